"""Read and validate a run's TOML config; every default lives in :data:`SCHEMA`.

Validation happens once, here, before any computation: an unknown key, a wrong
type or a value out of range raises :class:`~discover.exceptions.ConfigError`
whose message names the key path, what was given and what is accepted, e.g.::

    configs/ship.toml: [derivatives].window must be an odd int >= 3. Got 10.

Paths inside a config file are relative to the folder of that file.
"""

from __future__ import annotations

import difflib
import math
import os
import sys
import unicodedata
from collections.abc import Mapping
from dataclasses import dataclass, fields, make_dataclass
from types import MappingProxyType
from pathlib import Path

if sys.version_info >= (3, 11):
    import tomllib
else:  # pragma: no cover
    import tomli as tomllib

from .derivatives import METHODS, default_trim
from .exceptions import ConfigError

from .simulate import SOLVERS as SIMULATION_METHODS


@dataclass(frozen=True)
class Key:
    """One config key: its kind, default and limits.

    kind is one of "int", "float", "bool", "str", "str_list", "float_list", "table".
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
        "criterion": Key("str", "aicc", choices=("aicc", "aic", "bic", "simulation_error", "derivative_error")),
        "path": Key("bool", True),
        "sr3": Key("bool", True),
        "top": Key("int", 3, minimum=1, maximum=10),
        # Score on segments of this many time units, each from the measured state (None: whole runs).
        "horizon": Key("float", None, minimum=0.0, nullable=True),
        # Arrays of tables, checked in _check_ranking:
        "libraries": Key("table_list", []),
        "hypotheses": Key("table_list", []),
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
    "output": {
        "dir": Key("str", None, nullable=True),
        "figures": Key("bool", True),
        "report": Key("bool", True),  # the self-contained report.html
    },
}


def derivative_options(table):
    """The method options of an effective ``[derivatives]`` table (a dict during validation)."""
    return {k: v for k, v in table.items() if k not in ("method", "trim")}


def load_config(source):
    """Read a config from a TOML path or a dict, validate it and fill in defaults.

    Returns
    -------
    Settings
        Every section and key, frozen; ``source`` says where it came from (for
        messages) and ``base`` the folder relative paths start from.
    """
    if isinstance(source, Settings):
        return source
    if isinstance(source, dict):
        raw, where, base = source, "config", Path.cwd()
    else:
        path = Path(source)
        where, base = str(path), path.resolve().parent
        try:
            raw = tomllib.loads(path.read_bytes().decode("utf-8"))
        except FileNotFoundError:
            raise ConfigError(f"{path}: config file not found.") from None
        except IsADirectoryError:
            raise ConfigError(f"{path}: is a folder; give the path of a TOML config file.") from None
        except OSError as err:
            raise ConfigError(f"{path}: cannot read the config file ({err.strerror}).") from None
        except UnicodeDecodeError as err:
            raise ConfigError(f"{path}: not a UTF-8 text file (byte {err.start + 1}); save the config "
                              "as UTF-8.") from None
        except tomllib.TOMLDecodeError as err:
            raise ConfigError(f"{path}: not valid TOML: {err}.") from None
        except RecursionError:
            raise ConfigError(f"{path}: not valid TOML: nested too deeply.") from None
    return validate(raw, where, str(base))


def validate(raw, where="config", base="."):
    """Validate a raw config mapping; return its frozen :class:`Settings`."""
    return freeze(_effective(raw, where), where, base)


def _effective(raw, where):
    """Validate a raw config mapping; return the effective config as a new dict."""
    if not isinstance(raw, dict):
        raise ConfigError(f"{where}: a config must be a table of sections. Got {type(raw).__name__}.")
    sections = [name for name in SCHEMA if name]
    top_keys = list(SCHEMA[""])
    for name, value in raw.items():
        if name in SCHEMA[""]:
            continue
        if name not in SCHEMA:
            _unknown(where, "", name, sections + top_keys)
        if not isinstance(value, dict):
            raise ConfigError(f"{where}: [{name}] must be a table (a section). Got {value!r}.")
    effective, notes = {}, []
    for key, spec in SCHEMA[""].items():
        effective[key] = _check_value(where, "", key, spec, raw.get(key, spec.default))
    for name in sections:
        table = dict(raw.get(name, {}))
        for (section, old), (new, note) in DEPRECATED.items():
            if section == name and old in table:
                table.setdefault(new, table.pop(old))
                notes.append(f"{note}; please update the config.")
        for (section, key, old), (new, note) in DEPRECATED_VALUES.items():
            if section == name and table.get(key) == old:
                table[key] = new
                notes.append(f"{note}; please update the config.")
        schema = dict(SCHEMA[name])
        if name == "derivatives":
            schema.update(_derivative_keys(where, table))
        for key in table:
            if key not in schema:
                _unknown(where, name, key, list(schema))
        effective[name] = {}
        for key, spec in schema.items():
            value = table.get(key, spec.default)
            if value is REQUIRED:
                raise ConfigError(f"{where}: [{name}].{key} is required.")
            effective[name][key] = _check_value(where, name, key, spec, value)
    _normalize_names(effective["data"])
    _check_relations(where, effective)
    effective["_notes"] = notes
    return effective


def _normalize_names(data):
    """Column names in NFKC form, as :func:`discover.data.normalize_name` reads the files."""
    norm = lambda name: unicodedata.normalize("NFKC", name.strip())  # noqa: E731
    data["time"] = norm(data["time"])
    data["states"] = [norm(n) for n in data["states"]]
    data["inputs"] = [norm(n) for n in data["inputs"]]
    data["rename"] = {norm(k): v for k, v in data["rename"].items()}


def _derivative_keys(where, table):
    """Keys of the chosen method's options, from its record in derivatives.METHODS."""
    method = table.get("method", SCHEMA["derivatives"]["method"].default)
    if method not in METHODS:
        _check_value(where, "derivatives", "method", SCHEMA["derivatives"]["method"], method)
    keys = {}
    for option in METHODS[method].options:
        keys[option.name] = Key(option.kind, option.default, choices=option.choices, minimum=option.minimum,
                                nullable=option.nullable, odd=option.odd)
    return keys


