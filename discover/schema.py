"""The one schema of the config, the frozen settings built from it, and their TOML form.

:data:`SCHEMA` declares every key with its kind, default and limits (the derivative
methods' options come from their records in :data:`discover.derivatives.METHODS`);
:func:`freeze` turns a validated config into :class:`Settings`, one frozen dataclass
per section; :func:`to_toml` writes settings back as a TOML file that validates again.
"""

from __future__ import annotations

import os
from collections.abc import Mapping
from dataclasses import dataclass, fields, make_dataclass
from pathlib import Path
from types import MappingProxyType

from .derivatives import METHODS
from .simulate import SOLVERS as SIMULATION_METHODS
from .weak import DEFAULT_DEGREE_P, DEFAULT_TAU_HAT


@dataclass(frozen=True)
class Key:
    """One config key: its kind, default and limits.

    kind is one of "int", "float", "bool", "str", "str_list", "float_list", "table" (of strings),
    "table_list", "mapping" (any table, checked where it is used).
    A default of ``REQUIRED`` makes the key mandatory; ``None`` means "unset".
    """

    kind: str
    default: object
    choices: tuple = ()
    minimum: float | None = None
    maximum: float | None = None
    nullable: bool = False
    also: tuple = ()  # extra accepted string values for numeric keys, e.g. ("cv",)
    odd: bool = False


REQUIRED = object()

