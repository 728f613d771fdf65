"""Output-error refinement of a model structure by multiple shooting.

Given a structure (per state the terms of its equation, with starting coefficients;
which states are hidden; outputs y = g(x, u)) and training runs (t, measured y,
recorded u), :func:`refine` fits the free coefficients by minimising the simulation
(output) error with :func:`scipy.optimize.least_squares`. The same routine serves

* refining a derivative-based fit of fully measured states: output error is free of
  the bias that smoothing and differentiation leave in the regression pair;
* fitting models with hidden states, whose initial values are unknown.

Method: multiple shooting (Bock & Plitt 1984, Proc. 9th IFAC World Congress; for ODE
parameter estimation Peifer & Timmer 2007, IET Syst. Biol. 1(2)). Each run is cut
into segments; every segment's initial state is a parameter, started from the
measured state (a local quadratic fit around the segment start) or, for a hidden
state, from a simulation of the starting model. The residuals are

* (simulated − measured output) at every sample, divided by the output's noise level
  (estimated from the data unless given), so units do not matter;
* continuity (end of segment k − start of segment k + 1), divided by the state's
  noise-level scale and multiplied by ``continuity_weight``, a penalty that makes
  the trajectory continuous at the optimum. Measured on the Duffing test case: the
  largest gap was 0.087, 0.0042 and 6e-5 noise levels at weights 10, 100 and 1000,
  and at 1000 the coefficients equal single shooting's to 5 digits (at 100 they were
  0.07 % off), with the same number of iterations; hence the default 1000. The fit
  runs first at a tenth of the weight and then at the full weight from there
  (continuation), since a heavy penalty from the start makes weakly determined
  directions converge slowly.

Integration is a fixed-step classical Runge–Kutta (RK4) on the sample grid (with
``substeps`` per sample interval), all segments of all runs stepped together as one
numpy batch, the input interpolated inside each interval (linear or zero-order
hold, as :mod:`discover.simulate`). Why not ``solve_ivp``: it integrates one
segment at a time, a Python-level solver loop each, and its adaptive steps make the
objective a slightly non-smooth function of the parameters. Measured on the Duffing
test runs (3 × 500 samples, scipy 1.17, shared 2-core machine): one evaluation of
all 99 segments of 16 samples took 3.6 ms here at 2 substeps (11 ms with
sensitivities) against 240 ms for ``solve_ivp`` (RK45, rtol = 1e-6) segment by
segment, 67 times slower; 30 segments of 50 samples: 14.5 ms against 300 ms. The
fixed-step error is bounded by choosing ``substeps`` so that h·ρ ≤ RK4_STEP_LIMIT
(ρ the largest eigenvalue modulus of ∂f/∂x along the data), checked again at the
refined model: there, 2 substeps were chosen and the largest deviation from DOP853
at rtol = 1e-11 was 1.1e-5 of the state's range (2e-4 with 1 substep). The test
suite checks the free run against ``solve_ivp`` at rtol = 1e-10.

Sensitivities are exact for the discretised problem: the variational equations
dS/dt = ∂f/∂x·S + ∂f/∂p are integrated by the same RK4 stages as the states,
which is the derivative of the RK4 map itself (internal numerical differentiation,
Bock 1981), with ∂f/∂x from :func:`discover.symbolic.derivative`. Finite differences
through ``least_squares`` (``jacobian="2-point"``) remain available as a check.

A segment that diverges (non-finite, or outside ``divergence_factor`` times the
half-range of the starting trajectories around their centre) is frozen at its last
good state: its residuals stay large and finite, never an exception. ``max_nfev`` and
``time_limit`` bound the work.

Identifiability is read from the Jacobian of the free-run (single-shooting)
residuals at the optimum, with respect to the free coefficients and each run's
initial state: the Jacobian the multiple-shooting problem condenses to once the
trajectory is continuous, in which a symmetry such as the scale of a hidden state is
an exact null direction. Its columns are scaled to unit norm (units do not matter),
and directions with singular value below ``identifiability_rtol`` × the largest are
reported as combinations of named coefficients (relative changes). Standard errors
of the determined coefficients come from σ²·(JᵀJ)⁺ with σ² from the free-run
residuals (the truncated pseudo-inverse gives the variance of every function of the
parameters that the data determine; Searle 1971, Linear Models, ch. 5, from memory).
Output-error residuals are autocorrelated when the model is wrong or the noise is
coloured, and then σ²·(JᵀJ)⁻¹ is too small; the Newey–West (1987) sandwich with an
Andrews (1991) bandwidth gives standard errors that allow for it
(``standard_errors_hac``).

A hidden state's scale: if every term that contains hidden state h is a monomial in
it and no output uses it, x_h → a·x_h with matching changes of the coefficients
leaves the outputs unchanged. A scale rule set by the caller removes it: fix one of
those coefficients (``Structure.fixed``) or a non-zero initial value
(``fixed_initial``); :attr:`Refinement.scale_notes` says which holds. Without a rule
the fit holds one such coefficient at its starting value (along a flat direction
the optimiser would otherwise drift, and the continuity penalty pulls the hidden
state toward zero), and the report names the direction as not determined.

Caution: a refined model is fitted to the training runs only. Before a model is used
to control real equipment, validate it on held-out runs and under the operating
conditions it will see.
"""

from __future__ import annotations

import math
import time
from dataclasses import dataclass
from typing import Collection, Mapping, Sequence

import numpy as np
from scipy import sparse
from scipy.optimize import least_squares
from threadpoolctl import threadpool_limits

from .bootstrap import correlation_length
from .exceptions import ConfigError, DataError
from .expressions import parse_expression
from .model import Model
from .simulate import guess_interpolation
from .symbolic import derivative
from .terms import term_key

__all__ = [
    "MeasuredRun",
    "Structure",
    "Refinement",
    "refine",
    "structure_from_model",
    "coefficient_name",
    "noise_level",
    "scaled_svd",
    "covariance_from_jacobian",
    "newey_west_covariance",
    "andrews_lags",
]

#: Largest h·ρ of one RK4 substep (ρ: largest eigenvalue modulus of ∂f/∂x). RK4's
#: local error is about (h·ρ)^5 / 120 relative; at 0.2 that is 3e-6 per step.
RK4_STEP_LIMIT = 0.2
#: Shortest default segment, in samples.
MIN_SEGMENT = 8
#: Samples of the local quadratic fit that starts a measured state at a segment start.
START_WINDOW = 9
#: A coefficient whose unit vector has a component above this in the null space of the
#: scaled Jacobian is reported as not identifiable (no standard error).
NULL_COMPONENT = 0.01
#: Components below this fraction (of a unit direction) are left out of its text.
SHOWN_COMPONENT = 0.05
#: Largest continuity gap, in units of the state's noise scale, of a converged result.
CONTINUITY_TOL = 0.1
#: The first pass uses continuity_weight / CONTINUATION, the second continuity_weight.
CONTINUATION = 10.0
#: least_squares-like status of a fit stopped at the time limit.
TIMED_OUT = -3
#: Jacobians with more entries than this are built sparse (trust-region solver lsmr).
DENSE_LIMIT = 4_000_000

INTERPOLATIONS = ("linear", "zoh")
JACOBIANS = ("analytic", "2-point", "3-point")

NOT_DETERMINED = "{combination} is not determined by the data"
SCALE_FREE = (
    "hidden state {state!r}: its scale is not determined by the outputs (x_{state} -> a·x_{state} "
    "with matching coefficients fits equally well); set a scale rule: fix one of its coefficients "
    "({coefficients}) in Structure.fixed, or a non-zero initial value in fixed_initial"
)
SCALE_SET = "hidden state {state!r}: scale set by {rule}"
SCALE_ZERO_INITIAL = (
    "hidden state {state!r}: its initial value is fixed at 0 in run {run!r}, which fixes no scale"
)


# --------------------------------------------------------------------------- inputs and results


@dataclass(frozen=True)
class MeasuredRun:
    """One training run as the refinement sees it.

    Attributes
    ----------
    t : ndarray of shape (n_samples,)
        Strictly increasing times.
    y : ndarray of shape (n_samples, n_outputs)
        Measured outputs, columns in the order of ``Structure.output_names``.
    u : ndarray of shape (n_samples, n_inputs)
        Recorded inputs, columns in the order of ``Structure.input_names``.
    name : str
        Used in messages and in the names of initial-state parameters.

    A :class:`discover.data.Run` of fully measured states converts as
    ``MeasuredRun(run.t, run.x, run.u, run.name)``.
    """

    t: np.ndarray
    y: np.ndarray
    u: np.ndarray | None
    name: str = ""


