"""The identified model: evaluate f(x, u), simulate, save to and load from ``model.json``.

The file format ``discover-model/1`` is the contract of DESIGN.md: states, inputs,
and one equation per state whose terms carry an expression over the column names,
a coefficient in the data's units and an inclusion probability. Expressions are
read back through the whitelist parser; nothing in a model file is executed.
"""

from __future__ import annotations

import json
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np

from . import simulate as _simulate
from .exceptions import DiscoverError, ModelFileError
from .expressions import parse_expression
from .terms import TermEvaluator

FORMAT = "discover-model/1"


@dataclass(frozen=True)
class Model:
    """dx/dt = Θ(x, u) Ξ over a set of named terms.

    Attributes
    ----------
    state_names, input_names : tuple of str
    terms : tuple of str
        Expression of each term (row of ``coef``).
    coef : ndarray of shape (n_terms, n_states)
        Coefficients in the data's units; zero where a term is not in an equation.
    term_stats : dict of str -> ndarray of shape (n_terms, n_states)
        Per-term figures written beside each coefficient (e.g. inclusion_probability).
    info : dict
        Further top-level fields of the model file (threshold, derivative method...).
    """

    state_names: tuple
    input_names: tuple
    terms: tuple
    coef: np.ndarray
    term_stats: dict = field(default_factory=dict)
    info: dict = field(default_factory=dict)

    def __post_init__(self):
        known = tuple(self.state_names) + tuple(self.input_names)
        used = np.flatnonzero(np.any(self.coef != 0, axis=1))
        parsed = [parse_expression(self.terms[i], known, where=f"model term {self.terms[i]!r}") for i in used]
        object.__setattr__(self, "_used", used)
        object.__setattr__(self, "_evaluate", TermEvaluator(parsed, known))
        object.__setattr__(self, "_coef_used", np.ascontiguousarray(self.coef[used]))

    @property
    def support(self):
        """Bool ndarray of shape (n_terms, n_states): which terms each equation keeps."""
        return self.coef != 0

    def rhs(self, x, u=None):
        """dx/dt at x of shape (n_states,) or (n_samples, n_states); u likewise for inputs."""
        x = np.asarray(x, dtype=float)
        single = x.ndim == 1
        x2 = x.reshape(1, -1) if single else x
        if u is None:
            u = np.empty((len(x2), 0))
        n_inputs = len(self.input_names)
        u2 = np.asarray(u, dtype=float)
        u2 = np.empty((len(x2), 0)) if n_inputs == 0 else np.broadcast_to(u2.reshape(-1, n_inputs),
                                                                            (len(x2), n_inputs))
        theta = self._evaluate(np.hstack([x2, u2]))
        dx = theta @ self._coef_used
        if not np.isfinite(dx).all():
            # A non-finite term must not spoil equations that do not contain it (0 · inf is NaN).
            kept = self._coef_used != 0
            dx = np.stack([theta[:, kept[:, i]] @ self._coef_used[kept[:, i], i]
                           for i in range(dx.shape[1])], axis=1)
        return dx[0] if single else dx

    def simulate(self, t, x0, u=None, *, interpolation="linear", method="LSODA", rtol=1e-6,
                 atol=1e-9, limits=None, time_limit=_simulate.DEFAULT_TIME_LIMIT):
        """Simulate from x0 over times t with input u (samples at t, or a callable of t).

        Returns a :class:`discover.simulate.Simulation`; a diverging run is reported
        through its ``diverged`` flag, not raised.
        """
        t = np.asarray(t, dtype=float)
        if u is None:
            u = np.empty((len(t), 0))
        return _simulate.simulate(
            self.rhs, t, x0, u, interpolation=interpolation, method=method, rtol=rtol, atol=atol,
            limits=limits, state_names=list(self.state_names), time_limit=time_limit,
        )

    # --- states and outputs (model files with hidden states; older files: every state measured)

    @property
    def hidden_states(self):
        """States without a measurement (``info["hidden"]``); () for a fully measured model."""
        return tuple(self.info.get("hidden", ()))

    @property
    def output_expressions(self):
        """``{output name: expression}``; default every state not hidden is its own output."""
        listed = self.info.get("outputs")
        if not listed:
            return {s: s for s in self.state_names if s not in self.hidden_states}
        return {entry["name"]: entry["expr"] for entry in listed}

    def outputs(self, x, u=None):
        """y = g(x, u) for x of shape (n_samples, n_states); shape (n_samples, n_outputs)."""
        x = np.atleast_2d(np.asarray(x, dtype=float))
        u = np.empty((len(x), 0)) if u is None else np.asarray(u, dtype=float).reshape(len(x), -1)
        known = tuple(self.state_names) + tuple(self.input_names)
        columns = {**{s: x[:, k] for k, s in enumerate(self.state_names)},
                   **{n: u[:, k] for k, n in enumerate(self.input_names)}}
        return np.column_stack([parse_expression(e, known).evaluate(columns)
                                for e in self.output_expressions.values()])

    def estimate_states(self, t, y, u=None, *, x0=None, x0_cov=None, measurement_std=None, process_std=None,
                        interpolation=None):
        """Filter and smooth this model's states (hidden ones included) from measured outputs.

        Unscented Kalman filter and RTS smoother (:func:`discover.estimation.estimate_states`)
        with the noise levels the run that fitted the model resolved (``info["estimation"]``)
        unless given. ``y`` of shape (n_samples, n_outputs), columns in the order of
        ``output_expressions``; x0 default: the estimation record's typical state.
        Returns a :class:`discover.estimation.StateEstimate`.
        """
        from .estimation import estimate_states
        from .simulate import guess_interpolation

        record = self.info.get("estimation", {})
        outputs = list(self.output_expressions)

        def pick(given, key, names):
            if given is not None:
                return given
            values = record.get(key)
            if not isinstance(values, dict) or any(n not in values for n in names):
                raise DiscoverError(f"estimate_states: give `{key}`; the model file records none for {names}.")
            return np.array([float(values[n]) for n in names])

        measurement_std = pick(measurement_std, "measurement_std", outputs)
        process_std = pick(process_std, "process_std", list(self.state_names))
        if x0 is None:
            x0 = pick(None, "typical_state", list(self.state_names))
        if x0_cov is None and isinstance(record.get("typical_spread"), dict):
            spread = np.array([float(record["typical_spread"].get(s, 1.0)) for s in self.state_names])
            x0_cov = np.diag(np.maximum(spread, 1e-12) ** 2)
        t = np.asarray(t, dtype=float)
        u_arr = np.empty((len(t), 0)) if u is None else np.asarray(u, dtype=float).reshape(len(t), -1)
        if interpolation is None:
            interpolation = record.get("interpolation") or guess_interpolation(u_arr)
        return estimate_states(lambda x, uu: self.rhs(x, uu), lambda x, uu: self.outputs(x, uu), t, y,
                               u_arr if self.input_names else None, state_names=self.state_names, x0=x0,
                               x0_cov=x0_cov, measurement_std=measurement_std, process_std=process_std,
                               interpolation=interpolation)

    def equations(self):
        """``[(state, [(expr, coefficient, {stat: value}), ...]), ...]`` for the kept terms."""
        result = []
        for i, state in enumerate(self.state_names):
            kept = []
            for j in np.flatnonzero(self.coef[:, i]):
                stats = {name: float(values[j, i]) for name, values in self.term_stats.items()}
                kept.append((self.terms[j], float(self.coef[j, i]), stats))
            result.append((state, kept))
        return result

    def to_dict(self):
        equations = []
        for state, kept in self.equations():
            rows = []
            for expr, coefficient, stats in kept:
                stats = {k: (v if np.isfinite(v) else None) for k, v in stats.items()}
                row = {"expr": expr, "coefficient": coefficient}
                row["inclusion_probability"] = stats.pop("inclusion_probability", None)
                row.update(stats)
                rows.append(row)
            equations.append({"state": state, "terms": rows})
        return {
            "format": FORMAT,
            "states": list(self.state_names),
            "inputs": list(self.input_names),
            "equations": equations,
            **self.info,
        }

    def save(self, path):
        Path(path).write_text(json.dumps(self.to_dict(), indent=2, allow_nan=False) + "\n")