SCHEMA = {
    "": {"seed": Key("int", 0, minimum=0)},
    "data": {
        "files": Key("str_list", REQUIRED),
        "time": Key("str", "t"),
        "states": Key("str_list", REQUIRED),
        "inputs": Key("str_list", []),
        "rename": Key("table", {}),
        "held_out": Key("str_list", []),
        "held_out_count": Key("int", 1, minimum=0),
        "missing": Key("str", "refuse", choices=("refuse", "drop", "interpolate")),
        "max_gap": Key("int", 3, minimum=1),
        # Read training runs in chunks of this many rows (runs larger than memory); unset: whole runs.
        "chunk_rows": Key("int", None, minimum=100, nullable=True),
    },
    "derivatives": {
        "method": Key("str", "savitzky_golay", choices=tuple(METHODS)),
        "trim": Key("int", None, minimum=0, nullable=True),
        # Further keys are the keyword-only options of the chosen method (see below).
    },
    "terms": {
        "degree": Key("int", 2, minimum=0, maximum=6),
        "variables": Key("str_list", None, nullable=True),
        "input_degree": Key("int", None, minimum=0, nullable=True),
        "state_input_products": Key("bool", True),
        "constant": Key("bool", True),
        "trig_variables": Key("str_list", []),
        "trig_frequencies": Key("float_list", [1.0], minimum=0.0),
        "trig_input_products": Key("bool", False),
        "custom": Key("str_list", []),
    },
    "selection": {
        "threshold": Key("float", "cv", minimum=0.0, also=("cv",)),
        "thresholds": Key("float_list", None, minimum=0.0, nullable=True),
        "threshold_min": Key("float", 1e-3, minimum=0.0),
        "threshold_max": Key("float", 1.0, minimum=0.0),
        "threshold_count": Key("int", 20, minimum=2, maximum=500),
        "ridge": Key("float", 1e-5, minimum=0.0),
        "max_iter": Key("int", 20, minimum=1),
        "cv_folds": Key("int", 5, minimum=2, maximum=50),
        "cv_split": Key("str", "auto", choices=("auto", "runs", "blocks")),
        "cv_rule": Key("str", "one_se", choices=("one_se", "min")),
        # The regression pair: pointwise derivatives, or the weak (integral) form of [weak].
        "target": Key("str", "derivative", choices=("derivative", "weak")),
    },
    # Test functions of [selection].target = "weak" (discover.weak, Messenger & Bortz 2021).
    "weak": {
        # Samples on each side of a window's centre; "auto": from the data's corner frequency.
        "half_width": Key("int", "auto", minimum=2, also=("auto",)),
        "degree_p": Key("int", DEFAULT_DEGREE_P, minimum=1, maximum=64),
        # Samples between window starts; unset: half_width // 2.
        "stride": Key("int", None, minimum=1, nullable=True),
        # Used by half_width = "auto": standard deviations of the test function's spectrum at the corner.
        "tau_hat": Key("float", DEFAULT_TAU_HAT, minimum=0.1, maximum=20.0),
    },
    "bootstrap": {
        "members": Key("int", 100, minimum=0, maximum=100000),  # 0 turns the ensemble off
        "resample": Key("str", "auto", choices=("auto", "blocks", "runs", "rows")),
        "block_length": Key("int", None, minimum=4, nullable=True),
        "library_fraction": Key("float", 1.0, minimum=0.05, maximum=1.0),
        "inclusion_min": Key("float", 0.5, minimum=0.0, maximum=1.0),
        # The kept terms' coefficients: a least-squares refit on all training data, or the
        # median over all members (zeros of members that drop the term included).
        "coefficients": Key("str", "refit", choices=("refit", "member_median")),
        "level": Key("float", 0.9, minimum=0.5, maximum=0.999),
        "n_jobs": Key("int", 1, minimum=-1),
        "bands": Key("bool", True),
    },
    "simulation": {
        "input_interpolation": Key("str", "auto", choices=("auto", "linear", "zoh")),
        "method": Key("str", "LSODA", choices=SIMULATION_METHODS),
        # Solver accuracy far below measurement noise is wasted time; rtol 1e-5 is ample.
        "rtol": Key("float", 1e-5, minimum=1e-14, maximum=1.0),
        # Unset: 1e-6 times each state's range over the training runs (units of each state).
        "atol": Key("float", None, minimum=0.0, nullable=True),
        "divergence_factor": Key("float", 100.0, minimum=1.0),
    },
    "ranking": {
        "enabled": Key("bool", True),
        # "simulation": deviance of the free-run error with an effective sample size (discover.ranking).
        "criterion": Key("str", "simulation", choices=("simulation", "aicc", "aic", "bic", "simulation_error",
                                                       "derivative_error")),
        # Which candidate model.json holds: "recommended", "lowest", "ensemble" or a hypothesis name.
        "choose": Key("str", "recommended"),
        "path": Key("bool", True),
        "sr3": Key("bool", True),
        "top": Key("int", 3, minimum=1, maximum=10),
        # Score on segments of this many time units, each from the measured state (None: measured from
        # how fast nearby trajectories separate; whole runs when they do not).
        "horizon": Key("float", None, minimum=0.0, nullable=True),
        # Arrays of tables, checked in _check_ranking:
        "libraries": Key("table_list", []),
        "hypotheses": Key("table_list", []),
    },
    "refine": {
        # Refit the chosen structure's coefficients by output error (multiple shooting).
        "enabled": Key("bool", True),
        "max_evaluations": Key("int", 200, minimum=1, maximum=100000),
        "time_limit": Key("float", 120.0, minimum=0.1),  # seconds; at the limit the fit is not applied
        "level": Key("float", 0.9, minimum=0.5, maximum=0.999),  # of the coefficient intervals
    },
    "compute": {
        # None: this process; "local": a Dask LocalCluster; "tcp://host:8786": that scheduler.
        "scheduler": Key("str", None, nullable=True),
        "workers": Key("int", 2, minimum=1, maximum=1024),  # LocalCluster only
        "processes": Key("bool", True),  # LocalCluster only: worker processes, not threads
        "timeout": Key("float", 30.0, minimum=1.0),  # seconds to reach a remote scheduler
        # Refuse a run whose estimated memory exceeds this many GiB (None: half of this machine's memory).
        "memory_limit": Key("float", None, minimum=0.01, nullable=True),
        # Wall-clock limit of one simulation (one run, or one batch of ensemble members), seconds.
        "simulation_time_limit": Key("float", 60.0, minimum=0.1),
    },
    "hidden": {
        # States without a column in the data; fitted by output error (discover.hidden). Empty: every
        # state is measured and the run is the derivative-based pipeline, as without this section.
        "states": Key("str_list", []),
        # Further measured columns, each a function of states and inputs: {column = "expression"}.
        # Every state in [data].states is its own output besides.
        "outputs": Key("table", {}),
        # Structure hypotheses: {state = ["term", ...]}; a state not listed takes the [terms] library.
        "equations": Key("mapping", {}),
        # Known terms, held at their value: {state = {"term" = coefficient}}.
        "known": Key("mapping", {}),
        # Known initial values of hidden states, the same in every run: {state = value}.
        "initial": Key("mapping", {}),
        # A hidden state whose scale no known term or initial value sets: "unset" fits with one
        # coefficient held and says its numbers are arbitrary; "unit_coupling" fixes its coefficient
        # in the measured equation it drives at 1 (the state in units of that equation's rate).
        "scale": Key("str", "unset", choices=("unset", "unit_coupling")),
        # Library equations: terms below this share |coef|*rms(term)/rms(derivative) are dropped,
        # and the rest refitted by output error, at most `rounds` times.
        "threshold": Key("float", 0.05, minimum=0.0),
        "rounds": Key("int", 3, minimum=1, maximum=10),
        # Reconstruct every run's states by an unscented Kalman filter and RTS smoother.
        "estimate": Key("bool", True),
    },
    "output": {
        "dir": Key("str", None, nullable=True),
        "figures": Key("bool", True),
        "report": Key("bool", True),  # the self-contained report.html
    },
}


def derivative_options(table):
    """The method options of an effective ``[derivatives]`` table (a dict during validation)."""
    return {k: v for k, v in table.items() if k not in ("method", "trim")}


