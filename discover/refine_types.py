"""What output-error refinement (:mod:`discover.refine`) fits, and what it returns.

:class:`MeasuredRun` is one training run (t, measured outputs, recorded inputs);
:class:`Structure` the equations with their starting coefficients, hidden states,
outputs and fixed terms, checked when it is built; :class:`Refinement` the result.
The checks of runs and per-state options that :func:`discover.refine.refine` makes at
its boundary are here too, next to the types they check.
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Collection, Mapping, Sequence

import numpy as np

from .exceptions import ConfigError, DataError
from .expressions import parse_expression
from .model import Model
from .terms import term_key

__all__ = ["MeasuredRun", "Structure", "Refinement", "structure_from_model", "coefficient_name"]


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
        uses = {}
        for (state, _), expression in parsed.items():
            uses.setdefault(state, set()).update(expression.names)
        reaches = states_reaching_outputs({s for e in parsed_outputs.values() for s in e.names}, uses, states)
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


def states_reaching_outputs(output_names, uses, states):
    """The states the outputs see: those named in an output, and, repeatedly, those named in
    the equation (``uses``: state -> names in its terms) of a state already seen."""
    reaches = {n for n in output_names if n in states}
    frontier = set(reaches)
    while frontier:
        found = {n for state in frontier for n in uses.get(state, ()) if n in states} - reaches
        reaches |= found
        frontier = found
    return reaches


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
        The same from the Newey–West covariance (:func:`~discover.identifiability.newey_west_covariance`),
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
