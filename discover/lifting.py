"""Starting values for an output-error fit with hidden states, lifted from the measured equations.

Output error from a poor start stops in a local minimum (measured on the two-tank demo:
hidden level 26 % RMS off from a start whose hidden trajectory came from second
derivatives; 0.15 % from the start below). The start here reads the hidden state off
a measured equation that it enters through one invertible term::

    dx_m/dt = c·g(h) + Σ a_j θ_j(measured, inputs)    with g(h) = h**p (p = 1, an integer, 1/2 for sqrt)

so that ``h = g⁻¹((dx_m/dt − Σ a_j θ_j) / c)`` along each run, with dx_m/dt from the
[derivatives] smoothing. The hidden state's own equation is then a linear regression
in its coefficients b, taken in integral form over blocks of LIFT_BLOCK samples,
``h(t) − h(t_block) = ∫ Σ b_k φ_k dt`` (the weak form, Messenger & Bortz 2021), which
needs no second derivative of the data. The few outer parameters (a, and c where the
data fix it) are found by :func:`scipy.optimize.least_squares` with b profiled out
(variable projection; Golub & Pereyra 1973), from both signs of c.

c is a free outer parameter only when a known term of the hidden state's own equation
that does not contain it (a calibrated pump gain) anchors its scale; otherwise c is the
known value, 1 under the ``unit_coupling`` rule, or 1 held for the start only.
A hidden state that enters no measured equation so starts from zero coefficients, its
trajectory from a simulation of the start (the notes say so).
"""

from __future__ import annotations

import ast
from dataclasses import dataclass

import numpy as np
from scipy.integrate import cumulative_trapezoid
from scipy.optimize import least_squares

from .expressions import parse_expression

#: Samples per block of the integral-form regression of a lifted hidden state's equation.
LIFT_BLOCK = 20
#: Weight of the penalty on a negative argument of a root (sqrt(h) needs h >= 0).
ROOT_PENALTY = 10.0
NOT_LIFTED = ("hidden state {state!r} enters no measured equation through a single term h, h**p or "
              "sqrt(h); its equation started from zero coefficients")


@dataclass(frozen=True)
class Lift:
    """Hidden state ``hidden`` read off the equation of ``state`` through ``term`` = hidden**power."""

    hidden: str
    state: str
    term: str
    power: float
    coupling_free: bool


@dataclass(frozen=True)
class StartValues:
    """What :func:`start_values` resolved.

    Attributes
    ----------
    coefficients : dict of str to dict of str to float
    state_guess : tuple of ndarray of shape (n_samples, n_states)
        Lifted hidden trajectories, NaN for measured states and states not lifted.
    fixed : frozenset of (str, str)
        Known terms and couplings fixed by the ``unit_coupling`` rule.
    lifts : tuple of Lift
    notes : tuple of str
    """

    coefficients: dict
    state_guess: tuple
    fixed: frozenset
    lifts: tuple
    notes: tuple


def power_of(text, name, known):
    """p when ``text`` is ``name``, ``name**p`` or ``sqrt(name)``; else None."""
    tree = parse_expression(text, known)._tree
    if isinstance(tree, ast.Name) and tree.id == name:
        return 1.0
    if (isinstance(tree, ast.BinOp) and isinstance(tree.op, ast.Pow) and isinstance(tree.left, ast.Name)
            and tree.left.id == name and isinstance(tree.right, ast.Constant)
            and isinstance(tree.right.value, (int, float)) and tree.right.value > 0):
        return float(tree.right.value)
    if (isinstance(tree, ast.Call) and isinstance(tree.func, ast.Name) and tree.func.id == "sqrt"
            and len(tree.args) == 1 and isinstance(tree.args[0], ast.Name) and tree.args[0].id == name):
        return 0.5
    return None