def to_toml(settings, *, absolute_paths=False):
    """Write the settings as TOML (the subset of TOML this schema uses); it validates again as is.

    With ``absolute_paths`` the data files and the output folder are written as
    absolute paths, so that the file runs again as it is from wherever it lies.
    """
    config = settings.as_dict()
    if absolute_paths:
        base = Path(settings.base)

        def absolute(path):
            return None if path is None else str(Path(os.path.normpath(base / path)))

        config = {**config,
                  "data": {**config["data"], "files": [absolute(f) for f in settings.data.files]},
                  "output": {**config["output"], "dir": absolute(settings.output.dir)}}
    lines = []
    for key, value in config.items():
        if not isinstance(value, dict) and value is not None:
            lines.append(f"{key} = {_toml_value(value)}")
    for section, table in config.items():
        if not isinstance(table, dict):
            continue
        lines.append(f"\n[{section}]")
        for key, value in table.items():
            if value is None:
                lines.append(f"# {key} is unset")
            else:
                lines.append(f"{key} = {_toml_value(value)}")
    return "\n".join(lines) + "\n"


_TOML_ESCAPES = {"\\": "\\\\", '"': '\\"', "\n": "\\n", "\t": "\\t", "\r": "\\r", "\b": "\\b", "\f": "\\f"}


def _toml_value(value):
    if isinstance(value, bool):
        return "true" if value else "false"
    if isinstance(value, (int, float)):
        return repr(value)
    if isinstance(value, str):
        return '"' + "".join(_TOML_ESCAPES.get(c) or (f"\\u{ord(c):04x}" if ord(c) < 32 or ord(c) == 127 else c)
                             for c in value) + '"'
    if isinstance(value, (list, tuple)):
        return "[" + ", ".join(_toml_value(v) for v in value) + "]"
    if isinstance(value, Mapping):
        items = [(k, v) for k, v in value.items() if v is not None]
        return "{" + ", ".join(f"{_toml_value(k)} = {_toml_value(v)}" for k, v in items) + "}"
    raise TypeError(value)


# --------------------------------------------------------------------------- frozen settings

_TYPES = {"int": int, "float": float, "bool": bool, "str": str, "str_list": tuple, "float_list": tuple,
          "table": Mapping, "table_list": tuple, "mapping": Mapping}


def _section_class(name, keys):
    return make_dataclass(f"{name.title()}Settings", [(key, _TYPES[spec.kind] | None) for key, spec in keys.items()],
                          frozen=True)


#: One frozen dataclass per section, built from SCHEMA, so the keys are declared once.
SECTION_CLASSES = {name: _section_class(name, keys) for name, keys in SCHEMA.items() if name and name != "derivatives"}


@dataclass(frozen=True)
class DerivativeSettings:
    """``[derivatives]``: the method, the trim asked for (None: the method's), and its options."""

    method: str
    trim: int | None
    options: Mapping


@dataclass(frozen=True)
class Settings:
    """A validated config, frozen. Values resolved during a run live on the stage results."""

    seed: int
    data: object
    derivatives: DerivativeSettings
    terms: object
    selection: object
    weak: object
    bootstrap: object
    simulation: object
    ranking: object
    refine: object
    compute: object
    output: object
    hidden: object = None
    source: str = "config"
    base: str = "."
    notes: tuple = ()

    def as_dict(self):
        """A plain nested dict, as :func:`validate` accepts it."""
        out = {"seed": self.seed}
        for f in fields(self):
            value = getattr(self, f.name)
            if f.name == "derivatives":
                out["derivatives"] = {"method": value.method, "trim": value.trim, **_thaw(value.options)}
            elif f.name == "hidden" and not uses_hidden(self):
                continue  # not in use: configs and their TOML stay as without the section
            elif f.name in SECTION_CLASSES:
                out[f.name] = {g.name: _thaw(getattr(value, g.name)) for g in fields(value)}
        return out

    def library_table(self):
        """``[terms]`` as a mapping (libraries of [[ranking.libraries]] have the same keys)."""
        return {f.name: getattr(self.terms, f.name) for f in fields(self.terms)}


def uses_hidden(settings):
    """Whether a run has hidden states or further outputs (the output-error path, discover.hidden)."""
    hidden = settings.hidden
    return hidden is not None and bool(hidden.states or hidden.outputs)


def _freeze(value):
    if isinstance(value, list):
        return tuple(_freeze(v) for v in value)
    if isinstance(value, dict):
        return MappingProxyType({k: _freeze(v) for k, v in value.items()})
    return value


def _thaw(value):
    if isinstance(value, tuple):
        return [_thaw(v) for v in value]
    if isinstance(value, Mapping):
        return {k: _thaw(v) for k, v in value.items()}
    return value


def freeze(effective, source="config", base="."):
    """The :class:`Settings` of an effective config dict from :func:`validate`."""
    sections = {}
    for name, cls in SECTION_CLASSES.items():
        sections[name] = cls(**{k: _freeze(v) for k, v in effective[name].items()})
    deriv = effective["derivatives"]
    derivatives = DerivativeSettings(deriv["method"], deriv["trim"], MappingProxyType(derivative_options(deriv)))
    return Settings(effective["seed"], derivatives=derivatives, source=source, base=str(base),
                    notes=tuple(effective.get("_notes", ())), **sections)