#: Old keys still read, with the new name and a note for the run's warnings (one release).
DEPRECATED = {
    ("derivatives", "alpha"): ("noise_ratio", "[derivatives].alpha is now [derivatives].noise_ratio (same "
                                              "meaning: the ratio in samples, not the derivative package's alpha)"),
}
DEPRECATED_VALUES = {
    ("bootstrap", "coefficients", "bragg"): ("member_median", "[bootstrap].coefficients = \"bragg\" is now "
                                                              "\"member_median\""),
}


def _unknown(where, section, key, valid):
    path = f"[{section}].{key}" if section else key
    close = difflib.get_close_matches(key, valid, n=1)
    hint = f" Did you mean {close[0]!r}?" if close else ""
    raise ConfigError(
        f"{where}: unknown key {path}.{hint} Valid keys here: {', '.join(sorted(valid))}."
    )


def _describe(spec):
    words = {
        "int": "an int",
        "float": "a number",
        "bool": "true or false",
        "str": "a string",
        "str_list": "a list of strings",
        "float_list": "a list of numbers",
        "table": "a table of name = \"column\" pairs",
        "table_list": "an array of tables ([[...]] entries)",
    }[spec.kind]
    if spec.odd:
        words = "an odd int"
    if spec.choices:
        words = "one of " + ", ".join(repr(c) for c in spec.choices)
    if spec.minimum is not None:
        words += f" >= {spec.minimum:g}"
    if spec.maximum is not None:
        words += f" and <= {spec.maximum:g}"
    if spec.also:
        words += " or " + " or ".join(repr(a) for a in spec.also)
    return words