@dataclass(frozen=True)
class Structure:
    """What is fitted: states, inputs, equations with starting values, outputs, fixed terms.

    Attributes
    ----------
    state_names, input_names : tuple of str
    equations : mapping of str to mapping of str to float
        ``{state: {term expression: starting coefficient}}``, one entry per state (an
        empty mapping for dx/dt = 0).
    hidden : tuple of str
        States without a measurement.
    outputs : mapping of str to str or None
        ``{output name: expression over states and inputs}``. None: every state not in
        ``hidden`` is its own output, in the order of ``state_names``.
    fixed : frozenset of (str, str)
        ``(state, term)`` pairs kept at their starting coefficient (known terms, or a
        scale rule for a hidden state).

    Raises
    ------
    ConfigError
        For an unknown state, hidden state or fixed pair; ExpressionError (a
        ConfigError) for a term or output expression that does not parse or names an
        unknown column; ConfigError for a hidden state that no output depends on.
    """

    state_names: tuple[str, ...]
    input_names: tuple[str, ...]
    equations: Mapping[str, Mapping[str, float]]
    hidden: tuple[str, ...] = ()
    outputs: Mapping[str, str] | None = None
    fixed: frozenset[tuple[str, str]] = frozenset()

    def __post_init__(self):
        states, inputs = tuple(self.state_names), tuple(self.input_names)
        object.__setattr__(self, "state_names", states)
        object.__setattr__(self, "input_names", inputs)
        object.__setattr__(self, "hidden", tuple(self.hidden))
        object.__setattr__(self, "fixed", frozenset(tuple(pair) for pair in self.fixed))
        if not states or len(set(states)) != len(states):
            raise ConfigError(f"Structure: state_names must be distinct names, at least one. Got {states}.")
        if set(states) & set(inputs):
            raise ConfigError(f"Structure: names {sorted(set(states) & set(inputs))} are both states and inputs.")
        if not isinstance(self.equations, Mapping) or not all(
                isinstance(e, Mapping) for e in self.equations.values()):
            raise ConfigError("Structure.equations must map each state to {term expression: coefficient}.")
        extra = [s for s in self.equations if s not in states]
        if extra:
            raise ConfigError(f"Structure.equations: unknown state {extra[0]!r}. States: {', '.join(states)}.")
        missing = [s for s in states if s not in self.equations]
        if missing:
            raise ConfigError(
                f"Structure.equations has no entry for state {missing[0]!r}; give {{}} for d{missing[0]}/dt = 0."
            )
        for name in self.hidden:
            if name not in states:
                raise ConfigError(f"Structure.hidden: {name!r} is not a state. States: {', '.join(states)}.")
        known = states + inputs
        equations, parsed = {}, {}
        for state in states:
            equations[state] = {}
            for term, value in dict(self.equations[state]).items():
                where = f"Structure.equations[{state!r}], term {term!r}"
                expression = parse_expression(term, known, where=where)
                if not isinstance(value, (int, float, np.floating, np.integer)) or not np.isfinite(value):
                    raise ConfigError(f"{where}: the starting coefficient must be a finite number. Got {value!r}.")
                same = [t for t in equations[state] if term_key(t) == term_key(expression.text)]
                if same:
                    raise ConfigError(f"{where}: the same term as {same[0]!r} in this equation; keep one.")
                equations[state][expression.text] = float(value)
                parsed[(state, expression.text)] = expression
        object.__setattr__(self, "equations", equations)
        for pair in self.fixed:
            if len(pair) != 2 or pair[0] not in states or pair[1] not in equations.get(pair[0], {}):
                raise ConfigError(
                    f"Structure.fixed: {pair!r} is not a (state, term) pair of the equations."
                )
        if self.outputs is None:
            outputs = {s: s for s in states if s not in self.hidden}
        else:
            outputs = dict(self.outputs)
        if not outputs:
            raise ConfigError("Structure: no outputs; give outputs, or leave at least one state unhidden.")
        parsed_outputs = {}
        for name, text in outputs.items():
            parsed_outputs[name] = parse_expression(text, known, where=f"Structure.outputs[{name!r}]")
        object.__setattr__(self, "outputs", {k: v.text for k, v in parsed_outputs.items()})
        object.__setattr__(self, "_parsed", parsed)
        object.__setattr__(self, "_parsed_outputs", parsed_outputs)
        # A hidden state must reach an output, directly or through other states' equations.
        reaches = {s for e in parsed_outputs.values() for s in e.names if s in states}
        changed = True
        while changed:
            changed = False
            for (state, _), expression in parsed.items():
                if state in reaches:
                    new = {s for s in expression.names if s in states} - reaches
                    if new:
                        reaches |= new
                        changed = True
        for name in self.hidden:
            if name not in reaches:
                raise ConfigError(
                    f"Structure.hidden: state {name!r} appears in no output and in no equation of a state "
                    "that reaches an output, so the data cannot inform it. Add it to a term or an output, "
                    "or drop the state."
                )

    @property
    def output_names(self) -> tuple[str, ...]:
        return tuple(self.outputs)

    @property
    def coefficient_names(self) -> tuple[str, ...]:
        """Name of every coefficient, ``"d(state)/dt:term"``, in equation order."""
        return tuple(coefficient_name(s, term) for s in self.state_names for term in self.equations[s])


def coefficient_name(state: str, term: str) -> str:
    """``coefficient_name("i", "v_C") == "d(i)/dt:v_C"``."""
    return f"d({state})/dt:{term}"


def structure_from_model(model: Model, *, hidden: Sequence[str] = (), outputs: Mapping[str, str] | None = None,
                         fixed: Collection[tuple[str, str]] = ()) -> Structure:
    """The :class:`Structure` of a :class:`discover.model.Model`: its support and coefficients."""
    equations = {
        state: {model.terms[j]: float(model.coef[j, i]) for j in np.flatnonzero(model.coef[:, i])}
        for i, state in enumerate(model.state_names)
    }
    return Structure(model.state_names, model.input_names, equations, tuple(hidden), outputs, frozenset(fixed))


@dataclass(frozen=True)
class Refinement:
    """The refined structure, its fit and what the data determine.

    Attributes
    ----------
    state_names, input_names, output_names, hidden : tuple of str
    coefficients : dict of str to dict of str to float
        ``{state: {term: refined coefficient}}`` (fixed ones at their given values).
    fixed : frozenset of (str, str)
    initial_states : tuple of ndarray of shape (n_states,)
        Refined state at each run's first sample.
    segment_starts : tuple of ndarray of shape (n_segments, n_states)
        Refined start of every segment of each run.
    segment_length : int
        Samples per segment as resolved (runs are cut into near-equal segments).
    substeps : int
        RK4 substeps per sample interval as resolved.
    cost : float
        ½ Σ r² of the multiple-shooting residuals at the end.
    iterations, n_evaluations : int
        Jacobian evaluations (trust-region iterations) and residual evaluations.
    converged : bool
        The optimiser met a tolerance, no segment diverged, every continuity gap is
        below CONTINUITY_TOL and the free run did not diverge.
    message : str
        Why it stopped, and what did not hold when ``converged`` is False.
    continuity_gap : float
        Largest |end of segment − start of next| at the end, in units of the state's
        noise scale.
    output_scale : ndarray of shape (n_outputs,)
        Noise level each output's residuals were divided by (given or estimated).
    singular_values : ndarray of shape (n_parameters,)
        Of the column-scaled free-run Jacobian (free coefficients, then the free initial
        values of each run), largest first; empty if the free run diverged.
    parameter_names : tuple of str
        Names of those parameters.
    not_identifiable : tuple of str
        One sentence per direction with singular value below the tolerance.
    scale_notes : tuple of str
        Per hidden state: whether its scale is free or which rule sets it.
    standard_errors : dict of str to dict of str to float
        Like ``coefficients``; NaN for fixed and non-identifiable coefficients.
    standard_errors_hac : dict of str to dict of str to float
        The same from the Newey–West covariance (:func:`newey_west_covariance`),
        valid when the residuals are autocorrelated (model error, coloured noise);
        close to ``standard_errors`` when they are white.
    hac_lags : int
        Its lags as resolved (-1 when not computed).
    covariance : ndarray of shape (n_free, n_free)
        Of the free coefficients (order of ``free_names``), σ²·(JᵀJ)⁺ restricted to
        them; NaN rows and columns for non-identifiable ones.
    free_names : tuple of str
    residual_variance : float
        σ² of the free-run residuals in noise-scaled units (about 1 when the output
        noise levels are right and the model fits).
    simulated_states : tuple of ndarray of shape (n_samples, n_states)
        Free run of the refined model from each run's refined initial state.
    simulated_outputs : tuple of ndarray of shape (n_samples, n_outputs)
    output_rmse : ndarray of shape (n_outputs,)
        Root-mean-square free-run output error over all runs, in the data's units.
    interpolation : str
        Input interpolation as resolved ("linear" or "zoh").
    notes : tuple of str
        What the routine decided on the way (substeps raised, analysis skipped).
    """

    state_names: tuple[str, ...]
    input_names: tuple[str, ...]
    output_names: tuple[str, ...]
    hidden: tuple[str, ...]
    coefficients: dict[str, dict[str, float]]
    fixed: frozenset[tuple[str, str]]
    initial_states: tuple[np.ndarray, ...]
    segment_starts: tuple[np.ndarray, ...]
    segment_length: int
    substeps: int
    cost: float
    iterations: int
    n_evaluations: int
    converged: bool
    message: str
    continuity_gap: float
    output_scale: np.ndarray
    singular_values: np.ndarray
    parameter_names: tuple[str, ...]
    not_identifiable: tuple[str, ...]
    scale_notes: tuple[str, ...]
    standard_errors: dict[str, dict[str, float]]
    standard_errors_hac: dict[str, dict[str, float]]
    hac_lags: int
    covariance: np.ndarray
    free_names: tuple[str, ...]
    residual_variance: float
    simulated_states: tuple[np.ndarray, ...]
    simulated_outputs: tuple[np.ndarray, ...]
    output_rmse: np.ndarray
    interpolation: str = "linear"
    notes: tuple[str, ...] = ()

    def model(self) -> Model:
        """The refined dynamics as a :class:`discover.model.Model` (hidden states included)."""
        terms = []
        for state in self.state_names:
            terms += [term for term in self.coefficients[state] if term not in terms]
        coef = np.zeros((len(terms), len(self.state_names)))
        for i, state in enumerate(self.state_names):
            for term, value in self.coefficients[state].items():
                coef[terms.index(term), i] = value
        return Model(self.state_names, self.input_names, tuple(terms), coef,
                     info={"refined": "output error, multiple shooting", "hidden": list(self.hidden)})


