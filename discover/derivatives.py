"""Smoothing and differentiation of one run: ``(t, x) -> (x_smooth, x_dot)``.

Every method is a plain function with keyword-only options, registered by name
in :data:`DERIVATIVE_METHODS`. Each takes

- ``t`` : ndarray of shape (n_samples,), strictly increasing, possibly
  non-uniform (only ``savitzky_golay`` and ``finite_difference`` with
  ``order=4`` need a uniform step);
- ``x`` : ndarray of shape (n_samples, n_states);

and returns ``(x_smooth, x_dot)``, both float64 of shape (n_samples, n_states).
``x_smooth`` is the state the term library is built from, so that the library
and the derivative see the same smoothing.

The values near both ends of a run are less reliable than the interior (one-sided
stencils, off-centre filter windows, spline and smoother boundary effects);
:func:`default_trim` says how many samples to drop at each end, and
:func:`min_samples` how many samples a run needs for a method and its options.

Inputs are trusted (``data.py`` has already checked time and NaN); only the
options are checked here, and they raise :class:`~discover.exceptions.ConfigError`
naming the ``[derivatives]`` key.
"""

import math
from dataclasses import dataclass
from numbers import Integral, Real

import numpy as np

from discover.exceptions import ConfigError, DataError

# A run counts as uniformly sampled when every step is within this fraction of
# the median step. Float64 times from a clock at a fixed rate pass easily.
UNIFORM_STEP_RTOL = 1e-6

# Samples that must remain after trimming both ends (common practice: fewer
# than a handful of rows cannot inform a regression).
MIN_SAMPLES_AFTER_TRIM = 3

NON_UNIFORM_TIME = (
    "{what} needs uniformly sampled time, but this run is non-uniformly "
    "sampled: the time step ranges from {step_min:.6g} to {step_max:.6g} "
    "(median {step_median:.6g}). {advice}"
)
TOO_FEW_SAMPLES = "{what} needs at least {needed} samples in a run. Got {got}."


# --- option checks -----------------------------------------------------------


def _is_int(value):
    return isinstance(value, Integral) and not isinstance(value, bool)


def _is_real(value):
    return isinstance(value, Real) and not isinstance(value, bool)


def _check_finite_difference_options(order):
    if not _is_int(order) or order not in (2, 4):
        raise ConfigError(
            "[derivatives].order must be 2 or 4 for method 'finite_difference' "
            f"(order 4 needs uniform time). Got {order!r}."
        )


def _check_savitzky_golay_options(window, order):
    if window is not None and (not _is_int(window) or window < 3 or window % 2 == 0):
        raise ConfigError(
            f"[derivatives].window must be an odd int >= 3, or unset (chosen from the data). Got {window!r}."
        )
    if not _is_int(order) or order < 1:
        raise ConfigError(
            "[derivatives].order must be an int >= 1 (the polynomial order of "
            f"'savitzky_golay'). Got {order!r}."
        )
    if window is not None and window <= order:
        raise ConfigError(
            "[derivatives].window must be greater than [derivatives].order "
            f"for 'savitzky_golay'. Got window = {window}, order = {order}."
        )


def _check_smoothing_spline_options(lam):
    if lam is not None and not (_is_real(lam) and math.isfinite(lam) and lam >= 0):
        raise ConfigError(
            "[derivatives].lam must be a number >= 0, or omitted to let "
            f"generalized cross-validation choose it. Got {lam!r}."
        )


def _check_kalman_options(noise_ratio):
    if noise_ratio is not None and not (
        _is_real(noise_ratio) and math.isfinite(noise_ratio) and noise_ratio > 0
    ):
        raise ConfigError(
            "[derivatives].noise_ratio must be a number > 0, or omitted for the "
            f"default noise_ratio = 1. Got {noise_ratio!r}."
        )


# --- helpers shared by the methods --------------------------------------------


def _require_samples(n_samples, needed, what):
    if n_samples < needed:
        raise DataError(TOO_FEW_SAMPLES.format(what=what, needed=needed, got=n_samples))


def _uniform_step(t, what, advice):
    """Return the sampling step of a uniformly sampled ``t``, else raise DataError."""
    steps = np.diff(t)
    step_median = float(np.median(steps))
    if np.max(np.abs(steps - step_median)) > UNIFORM_STEP_RTOL * step_median:
        raise DataError(
            NON_UNIFORM_TIME.format(
                what=what,
                step_min=float(steps.min()),
                step_max=float(steps.max()),
                step_median=step_median,
                advice=advice,
            )
        )
    # Twelve significant digits: the step then does not depend on which samples it was
    # taken from (time stamps carry float jitter), so chunks of a run agree with the whole run.
    return float(f"{step_median:.12g}")