def _check_value(where, section, key, spec, value):
    path = f"[{section}].{key}" if section else key

    def fail():
        raise ConfigError(f"{where}: {path} must be {_describe(spec)}. Got {value!r}.")

    if value is None:
        if spec.nullable or spec.default is None:
            return None
        fail()
    if spec.also and value in spec.also:
        return value
    kind = spec.kind
    if kind == "bool":
        if not isinstance(value, bool):
            fail()
        return value
    if kind == "str":
        if not isinstance(value, str) or (spec.choices and value not in spec.choices):
            fail()
        return value
    if kind == "table":
        if not isinstance(value, dict) or not all(isinstance(v, str) for v in value.values()):
            fail()
        return dict(value)
    if kind == "table_list":
        if not isinstance(value, list) or not all(isinstance(v, dict) for v in value):
            fail()
        return [dict(v) for v in value]
    if kind == "str_list":
        if isinstance(value, str):
            value = [value]
        if not isinstance(value, list) or not all(isinstance(v, str) for v in value):
            fail()
        return list(value)
    if kind == "float_list":
        if not isinstance(value, list) or not all(_is_number(v) for v in value):
            fail()
        if spec.minimum is not None and any(v < spec.minimum for v in value):
            fail()
        return [float(v) for v in value]
    if kind == "int":
        if isinstance(value, bool) or not isinstance(value, int) or (spec.odd and value % 2 == 0):
            fail()
    elif not _is_number(value):  # float
        fail()
    if spec.minimum is not None and value < spec.minimum:
        fail()
    if spec.maximum is not None and value > spec.maximum:
        fail()
    return value if kind == "int" else float(value)


def _is_number(value):
    return isinstance(value, (int, float)) and not isinstance(value, bool) and math.isfinite(value)


def _check_relations(where, config):
    """Checks that involve several keys."""
    data, sel, terms = config["data"], config["selection"], config["terms"]
    if not data["states"]:
        raise ConfigError(f"{where}: [data].states must name at least one state column.")
    both = set(data["states"]) & set(data["inputs"])
    if both:
        raise ConfigError(
            f"{where}: {sorted(both)} appear in both [data].states and [data].inputs; "
            "a column is either a state or an input."
        )
    for key, names in (("states", data["states"]), ("inputs", data["inputs"])):
        repeated = sorted({n for n in names if names.count(n) > 1})
        if repeated:
            raise ConfigError(f"{where}: [data].{key} lists {repeated} more than once.")
    if sel["threshold_min"] >= sel["threshold_max"]:
        raise ConfigError(
            f"{where}: [selection].threshold_min must be below threshold_max. "
            f"Got {sel['threshold_min']} and {sel['threshold_max']}."
        )
    if sel["thresholds"] is not None and len(sel["thresholds"]) < 1:
        raise ConfigError(f"{where}: [selection].thresholds must list at least one threshold.")
    deriv = config["derivatives"]
    if data["chunk_rows"] is not None:
        streaming = [name for name, record in METHODS.items() if record.stream_half_width is not None]
        problems = []
        if deriv["method"] not in streaming:
            problems.append(f"[derivatives].method must be one of {', '.join(map(repr, streaming))} "
                            f"(local methods; got {deriv['method']!r})")
        if data["missing"] != "refuse":
            problems.append(f"[data].missing must be 'refuse' (got {data['missing']!r})")
        if config["bootstrap"]["resample"] == "rows":
            problems.append("[bootstrap].resample cannot be 'rows'")
        if not data["held_out"] and data["held_out_count"] < 1:
            problems.append("a run must be held out ([data].held_out or held_out_count >= 1), since "
                            "validation and ranking simulate held-out runs held in memory")
        if problems:
            raise ConfigError(f"{where}: with [data].chunk_rows set, " + "; ".join(problems) + ".")
    try:
        default_trim(deriv["method"], derivative_options(deriv))
    except ConfigError as err:
        raise ConfigError(f"{where}: {err}") from None
    from .expressions import parse_expression

    for i, text in enumerate(terms["custom"]):
        parse_expression(text, list(data["states"]) + list(data["inputs"]), where=f"{where}: [terms].custom[{i}]")
    _check_ranking(where, config)
    known = set(data["states"]) | set(data["inputs"])
    for key in ("variables", "trig_variables"):
        for name in terms[key] or []:
            if name not in known:
                close = difflib.get_close_matches(name, sorted(known), n=1)
                hint = f" Did you mean {close[0]!r}?" if close else ""
                raise ConfigError(
                    f"{where}: [terms].{key} names {name!r}, which is neither a state nor an "
                    f"input.{hint} States and inputs: {', '.join(sorted(known))}."
                )


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