# --------------------------------------------------------------------------- kernels on plain arrays


def noise_level(y_runs: Sequence[np.ndarray]) -> np.ndarray:
    """Noise standard deviation of each column, from third differences.

    For white noise e, E[(Δ³e)²] = C(6, 3)·σ² = 20·σ²; a smooth signal sampled
    densely adds little to third differences. (Difference-based variance
    estimation; Hall, Kay & Titterington 1990, Biometrika 77(3), from memory.)

    Parameters
    ----------
    y_runs : sequence of ndarray of shape (n_samples, n_columns)

    Returns
    -------
    ndarray of shape (n_columns,)
        Floored at 1e-9 × the column's spread (1e-9 if the column is constant).
    """
    total, count = 0.0, 0
    for y in y_runs:
        if len(y) >= 4:
            total = total + np.sum(np.diff(y, n=3, axis=0) ** 2, axis=0)
            count += len(y) - 3
    stacked = np.vstack(list(y_runs))
    spread = np.std(stacked, axis=0)
    sigma = np.sqrt(total / (20.0 * count)) if count else np.zeros(stacked.shape[1])
    return np.maximum(sigma, 1e-9 * np.where(spread > 0, spread, 1.0))


def scaled_svd(jacobian: np.ndarray) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """SVD of the Jacobian with columns scaled to unit norm.

    Parameters
    ----------
    jacobian : ndarray of shape (n_residuals, n_parameters)

    Returns
    -------
    singular_values : ndarray of shape (n_parameters,)
        Largest first (zero-padded when there are fewer residuals than parameters).
    directions : ndarray of shape (n_parameters, n_parameters)
        Right singular vectors as columns, in scaled coordinates.
    column_norms : ndarray of shape (n_parameters,)
        The scales (1 for a column of zeros): parameter change = direction / column_norms.
    """
    jacobian = np.asarray(jacobian, dtype=float)
    n_params = jacobian.shape[1]
    norms = np.linalg.norm(jacobian, axis=0)
    norms = np.where(norms > 0, norms, 1.0)
    scaled = jacobian / norms
    if len(scaled) < n_params:  # zero rows keep the singular values and complete V
        scaled = np.vstack([scaled, np.zeros((n_params - len(scaled), n_params))])
    # The SVD of R (from QR) has the singular values and right vectors of J, at a fraction of the cost.
    _, values, vt = np.linalg.svd(np.linalg.qr(scaled, mode="r"))
    return values, vt.T, norms


def covariance_from_jacobian(jacobian: np.ndarray, residuals: np.ndarray, *,
                             rtol: float = 1e-6) -> tuple[np.ndarray, float, int]:
    """σ²·(JᵀJ)⁺ with σ² = Σr² / (n − rank), truncated at ``rtol`` of the largest singular value.

    Columns are scaled to unit norm before the SVD, so the truncation does not depend
    on units. For a full-rank linear problem this is the ordinary least-squares
    covariance.

    Parameters
    ----------
    jacobian : ndarray of shape (n_residuals, n_parameters)
    residuals : ndarray of shape (n_residuals,)

    Returns
    -------
    covariance : ndarray of shape (n_parameters, n_parameters)
    sigma2 : float
    rank : int
    """
    values, directions, norms = scaled_svd(jacobian)
    keep = values > rtol * values[0] if values.size and values[0] > 0 else np.zeros(len(values), bool)
    rank = int(keep.sum())
    dof = max(len(residuals) - rank, 1)
    sigma2 = float(np.sum(np.asarray(residuals) ** 2) / dof)
    v = directions[:, keep] / values[keep]
    covariance = sigma2 * (v @ v.T) / np.outer(norms, norms)
    return covariance, sigma2, rank


def newey_west_covariance(jacobian: np.ndarray, residuals: np.ndarray, groups: np.ndarray, *, lags: int,
                          rtol: float = 1e-6) -> np.ndarray:
    """Covariance of least-squares estimates robust to autocorrelated residuals.

    The sandwich (JᵀJ)⁺·Ŝ·(JᵀJ)⁺ of Newey & West (1987, Econometrica 55(3)), with
    Ŝ = Σ_l w_l Σ_n (s_n s_{n−l}ᵀ + s_{n−l} s_nᵀ) over the scores s_n = J_nᵀ r_n of
    the samples, Bartlett weights w_l = 1 − l/(lags + 1) (w_0 counted once), and lags
    taken within each group (run), never across. Without correction for degrees of
    freedom (statsmodels' ``use_correction=False``).

    Parameters
    ----------
    jacobian : ndarray of shape (n_samples, n_outputs, n_parameters)
    residuals : ndarray of shape (n_samples, n_outputs)
    groups : ndarray of shape (n_samples,)
        Run of each sample; samples of a run are consecutive.
    lags : int
        Highest lag with a non-zero weight.
    rtol : float, default=1e-6
        Truncation of the pseudo-inverse, as :func:`covariance_from_jacobian`.

    Returns
    -------
    ndarray of shape (n_parameters, n_parameters)
    """
    jacobian = np.asarray(jacobian, dtype=float)
    n_params = jacobian.shape[2]
    scores = np.einsum("nop,no->np", jacobian, residuals)
    middle = np.zeros((n_params, n_params))
    groups = np.asarray(groups)
    for g in np.unique(groups):
        s = scores[groups == g]
        middle += s.T @ s
        for lag in range(1, min(lags, len(s) - 1) + 1):
            product = s[lag:].T @ s[:-lag]
            middle += (1.0 - lag / (lags + 1.0)) * (product + product.T)
    values, directions, norms = scaled_svd(jacobian.reshape(-1, n_params))
    keep = values > rtol * values[0] if values.size and values[0] > 0 else np.zeros(len(values), bool)
    # (JᵀJ)⁺ in data units, from the scaled SVD.
    v = directions[:, keep] / values[keep]
    bread = (v @ v.T) / np.outer(norms, norms)
    return bread @ middle @ bread


def andrews_lags(residuals: np.ndarray, groups: np.ndarray) -> int:
    """Bandwidth for the Bartlett kernel from an AR(1) fit to the residuals.

    Andrews (1991, Econometrica 59(3)) plug-in rule, from memory: lags =
    1.1447·(α·n)^(1/3) with α = 4ρ² / ((1 − ρ)²(1 + ρ)²) for one AR(1) series with
    lag-one autocorrelation ρ. Here ρ is pooled over the outputs and runs (an
    approximation: Andrews fits each score component). ρ = 0 gives 0 lags, the
    ordinary covariance.

    Parameters
    ----------
    residuals : ndarray of shape (n_samples, n_outputs)
    groups : ndarray of shape (n_samples,)

    Returns
    -------
    int
    """
    residuals = np.asarray(residuals, dtype=float)
    groups = np.asarray(groups)
    lagged, total = 0.0, 0.0
    for g in np.unique(groups):
        r = residuals[groups == g]
        r = r - r.mean(axis=0)
        lagged += float(np.sum(r[1:] * r[:-1]))
        total += float(np.sum(r[:-1] ** 2))
    rho = float(np.clip(lagged / total, -0.99, 0.99)) if total > 0 else 0.0
    alpha = 4.0 * rho**2 / ((1.0 - rho) ** 2 * (1.0 + rho) ** 2)
    return int(1.1447 * (alpha * len(residuals)) ** (1.0 / 3.0))


# --------------------------------------------------------------------------- the compiled problem


class _Dynamics:
    """f(x, u) = Θ(x, u)·Ξ, its state Jacobian, and the outputs g(x, u) with theirs."""

    def __init__(self, structure):
        states, inputs = structure.state_names, structure.input_names
        self.n_states, self.n_inputs = len(states), len(inputs)
        names = list(states) + list(inputs)
        terms, expressions = [], []
        self.coef_state, self.coef_term, self.coef_pairs = [], [], []
        for i, state in enumerate(states):
            for term in structure.equations[state]:
                if term not in terms:
                    terms.append(term)
                    expressions.append(structure._parsed[(state, term)])
                self.coef_state.append(i)
                self.coef_term.append(terms.index(term))
                self.coef_pairs.append((state, term))
        self.terms = terms
        self.coef_state = np.array(self.coef_state, dtype=int)
        self.coef_term = np.array(self.coef_term, dtype=int)
        self.n_coef = len(self.coef_pairs)
        self.coef_columns = self.n_states + np.arange(self.n_coef)
        self.evaluate_terms = _Evaluator.of_values(expressions, names)
        self.term_jacobian = _Evaluator.of_derivatives(expressions, states, names)
        outputs = list(structure._parsed_outputs.values())
        self.n_outputs = len(outputs)
        self.output_index = [states.index(e.text) if e.text in states else -1 for e in outputs]
        self.evaluate_outputs = _Evaluator.of_values(outputs, names)
        self.output_jacobian = _Evaluator.of_derivatives(outputs, states, names)

    def xi(self, coef):
        """Ξ of shape (n_terms, n_states) from the coefficient vector (n_coef,)."""
        matrix = np.zeros((len(self.terms), self.n_states))
        matrix[self.coef_term, self.coef_state] = coef
        return matrix

    def rhs(self, x, u, xi, sens):
        """dx/dt (n, n_states) and, with sens (n, n_states, n_p), its sensitivity derivative."""
        z = np.concatenate([x, u], axis=1)
        theta = self.evaluate_terms(z)
        f = theta @ xi
        if sens is None:
            return f, None
        fx = np.matmul(xi.T, self.term_jacobian(z))   # (n, n_states, n_states)
        k = np.matmul(fx, sens)
        k[:, self.coef_state, self.coef_columns] += theta[:, self.coef_term]
        return f, k

    def state_jacobian(self, x, u, xi):
        """∂f/∂x of shape (n, n_states, n_states)."""
        return np.matmul(xi.T, self.term_jacobian(np.concatenate([x, u], axis=1)))

    def outputs(self, x, u):
        """y (n, n_outputs) and ∂y/∂x (n, n_outputs, n_states)."""
        z = np.concatenate([x, u], axis=1)
        return self.evaluate_outputs(z), self.output_jacobian(z)


