"""The weak (integral) form of the regression pair (Messenger & Bortz 2021).

Instead of a pointwise derivative Ẋ, each row is an integral over a window of the
run against a test function φ_q that vanishes at both ends of its window [a_q, b_q]::

    V_qj = ∫ φ_q(t) θ_j(x(t), u(t)) dt,        b_qi = −∫ φ_q'(t) x_i(t) dt.

Integration by parts (φ_q(a_q) = φ_q(b_q) = 0) makes ``b_q = ∫ φ_q ẋ dt``, so the
model ẋ = Θ ξ becomes ``b = V ξ`` and no derivative of noisy data is taken.

References
----------
D. A. Messenger and D. M. Bortz, "Weak SINDy: Galerkin-based data-driven model
selection", Multiscale Model. Simul. 19(3), 2021 (test functions, trapezoidal rule).
D. A. Messenger and D. M. Bortz, "Weak SINDy for partial differential equations",
J. Comput. Phys. 443, 2021 (the spectral rule for the support of the test functions).

Choices made here
-----------------
* Test functions: ``φ(t) = C ((t − a)(b − t))^p`` with ``C = (2 / (b − a))^(2p)``, so
  that ``max φ = φ((a + b)/2) = 1`` (the normalisation of Messenger & Bortz's ODE
  paper; in the rescaled variable s = (t − c)/H it is ``(1 − s²)^p``).
* Windows are counted in samples: window q covers samples ``start_q .. start_q + 2h``
  (``h = half_width``), consecutive windows start ``stride`` samples apart. On
  non-uniform time the windows therefore differ in duration, never in sample count.
* Quadrature: the trapezoidal rule on the samples of each window, which works on
  non-uniform time (Messenger & Bortz 2021, MMS, use the trapezoidal rule too). On a
  uniform grid it is unusually accurate here: φ has a zero of order p at both ends,
  so in the Euler–Maclaurin expansion the end-point terms of low order vanish; for a
  smooth integrand the error of ∫ φ f is O(step^(2⌈(p+1)/2⌉)) and that of ∫ φ' f
  (a zero of order p − 1) is O(step^(2⌈p/2⌉)): step⁶ and step⁴ for p = 4. On a
  non-uniform grid the error is the usual O(step²).
* Both integrals are linear in the samples: ``V = Φ Θ`` and ``b = −Φ' X`` with sparse
  weight matrices Φ, Φ' of shape (n_windows, n_samples), each row holding the
  trapezoidal weights times φ_q (or φ_q') on its window (:func:`weight_matrices`).

Two layers as elsewhere in the package: kernels on plain arrays
(:func:`test_function_windows`, :func:`weight_matrices`, :func:`weak_pair`,
:func:`default_half_width`), and :func:`weak_rows` / :func:`weak_blocks`, which take a
run and a library and hand back rows for :func:`discover.selection.block_grams`.
"""

from __future__ import annotations

from dataclasses import dataclass
from numbers import Integral, Real

import numpy as np
from scipy import sparse

from discover.exceptions import ConfigError, DataError

#: Default polynomial degree p of the test functions. Messenger & Bortz tie p to the
#: support so that φ one sample inside its ends equals a small tolerance τ (p grows
#: with the window); a fixed p = 4 is a common practical choice (also the reference library's
#: default) and keeps the spectral rule for the half-width explicit in p.
DEFAULT_DEGREE_P = 4

#: Standard deviations of φ's Fourier transform placed at the corner frequency of
#: the data (Messenger & Bortz 2021, JCP: τ̂; 2 is the value used in their examples,
#: from memory).
DEFAULT_TAU_HAT = 2.0

TOO_SHORT = (
    "{where}: {n_samples} samples is too short for test functions with half_width = "
    "{half_width} (a window spans 2 * half_width + 1 = {needed} samples). Use a smaller "
    "half_width or a longer run."
)


# --------------------------------------------------------------------------- checks


def _is_int(value):
    return isinstance(value, Integral) and not isinstance(value, bool)