def _fail(path, why):
    raise ModelFileError(f"{path}: {why}")


def from_dict(document, where="model"):
    """Build a :class:`Model` from a parsed ``model.json`` document."""
    if not isinstance(document, dict) or document.get("format") != FORMAT:
        got = document.get("format") if isinstance(document, dict) else type(document).__name__
        _fail(where, f"not a {FORMAT} model file (format is {got!r}).")
    states, inputs = document.get("states"), document.get("inputs", [])
    if not isinstance(states, list) or not all(isinstance(s, str) for s in states) or not states:
        _fail(where, "'states' must be a non-empty list of names.")
    if not isinstance(inputs, list) or not all(isinstance(s, str) for s in inputs):
        _fail(where, "'inputs' must be a list of names.")
    equations = document.get("equations")
    if not isinstance(equations, list):
        _fail(where, "'equations' must be a list with one entry per state.")
    if len(set(states)) != len(states) or set(states) & set(inputs) or len(set(inputs)) != len(inputs):
        _fail(where, f"'states' and 'inputs' must be distinct names. Got states {states}, inputs {inputs}.")
    described = [e.get("state") if isinstance(e, dict) else None for e in equations]
    missing = [s for s in states if s not in described]
    if missing:
        _fail(where, f"no equation for the state(s) {missing}; every state needs one (with \"terms\": [] for "
                     "dx/dt = 0).")
    terms, entries = [], {}
    for k, equation in enumerate(equations):
        state = equation.get("state") if isinstance(equation, dict) else None
        if state not in states:
            _fail(where, f"equations[{k}].state must be one of {states}. Got {state!r}.")
        if described.index(state) != k:
            _fail(where, f"equations[{k}] is a second equation for {state!r}; give each state one equation.")
        listed = equation.get("terms", [])
        if not isinstance(listed, list):
            _fail(where, f"equations[{k}].terms must be a list of {{\"expr\": ..., \"coefficient\": ...}} "
                         f"entries. Got {type(listed).__name__}.")
        for m, term in enumerate(listed):
            if not isinstance(term, dict):
                _fail(where, f"equations[{k}].terms[{m}] must be an object with 'expr' and 'coefficient'. "
                             f"Got {type(term).__name__}.")
            expr, coefficient = term.get("expr"), term.get("coefficient")
            if not isinstance(expr, str) or not _is_real(coefficient):
                _fail(where, f"equations[{k}].terms[{m}] needs a string 'expr' and a finite number "
                             f"'coefficient' (not a boolean, NaN or infinity). Got {coefficient!r}.")
            if (expr, state) in entries:
                _fail(where, f"equations[{k}].terms[{m}]: the term {expr!r} appears twice in the equation of "
                             f"{state!r}; give each term once.")
            if expr not in terms:
                terms.append(expr)
            entries[(expr, state)] = term
    coef = np.zeros((len(terms), len(states)))
    stat_names = sorted({key for term in entries.values() for key, value in term.items()
                         if key not in ("expr", "coefficient") and _is_real(value)})
    stats = {name: np.full((len(terms), len(states)), np.nan) for name in stat_names}
    for (expr, state), term in entries.items():
        j, i = terms.index(expr), states.index(state)
        coef[j, i] = float(term["coefficient"])
        for name in stat_names:
            if _is_real(term.get(name)):
                stats[name][j, i] = float(term[name])
    info = {k: v for k, v in document.items() if k not in ("format", "states", "inputs", "equations")}
    _check_states_and_outputs(info, states, inputs, where)
    try:
        return Model(tuple(states), tuple(inputs), tuple(terms), coef, stats, info)
    except DiscoverError as err:
        _fail(where, str(err))


