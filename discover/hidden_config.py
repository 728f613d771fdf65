"""The ``[hidden]`` section: states nobody measured, measured outputs y = g(x, u), and what is known.

:func:`check_hidden` validates the section once, when the config is read (called from
:mod:`discover.config`); :func:`hidden_spec` resolves it into a :class:`HiddenSpec`,
the one description of the states, outputs and candidate equations that the
output-error stage (:mod:`discover.hidden`) fits. Both take the same plain tables,
so the structure the check accepts is the structure that is fitted.

Equations: a state listed in ``[hidden].equations`` takes those terms (a structure
hypothesis); any other state takes the ``[terms]`` library over all states, hidden ones
included, and its terms are thresholded by output error. A term of ``[hidden].known``
is added to its equation and held at its value.
"""

from __future__ import annotations

import difflib
import math
from dataclasses import dataclass
from types import MappingProxyType
from typing import Mapping

from .exceptions import ConfigError
from .expressions import parse_expression
from .refine_types import states_reaching_outputs
from .terms import build_library, term_key

__all__ = ["HiddenSpec", "check_hidden", "hidden_spec"]

#: Keys of [ranking] and [data] that do not apply with hidden states, and why.
NOT_WITH_HIDDEN = (
    ("ranking", "hypotheses", "give structures in [hidden].equations"),
    ("ranking", "libraries", "one library, [terms], is thresholded by output error"),
)


@dataclass(frozen=True)
class HiddenSpec:
    """States, outputs and candidate equations of a run with hidden states.

    Attributes
    ----------
    measured : tuple of str
        States with a column ([data].states); each is its own output.
    hidden : tuple of str
        States without a column.
    inputs : tuple of str
    outputs : mapping of str to str
        ``{column: expression}``: the measured states first, then [hidden].outputs.
    equations : mapping of str to tuple of str
        Candidate terms of every state's equation (known terms included).
    from_library : frozenset of str
        States whose equation is the [terms] library (thresholded).
    known : mapping of (str, str) to float
        ``(state, term) -> coefficient`` held fixed.
    initial : mapping of str to float
        Known initial value of a hidden state (every run).
    """

    measured: tuple
    hidden: tuple
    inputs: tuple
    outputs: Mapping
    equations: Mapping
    from_library: frozenset
    known: Mapping
    initial: Mapping

    @property
    def states(self):
        return self.measured + self.hidden

    @property
    def output_columns(self):
        """Columns read from the data files: the measured states, then the further outputs."""
        return tuple(self.outputs)


def _library_table(terms):
    return {k: (tuple(v) if isinstance(v, list) else v) for k, v in terms.items()}


def hidden_spec(data, hidden, terms, where="config"):
    """A :class:`HiddenSpec` from the [data], [hidden] and [terms] tables (dicts or frozen settings)."""
    get = (lambda table, key: table[key]) if isinstance(data, Mapping) else getattr  # noqa: E731
    measured, hidden_states = tuple(get(data, "states")), tuple(get(hidden, "states"))
    inputs = tuple(get(data, "inputs"))
    states = measured + hidden_states
    known_names = states + inputs
    outputs = {name: name for name in measured}
    for column, text in dict(get(hidden, "outputs")).items():
        outputs[column] = parse_expression(text, known_names, where=f"{where}: [hidden].outputs.{column}").text
    table = terms if isinstance(terms, Mapping) else {k: getattr(terms, k) for k in terms.__dataclass_fields__}
    library = None
    equations, from_library = {}, set()
    given = dict(get(hidden, "equations"))
    for state in states:
        if state in given:
            texts = [parse_expression(t, known_names, where=f"{where}: [hidden].equations.{state}[{m}]").text
                     for m, t in enumerate(given[state])]
        else:
            if library is None:
                library = build_library(states, inputs, **_library_table(table), where=f"{where}: [terms]")
            texts = list(library.names)
            from_library.add(state)
        equations[state] = texts
    known = {}
    for state, entries in dict(get(hidden, "known")).items():
        for term, value in dict(entries).items():
            text = parse_expression(term, known_names, where=f"{where}: [hidden].known.{state}.{term}").text
            same = [t for t in equations[state] if term_key(t) == term_key(text)]
            if same:
                text = same[0]
            else:
                equations[state].append(text)
            known[(state, text)] = float(value)
    return HiddenSpec(measured, hidden_states, inputs, MappingProxyType(outputs),
                      MappingProxyType({s: tuple(t) for s, t in equations.items()}), frozenset(from_library),
                      MappingProxyType(known), MappingProxyType({k: float(v) for k, v in
                                                                 dict(get(hidden, "initial")).items()}))


