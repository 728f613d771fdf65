"""The output-error stage for models with hidden states: ẋ = f(x, u), y = g(x, u).

Every equation, and each run's unknown initial values of the hidden states, are fitted
to the measured outputs by multiple shooting (:func:`discover.refine.refine`; Bock &
Plitt 1984), from starting values lifted off the measured equations
(:mod:`discover.lifting`). Equations taken from the [terms] library are then made sparse
by thresholded output-error refits: a term whose share |ξ|·rms(θ)/rms(ẋ) along the
fitted trajectory is below ``[hidden].threshold`` is dropped and the rest refitted, at
most ``[hidden].rounds`` times (the dimensionless scale of the derivative-based
selection, DESIGN.md). Structure hypotheses ([hidden].equations) are fitted as given.

What the data determine comes from :mod:`discover.identifiability` (scaled SVD of the
output sensitivities): directions they leave free are reported as combinations of
named coefficients, and the scale of each hidden state says which rule set it. A
coefficient along a free direction is not a finding; the summary, report and model
file say so (``identifiability.arbitrary``).

Caution: an identified model is fitted to the training runs only. Before it is used to
control real equipment, validate it on independent runs and defer to local codes and
licensed engineering practice.
"""

from __future__ import annotations

import warnings
from dataclasses import dataclass

import numpy as np

from .exceptions import ConfigError
from .expressions import parse_expression
from .lifting import start_values
from .model import Model

#: Output samples the training runs must hold per unknown (coefficients and hidden initial
#: values): ten observations per parameter, a rule of thumb of regression (common practice).
SAMPLES_PER_UNKNOWN = 10

TOO_MANY_HIDDEN = (
    "{where}: [hidden].states lists {n_hidden} hidden state(s); with these equations the fit has {unknowns} "
    "unknowns ({coefficients} coefficients, {initial} hidden initial values) but the training runs hold "
    "{samples} output samples, fewer than {per} per unknown. Use fewer hidden states, give their equations in "
    "[hidden].equations, or add runs."
)
ARBITRARY = ("Coefficients along a direction the data do not determine are one point of a family that fits "
             "equally well, not findings: {names}.")


@dataclass(frozen=True)
class HiddenFit:
    """What the output-error stage resolved.

    Attributes
    ----------
    model : Model
        Every state's equation (hidden ones included), refined coefficients, standard
        errors and intervals, and in ``info`` the outputs, hidden states and identifiability.
    refinement : discover.refine_types.Refinement
        Of the last fit.
    start : discover.lifting.StartValues
    dropped : tuple of str
        Library terms dropped by the threshold, ``"term in d(state)/dt"``.
    rounds : int
        Output-error fits made.
    arbitrary : tuple of str
        Coefficient names along directions the data do not determine.
    notes : tuple of str
    """

    model: Model
    refinement: object
    start: object
    dropped: tuple
    rounds: int
    arbitrary: tuple
    notes: tuple


def check_support(spec, runs, where):
    """Refuse more unknowns than the training runs' outputs can support (one line naming the key)."""
    coefficients = sum(len(terms) for terms in spec.equations.values()) - len(spec.known)
    initial = len([h for h in spec.hidden if h not in spec.initial]) * len(runs)
    samples = sum(len(run.t) for run in runs) * len(spec.outputs)
    if samples < SAMPLES_PER_UNKNOWN * (coefficients + initial):
        raise ConfigError(TOO_MANY_HIDDEN.format(where=where, n_hidden=len(spec.hidden),
                                                 unknowns=coefficients + initial, coefficients=coefficients,
                                                 initial=initial, samples=samples, per=SAMPLES_PER_UNKNOWN))


def shares(spec, result, inputs):
    """|ξ|·rms(θ)/rms(ẋ) of every (state, term) along the refined free run, NaN where undefined.

    ``inputs``: each training run's recorded input, shape (n_samples, n_inputs).
    """
    model = result.model()
    known = spec.states + spec.inputs
    x = np.vstack(result.simulated_states)
    u = np.vstack(inputs)
    good = np.isfinite(x).all(axis=1)
    x, u = x[good], u[good]
    columns = {**{s: x[:, k] for k, s in enumerate(spec.states)}, **{n: u[:, k] for k, n in enumerate(spec.inputs)}}
    with np.errstate(all="ignore"):
        rates = model.rhs(x, u) if len(x) else np.full((0, len(spec.states)), np.nan)
    out = {}
    for i, state in enumerate(spec.states):
        rms_rate = float(np.sqrt(np.mean(rates[:, i] ** 2))) if len(x) else np.nan
        for term, value in result.coefficients[state].items():
            with np.errstate(all="ignore"):
                theta = parse_expression(term, known).evaluate(columns) if len(x) else np.array([np.nan])
            rms = float(np.sqrt(np.mean(theta ** 2)))
            out[(state, term)] = abs(value) * rms / rms_rate if rms_rate > 0 else np.nan
    return out


def _structure(spec, coefficients, fixed):
    from .refine_types import Structure

    return Structure(spec.states, spec.inputs, coefficients, hidden=spec.hidden, outputs=dict(spec.outputs),
                     fixed=fixed)


