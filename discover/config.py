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
import tomllib
import unicodedata
from pathlib import Path

from .derivatives import METHODS, default_trim
from .exceptions import ConfigError
from .schema import REQUIRED, SCHEMA, Key, Settings, derivative_options, freeze, to_toml  # noqa: F401


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
            raw = tomllib.loads(path.read_bytes().decode("utf-8-sig"))  # a byte-order mark is fine
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
    effective["hidden"]["states"] = [unicodedata.normalize("NFKC", n.strip()) for n in effective["hidden"]["states"]]
    _normalize_term_names(effective["terms"])
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


def _normalize_term_names(terms):
    norm = lambda name: unicodedata.normalize("NFKC", name.strip())  # noqa: E731
    for key in ("variables", "trig_variables"):
        if terms[key] is not None:
            terms[key] = [norm(n) for n in terms[key]]


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
        "mapping": "a table",
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
    if kind == "mapping":
        if not isinstance(value, dict):
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
    if not data["states"] and not config["hidden"]["outputs"]:
        raise ConfigError(f"{where}: [data].states must name at least one state column (or [hidden].outputs "
                          "at least one measured column).")
    if not data["files"]:
        raise ConfigError(f"{where}: [data].files must list at least one file or glob pattern.")
    if data["time"] in list(data["states"]) + list(data["inputs"]):
        raise ConfigError(f"{where}: [data].time = {data['time']!r} is also named in [data].states or "
                          "[data].inputs; the time column cannot be a state or an input.")
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
        if sel["target"] == "weak":
            problems.append("[selection].target must be 'derivative' (the weak form integrates whole runs in memory)")
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
    from .hidden_config import check_hidden

    states = list(data["states"]) + list(config["hidden"]["states"])  # hidden states enter terms too
    for i, text in enumerate(terms["custom"]):
        parse_expression(text, states + list(data["inputs"]), where=f"{where}: [terms].custom[{i}]")
    check_hidden(where, config)
    _check_ranking(where, config)
    _check_choose(where, config)
    known = set(states) | set(data["inputs"])
    for key in ("variables", "trig_variables"):
        for name in terms[key] or []:
            if name not in known:
                close = difflib.get_close_matches(name, sorted(known), n=1)
                hint = f" Did you mean {close[0]!r}?" if close else ""
                raise ConfigError(
                    f"{where}: [terms].{key} names {name!r}, which is neither a state nor an "
                    f"input.{hint} States and inputs: {', '.join(sorted(known))}."
                )


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


def _check_choose(where, config):
    choose = config["ranking"]["choose"]
    names = [h["name"] for h in config["ranking"]["hypotheses"]]
    if choose not in ("recommended", "lowest", "ensemble") and choose not in names:
        raise ConfigError(f"{where}: [ranking].choose = {choose!r} is none of 'recommended', 'lowest', 'ensemble' "
                          f"or the name of a [[ranking.hypotheses]] entry ({', '.join(map(repr, names)) or 'none given'}).")


def with_hypotheses(settings, hypotheses_raw, where):
    """The settings with other [[ranking.hypotheses]], checked (for ``discover rank``)."""
    raw = settings.as_dict()
    raw["ranking"]["hypotheses"] = hypotheses_raw
    return validate(raw, where, settings.base)