class _Evaluator:
    """Columns that are monomials c·Π z_v^p_v or parsed trees, evaluated at n points.

    Monomials (terms such as ``x**3*u``, and their derivatives, which are monomials
    again: ∂/∂x_k of Π z_v^p_v is p_k·x_k^(p_k − 1)·…) share one table of powers per
    call, built by repeated multiplication; anything else (``sin(x)``, and its
    derivative from :func:`discover.symbolic.derivative`) is evaluated from its tree.
    The simulation calls this four times per step, so its overhead is the cost.
    """

    def __init__(self, n_columns, shape, monomials, trees, names):
        self.n_columns, self.shape, self.names = n_columns, shape, list(names)
        self.constant = np.zeros(n_columns)
        self.monomials, self.trees = [], trees
        self.max_power = {}
        for column, factor, factors in monomials:
            if not factors:
                self.constant[column] = factor
                continue
            self.monomials.append((column, factor, factors))
            for v, p in factors:
                self.max_power[v] = max(self.max_power.get(v, 0), p)

    @classmethod
    def of_values(cls, expressions, names):
        monomials, trees = [], []
        for column, expression in enumerate(expressions):
            powers = _monomial_powers(expression, names)
            if powers is None:
                trees.append((column, expression))
            else:
                monomials.append((column, 1.0, powers))
        return cls(len(expressions), (len(expressions),), monomials, trees, names)

    @classmethod
    def of_derivatives(cls, expressions, states, names):
        """∂e_j/∂x_k, shaped (n, n_expressions, n_states)."""
        monomials, trees = [], []
        n_states = len(states)
        for j, expression in enumerate(expressions):
            powers = _monomial_powers(expression, names)
            for k, state in enumerate(states):
                if state not in expression.names:
                    continue
                column = j * n_states + k
                if powers is not None:
                    v = names.index(state)
                    exponent = dict(powers)[v]
                    lowered = [(w, p - (w == v)) for w, p in powers if p - (w == v) > 0]
                    monomials.append((column, float(exponent), lowered))
                else:
                    d = derivative(expression, state)
                    if d.is_constant:
                        monomials.append((column, float(d.evaluate({})[0]), []))
                    else:
                        trees.append((column, d))
        return cls(len(expressions) * n_states, (len(expressions), n_states), monomials, trees, names)

    def __call__(self, z):
        n = len(z)
        out = np.empty((n, self.n_columns))
        out[:] = self.constant
        table = {}
        for v, top in self.max_power.items():
            value = table[(v, 1)] = z[:, v]
            for p in range(2, top + 1):
                value = table[(v, p)] = value * z[:, v]
        for column, factor, factors in self.monomials:
            value = table[factors[0]]
            for key in factors[1:]:
                value = value * table[key]
            out[:, column] = value if factor == 1.0 else factor * value
        if self.trees:
            columns = {name: z[:, i] for i, name in enumerate(self.names)}
            for column, tree in self.trees:
                out[:, column] = tree.evaluate(columns)
        return out.reshape((n,) + self.shape)


def _monomial_powers(expression, names):
    """``[(column index, power), ...]`` of a monomial expression (``[]`` for ``1``), else None."""
    key = term_key(expression.text)
    if key == ("constant",):
        return []
    if key[0] == "text" or not all(name in names for name, _ in key):
        return None
    return [(names.index(name), power) for name, power in key]


@dataclass
class _Layout:
    """Segments of all runs, stepped together (shorter ones padded with zero steps)."""

    run: np.ndarray            # (n_seg,) run of each segment
    first: np.ndarray          # (n_seg,) first sample of each segment within its run
    steps: np.ndarray          # (n_seg,) sample intervals in each segment
    following: np.ndarray      # (n_seg,) next segment of the same run, -1 for the last
    h: np.ndarray              # (n_steps * m, n_seg) substep lengths, 0 for padding
    u_stage: np.ndarray        # (n_steps * m, 3, n_seg, n_inputs) input at substep start, middle, end
    sample_segment: np.ndarray  # (n_total,) segment of each sample, runs concatenated
    sample_local: np.ndarray   # (n_total,) its position within the segment
    substeps: int

    @property
    def n_segments(self):
        return len(self.run)


def _cut(n_samples, segment_length):
    """Boundaries (first sample of each segment, and the last sample) of near-equal segments."""
    n_segments = max(1, int(round((n_samples - 1) / max(segment_length - 1, 1))))
    return np.unique(np.round(np.linspace(0, n_samples - 1, n_segments + 1)).astype(int))


def _layout(runs, boundaries, substeps, interpolation):
    run_of, first, steps = [], [], []
    for r, bounds in enumerate(boundaries):
        for a, b in zip(bounds[:-1], bounds[1:]):
            run_of.append(r)
            first.append(a)
            steps.append(b - a)
    run_of, first, steps = np.array(run_of), np.array(first), np.array(steps)
    n_seg, n_steps, m = len(run_of), int(steps.max()), substeps
    n_inputs = runs[0].u.shape[1]
    h = np.zeros((n_steps * m, n_seg))
    u_stage = np.zeros((n_steps * m, 3, n_seg, n_inputs))
    fractions = (np.arange(m)[:, None] + np.array([0.0, 0.5, 1.0])[None, :]) / m  # (m, 3)
    for g in range(n_seg):
        run = runs[run_of[g]]
        a, n = first[g], steps[g]
        dt = np.diff(run.t[a:a + n + 1])
        h[: n * m, g] = np.repeat(dt / m, m)
        u0, u1 = run.u[a:a + n], run.u[a + 1:a + n + 1]
        if interpolation == "zoh":
            stage = np.broadcast_to(u0[:, None, None, :], (n, m, 3, n_inputs))
        else:
            stage = u0[:, None, None, :] + fractions[None, :, :, None] * (u1 - u0)[:, None, None, :]
        u_stage[: n * m, :, g] = stage.reshape(n * m, 3, n_inputs)
        u_stage[n * m:, :, g] = run.u[a + n]
    following = np.where(np.r_[run_of[1:] == run_of[:-1], False], np.arange(n_seg) + 1, -1)
    sample_segment, sample_local = [], []
    for r, bounds in enumerate(boundaries):
        n_samples = bounds[-1] + 1
        segment_ids = np.flatnonzero(run_of == r)
        index = np.searchsorted(bounds[1:-1], np.arange(n_samples), side="right")
        sample_segment.append(segment_ids[index])
        sample_local.append(np.arange(n_samples) - bounds[index])
    return _Layout(run_of, first, steps, following, h, u_stage, np.concatenate(sample_segment),
                   np.concatenate(sample_local), m)


def _integrate(dynamics, layout, x0, coef, *, sensitivities, limits):
    """RK4 over all segments together.

    Returns x (n_steps + 1, n_seg, n_states) at the samples, S (same plus (n_states +
    n_coef,)) or None, and for each segment the first sample at which it was frozen as
    diverged (n_steps + 1 if it was not); frozen samples repeat the last good state.
    """
    xi = dynamics.xi(coef)
    n_seg, n_states = x0.shape
    n_steps = layout.h.shape[0] // layout.substeps
    center, bound = limits
    x = x0.copy()
    xs = np.empty((n_steps + 1, n_seg, n_states))
    xs[0] = x
    s = ss = None
    if sensitivities:
        s = np.zeros((n_seg, n_states, n_states + dynamics.n_coef))
        s[:, np.arange(n_states), np.arange(n_states)] = 1.0
        ss = np.empty((n_steps + 1,) + s.shape)
        ss[0] = s
    alive = np.all(np.isfinite(x) & (np.abs(x - center) <= bound), axis=1)
    stopped = np.where(alive, n_steps + 1, 0)
    with np.errstate(all="ignore"):
        for step in range(n_steps):
            for q in range(step * layout.substeps, (step + 1) * layout.substeps):
                h = layout.h[q][:, None]
                u0, um, u1 = layout.u_stage[q]
                k1, c1 = dynamics.rhs(x, u0, xi, s)
                k2, c2 = dynamics.rhs(x + 0.5 * h * k1, um, xi, None if s is None else s + 0.5 * h[:, :, None] * c1)
                k3, c3 = dynamics.rhs(x + 0.5 * h * k2, um, xi, None if s is None else s + 0.5 * h[:, :, None] * c2)
                k4, c4 = dynamics.rhs(x + h * k3, u1, xi, None if s is None else s + h[:, :, None] * c3)
                x = x + h / 6.0 * (k1 + 2.0 * k2 + 2.0 * k3 + k4)
                if s is not None:
                    s = s + h[:, :, None] / 6.0 * (c1 + 2.0 * c2 + 2.0 * c3 + c4)
            alive &= np.all(np.isfinite(x) & (np.abs(x - center) <= bound), axis=1)
            if s is not None:
                alive &= np.all(np.isfinite(s), axis=(1, 2))
            dead = ~alive
            stopped[dead & (stopped > step + 1)] = step + 1
            if dead.any():
                x[dead] = xs[step, dead]
                if s is not None:
                    s[dead] = ss[step, dead]  # the frozen residuals depend on the last good state
            xs[step + 1] = x
            if s is not None:
                ss[step + 1] = s
    return xs, ss, stopped


# --------------------------------------------------------------------------- the multiple-shooting problem