def _invert(s, power):
    """(h, penalty) with h**power = s; a root needs s >= 0, the penalty measures how far it is below."""
    inverse = 1.0 / power
    odd = float(inverse).is_integer() and int(inverse) % 2 == 1
    h = np.sign(s) * np.abs(s) ** inverse
    return h, (np.zeros_like(s) if odd else np.minimum(s, 0.0))


def _block_integrals(t, values):
    """∫ from each block's start, per block of LIFT_BLOCK samples; values of shape (n, k)."""
    out = np.empty_like(values)
    for start in range(0, len(t), LIFT_BLOCK):
        stop = min(start + LIFT_BLOCK, len(t))
        out[start:stop] = cumulative_trapezoid(values[start:stop], t[start:stop], initial=0.0, axis=0)
    return out


def _block_changes(t, h):
    out = np.empty_like(h)
    for start in range(0, len(t), LIFT_BLOCK):
        stop = min(start + LIFT_BLOCK, len(t))
        out[start:stop] = h[start:stop] - h[start]
    return out


def read_states(spec, smoothed):
    """States read off the data: the measured ones, and a hidden state that an output shows alone.

    An output affine in a single hidden state h, ``y = α·h + β(u)`` (a calibration, a
    feed-through), gives ``h = (y − β(u)) / α`` along the smoothed output; its rate comes
    from the [derivatives] method applied to that trajectory. Returns (names, per-run
    values, per-run rates), untrimmed.
    """
    from .derivatives import DERIVATIVE_METHODS

    known = spec.states + spec.inputs
    names = list(spec.measured)
    values = [{m: run.x[:, k] for k, m in enumerate(spec.measured)} for run in smoothed.full]
    rates = [{m: run.x_dot[:, k] for k, m in enumerate(spec.measured)} for run in smoothed.full]
    for column, (name, text) in enumerate(spec.outputs.items()):
        expression = parse_expression(text, known)
        states = [n for n in expression.names if n in spec.states]
        if name in spec.measured or len(states) != 1 or states[0] not in spec.hidden or states[0] in names:
            continue
        h = states[0]
        per_run = []
        for run in smoothed.full:
            columns = {n: run.u[:, k] for k, n in enumerate(spec.inputs)}
            at = [expression.evaluate({**columns, h: np.full(len(run.t), v)}) for v in (0.0, 1.0, 2.0)]
            slope = at[1] - at[0]
            if not np.allclose(at[2] - at[1], slope) or not np.all(np.abs(slope) > 0):
                break  # not affine in h, or h does not show
            per_run.append((run.x[:, column] - at[0]) / slope)
        else:
            names.append(h)
            for r, (run, trajectory) in enumerate(zip(smoothed.full, per_run)):
                values[r][h] = trajectory
                rates[r][h] = DERIVATIVE_METHODS[smoothed.method](run.t - run.t[0], trajectory[:, None],
                                                                  **dict(smoothed.options))[1][:, 0]
    return tuple(names), values, rates


def _lstsq(theta, target):
    if theta.shape[1] == 0:
        return np.zeros(0)
    scale = np.linalg.norm(theta, axis=0)
    scale = np.where(scale > 0, scale, 1.0)
    return np.linalg.lstsq(theta / scale, target, rcond=None)[0] / scale