def _check_ranking(where, config):
    """Validate [[ranking.libraries]] (keys of [terms] plus a name) and
    [[ranking.hypotheses]] (a name plus, per state, a list of term expressions)."""
    from .expressions import parse_expression

    ranking, data = config["ranking"], config["data"]
    known = list(data["states"]) + list(data["inputs"])
    names = []
    for kind in ("libraries", "hypotheses"):
        checked = []
        for n, entry in enumerate(ranking[kind], start=1):
            name = entry.get("name")
            label = f"[[ranking.{kind}]] #{n}"
            if not isinstance(name, str) or not name.strip():
                raise ConfigError(f"{where}: {label} needs a name = \"...\".")
            if name in names:
                raise ConfigError(f"{where}: {label}: the name {name!r} is used twice.")
            names.append(name)
            label = f"[[ranking.{kind}]] {name!r}"
            if kind == "libraries":
                table = {"name": name}
                for key, value in entry.items():
                    if key == "name":
                        continue
                    if key not in SCHEMA["terms"]:
                        _unknown(where, f"ranking.libraries {name!r}", key, list(SCHEMA["terms"]) + ["name"])
                    table[key] = _check_value(where, f"ranking.libraries {name!r}", key, SCHEMA["terms"][key], value)
                for key, spec in SCHEMA["terms"].items():
                    table.setdefault(key, spec.default)
                checked.append(table)
                continue
            table = {"name": name}
            for key, value in entry.items():
                if key == "name":
                    continue
                if key not in data["states"]:
                    _unknown(where, f"ranking.hypotheses {name!r}", key, list(data["states"]) + ["name"])
                if isinstance(value, str):
                    value = [value]
                if not isinstance(value, list) or not all(isinstance(v, str) for v in value):
                    raise ConfigError(f"{where}: {label}.{key} must be a list of term expressions. Got {value!r}.")
                for m, text in enumerate(value):
                    parse_expression(text, known, where=f"{where}: {label}.{key}[{m}]")
                table[key] = list(value)
            if len(table) == 1:
                raise ConfigError(f"{where}: {label} lists no equation; give terms for at least one state, "
                                  f"e.g. {data['states'][0]} = [\"...\"].")
            checked.append(table)
        ranking[kind] = checked


# --------------------------------------------------------------------------- frozen settings

_TYPES = {"int": int, "float": float, "bool": bool, "str": str, "str_list": tuple, "float_list": tuple,
          "table": Mapping, "table_list": tuple}


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
    bootstrap: object
    simulation: object
    ranking: object
    compute: object
    output: object
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
            elif f.name in SECTION_CLASSES:
                out[f.name] = {g.name: _thaw(getattr(value, g.name)) for g in fields(value)}
        return out

    def library_table(self):
        """``[terms]`` as a mapping (libraries of [[ranking.libraries]] have the same keys)."""
        return {f.name: getattr(self.terms, f.name) for f in fields(self.terms)}


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


def with_hypotheses(settings, hypotheses_raw, where):
    """The settings with other [[ranking.hypotheses]], checked (for ``discover rank``)."""
    raw = settings.as_dict()
    raw["ranking"]["hypotheses"] = hypotheses_raw
    return validate(raw, where, settings.base)