class _OutOfTime(Exception):
    pass


class _Shooting:
    """Residuals and Jacobian of the multiple-shooting problem over a parameter vector.

    Parameters: the free coefficients, then every segment's free start values
    (segment by segment, state by state).
    """

    def __init__(self, dynamics, layout, runs, y_scale, state_scale, coef0, free_coef, starts0,
                 free_start, continuity_weight, limits):
        self.dynamics, self.layout, self.limits = dynamics, layout, limits
        self.coef0, self.starts0 = coef0, starts0
        self.free_coef = np.flatnonzero(free_coef)
        self.free_start = free_start  # bool (n_seg, n_states)
        n_free = len(self.free_coef)
        self.start_column = np.full(free_start.shape, -1)
        self.start_column[free_start] = n_free + np.arange(free_start.sum())
        self.coef_column = np.full(dynamics.n_coef, -1)
        self.coef_column[self.free_coef] = np.arange(n_free)
        self.n_params = n_free + int(free_start.sum())
        self.y = np.concatenate([run.y for run in runs])
        self.u = np.concatenate([run.u for run in runs])
        self.y_scale = y_scale
        self.weight = continuity_weight
        self.continuity_scale = state_scale / continuity_weight
        self.has_next = np.flatnonzero(layout.following >= 0)
        n_out = len(self.y) * dynamics.n_outputs
        self.n_residuals = n_out + len(self.has_next) * dynamics.n_states

    def unpack(self, p):
        coef = self.coef0.copy()
        coef[self.free_coef] = p[: len(self.free_coef)]
        starts = self.starts0.copy()
        starts[self.free_start] = p[len(self.free_coef):]
        return coef, starts

    def pack(self, coef, starts):
        return np.concatenate([coef[self.free_coef], starts[self.free_start]])

    def simulate(self, p, sensitivities):
        coef, starts = self.unpack(p)
        return _integrate(self.dynamics, self.layout, starts, coef, sensitivities=sensitivities,
                          limits=self.limits) + (starts,)

    def residuals(self, p, sensitivities=False):
        xs, ss, stopped, starts = self.simulate(p, sensitivities)
        diverged = stopped <= self.layout.steps
        lay = self.layout
        x = xs[lay.sample_local, lay.sample_segment]
        y, gx = self.dynamics.outputs(x, self.u)
        r_out = ((y - self.y) / self.y_scale).ravel()
        ends = xs[lay.steps[self.has_next], self.has_next]
        gaps = (ends - starts[lay.following[self.has_next]]) / self.continuity_scale
        r = np.concatenate([r_out, gaps.ravel()])
        r = np.where(np.isfinite(r), r, 0.0)
        return r, (xs, ss, diverged, starts, gx, stopped)

    def fun(self, p):
        return self.residuals(p)[0]

    def jac(self, p):
        return self.residuals_and_jacobian(p)[1]

    def residuals_and_jacobian(self, p):
        """Residuals, Jacobian and the simulation details, from one integration with sensitivities."""
        r, details = self.residuals(p, sensitivities=True)
        xs, ss, _, _, gx, _ = details
        lay, n_states = self.layout, self.dynamics.n_states
        n_samples, n_out = len(self.y), self.dynamics.n_outputs
        # Output rows: ∂y/∂x · S at each sample, columns mapped from local to global.
        s = ss[lay.sample_local, lay.sample_segment]              # (n_samples, n_states, n_local)
        local = np.einsum("nok,nkp->nop", gx, s) / self.y_scale[None, :, None]
        rows_out = np.arange(n_samples * n_out).reshape(n_samples, n_out)
        columns = self._local_columns(lay.sample_segment)         # (n_samples, n_local)
        blocks = [(rows_out[:, :, None], columns[:, None, :], local)]
        # Continuity rows: S at the segment end, minus the identity on the next start.
        g = self.has_next
        end = ss[lay.steps[g], g] / self.continuity_scale[None, :, None]
        rows_gap = n_samples * n_out + np.arange(len(g) * n_states).reshape(len(g), n_states)
        blocks.append((rows_gap[:, :, None], self._local_columns(g)[:, None, :], end))
        nxt = self.start_column[lay.following[g]]                 # (n_gap, n_states)
        blocks.append((rows_gap[:, :, None], nxt[:, :, None],
                       np.broadcast_to(-1.0 / self.continuity_scale[:, None], (len(g), n_states, 1))))
        return r, self._assemble(blocks), details

    def _local_columns(self, segments):
        """Global column of each local parameter (segment start, then every coefficient); -1 if fixed."""
        return np.concatenate([self.start_column[segments],
                               np.broadcast_to(self.coef_column, (len(segments), self.dynamics.n_coef))], axis=1)

    def _assemble(self, blocks, dense=None):
        rows, cols, vals = [], [], []
        for r, c, v in blocks:
            r, c, v = np.broadcast_arrays(r, c, v)
            keep = c >= 0
            rows.append(r[keep])
            cols.append(c[keep])
            vals.append(np.where(np.isfinite(v[keep]), v[keep], 0.0))
        rows, cols, vals = np.concatenate(rows), np.concatenate(cols), np.concatenate(vals)
        shape = (self.n_residuals, self.n_params)
        if self.dense if dense is None else dense:
            out = np.zeros(shape)
            out[rows, cols] = vals  # every (row, column) pair occurs once
            return out
        return sparse.csr_matrix((vals, (rows, cols)), shape=shape)

    @property
    def dense(self):
        return self.n_residuals * self.n_params <= DENSE_LIMIT

    def sparsity(self):
        """Pattern of the Jacobian (where an entry can be non-zero), for finite differences."""
        lay, n_states = self.layout, self.dynamics.n_states
        n_samples, n_out = len(self.y), self.dynamics.n_outputs
        rows_out = np.arange(n_samples * n_out).reshape(n_samples, n_out)
        g = self.has_next
        rows_gap = n_samples * n_out + np.arange(len(g) * n_states).reshape(len(g), n_states)
        blocks = [(rows_out[:, :, None], self._local_columns(lay.sample_segment)[:, None, :], 1.0),
                  (rows_gap[:, :, None], self._local_columns(g)[:, None, :], 1.0),
                  (rows_gap[:, :, None], self.start_column[lay.following[g]][:, :, None], 1.0)]
        return sparse.csr_matrix(self._assemble(blocks, dense=False) != 0)


class _Budget:
    """Counts evaluations, keeps the best point seen, and stops at the deadline."""

    def __init__(self, problem, deadline):
        self.problem, self.deadline = problem, deadline
        self.best_cost, self.best_p = np.inf, None
        self.n_fun = self.n_jac = 0

    def _check(self):
        if time.monotonic() > self.deadline:
            raise _OutOfTime

    def fun(self, p):
        self._check()
        self.n_fun += 1
        r = self.problem.fun(p)
        cost = 0.5 * float(r @ r)
        if cost < self.best_cost:
            self.best_cost, self.best_p = cost, p.copy()
        return r

    def jac(self, p):
        self._check()
        self.n_jac += 1
        return self.problem.jac(p)


# --------------------------------------------------------------------------- checks at the boundary


def _check_runs(structure, runs):
    if isinstance(runs, MeasuredRun) or not len(runs):
        raise DataError("refine: `runs` must be a non-empty sequence of MeasuredRun.")
    checked = []
    n_out, n_in = len(structure.output_names), len(structure.input_names)
    for k, run in enumerate(runs):
        name = run.name or f"run {k}"
        t = np.asarray(run.t, dtype=float).ravel()
        y = np.asarray(run.y, dtype=float)
        u = np.asarray(run.u, dtype=float) if run.u is not None else np.empty((len(t), 0))
        y = y.reshape(len(t), -1) if y.ndim == 1 and n_out == 1 else y
        u = u.reshape(len(t), -1) if u.ndim == 1 else u
        if len(t) < 3 or not np.all(np.diff(t) > 0) or not np.all(np.isfinite(t)):
            raise DataError(f"{name}: t must be finite, strictly increasing, at least 3 samples.")
        if y.shape != (len(t), n_out):
            raise DataError(
                f"{name}: y must have shape (n_samples, n_outputs) = ({len(t)}, {n_out}) for outputs "
                f"{list(structure.output_names)}. Got {y.shape}."
            )
        if u.shape != (len(t), n_in):
            raise DataError(
                f"{name}: u must have shape ({len(t)}, {n_in}) for inputs {list(structure.input_names)}. "
                f"Got {u.shape}."
            )
        for what, values, columns in (("y", y, structure.output_names), ("u", u, structure.input_names)):
            bad = ~np.isfinite(values)
            if bad.any():
                row, col = np.argwhere(bad)[0]
                raise DataError(
                    f"{name}: {what} column {columns[col]!r} has {int(bad[:, col].sum())} non-finite values "
                    f"(first at row {row + 1}). Drop or interpolate them first."
                )
        checked.append(MeasuredRun(t, y, u, name))
    return checked


def _per_run(value, n_runs, where):
    """A float for every run, or a sequence with one value per run."""
    values = np.atleast_1d(np.asarray(value, dtype=float))
    if values.size == 1:
        values = np.repeat(values, n_runs)
    if values.shape != (n_runs,) or not np.all(np.isfinite(values)):
        raise ConfigError(f"{where} must be a finite number or one per run ({n_runs}). Got {value!r}.")
    return values


def _state_values(mapping, structure, n_runs, where):
    """``{state: value or per-run values}`` -> ndarray (n_runs, n_states), NaN where not given."""
    out = np.full((n_runs, len(structure.state_names)), np.nan)
    for state, value in (mapping or {}).items():
        if state not in structure.state_names:
            raise ConfigError(f"{where}: {state!r} is not a state. States: {', '.join(structure.state_names)}.")
        out[:, structure.state_names.index(state)] = _per_run(value, n_runs, f"{where}[{state!r}]")
    return out