def start_values(spec, smoothed, *, scale_rule="unset"):
    """Starting coefficients and hidden trajectories for :func:`discover.refine.refine`.

    Parameters
    ----------
    spec : discover.hidden_config.HiddenSpec
    smoothed : discover.smoothing.SmoothedRuns
        The training runs' measured columns (``spec.output_columns``), smoothed and
        differentiated; the measured states are its first columns.
    scale_rule : {"unset", "unit_coupling"}

    Returns
    -------
    StartValues
    """
    states, inputs = spec.states, spec.inputs
    known_names = states + inputs
    parsed = {(s, t): parse_expression(t, known_names) for s in states for t in spec.equations[s]}
    runs = smoothed.trimmed
    trim = smoothed.trim
    readable, read_values, rates = read_states(spec, smoothed)
    keep = [slice(trim, len(run.t) - trim) for run in smoothed.full]
    values_trimmed = [{n: v[k] for n, v in run_values.items()} for run_values, k in zip(read_values, keep)]
    rates_trimmed = [{n: v[k] for n, v in run_rates.items()} for run_rates, k in zip(rates, keep)]
    notes, fixed = [], set(spec.known)
    lifts = []
    for h in spec.hidden:
        if h in readable:
            continue  # read off an output
        anchored = any(s == h and h not in parsed[(s, t)].names for s, t in spec.known)
        for m in readable:
            found = [(t, power_of(t, h, known_names)) for t in spec.equations[m] if parsed[(m, t)].names == (h,)]
            found = [(t, p) for t, p in found if p is not None]
            if found:
                term, power = found[0]
                free = (m, term) not in spec.known and anchored
                if (m, term) not in spec.known and not anchored and scale_rule == "unit_coupling":
                    fixed.add((m, term))
                lifts.append(Lift(h, m, term, power, free))
                break
        else:
            notes.append(NOT_LIFTED.format(state=h))
    lifted = {lift.hidden for lift in lifts}
    measured_set = set(readable) | set(inputs)
    base = [{**read, **{name: run.u[:, k] for k, name in enumerate(inputs)}}
            for run, read in zip(runs, values_trimmed)]
    coefficients = {s: {t: spec.known.get((s, t), 0.0) for t in spec.equations[s]} for s in states}

    def measured_terms(m):
        return [t for t in spec.equations[m] if set(parsed[(m, t)].names) <= measured_set and (m, t) not in spec.known]

    def known_part(state, columns):
        total = 0.0
        for (s, t), value in spec.known.items():
            if s == state and set(parsed[(s, t)].names) <= set(columns):
                total = total + value * parsed[(s, t)].evaluate(columns)
        return total

    # Outer parameters: per lift, the measured terms' coefficients a, then c if free.
    layout = []
    for lift in lifts:
        terms = measured_terms(lift.state)
        theta = np.vstack([(np.column_stack([parsed[(lift.state, t)].evaluate(c) for t in terms])
                            if terms else np.empty((len(run.t), 0))) for run, c in zip(runs, base)])
        target = np.concatenate([rate[lift.state] - known_part(lift.state, c) for rate, c in zip(rates_trimmed, base)])
        layout.append((lift, terms, _lstsq(theta, target)))
    c_start = {lift.hidden: spec.known.get((lift.state, lift.term), 1.0) for lift in lifts}

    def hidden_paths(p):
        """Lifted hidden trajectories per run, and the root penalties."""
        paths, penalties, i = [{} for _ in runs], [], 0
        for lift, terms, _ in layout:
            a = p[i:i + len(terms)]
            i += len(terms)
            c = p[i] if lift.coupling_free else c_start[lift.hidden]
            i += int(lift.coupling_free)
            for r, (run, columns) in enumerate(zip(runs, base)):
                rest = sum((a[j] * parsed[(lift.state, t)].evaluate(columns) for j, t in enumerate(terms)),
                           np.zeros(len(run.t)))
                s = (rates_trimmed[r][lift.state] - known_part(lift.state, columns) - rest) / c
                paths[r][lift.hidden], penalty = _invert(s, lift.power)
                penalties.append(ROOT_PENALTY * penalty)
        return paths, penalties

    def hidden_fits(paths):
        """b of each lifted hidden state's equation by the integral-form regression; residuals."""
        residuals, fits = [], {}
        for h in lifted:
            terms = [t for t in spec.equations[h] if (h, t) not in spec.known
                     and set(parsed[(h, t)].names) <= measured_set | lifted]
            theta, target = [], []
            for run, columns, path in zip(runs, base, paths):
                full = {**columns, **path}
                with np.errstate(invalid="ignore", divide="ignore", over="ignore"):
                    phi = np.column_stack([parsed[(h, t)].evaluate(full) for t in terms]) if terms \
                        else np.empty((len(run.t), 0))
                    known = np.broadcast_to(known_part(h, full), (len(run.t),))
                theta.append(_block_integrals(run.t, phi))
                target.append(_block_changes(run.t, path[h]) - _block_integrals(run.t, known[:, None])[:, 0])
            theta, target = np.nan_to_num(np.vstack(theta)), np.nan_to_num(np.concatenate(target))
            b = _lstsq(theta, target)
            fits[h] = dict(zip(terms, b))
            residuals.append(target - theta @ b)
        return fits, residuals

    p0 = np.concatenate([np.append(a0, [1.0] if lift.coupling_free else []) for lift, _, a0 in layout]) \
        if layout else np.zeros(0)
    if layout:
        paths0, _ = hidden_paths(p0)
        scale = max(float(np.std(np.concatenate([p[h] for p in paths0 for h in p]))), 1e-12)

        def residual(p):
            paths, penalties = hidden_paths(p)
            return np.concatenate(hidden_fits(paths)[1] + penalties) / scale

        best = None
        free_c = [i for i, (lift, terms, _) in enumerate(layout) if lift.coupling_free]
        for sign in ((1.0, -1.0) if free_c else (1.0,)):
            start = p0.copy()
            i = 0
            for lift, terms, _ in layout:
                i += len(terms)
                if lift.coupling_free:
                    start[i] = sign
                    i += 1
            if start.size:
                fit = least_squares(residual, start, x_scale="jac")
                if best is None or fit.cost < best.cost:
                    best = fit
        p = best.x if best is not None else p0
        paths, _ = hidden_paths(p)
        fits, _ = hidden_fits(paths)
        i = 0
        for lift, terms, _ in layout:
            coefficients[lift.state].update(zip(terms, p[i:i + len(terms)]))
            i += len(terms)
            coefficients[lift.state][lift.term] = p[i] if lift.coupling_free else c_start[lift.hidden]
            i += int(lift.coupling_free)
        for h, values in fits.items():
            coefficients[h].update(values)
    else:
        paths = [{} for _ in runs]
    # The other equations: derivative regressions on the measured and lifted columns.
    lifted_equations = {lift.state for lift in lifts}
    for m in readable:
        if m in lifted_equations:
            continue
        terms = [t for t in spec.equations[m] if (m, t) not in spec.known
                 and set(parsed[(m, t)].names) <= measured_set | lifted]
        theta, target = [], []
        for run, columns, path, rate in zip(runs, base, paths, rates_trimmed):
            full = {**columns, **path}
            with np.errstate(invalid="ignore", divide="ignore", over="ignore"):
                theta.append(np.column_stack([parsed[(m, t)].evaluate(full) for t in terms]) if terms
                             else np.empty((len(run.t), 0)))
            target.append(rate[m] - np.broadcast_to(known_part(m, full), (len(run.t),)))
        coefficients[m].update(zip(terms, _lstsq(np.nan_to_num(np.vstack(theta)),
                                                 np.nan_to_num(np.concatenate(target)))))
    guesses = []
    for run, path, read in zip(smoothed.full, paths, read_values):
        guess = np.full((len(run.t), len(states)), np.nan)
        for h in spec.hidden:
            if h in read:
                guess[:, states.index(h)] = read[h]
        for h, values in path.items():
            lift = next(lift for lift in lifts if lift.hidden == h)
            values = np.maximum(values, 0.0) if not float(1.0 / lift.power).is_integer() else values
            padded = np.concatenate([np.full(trim, values[0]), values, np.full(len(run.t) - len(values) - trim,
                                                                                values[-1])])
            guess[:, states.index(h)] = padded
        guesses.append(guess)
    coefficients = {s: {t: float(np.nan_to_num(v)) for t, v in terms.items()} for s, terms in coefficients.items()}
    return StartValues(coefficients, tuple(guesses), frozenset(fixed), tuple(lifts), tuple(notes))