def check_hidden(where, config):
    """Validate [hidden] against [data] and [terms]; raise a one-line ConfigError naming the key."""
    data, hidden, terms = config["data"], config["hidden"], config["terms"]
    states, inputs = list(data["states"]), list(data["inputs"])
    used = hidden["states"] or hidden["outputs"]
    if not used:
        for key in ("equations", "known", "initial"):
            if hidden[key]:
                raise ConfigError(f"{where}: [hidden].{key} applies only with hidden states or further outputs; "
                                  "name them in [hidden].states or [hidden].outputs, or remove the key.")
        return
    names = list(hidden["states"])
    repeated = sorted({n for n in names if names.count(n) > 1})
    if repeated:
        raise ConfigError(f"{where}: [hidden].states lists {repeated} more than once.")
    taken = {data["time"]: "the time column", **{s: "a measured state in [data].states" for s in states},
             **{u: "an input in [data].inputs" for u in inputs}}
    for name in names:
        if not name.isidentifier():
            raise ConfigError(f"{where}: [hidden].states: {name!r} is not a valid name; use letters, digits "
                              "and underscores, not starting with a digit.")
        if name in taken:
            raise ConfigError(f"{where}: [hidden].states: {name!r} is also {taken[name]}; a hidden state has "
                              "no column, so list it in one place only.")
    all_states = states + names
    for column in hidden["outputs"]:
        if column in all_states or column in inputs or column == data["time"]:
            raise ConfigError(f"{where}: [hidden].outputs.{column}: the column name is a state, an input or "
                              "the time column; name the measured column by its own name.")
    for key, allowed, what in (("equations", all_states, "state"), ("known", all_states, "state"),
                               ("initial", names, "hidden state")):
        for name, value in hidden[key].items():
            if name not in allowed:
                close = difflib.get_close_matches(name, allowed, n=1)
                hint = f" Did you mean {close[0]!r}?" if close else ""
                raise ConfigError(f"{where}: [hidden].{key}.{name}: {name!r} is not a {what}.{hint} "
                                  f"{what.capitalize()}s: {', '.join(allowed) or 'none'}.")
            _check_entry(where, key, name, value)
    for section, key, why in NOT_WITH_HIDDEN:
        if config[section][key]:
            raise ConfigError(f"{where}: [{section}].{key} does not apply with hidden states ({why}); "
                              f"remove it or the hidden states.")
    if data["chunk_rows"] is not None:
        raise ConfigError(f"{where}: [data].chunk_rows cannot be used with hidden states (the output-error fit "
                          "holds the training runs in memory); unset it.")
    spec = hidden_spec(data, hidden, terms, where)
    _check_reach(where, spec)


def _check_entry(where, key, name, value):
    path = f"[hidden].{key}.{name}"
    if key == "equations":
        value = [value] if isinstance(value, str) else value
        if not isinstance(value, list) or not all(isinstance(v, str) for v in value):
            raise ConfigError(f"{where}: {path} must be a list of term expressions. Got {value!r}.")
    elif key == "known":
        if not isinstance(value, dict) or not value:
            raise ConfigError(f"{where}: {path} must be a table of \"term\" = coefficient. Got {value!r}.")
        for term, number in value.items():
            if not _finite(number):
                raise ConfigError(f"{where}: {path}.{term} must be a finite number. Got {number!r}.")
    elif not _finite(value):
        raise ConfigError(f"{where}: {path} must be a finite number. Got {value!r}.")


def _finite(value):
    return isinstance(value, (int, float)) and not isinstance(value, bool) and math.isfinite(value)


def _check_reach(where, spec):
    """Every hidden state must reach an output, directly or through the equations of states that do."""
    parsed = {s: [parse_expression(t, spec.states + spec.inputs).names for t in terms]
              for s, terms in spec.equations.items()}
    outputs = {n for e in spec.outputs.values() for n in parse_expression(e, spec.states + spec.inputs).names}
    uses = {state: {n for names in terms for n in names} for state, terms in parsed.items()}
    reaches = states_reaching_outputs(outputs, uses, spec.states)
    for name in spec.hidden:
        if name not in reaches:
            raise ConfigError(
                f"{where}: [hidden].states: {name!r} appears in no output and in no equation of a state that "
                "reaches an output, so the data cannot inform it; add it to a term in [hidden].equations or "
                "to [hidden].outputs, or drop it."
            )