# --------------------------------------------------------------------------- refine


def refine(
    structure: Structure,
    runs: Sequence[MeasuredRun],
    *,
    segment_length: int | None = None,
    initial_guess: Mapping[str, float | Sequence[float]] | None = None,
    fixed_initial: Mapping[str, float | Sequence[float]] | None = None,
    state_guess: Sequence[np.ndarray] | None = None,
    output_noise: Sequence[float] | None = None,
    continuity_weight: float = 1000.0,
    interpolation: str | None = None,
    substeps: int | None = None,
    jacobian: str = "analytic",
    max_nfev: int = 200,
    time_limit: float = 120.0,
    identifiability_rtol: float = 1e-6,
    divergence_factor: float = 100.0,
    hac_lags: int | None = None,
) -> Refinement:
    """Fit the free coefficients of ``structure`` to ``runs`` by output error (multiple shooting).

    Parameters
    ----------
    structure : Structure
    runs : sequence of MeasuredRun
    segment_length : int or None, default=None
        Samples per segment (a segment of L samples spans L − 1 intervals). None: twice
        the correlation length of the measured outputs (the lag where their
        autocorrelation first drops below 1/e, median over runs: a segment then
        spans the memory of the signal), at most a tenth of the shortest run, at
        least MIN_SEGMENT. A run's whole length means single shooting.
    initial_guess : mapping of str to float or sequence, optional
        Starting value at each run's first sample of states not measured as their own
        output (default 0); their other segment starts come from a simulation of the
        starting model.
    fixed_initial : mapping of str to float or sequence, optional
        Initial values (at each run's first sample) held fixed: known initial states,
        or a scale rule for a hidden state (a non-zero value).
    state_guess : sequence of ndarray of shape (n_samples, n_states), optional
        Starting trajectories per run (e.g. smoothed states or a filter's estimate);
        segment starts are read from them where finite, else by the rules above.
    output_noise : sequence of float of shape (n_outputs,), optional
        Noise standard deviation of each output; None estimates it (:func:`noise_level`).
    continuity_weight : float, default=1000
        Weight of the continuity residuals relative to noise-scaled output residuals.
    interpolation : {"linear", "zoh"} or None, default=None
        Input between samples; None guesses from the first run
        (:func:`discover.simulate.guess_interpolation`).
    substeps : int or None, default=None
        RK4 substeps per sample interval. None: the smallest with h·ρ ≤ RK4_STEP_LIMIT
        along the data for the starting model, raised and refitted once if the
        refined model needs more.
    jacobian : {"analytic", "2-point", "3-point"}, default="analytic"
        Exact sensitivities, or finite differences by ``least_squares``.
    max_nfev : int, default=200
        Most residual evaluations of ``least_squares``.
    time_limit : float, default=120
        Seconds; at the limit the best point so far is returned, not converged.
    identifiability_rtol : float, default=1e-6
        Directions whose scaled singular value is below this times the largest are
        reported as not determined.
    divergence_factor : float, default=100
        A segment is stopped as diverged outside centre ± this × half-range of the
        starting trajectories.
    hac_lags : int or None, default=None
        Lags of the Newey–West standard errors; None: :func:`andrews_lags` of the
        free-run residuals.

    Returns
    -------
    Refinement

    Raises
    ------
    DataError
        Runs of the wrong shape, non-finite values, time not increasing.
    ConfigError
        Options out of range, unknown states in the mappings.

    Notes
    -----
    BLAS runs on one thread during the call: the dense problems here are small, and on
    a shared 2-core machine a 1800 × 105 SVD took 16 ms on one OpenBLAS thread and
    360 ms on two (measured, OpenBLAS 0.3.31).
    """
    with threadpool_limits(limits=1):
        return _refine(structure, runs, segment_length=segment_length, initial_guess=initial_guess,
                       fixed_initial=fixed_initial, state_guess=state_guess, output_noise=output_noise,
                       continuity_weight=continuity_weight, interpolation=interpolation, substeps=substeps,
                       jacobian=jacobian, max_nfev=max_nfev, time_limit=time_limit,
                       identifiability_rtol=identifiability_rtol, divergence_factor=divergence_factor,
                       hac_lags=hac_lags)