def _time_in_samples(t):
    """Rescale ``t`` so the median step is 1; return ``(s, step)`` with t - t[0] = s * step.

    Smoothing weights (``lam``, ``noise_ratio``) are then unit-free: both terms of the
    penalised objectives are in the state's units squared, and time is counted
    in samples. It also keeps scipy's spline solver well conditioned: in data
    units, steps of 1e-6 make the GCV problem ill-posed and steps of 1e-3 or
    1e3 let GCV pick a poor ``lam`` (measured with scipy 1.17).
    """
    step = float(np.median(np.diff(t)))
    return (t - t[0]) / step, step


# --- methods ------------------------------------------------------------------


def finite_difference(t, x, *, order=2):
    """Central finite differences; the state is not smoothed.

    Parameters
    ----------
    t : ndarray of shape (n_samples,)
        Strictly increasing times; non-uniform steps are fine for ``order=2``.
    x : ndarray of shape (n_samples, n_states)
        States, one row per time.
    order : {2, 4}, default=2
        Order of accuracy. 2 is :func:`numpy.gradient` with ``edge_order=2``:
        second-order central differences on any grid, one-sided second-order
        formulas at the two ends, exact for quadratics. 4 needs a uniform
        step: the derivative of the degree-4 polynomial through each 5
        neighbouring samples (``savgol_filter`` with ``window_length=5,
        polyorder=4``), i.e. the stencil (1, -8, 0, 8, -1) / (12 h) in the
        interior, exact for quartics, including the ends.

    Returns
    -------
    x_smooth : ndarray of shape (n_samples, n_states)
        A float64 copy of ``x``.
    x_dot : ndarray of shape (n_samples, n_states)
        Estimated dx/dt.

    Raises
    ------
    ConfigError
        If ``order`` is not 2 or 4.
    DataError
        If ``order=4`` and the run is not uniformly sampled, or the run is
        shorter than the stencil (3 samples, or 5 for ``order=4``).
    """
    _check_finite_difference_options(order)
    x = np.array(x, dtype=np.float64)
    _require_samples(len(t), order + 1, f"finite_difference with order = {order}")
    if order == 2:
        x_dot = np.gradient(x, t, axis=0, edge_order=2)
    else:
        step = _uniform_step(
            t,
            "finite_difference with order = 4",
            "Use order = 2, or 'smoothing_spline', which accept non-uniform time.",
        )
        from scipy.signal import savgol_filter  # here: scipy.signal costs a second at start-up

        x_dot = savgol_filter(x, 5, 4, deriv=1, delta=step, axis=0, mode="interp")
    return x, np.asarray(x_dot, dtype=np.float64)


def savitzky_golay(t, x, *, window=None, order=3):
    """Savitzky–Golay filter (Savitzky & Golay 1964): local least-squares polynomials.

    Each sample takes the value and slope of the degree-``order`` least-squares
    polynomial of the ``window`` samples around it (:func:`scipy.signal.savgol_filter`,
    ``mode="interp"``: the ends take the fit of the first and last full window).

    Parameters
    ----------
    t : ndarray of shape (n_samples,)
        Strictly increasing, uniformly sampled times.
    x : ndarray of shape (n_samples, n_states)
        States, one row per time.
    window : int or None, default=None
        Samples in each fit; odd, >= 3 and > ``order``. None: chosen from this run by
        GCV (:mod:`discover.window_choice`; a pipeline run chooses one for all runs).
    order : int, default=3
        Degree of the fitted polynomial, >= 1.

    Returns
    -------
    x_smooth : ndarray of shape (n_samples, n_states)
        Smoothed states.
    x_dot : ndarray of shape (n_samples, n_states)
        Estimated dx/dt.

    Raises
    ------
    ConfigError
        If ``window`` or ``order`` is out of range.
    DataError
        If the run is not uniformly sampled (relative step spread above
        ``UNIFORM_STEP_RTOL``) or has fewer than ``window`` samples.
    """
    _check_savitzky_golay_options(window, order)
    x = np.asarray(x, dtype=np.float64)
    if window is None:
        from .window_choice import automatic_window

        window, _ = automatic_window([x], order)
    _require_samples(len(t), window, f"savitzky_golay with window = {window}")
    step = _uniform_step(
        t,
        "savitzky_golay",
        "Use 'smoothing_spline' or 'finite_difference', which accept "
        "non-uniform time, or resample the run first.",
    )
    from scipy.signal import savgol_filter  # here: scipy.signal costs a second at start-up

    x_smooth = savgol_filter(x, window, order, deriv=0, axis=0, mode="interp")
    x_dot = savgol_filter(x, window, order, deriv=1, delta=step, axis=0, mode="interp")
    return np.asarray(x_smooth, dtype=np.float64), np.asarray(x_dot, dtype=np.float64)