def fit_hidden(spec, training, smoothed, settings, interpolation):
    """Fit every equation by output error; threshold the library equations; return a :class:`HiddenFit`.

    Parameters
    ----------
    spec : discover.hidden_config.HiddenSpec
    training : discover.data.Dataset
        Columns ``spec.output_columns`` (the measured outputs), in memory.
    smoothed : discover.smoothing.SmoothedRuns
        The same runs smoothed and differentiated.
    settings : discover.schema.Settings
    interpolation : {"linear", "zoh"} or a sequence of them, one per training run
        Of the inputs between samples, as resolved.
    """
    from scipy.stats import norm

    from .refine import refine
    from .refine_types import MeasuredRun, coefficient_name

    check_support(spec, training.runs, settings.source)
    start = start_values(spec, smoothed, scale_rule=settings.hidden.scale)
    runs = [MeasuredRun(run.t, run.x, run.u, run.name) for run in training.runs]
    fixed_initial = dict(spec.initial) or None
    options = dict(interpolation=interpolation, fixed_initial=fixed_initial,
                   max_nfev=settings.refine.max_evaluations, time_limit=settings.refine.time_limit,
                   divergence_factor=settings.simulation.divergence_factor)
    coefficients, guess = start.coefficients, list(start.state_guess)
    protected = set(start.fixed) | {(lift.state, lift.term) for lift in start.lifts}
    dropped, notes, rounds, previous, small = [], list(start.notes), 0, None, []
    while True:
        with warnings.catch_warnings():  # a diverged free run is reported in the result, not as numpy's warning
            warnings.filterwarnings("ignore", "Mean of empty slice", RuntimeWarning)
            result = refine(_structure(spec, coefficients, start.fixed), runs, state_guess=guess, **options)
        rounds += 1
        if previous is not None and not result.converged:
            # The refit without the small terms failed: keep the converged fit with them.
            notes.append(f"The output-error refit without {', '.join(dropped[-len(small):])} did not converge; "
                         "the fit with them is kept.")
            result, dropped = previous, dropped[:-len(small)]
            break
        if not spec.from_library or rounds > settings.hidden.rounds or not result.converged:
            break
        small = [(s, t) for (s, t), share in shares(spec, result, [run.u for run in runs]).items()
                 if s in spec.from_library and (s, t) not in protected and not share >= settings.hidden.threshold]
        if not small:
            break
        dropped += [f"{t} in d({s})/dt" for s, t in small]
        previous = result
        coefficients = {s: {t: v for t, v in terms.items() if (s, t) not in small}
                        for s, terms in result.coefficients.items()}
        guess = [x.copy() for x in result.simulated_states]  # NaN after a diverged stop
        for g in guess:
            g[:, :len(spec.measured)] = np.nan  # measured states start from the data
    if not result.converged:
        notes.append(f"The output-error fit did not converge ({result.message or 'no reason given'}); the "
                     "coefficients are the best point reached, not a fit to trust.")
    free_pairs = [(s, t) for s in spec.states for t in result.coefficients[s] if (s, t) not in result.fixed]
    arbitrary = tuple(coefficient_name(s, t) for s, t in free_pairs
                      if not np.isfinite(result.standard_errors[s][t])) if result.singular_values.size else ()
    if not result.singular_values.size:
        notes.append("What the data determine was not computed (the free run of the fitted model diverged); "
                     "no coefficient is established.")
    if arbitrary:
        notes.append(ARBITRARY.format(names=", ".join(arbitrary)))
    model = _model(spec, result, start, settings, norm.ppf(0.5 + settings.refine.level / 2), arbitrary, dropped,
                   rounds, [run.name for run in runs])
    return HiddenFit(model, result, start, tuple(dropped), rounds, arbitrary, tuple(notes))


def _model(spec, result, start, settings, z, arbitrary, dropped, rounds, run_names):
    terms = []
    for state in spec.states:
        terms += [t for t in result.coefficients[state] if t not in terms]
    shape = (len(terms), len(spec.states))
    coef = np.zeros(shape)
    stats = {name: np.full(shape, np.nan) for name in ("start_value", "standard_error", "interval_low",
                                                       "interval_high")}
    for i, state in enumerate(spec.states):
        for term, value in result.coefficients[state].items():
            j = terms.index(term)
            coef[j, i] = value
            se = result.standard_errors_hac[state].get(term, np.nan)
            stats["start_value"][j, i] = start.coefficients[state].get(term, np.nan)
            stats["standard_error"][j, i] = se
            stats["interval_low"][j, i], stats["interval_high"][j, i] = value - z * se, value + z * se
    info = {
        "time": settings.data.time,
        "hidden": list(spec.hidden),
        "outputs": [{"name": name, "expr": expr} for name, expr in spec.outputs.items()],
        "known_terms": [{"state": s, "expr": t, "coefficient": v} for (s, t), v in spec.known.items()],
        "fixed_terms": [{"state": s, "expr": t} for s, t in sorted(result.fixed)],
        "output_error": {
            "method": "output error, multiple shooting, initial hidden states fitted per run",
            "converged": bool(result.converged),
            "message": result.message,
            "segment_length": int(result.segment_length),
            "iterations": int(result.iterations),
            "fits": int(rounds),
            "threshold": float(settings.hidden.threshold),
            "threshold_scale": "dimensionless: |coefficient| * rms(term) / rms(derivative) along the fitted run",
            "dropped_by_threshold": list(dropped),
            "interval_level": float(settings.refine.level),
            "interval_meaning": (f"coefficient ± {z:.3f} standard errors (Newey-West covariance of the output "
                                 "residuals): a confidence interval given the structure"),
            "output_rmse": {name: float(v) for name, v in zip(result.output_names, result.output_rmse)},
            "initial_states": {run: dict(zip(spec.states, map(float, x0)))
                               for run, x0 in zip(run_names, result.initial_states)},
        },
        "identifiability": {
            "not_identifiable": list(result.not_identifiable),
            "scale": [note.replace("in Structure.fixed", "in [hidden].known").replace(
                "in fixed_initial", "in [hidden].initial") for note in result.scale_notes],
            "arbitrary": list(arbitrary),
            "parameters": list(result.parameter_names),
            "singular_values": [float(v) for v in result.singular_values],
        },
    }
    return Model(spec.states, spec.inputs, tuple(terms), coef, stats, info)