def _refine(structure, runs, *, segment_length, initial_guess, fixed_initial, state_guess, output_noise,
            continuity_weight, interpolation, substeps, jacobian, max_nfev, time_limit, identifiability_rtol,
            divergence_factor, hac_lags):
    if not isinstance(structure, Structure):
        raise ConfigError(f"refine: `structure` must be a Structure. Got {type(structure).__name__}.")
    runs = _check_runs(structure, runs)
    n_runs, states = len(runs), structure.state_names
    n_states = len(states)
    if interpolation is None:
        interpolation = guess_interpolation(runs[0].u)
    if interpolation not in INTERPOLATIONS:
        raise ConfigError(f"refine: `interpolation` must be one of {INTERPOLATIONS}. Got {interpolation!r}.")
    if jacobian not in JACOBIANS:
        raise ConfigError(f"refine: `jacobian` must be one of {JACOBIANS}. Got {jacobian!r}.")
    for name, value, low in (("continuity_weight", continuity_weight, 0.0), ("time_limit", time_limit, 0.0),
                             ("divergence_factor", divergence_factor, 1.0)):
        if not isinstance(value, (int, float)) or not value > low or not math.isfinite(value):
            raise ConfigError(f"refine: `{name}` must be a number > {low:g}. Got {value!r}.")
    if not isinstance(max_nfev, int) or max_nfev < 1:
        raise ConfigError(f"refine: `max_nfev` must be an int >= 1. Got {max_nfev!r}.")
    if hac_lags is not None and (not isinstance(hac_lags, int) or hac_lags < 0):
        raise ConfigError(f"refine: `hac_lags` must be an int >= 0 or None. Got {hac_lags!r}.")
    if substeps is not None and (not isinstance(substeps, int) or substeps < 1):
        raise ConfigError(f"refine: `substeps` must be an int >= 1 or None. Got {substeps!r}.")
    if segment_length is None:
        lengths = [correlation_length(run.y) for run in runs]
        shortest = min(len(run.t) for run in runs)
        segment_length = max(MIN_SEGMENT, min(2 * int(np.median(lengths)), shortest // 10))
    elif not isinstance(segment_length, int) or segment_length < 2:
        raise ConfigError(f"refine: `segment_length` must be an int >= 2 or None. Got {segment_length!r}.")
    if output_noise is None:
        y_scale = noise_level([run.y for run in runs])
    else:
        y_scale = np.asarray(output_noise, dtype=float).ravel()
        if y_scale.shape != (len(structure.output_names),) or not np.all(y_scale > 0):
            raise ConfigError(
                f"refine: `output_noise` must hold one positive value per output {list(structure.output_names)}. "
                f"Got {output_noise!r}."
            )
    guess0 = _state_values(initial_guess, structure, n_runs, "refine: initial_guess")
    fixed0 = _state_values(fixed_initial, structure, n_runs, "refine: fixed_initial")
    if state_guess is not None:
        if len(state_guess) != n_runs:
            raise ConfigError(f"refine: `state_guess` must hold one array per run ({n_runs}).")
        state_guess = [np.asarray(g, dtype=float) for g in state_guess]
        for run, g in zip(runs, state_guess):
            if g.shape != (len(run.t), n_states):
                raise ConfigError(
                    f"refine: state_guess for {run.name!r} must have shape ({len(run.t)}, {n_states}). Got {g.shape}."
                )

    dynamics = _Dynamics(structure)
    coef0 = np.array([structure.equations[s][t] for s, t in dynamics.coef_pairs])
    free_coef = np.array([pair not in structure.fixed for pair in dynamics.coef_pairs], dtype=bool)
    measured = dynamics.output_index  # state measured as its own output, per output
    # A hidden state's free scale would let the fit drift along it (the continuity penalty
    # even pulls it toward zero); hold it by one coefficient during the fit and report it.
    changes = {h: _scale_change(structure, dynamics, h) for h in structure.hidden}
    pinned, fit_coef = {}, free_coef.copy()
    for h, change in changes.items():
        if change is None or _scale_rules(dynamics, states.index(h), change, coef0, free_coef, fixed0, runs)[0]:
            continue
        candidates = [j for j in range(dynamics.n_coef) if fit_coef[j] and change[j] != 0 and coef0[j] != 0]
        if candidates:
            pinned[h] = candidates[0]
            fit_coef[candidates[0]] = False

    # Starting trajectories: measured states from the data, the rest from the starting model.
    trajectories = []
    for r, run in enumerate(runs):
        x = np.full((len(run.t), n_states), np.nan)
        for o, k in enumerate(measured):
            if k >= 0:
                x[:, k] = run.y[:, o]
        if state_guess is not None:
            given = np.isfinite(state_guess[r])
            x[given] = state_guess[r][given]
        trajectories.append(x)
    # Initial values for the simulation of the starting model.
    x_first = np.array([[_local_fit(run.t, traj[:, k], 0) if np.isfinite(traj[:, k]).all() else np.nan
                         for k in range(n_states)] for run, traj in zip(runs, trajectories)])
    x_first = np.where(np.isfinite(x_first), x_first, np.where(np.isfinite(guess0), guess0, 0.0))
    x_first = np.where(np.isfinite(fixed0), fixed0, x_first)
    data_limits = _limits(trajectories, x_first, divergence_factor)
    if substeps is None:
        substeps_used = _needed_substeps(dynamics, runs, trajectories, coef0)
    else:
        substeps_used = substeps
    if not all(np.isfinite(traj).all() for traj in trajectories):
        single = _layout(runs, [np.array([0, len(run.t) - 1]) for run in runs], substeps_used, interpolation)
        xs, _, _ = _integrate(dynamics, single, x_first, coef0, sensitivities=False, limits=data_limits)
        for r, run in enumerate(runs):
            sim = xs[: len(run.t), r]
            missing = ~np.isfinite(trajectories[r])
            trajectories[r][missing] = sim[missing]
    limits = _limits(trajectories, x_first, divergence_factor)
    y_spread = np.std(np.vstack([run.y for run in runs]), axis=0)
    ratio = float(np.median(y_scale / np.where(y_spread > 0, y_spread, 1.0)))
    state_scale = np.empty(n_states)
    stacked = np.vstack(trajectories)
    for k in range(n_states):
        outputs_of_k = [o for o, j in enumerate(measured) if j == k]
        if outputs_of_k:
            state_scale[k] = y_scale[outputs_of_k[0]]
        else:
            spread = float(np.std(stacked[:, k]))
            state_scale[k] = ratio * (spread if spread > 0 else 1.0)

    boundaries = [_cut(len(run.t), min(segment_length, len(run.t))) for run in runs]
    # Continuation in the weight: a heavy continuity penalty from the start makes weakly
    # determined directions crawl (measured: an RLC fit with the hidden scale set by one
    # initial value took 214 iterations at weight 1000, 36 at 100); the second pass
    # starts next to its optimum.
    weights = [continuity_weight / CONTINUATION, continuity_weight] if continuity_weight > CONTINUATION \
        else [continuity_weight]
    deadline = time.monotonic() + time_limit
    passes, notes = [], []
    coef_start, previous, stage, raised = coef0.copy(), None, 0, False
    while True:
        layout = _layout(runs, boundaries, substeps_used, interpolation)
        starts0, free_start = _segment_starts(runs, layout, trajectories, measured, fixed0, previous)
        problem = _Shooting(dynamics, layout, runs, y_scale, state_scale, coef_start, fit_coef, starts0,
                            free_start, weights[stage], limits)
        fit = _solve(problem, jacobian, max_nfev, deadline, time_limit)
        passes.append(fit)
        coef_fit, starts_fit = problem.unpack(fit["x"])
        settled = fit["status"] > 0 and not problem.residuals(fit["x"])[1][2].any()
        if fit["status"] == TIMED_OUT:
            break
        coef_start, previous = coef_fit, (layout, starts_fit)
        if stage + 1 < len(weights):
            stage += 1
            continue
        needed = _needed_substeps(dynamics, runs, trajectories, coef_fit) if substeps is None else substeps_used
        if substeps is not None or needed <= substeps_used or raised or not settled:
            break
        notes.append(f"substeps raised from {substeps_used} to {needed} for the refined model, and refitted")
        substeps_used, raised = needed, True

    r_final, (_, _, diverged, starts_fit, _, _) = problem.residuals(fit["x"])
    gaps = r_final[len(problem.y) * dynamics.n_outputs:].reshape(-1, n_states) / problem.weight
    continuity_gap = float(np.max(np.abs(gaps))) if gaps.size else 0.0

    # Free run of the refined model and its Jacobian (identifiability, covariance).
    x_init = starts_fit[[np.flatnonzero(layout.run == r)[0] for r in range(n_runs)]]
    free_init = ~np.isfinite(fixed0)
    single = _layout(runs, [np.array([0, len(run.t) - 1]) for run in runs], substeps_used, interpolation)
    free_run = _Shooting(dynamics, single, runs, y_scale, state_scale, coef_fit, free_coef, x_init, free_init,
                         continuity_weight, limits)
    p_free = free_run.pack(coef_fit, x_init)
    r_free, jac_free, (xs_free, _, free_diverged, _, _, stopped) = free_run.residuals_and_jacobian(p_free)
    n_out_res = len(free_run.y) * dynamics.n_outputs
    sim_states, sim_outputs = [], []
    for r, run in enumerate(runs):
        x = xs_free[: len(run.t), r].copy()
        y = dynamics.outputs(x, run.u)[0]
        x[stopped[r]:], y[stopped[r]:] = np.nan, np.nan  # NaN after a diverged run's stop
        sim_states.append(x)
        sim_outputs.append(y)
    output_rmse = np.sqrt(np.nanmean((np.vstack(sim_outputs) - free_run.y) ** 2, axis=0))

    coefficient_names = tuple(coefficient_name(s, t) for s, t in dynamics.coef_pairs)
    free_names = tuple(n for n, f in zip(coefficient_names, free_coef) if f)
    initial_names = tuple(f"{states[k]}(t0) of {run.name!r}" for r, run in enumerate(runs)
                          for k in range(n_states) if free_init[r, k])
    parameter_names = free_names + initial_names
    n_free = len(free_names)
    standard_errors = {s: {t: math.nan for t in structure.equations[s]} for s in states}
    standard_errors_hac = {s: dict(errors) for s, errors in standard_errors.items()}
    resolved_lags = -1
    covariance = np.full((n_free, n_free), np.nan)
    not_identifiable, scale_notes = [], []
    sigma2 = math.nan
    singular_values = np.empty(0)
    if free_diverged.any():
        notes.append("identifiability and standard errors not computed: the free run of the refined model diverged")
    else:
        jac_free = jac_free.toarray() if sparse.issparse(jac_free) else jac_free
        j_out = jac_free[:n_out_res]
        values, directions, norms = scaled_svd(j_out)
        singular_values = values
        null = values <= identifiability_rtol * values[0] if values[0] > 0 else np.ones(len(values), bool)
        null_basis = directions[:, null]
        cov, sigma2, _ = covariance_from_jacobian(j_out, r_free[:n_out_res], rtol=identifiability_rtol)
        free_values = np.concatenate([coef_fit[free_coef], x_init[free_init]])
        for v in null_basis.T:
            not_identifiable.append(_direction_text(v, norms, free_values, parameter_names, n_free, runs,
                                                    states, free_init))
        undetermined = np.linalg.norm(null_basis, axis=1) > NULL_COMPONENT
        # Autocorrelated residuals (model error, coloured noise): Newey–West sandwich.
        n_total = len(free_run.y)
        groups = np.repeat(np.arange(n_runs), [len(run.t) for run in runs])
        residual_rows = r_free[:n_out_res].reshape(n_total, dynamics.n_outputs)
        resolved_lags = andrews_lags(residual_rows, groups) if hac_lags is None else hac_lags
        cov_hac = newey_west_covariance(j_out.reshape(n_total, dynamics.n_outputs, -1), residual_rows, groups,
                                        lags=resolved_lags, rtol=identifiability_rtol)
        free_pairs = [pair for pair, f in zip(dynamics.coef_pairs, free_coef) if f]
        for j, (s, t) in enumerate(free_pairs):
            if not undetermined[j]:
                standard_errors[s][t] = float(math.sqrt(max(cov[j, j], 0.0)))
                standard_errors_hac[s][t] = float(math.sqrt(max(cov_hac[j, j], 0.0)))
        covariance = cov[:n_free, :n_free].copy()
        covariance[undetermined[:n_free], :] = np.nan
        covariance[:, undetermined[:n_free]] = np.nan
        scale_notes = _scale_notes(structure, dynamics, changes, pinned, coef_fit, free_coef, x_init, free_init,
                                   fixed0, runs, j_out, norms, values, identifiability_rtol)

    reasons = []
    if fit["message"]:
        reasons.append(fit["message"])
    if diverged.any():
        reasons.append(f"{int(diverged.sum())} of {len(diverged)} segments diverged")
    if continuity_gap > CONTINUITY_TOL:
        reasons.append(f"continuity gap {continuity_gap:.3g} noise scales (> {CONTINUITY_TOL:g})")
    if free_diverged.any():
        reasons.append("the free run of the refined model diverged in run "
                       + ", ".join(repr(runs[r].name) for r in np.flatnonzero(free_diverged)))
    converged = passes[-1]["status"] > 0 and not diverged.any() and continuity_gap <= CONTINUITY_TOL \
        and not free_diverged.any()
    coefficients = {s: {} for s in states}
    for (s, t), value in zip(dynamics.coef_pairs, coef_fit):
        coefficients[s][t] = float(value)
    segment_starts = tuple(starts_fit[layout.run == r] for r in range(n_runs))
    return Refinement(
        state_names=states,
        input_names=structure.input_names,
        output_names=structure.output_names,
        hidden=structure.hidden,
        coefficients=coefficients,
        fixed=structure.fixed,
        initial_states=tuple(x_init),
        segment_starts=segment_starts,
        segment_length=int(segment_length),
        substeps=int(substeps_used),
        cost=float(0.5 * r_final @ r_final),
        iterations=int(sum(f["njev"] for f in passes)),
        n_evaluations=int(sum(f["nfev"] for f in passes)),
        converged=bool(converged),
        message="; ".join(reasons),
        continuity_gap=continuity_gap,
        output_scale=y_scale,
        singular_values=singular_values,
        parameter_names=parameter_names,
        not_identifiable=tuple(not_identifiable),
        scale_notes=tuple(scale_notes),
        standard_errors=standard_errors,
        standard_errors_hac=standard_errors_hac,
        hac_lags=int(resolved_lags),
        covariance=covariance,
        free_names=free_names,
        residual_variance=float(sigma2),
        simulated_states=tuple(sim_states),
        simulated_outputs=tuple(sim_outputs),
        output_rmse=output_rmse,
        interpolation=interpolation,
        notes=tuple(notes),
    )


def _solve(problem, jacobian, max_nfev, deadline, time_limit):
    """least_squares within the budget; returns x, status, message, nfev, njev."""
    p0 = problem.pack(problem.coef0, problem.starts0)
    budget = _Budget(problem, deadline)
    tr_solver = "exact" if problem.dense else "lsmr"
    if jacobian == "analytic":
        jac, options = budget.jac, {}
    else:  # scipy takes a sparsity pattern only with lsmr
        jac, options = jacobian, ({} if problem.dense else {"jac_sparsity": problem.sparsity()})
    try:
        result = least_squares(budget.fun, p0, jac=jac, method="trf", x_scale="jac", max_nfev=max_nfev,
                               tr_solver=tr_solver, ftol=1e-10, xtol=1e-10, gtol=1e-10, **options)
    except _OutOfTime:
        best = budget.best_p if budget.best_p is not None else p0
        return {"x": best, "status": TIMED_OUT, "nfev": budget.n_fun, "njev": budget.n_jac,
                "message": f"stopped at the time limit of {time_limit:g} s (best point so far returned)"}
    message = "" if result.status > 0 else (
        f"stopped after max_nfev = {max_nfev} evaluations" if result.status == 0 else result.message)
    return {"x": result.x, "status": result.status, "nfev": result.nfev, "njev": result.njev or 0,
            "message": message}


def _local_fit(t, x, at):
    """Value at sample ``at`` of the least-squares quadratic through the START_WINDOW nearest samples."""
    n = len(t)
    half = START_WINDOW // 2
    lo = int(np.clip(at - half, 0, max(n - START_WINDOW, 0)))
    hi = min(n, lo + START_WINDOW)
    s = t[lo:hi] - t[at]
    degree = min(2, hi - lo - 1)
    scale = np.max(np.abs(s)) or 1.0
    coef = np.polynomial.polynomial.polyfit(s / scale, x[lo:hi], degree)
    return float(coef[0])


def _limits(trajectories, x_first, factor):
    stacked = np.vstack(trajectories + [x_first])
    with np.errstate(all="ignore"):
        low, high = np.nanmin(stacked, axis=0), np.nanmax(stacked, axis=0)
    low, high = np.where(np.isfinite(low), low, 0.0), np.where(np.isfinite(high), high, 0.0)
    center = 0.5 * (low + high)
    half = 0.5 * (high - low)
    half = np.where(half > 0, half, np.maximum(np.abs(center), 1.0))
    return center, factor * half


def _needed_substeps(dynamics, runs, trajectories, coef):
    """Smallest substep count with h·ρ(∂f/∂x) ≤ RK4_STEP_LIMIT along the starting trajectories."""
    xi = dynamics.xi(coef)
    need = 1
    for run, traj in zip(runs, trajectories):
        x = np.where(np.isfinite(traj), traj, 0.0)
        stride = max(1, len(x) // 200)
        with np.errstate(all="ignore"):
            fx = dynamics.state_jacobian(x[::stride], run.u[::stride], xi)
        fx = np.where(np.isfinite(fx), fx, 0.0)
        rho = float(np.max(np.abs(np.linalg.eigvals(fx)))) if fx.size else 0.0
        h = float(np.max(np.diff(run.t)))
        need = max(need, int(math.ceil(h * rho / RK4_STEP_LIMIT)))
    return min(need, 1000)


def _segment_starts(runs, layout, trajectories, measured, fixed0, previous):
    """Starting values (n_seg, n_states) of every segment and which of them are free."""
    n_states = trajectories[0].shape[1]
    starts = np.empty((layout.n_segments, n_states))
    for g in range(layout.n_segments):
        r, a = layout.run[g], layout.first[g]
        traj = trajectories[r]
        for k in range(n_states):
            if k in measured:
                starts[g, k] = _local_fit(runs[r].t, traj[:, k], a)
            else:
                starts[g, k] = traj[a, k]
    if previous is not None:  # a second pass starts from the first one's segment starts
        old_layout, old_starts = previous
        if np.array_equal(old_layout.first, layout.first) and np.array_equal(old_layout.run, layout.run):
            starts = old_starts.copy()
    free = np.ones_like(starts, dtype=bool)
    for r in range(len(runs)):
        g = np.flatnonzero(layout.run == r)[0]
        given = np.isfinite(fixed0[r])
        starts[g, given] = fixed0[r, given]
        free[g, given] = False
    return starts, free


def _signed(value, name, first):
    """``-0.58, "a", True -> "−0.58·a"``; later pieces get a spaced sign."""
    if first:
        return f"{'−' if value < 0 else ''}{abs(value):.2f}·{name}"
    return f" {'−' if value < 0 else '+'} {abs(value):.2f}·{name}"


def _direction_text(v, norms, values, names, n_free, runs, states, free_init):
    """A null direction as a sentence over named coefficients (relative changes).

    ``v`` is a unit vector in column-scaled coordinates; the parameter change is
    v / norms. Coefficients are shown as δθ/θ (as the change itself where θ = 0),
    normalised to unit length; initial values only by the states they belong to.
    """
    delta = v / norms
    nonzero = values[:n_free] != 0
    coef_part = np.where(nonzero, delta[:n_free] / np.where(nonzero, values[:n_free], 1.0), delta[:n_free])
    total = np.linalg.norm(v)
    index = [k for r in range(len(runs)) for k in range(len(states)) if free_init[r, k]]
    initial = [states[k] for k in dict.fromkeys(index)
               if np.linalg.norm(v[n_free:][np.array(index) == k]) > SHOWN_COMPONENT * total]
    initial_text = " and ".join(f"the initial values of {state}" for state in initial)
    if n_free and np.linalg.norm(v[:n_free]) > SHOWN_COMPONENT * total:
        rel = coef_part / np.linalg.norm(coef_part)
        shown = [(rel[j], names[j]) for j in range(n_free) if abs(rel[j]) >= SHOWN_COMPONENT]
        if shown[0][0] < 0:  # the sign of a direction is arbitrary: lead with a plus
            shown = [(-a, n) for a, n in shown]
        text = "".join(_signed(a, n, i == 0) for i, (a, n) in enumerate(shown))
        together = f", together with {initial_text}" if initial else ""
        combination = f"{text} (relative changes{together})"
    elif initial:
        combination = f"a combination of {initial_text}"
    else:
        combination = "a combination of the parameters"
    return NOT_DETERMINED.format(combination=combination)


def _scale_change(structure, dynamics, hidden):
    """Relative change of every coefficient under x_h → (1 + ε)·x_h, per unit ε.

    The coefficient of a term with x_h**p changes by (δ_ih − p)·ε in the equation of
    state i, since d(a·x_h)/dt = a·f_h and x_h = (a·x_h)/a elsewhere. None when there is
    no such symmetry: x_h in an output, or in a term that is not a monomial in it.
    """
    if any(hidden in e.names for e in structure._parsed_outputs.values()):
        return None
    change = []
    for state, term in dynamics.coef_pairs:
        key = term_key(term)
        if key == ("constant",):
            power = 0
        elif key[0] == "text":
            if hidden in structure._parsed[(state, term)].names:
                return None
            power = 0
        else:
            power = dict(key).get(hidden, 0)
        change.append((1.0 if state == hidden else 0.0) - power)
    return np.array(change)


def _scale_rules(dynamics, hidden_index, change, coef, free_coef, fixed0, runs):
    """The caller's rules that set a hidden state's scale, and the runs where its initial value is fixed at 0."""
    rules, notes = [], []
    for j, (s, t) in enumerate(dynamics.coef_pairs):
        if not free_coef[j] and change[j] != 0 and coef[j] != 0:
            rules.append(f"the fixed coefficient {coefficient_name(s, t)} = {coef[j]:.6g}")
    for r, run in enumerate(runs):
        value = fixed0[r, hidden_index]
        if np.isfinite(value):
            if value != 0:
                rules.append(f"its initial value fixed at {value:.6g} in run {run.name!r}")
            else:
                notes.append((r, run.name))
    return rules, notes


def _scale_notes(structure, dynamics, changes, pinned, coef, free_coef, x_init, free_init, fixed0, runs, j_out,
                 norms, values, rtol):
    """Per hidden state, whether x_h → a·x_h leaves the outputs unchanged, or which rule prevents it."""
    notes = []
    states = structure.state_names
    for h in structure.hidden:
        change = changes.get(h)
        if change is None:
            continue
        k = states.index(h)
        rules, zero_runs = _scale_rules(dynamics, k, change, coef, free_coef, fixed0, runs)
        notes += [SCALE_ZERO_INITIAL.format(state=h, run=name) for _, name in zero_runs]
        if rules:
            notes.append(SCALE_SET.format(state=h, rule="; ".join(rules)))
            continue
        delta_coef = change * coef
        x_change = np.where(np.arange(len(states)) == k, x_init, 0.0)
        delta = np.concatenate([delta_coef[free_coef], x_change[free_init]])
        scaled = delta * norms
        if not np.any(scaled):
            continue
        along = np.linalg.norm(j_out @ delta) / (values[0] * np.linalg.norm(scaled))
        if along < rtol:
            names = ", ".join(coefficient_name(s, t) for (s, t), c, v in zip(dynamics.coef_pairs, change, coef)
                              if c != 0 and v != 0)
            note = SCALE_FREE.format(state=h, coefficients=names)
            if h in pinned:
                j = pinned[h]
                note += (f"; during the fit it was held by keeping {coefficient_name(*dynamics.coef_pairs[j])} "
                         f"at its starting value {coef[j]:.6g}")
            notes.append(note)
        else:
            notes.append(SCALE_SET.format(state=h, rule="the outputs"))
    return notes