def smoothing_spline(t, x, *, lam=None):
    """Cubic smoothing spline per state (:func:`scipy.interpolate.make_smoothing_spline`).

    For each state, minimises ``sum_i (x_i - f(s_i))**2 + lam * integral f''(s)**2 ds``
    over cubic splines ``f``, where ``s`` is time counted in samples (see
    ``lam``). Works on non-uniform time.

    Parameters
    ----------
    t : ndarray of shape (n_samples,)
        Strictly increasing times; non-uniform steps are fine.
    x : ndarray of shape (n_samples, n_states)
        States, one row per time.
    lam : float >= 0 or None, default=None
        Roughness penalty, with time rescaled so that the median step is 1:
        the same ``lam`` smooths over the same number of samples whatever
        the time unit (in data units it is ``lam * median_step**3``). 0
        interpolates. None lets scipy choose it for each state separately by
        generalized cross-validation (GCV; Craven & Wahba 1979).

    Returns
    -------
    x_smooth : ndarray of shape (n_samples, n_states)
        Spline values at ``t``.
    x_dot : ndarray of shape (n_samples, n_states)
        Spline slopes at ``t``, in the data's time units.

    Raises
    ------
    ConfigError
        If ``lam`` is negative or not a number.
    DataError
        If the run has fewer than 5 samples (scipy's minimum).

    Notes
    -----
    The spline is natural (zero curvature at the ends), which biases the
    slope near both ends; :func:`default_trim` drops 3 samples there. GCV
    costs about 0.3 ms per sample and state (scipy 1.17); a given ``lam`` is
    some 50 times cheaper.
    """
    _check_smoothing_spline_options(lam)
    x = np.asarray(x, dtype=np.float64)
    _require_samples(len(t), 5, "smoothing_spline")
    from scipy.interpolate import make_smoothing_spline

    s, step = _time_in_samples(np.asarray(t, dtype=np.float64))
    x_smooth = np.empty_like(x)
    x_dot = np.empty_like(x)
    # One spline per state, so that GCV picks a penalty for each state's noise.
    for j in range(x.shape[1]):
        spline = make_smoothing_spline(s, x[:, j], lam=lam)
        x_smooth[:, j] = spline(s)
        x_dot[:, j] = spline.derivative()(s) / step
    return x_smooth, x_dot


def kalman(t, x, *, noise_ratio=None):
    """Kalman smoother with a random-walk derivative (the ``derivative`` package).

    Models each state as having a derivative that is a Brownian motion, seen
    through noisy samples, and returns the maximum-likelihood state and
    derivative (``derivative.Kalman``). Works on non-uniform time.

    Parameters
    ----------
    t : ndarray of shape (n_samples,)
        Strictly increasing times; non-uniform steps are fine.
    x : ndarray of shape (n_samples, n_states)
        States, one row per time.
    noise_ratio : float > 0 or None, default=None
        Ratio of measurement-noise variance to process-noise variance, with
        time rescaled so that the median step is 1, as ``lam`` in
        :func:`smoothing_spline` (in data units it is
        ``noise_ratio * median_step**3``). The package's own ``alpha`` is in
        data time units, where its default of 1 flattens a signal sampled at
        10 Hz or faster, so a value meant for it is not a value for this option.
        None passes None to the package, which then uses 1 (``derivative``
        0.6.3, ``dglobal.Kalman._global``); larger values smooth more.

    Returns
    -------
    x_smooth : ndarray of shape (n_samples, n_states)
        Smoothed states.
    x_dot : ndarray of shape (n_samples, n_states)
        Estimated dx/dt, in the data's time units.

    Raises
    ------
    ConfigError
        If ``noise_ratio`` is not a positive number.
    DataError
        If the run has fewer than 5 samples.

    Notes
    -----
    With the same ``noise_ratio`` this smoother gives the cubic smoothing spline
    with ``lam = noise_ratio`` (Wahba 1978); the tests check it. The package solves
    a dense (2 n_samples) x (2 n_samples) system per state: about 1.4 s for
    2000 samples, and cubic growth beyond (about 3 GB of memory at 10 000
    samples).
    """
    _check_kalman_options(noise_ratio)
    x = np.asarray(x, dtype=np.float64)
    _require_samples(len(t), 5, "kalman")
    # Imported here: the package pulls in scikit-learn (over a second at import).
    import derivative

    s, step = _time_in_samples(np.asarray(t, dtype=np.float64))
    smoother = derivative.Kalman(alpha=noise_ratio)
    x_smooth = np.empty_like(x)
    x_dot = np.empty_like(x)
    # Column by column: the package caches one solve, which .d and .x then share.
    for j in range(x.shape[1]):
        x_dot[:, j] = smoother.d(x[:, j], s) / step
        x_smooth[:, j] = smoother.x(x[:, j], s)
    return x_smooth, x_dot