def _check_states_and_outputs(info, states, inputs, where):
    """The optional ``hidden`` and ``outputs`` keys (files without them: every state measured)."""
    hidden = info.get("hidden", [])
    if not isinstance(hidden, list) or any(h not in states for h in hidden):
        _fail(where, f"'hidden' must list states of the model ({states}). Got {hidden!r}.")
    outputs = info.get("outputs")
    if outputs is None:
        return
    if not isinstance(outputs, list) or not all(isinstance(o, dict) and isinstance(o.get("name"), str)
                                                and isinstance(o.get("expr"), str) for o in outputs):
        _fail(where, "'outputs' must be a list of {\"name\": ..., \"expr\": ...} entries.")
    for k, entry in enumerate(outputs):
        try:
            parse_expression(entry["expr"], tuple(states) + tuple(inputs), where=f"outputs[{k}] ({entry['name']!r})")
        except DiscoverError as err:
            _fail(where, str(err))


def _is_real(value):
    """A finite int or float, not a boolean."""
    if isinstance(value, bool) or not isinstance(value, (int, float)):
        return False
    try:
        return bool(np.isfinite(float(value)))
    except OverflowError:  # an integer literal beyond the float range
        return False


def _refuse_constant(token):
    raise ValueError(f"{token} is not a finite number")


def load_model(path):
    """Read a ``model.json`` back into a :class:`Model`."""
    path = Path(path)
    try:
        document = json.loads(path.read_text(encoding="utf-8"), parse_constant=_refuse_constant)
    except FileNotFoundError:
        _fail(path, "model file not found.")
    except IsADirectoryError:
        _fail(path, "is a folder; give the path of model.json.")
    except RecursionError:
        _fail(path, "cannot read the model file (JSON nested too deeply).")
    except (OSError, UnicodeDecodeError, ValueError) as err:
        _fail(path, f"cannot read the model file ({err}).")
    except OverflowError as err:
        _fail(path, f"cannot read the model file (a number is too large: {err}).")
    return from_dict(document, where=str(path))