def _check_options(half_width, degree_p, stride):
    if not _is_int(half_width) or half_width < 1:
        raise ConfigError(
            "[weak].half_width must be an int >= 1 (samples on each side of a window's "
            f"centre). Got {half_width!r}."
        )
    if not _is_int(degree_p) or degree_p < 1:
        raise ConfigError(
            "[weak].degree_p must be an int >= 1 (the power p of the test function "
            f"((t - a)(b - t))**p). Got {degree_p!r}."
        )
    if stride is not None and (not _is_int(stride) or stride < 1):
        raise ConfigError(
            "[weak].stride must be an int >= 1 (samples between the starts of "
            f"consecutive windows), or omitted for half_width // 2. Got {stride!r}."
        )


def _resolved_stride(half_width, stride):
    # Half a half-width: every sample lies in about four windows (common practice:
    # overlapping windows use all the data without making V nearly rank deficient).
    return max(1, half_width // 2) if stride is None else stride


# --------------------------------------------------------------------------- kernels


def test_function_windows(t, *, half_width, stride=None):
    """Sample index ranges of the test-function windows of one run.

    Parameters
    ----------
    t : ndarray of shape (n_samples,)
        Strictly increasing times (uniform or not).
    half_width : int
        Samples on each side of a window's centre; a window spans 2*half_width + 1 samples.
    stride : int or None, default=None
        Samples between the starts of consecutive windows; None means
        ``max(1, half_width // 2)``.

    Returns
    -------
    windows : int ndarray of shape (n_windows, 2)
        Half-open ranges ``[start, stop)``: window q covers ``t[start_q:stop_q]``, its
        ends a_q = t[start_q] and b_q = t[stop_q - 1], its centre sample start_q + half_width.
    """
    _check_options(half_width, DEFAULT_DEGREE_P, stride)
    stride = _resolved_stride(half_width, stride)
    n_samples = len(t)
    span = 2 * half_width + 1
    if n_samples < span:
        raise DataError(TOO_SHORT.format(where="run", n_samples=n_samples, half_width=half_width, needed=span))
    starts = np.arange(0, n_samples - span + 1, stride)
    return np.column_stack([starts, starts + span])


test_function_windows.__test__ = False  # a kernel, not a test: keep pytest from collecting it


def weight_matrices(t, windows, *, degree_p=DEFAULT_DEGREE_P):
    """Sparse quadrature weights of φ_q and φ_q' on every window.

    Parameters
    ----------
    t : ndarray of shape (n_samples,)
    windows : int ndarray of shape (n_windows, 2)
        From :func:`test_function_windows` (all windows of one length).
    degree_p : int, default=4

    Returns
    -------
    phi, phi_dot : scipy.sparse.csr_array of shape (n_windows, n_samples)
        ``phi[q, i] = w_qi φ_q(t_i)`` and ``phi_dot[q, i] = w_qi φ_q'(t_i)``, where
        w_qi are the trapezoidal weights of window q: half the sum of the steps on
        either side of t_i inside the window (one step at the window's ends).
        Then ``phi @ f ≈ ∫ φ_q f dt`` for any sampled f.
    """
    t = np.asarray(t, dtype=float)
    n_windows = len(windows)
    span = int(windows[0, 1] - windows[0, 0])
    index = windows[:, :1] + np.arange(span)[None, :]  # (n_windows, span)
    tw = t[index]
    a, b = tw[:, :1], tw[:, -1:]
    centre, half = (a + b) / 2, (b - a) / 2
    s = (tw - centre) / half
    s[:, 0], s[:, -1] = -1.0, 1.0  # exact ends, so φ there is exactly zero
    base = 1.0 - s * s
    phi = base**degree_p
    # d/dt (1 - s²)^p = -2 p s (1 - s²)^(p-1) / H
    phi_dot = -2.0 * degree_p * s * base ** (degree_p - 1) / half
    steps = np.diff(tw, axis=1)
    w = np.zeros_like(tw)
    w[:, :-1] += steps / 2
    w[:, 1:] += steps / 2
    rows = np.repeat(np.arange(n_windows), span)
    shape = (n_windows, len(t))
    phi_matrix = sparse.csr_array(((w * phi).ravel(), (rows, index.ravel())), shape=shape)
    phi_dot_matrix = sparse.csr_array(((w * phi_dot).ravel(), (rows, index.ravel())), shape=shape)
    return phi_matrix, phi_dot_matrix


def weak_pair(t, x, theta, *, half_width, degree_p=DEFAULT_DEGREE_P, stride=None):
    """The weak regression pair (V, b) of one run.

    Parameters
    ----------
    t : ndarray of shape (n_samples,)
        Strictly increasing times, uniform or not.
    x : ndarray of shape (n_samples, n_states)
        States (raw or smoothed); only integrated, never differentiated.
    theta : ndarray of shape (n_samples, n_terms)
        The library evaluated on the same samples.
    half_width : int
        Samples on each side of a window's centre (see :func:`default_half_width`).
    degree_p : int, default=4
        Power p of the test functions ((t − a)(b − t))^p, normalised to a peak of 1.
    stride : int or None, default=None
        Samples between consecutive window starts; None means ``max(1, half_width // 2)``.

    Returns
    -------
    V : ndarray of shape (n_windows, n_terms)
        ``V[q, j] = ∫ φ_q θ_j dt`` (trapezoidal rule).
    b : ndarray of shape (n_windows, n_states)
        ``b[q, i] = −∫ φ_q' x_i dt`` (trapezoidal rule), which equals ∫ φ_q ẋ_i dt.
    """
    _check_options(half_width, degree_p, stride)
    t = np.asarray(t, dtype=float)
    x = _as_2d(x, len(t), "x")
    theta = _as_2d(theta, len(t), "theta")
    windows = test_function_windows(t, half_width=half_width, stride=stride)
    phi, phi_dot = weight_matrices(t, windows, degree_p=degree_p)
    return phi @ theta, -(phi_dot @ x)


def _as_2d(a, n_samples, name):
    a = np.asarray(a, dtype=float)
    if a.ndim == 1:
        a = a[:, None]
    if a.ndim != 2 or a.shape[0] != n_samples:
        raise DataError(
            f"`{name}` must have one row per time sample, shape ({n_samples}, n_columns). "
            f"Got shape {a.shape}."
        )
    return a


def _uniform_resample(t, x):
    """x on a uniform grid of the same number of samples (linear interpolation)."""
    grid = np.linspace(t[0], t[-1], len(t))
    return np.column_stack([np.interp(grid, t, x[:, i]) for i in range(x.shape[1])])


def corner_frequency(t, x):
    """Index k* of the frequency where the data's spectrum meets its noise floor.

    The magnitude of the discrete Fourier transform of each state (mean removed,
    divided by its largest value so that units do not matter) is averaged over the
    states. From the Nyquist frequency down to the spectrum's peak, its cumulative
    sum rises slowly over the flat noise floor and fast over the signal; k* is the
    break point of the best two-line least-squares fit to that cumulative sum
    (Messenger & Bortz 2021, JCP, "changepoint" of the cumulative spectrum).

    Parameters
    ----------
    t : ndarray of shape (n_samples,)
        Non-uniform time is first resampled linearly to a uniform grid.
    x : ndarray of shape (n_samples, n_states)

    Returns
    -------
    k_star : int
        Frequency index (cycles per run length), >= 1.
    """
    t = np.asarray(t, dtype=float)
    x = _uniform_resample(t, _as_2d(x, len(t), "x"))
    magnitude = np.abs(np.fft.rfft(x - x.mean(axis=0), axis=0))
    peak_of_state = magnitude.max(axis=0)
    moving = peak_of_state > 0
    if not moving.any():
        raise DataError("every state is constant over the run; the weak form needs a state that moves.")
    spectrum = (magnitude[:, moving] / peak_of_state[moving]).mean(axis=1)
    peak = max(1, int(np.argmax(spectrum[1:])) + 1)
    tail = spectrum[peak:][::-1]  # Nyquist first, down to the peak
    if len(tail) < 4:
        return peak
    y = np.cumsum(tail)
    y = y / y[-1]
    position = np.arange(len(y), dtype=float)
    split = np.arange(2, len(y) - 1)  # break after sample `split - 1`; each side >= 2 points
    left = _line_residuals(position, y, split)
    right = _line_residuals(position[::-1], y[::-1], len(y) - split)
    best = split[int(np.argmin(left + right))]
    return int(peak + (len(tail) - best))


def _line_residuals(position, y, counts):
    """Residual sum of squares of a least-squares line through the first ``counts`` points."""
    sx, sy = np.cumsum(position), np.cumsum(y)
    sxx, sxy, syy = np.cumsum(position**2), np.cumsum(position * y), np.cumsum(y**2)
    i = counts - 1
    n = counts.astype(float)
    cov_xy = sxy[i] - sx[i] * sy[i] / n
    var_x = sxx[i] - sx[i] ** 2 / n
    var_y = syy[i] - sy[i] ** 2 / n
    return np.maximum(var_y - cov_xy**2 / var_x, 0.0)


def default_half_width(t, x, *, degree_p=DEFAULT_DEGREE_P, tau_hat=DEFAULT_TAU_HAT):
    """Half-width of the test functions from the data's spectrum.

    Messenger & Bortz (2021, JCP) choose the support so that the corner frequency k*
    of the data (:func:`corner_frequency`) lies ``tau_hat`` standard deviations out in
    the Fourier transform of φ: φ then passes the signal and damps what lies beyond
    the corner, which is mostly noise. Seen as a density, (1 − s²)^p on [−1, 1] has
    variance 1 / (2p + 3); with a half-width of m samples φ is close to a Gaussian of
    standard deviation σ = m / sqrt(2p + 3) samples, whose transform has standard
    deviation 1/σ in radians per sample. Setting 2π k* / n_samples = tau_hat / σ gives

        m = tau_hat · n_samples · sqrt(2p + 3) / (2π k*).

    (They also tie p to m through a tolerance τ; here p is the caller's and enters
    only through the variance.)

    Parameters
    ----------
    t : ndarray of shape (n_samples,)
    x : ndarray of shape (n_samples, n_states)
    degree_p : int, default=4
    tau_hat : float, default=2.0

    Returns
    -------
    half_width : int
        Clipped to [2, (n_samples - 1) // 2].
    """
    _check_options(2, degree_p, None)
    if not (isinstance(tau_hat, Real) and not isinstance(tau_hat, bool) and np.isfinite(tau_hat) and tau_hat > 0):
        raise ConfigError(f"[weak].tau_hat must be a number > 0. Got {tau_hat!r}.")
    n_samples = len(t)
    if n_samples < 5:
        raise DataError(TOO_SHORT.format(where="run", n_samples=n_samples, half_width=2, needed=5))
    k_star = corner_frequency(t, x)
    m = tau_hat * n_samples * np.sqrt(2 * degree_p + 3) / (2 * np.pi * k_star)
    return int(np.clip(np.ceil(m), 2, (n_samples - 1) // 2))


# --------------------------------------------------------------------------- rows for block Grams


@dataclass(frozen=True)
class WeakRows:
    """The weak pair of one run, side by side.

    Attributes
    ----------
    z : ndarray of shape (n_windows, n_terms + n_states)
        ``[V b]``: the layout :func:`discover.selection.block_grams` takes with
        ``n_terms`` (the same as ``[Θ Ẋ]`` on the pointwise path).
    windows : int ndarray of shape (n_windows, 2)
        Sample ranges ``[start, stop)`` of the windows.
    centres : int ndarray of shape (n_windows,)
        Sample index of each window's centre.
    """

    z: np.ndarray
    windows: np.ndarray
    centres: np.ndarray


def weak_rows(t, x, u, library, *, half_width, degree_p=DEFAULT_DEGREE_P, stride=None, name="run"):
    """``[V b]`` of one run for a term library.

    Parameters
    ----------
    t : ndarray of shape (n_samples,)
    x : ndarray of shape (n_samples, n_states)
        Raw or smoothed states.
    u : ndarray of shape (n_samples, n_inputs)
    library : object with ``evaluate(x, u)`` and ``names``
        E.g. :class:`discover.terms.Library`.
    half_width, degree_p, stride
        As in :func:`weak_pair`.
    name : str, default="run"
        Used in error messages.

    Returns
    -------
    WeakRows
    """
    _check_options(half_width, degree_p, stride)
    t = np.asarray(t, dtype=float)
    x = _as_2d(x, len(t), "x")
    span = 2 * half_width + 1
    if len(t) < span:
        raise DataError(TOO_SHORT.format(where=f"run {name!r}", n_samples=len(t), half_width=half_width,
                                         needed=span))
    with np.errstate(all="ignore"):
        theta = library.evaluate(x, u)
    bad = ~np.isfinite(theta)
    if bad.any():
        row, j = np.argwhere(bad)[0]
        raise DataError(
            f"run {name!r}: the candidate term {library.names[j]!r} is not finite at row {row + 1} "
            f"(value {float(theta[row, j])!r}); a division by zero or a log/sqrt of a negative "
            "number? Change the term or the data's range."
        )
    windows = test_function_windows(t, half_width=half_width, stride=stride)
    phi, phi_dot = weight_matrices(t, windows, degree_p=degree_p)
    k = theta.shape[1]
    z = np.empty((len(windows), k + x.shape[1]))
    z[:, :k] = phi @ theta
    z[:, k:] = -(phi_dot @ x)
    return WeakRows(z, windows, windows[:, 0] + half_width)


@dataclass(frozen=True)
class WeakBlocks:
    """Sub-blocks of weak rows for :func:`discover.selection.block_grams`.

    Attributes
    ----------
    stacked : tuple of (int, ndarray, None)
        ``(run_index, z_block, None)`` with z_block of shape (n_windows_in_block,
        n_terms + n_states), in run order and, within a run, in order of window
        centre; pass as ``block_grams(list(stacked), n_terms=n_terms)``.
    n_terms : int
    half_width : int
        The half-width used (resolved from the data when none was given).
    stride : int
        The stride used.
    degree_p : int
    """

    stacked: tuple
    n_terms: int
    half_width: int
    stride: int
    degree_p: int


def weak_blocks(runs, library, *, sub_length, n_folds, half_width=None, degree_p=DEFAULT_DEGREE_P,
                stride=None, tau_hat=DEFAULT_TAU_HAT):
    """Weak rows of every run, cut into contiguous sub-blocks by window centre.

    The weak counterpart of the ``stacked`` list that
    :func:`discover.pipeline.regression_blocks` passes to
    :func:`discover.selection.block_grams`: one entry per sub-block, whose rows are
    windows instead of samples. A sub-block holds the consecutive windows whose
    centres span about ``sub_length`` samples (``sub_length // stride`` windows), and
    each run gives at least ``n_folds`` sub-blocks, so that cross-validation by
    contiguous blocks and the block bootstrap work unchanged. Neighbouring windows
    share samples, so adjacent sub-blocks are not quite independent; the overlap is
    one window length at each boundary.

    Parameters
    ----------
    runs : sequence of runs
        Objects with ``name``, ``t`` (n_samples,), ``x`` (n_samples, n_states) and
        ``u`` (n_samples, n_inputs), e.g. :class:`discover.data.Run` (raw states) or
        the pipeline's smoothed runs.
    library : object with ``evaluate(x, u)``, ``names`` and ``len()``
    sub_length : int
        Samples spanned by the centres of one sub-block.
    n_folds : int
        Least number of sub-blocks per run.
    half_width : int or None, default=None
        None: the median over the runs of :func:`default_half_width`.
    degree_p, stride, tau_hat
        As in :func:`weak_pair` and :func:`default_half_width`.

    Returns
    -------
    WeakBlocks
    """
    if not _is_int(sub_length) or sub_length < 1:
        raise ConfigError(f"`sub_length` must be an int >= 1. Got {sub_length!r}.")
    if not _is_int(n_folds) or n_folds < 1:
        raise ConfigError(f"`n_folds` must be an int >= 1. Got {n_folds!r}.")
    if half_width is None:
        half_width = int(np.median([default_half_width(r.t, r.x, degree_p=degree_p, tau_hat=tau_hat)
                                    for r in runs]))
    _check_options(half_width, degree_p, stride)
    stride = _resolved_stride(half_width, stride)
    stacked = []
    for r, run in enumerate(runs):
        rows = weak_rows(run.t, run.x, run.u, library, half_width=half_width, degree_p=degree_p,
                         stride=stride, name=run.name)
        n_windows = len(rows.z)
        if n_windows < n_folds:
            raise DataError(
                f"run {run.name!r}: {n_windows} test-function windows (half_width = {half_width}, "
                f"stride = {stride}) are fewer than the {n_folds} cross-validation folds. Use a "
                "smaller half_width or stride, or fewer folds."
            )
        per_block = max(1, sub_length // stride)
        n_sub = min(n_windows, max(n_folds, n_windows // per_block))
        for index in np.array_split(np.arange(n_windows), n_sub):
            stacked.append((r, rows.z[index[0]: index[-1] + 1], None))
    return WeakBlocks(tuple(stacked), len(library), half_width, stride, degree_p)