@dataclass(frozen=True)
class Option:
    """One keyword option of a derivative method, with its limits (the config reads these)."""

    name: str
    kind: str  # "int" or "float"
    default: object
    minimum: float | None = None
    odd: bool = False
    nullable: bool = False
    choices: tuple = ()


@dataclass(frozen=True)
class DerivativeMethod:
    """Everything about one derivative method, in one place.

    Attributes
    ----------
    function : callable
        ``function(t, x, **options) -> (x_smooth, x_dot)``.
    options : tuple of Option
    check : callable
        ``check(**options)`` raises ConfigError for values out of range or inconsistent.
    trim : callable
        Samples to drop at each end, from the options (reasons in :data:`METHODS`' comments).
    fewest : callable
        Fewest samples the method can work on at all, from the options.
    stream_half_width : callable or None
        Neighbours on each side one derivative sample depends on; None for methods
        that need the whole run and cannot be read in chunks.
    """

    name: str
    function: object
    options: tuple
    check: object
    trim: object
    fewest: object
    stream_half_width: object = None

    def defaults(self):
        return {o.name: o.default for o in self.options}


# Trims are common practice, with these reasons: finite_difference: the ends use
# one-sided stencils with larger error (order 2: 1 sample, order 4: 2); savitzky_golay:
# the first and last window // 2 samples come from an off-centre fit, whose slope is the
# noisiest; smoothing_spline: the natural end conditions (zero curvature) bias the
# slope; kalman: the smoother has data on one side only near the ends.
METHODS = {m.name: m for m in (
    DerivativeMethod(
        "finite_difference", finite_difference, (Option("order", "int", 2, choices=(2, 4)),),
        _check_finite_difference_options, trim=lambda o: o["order"] // 2, fewest=lambda o: o["order"] + 1,
        stream_half_width=lambda o: o["order"] // 2),
    DerivativeMethod(
        "savitzky_golay", savitzky_golay,
        (Option("window", "int", None, minimum=3, odd=True, nullable=True), Option("order", "int", 3, minimum=1)),
        # An unset window is resolved from the data first; until then the smallest stands in.
        _check_savitzky_golay_options, trim=lambda o: (o["window"] or o["order"] + 2) // 2,
        fewest=lambda o: o["window"] or o["order"] + 2,
        stream_half_width=lambda o: (o["window"] or o["order"] + 2) // 2),
    DerivativeMethod(
        "smoothing_spline", smoothing_spline, (Option("lam", "float", None, minimum=0.0, nullable=True),),
        _check_smoothing_spline_options, trim=lambda o: 3, fewest=lambda o: 5),
    DerivativeMethod(
        "kalman", kalman, (Option("noise_ratio", "float", None, minimum=0.0, nullable=True),),
        _check_kalman_options, trim=lambda o: 3, fewest=lambda o: 5),
)}

#: name -> function, for callers that only differentiate.
DERIVATIVE_METHODS = {name: m.function for name, m in METHODS.items()}


def _resolved_options(method, options):
    """Check ``method`` and ``options`` and return the options with defaults filled in."""
    if method not in METHODS:
        accepted = ", ".join(repr(name) for name in METHODS)
        raise ConfigError(
            f"[derivatives].method must be one of {accepted}. Got {method!r}."
        )
    record = METHODS[method]
    accepted_options = [o.name for o in record.options]
    unknown = sorted(set(options) - set(accepted_options))
    if unknown:
        raise ConfigError(
            f"[derivatives] has options {unknown} that method {method!r} does "
            f"not accept. Accepted: {accepted_options}."
        )
    resolved = record.defaults()
    resolved.update(options)
    record.check(**resolved)
    return resolved


def default_trim(method, options):
    """Samples to drop at each end of a run after differentiating it.

    ``method`` is a key of :data:`METHODS`; missing ``options`` take the function's
    defaults. Returns the samples to drop at the start and, again, at the end
    (reasons beside :data:`METHODS`).

    Raises
    ------
    ConfigError
        If the method is unknown or an option is unknown or out of range.
    """
    return int(METHODS[method].trim(_resolved_options(method, options)))


def min_samples(method, options):
    """Fewest samples a run needs for ``method`` with ``options``.

    The larger of what the method needs to run at all and
    ``2 * default_trim + MIN_SAMPLES_AFTER_TRIM``, so that a few samples are left
    after trimming both ends.

    Raises
    ------
    ConfigError
        If the method is unknown or an option is unknown or out of range.
    """
    resolved = _resolved_options(method, options)
    record = METHODS[method]
    return int(max(record.fewest(resolved), 2 * record.trim(resolved) + MIN_SAMPLES_AFTER_TRIM))


def stream_half_width(method, options):
    """Neighbours on each side of a derivative sample; None if the method cannot stream."""
    record = METHODS[method]
    return None if record.stream_half_width is None else int(record.stream_half_width(
        _resolved_options(method, options)))
