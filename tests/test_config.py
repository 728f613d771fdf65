"""Config validation: every bad key or value names the key path, the value and what is accepted."""

import pytest

from discover.config import SCHEMA, load_config, to_toml, validate
from discover.exceptions import ConfigError

import tomllib

BASE = {"data": {"files": ["*.csv"], "states": ["x"], "inputs": ["u"]}}


def merged(section, **keys):
    config = {k: dict(v) for k, v in BASE.items()}
    config.setdefault(section, {}).update(keys)
    return config


def message(raw):
    with pytest.raises(ConfigError) as info:
        validate(raw, "cfg.toml")
    return str(info.value)


def test_defaults_fill_every_key():
    settings = validate(BASE, "cfg.toml")
    config = settings.as_dict()
    # [hidden] is left out of the dict (and the TOML) while unused; its defaults are on the settings.
    config["hidden"] = {key: getattr(settings.hidden, key) for key in SCHEMA["hidden"]}
    for section, keys in SCHEMA.items():
        table = config if section == "" else config[section]
        assert set(keys) <= set(table)
    # The default method's own option: unset, the window is chosen from the data.
    assert config["derivatives"]["method"] == "savitzky_golay" and config["derivatives"]["window"] is None


def test_settings_are_frozen():
    import dataclasses

    settings = validate(BASE, "cfg.toml")
    with pytest.raises(dataclasses.FrozenInstanceError):
        settings.selection.cv_folds = 3
    with pytest.raises(TypeError):
        settings.derivatives.options["window"] = 5
    assert isinstance(settings.data.states, tuple)


def test_misspelled_key_names_the_closest_valid_key():
    text = message(merged("derivatives", windw=11))
    assert "unknown key [derivatives].windw" in text and "Did you mean 'window'?" in text
    assert "cfg.toml" in text


def test_misspelled_section():
    text = message({**BASE, "selecton": {}})
    assert "unknown key selecton" in text and "'selection'" in text


def test_even_window_is_refused_with_the_value():
    text = message(merged("derivatives", method="savitzky_golay", window=10))
    assert text == "cfg.toml: [derivatives].window must be an odd int >= 3. Got 10."
    assert message(merged("derivatives", window=1)) == "cfg.toml: [derivatives].window must be an odd int >= 3. Got 1."


def test_unknown_method_lists_the_choices():
    text = message(merged("derivatives", method="savgol"))
    assert "[derivatives].method must be one of 'finite_difference', 'savitzky_golay'" in text
    assert "Got 'savgol'" in text


def test_wrong_type_and_range():
    assert "[terms].degree must be an int >= 0 and <= 6. Got 'three'." in message(merged("terms", degree="three"))
    assert "[selection].cv_folds must be an int >= 2" in message(merged("selection", cv_folds=1))
    assert "[selection].threshold must be a number >= 0 or 'cv'. Got -1" in message(merged("selection", threshold=-1))
    assert "[terms].constant must be true or false. Got 1." in message(merged("terms", constant=1))


def test_missing_required_key():
    assert "[data].states is required" in message({"data": {"files": ["a.csv"]}})


def test_state_also_an_input():
    assert "appear in both [data].states and [data].inputs" in message(merged("data", inputs=["x"]))


def test_term_variables_must_be_columns():
    text = message(merged("terms", variables=["x", "uu"]))
    assert "[terms].variables names 'uu'" in text and "Did you mean 'u'?" in text


def test_method_option_checked_at_config_time():
    text = message(merged("derivatives", method="savitzky_golay", window=5, order=5))
    assert text == ("cfg.toml: [derivatives].window must be greater than [derivatives].order for "
                    "'savitzky_golay'. Got window = 5, order = 5.")


def test_deprecated_names_are_read_with_a_note():
    settings = validate(merged("derivatives", method="kalman", alpha=2.0), "cfg.toml")
    assert settings.derivatives.options["noise_ratio"] == 2.0
    assert any("[derivatives].alpha is now [derivatives].noise_ratio" in n for n in settings.notes)
    settings = validate(merged("bootstrap", coefficients="bragg"), "cfg.toml")
    assert settings.bootstrap.coefficients == "member_median" and settings.notes


def test_missing_file_and_bad_toml(tmp_path):
    with pytest.raises(ConfigError, match="config file not found"):
        load_config(tmp_path / "none.toml")
    bad = tmp_path / "bad.toml"
    bad.write_text("[data\nfiles = 3")
    with pytest.raises(ConfigError, match="bad.toml: not valid TOML"):
        load_config(bad)


def test_effective_config_round_trips_through_toml():
    # tomllib (the standard library's TOML reader) reads back what we write.
    config = validate(merged("data", rename={"x": "X [m]"}), "cfg.toml")
    again = validate(tomllib.loads(to_toml(config)), "cfg.toml")
    assert again.as_dict() == config.as_dict()


# --------------------------------------------------------------------------- [hidden]

HIDDEN = {"states": ["i"], "equations": {"x": ["i"], "i": ["x", "i", "u"]}}


def test_hidden_state_in_no_equation_names_the_key():
    text = message(merged("hidden", states=["i", "h"], equations={"x": ["i"], "i": ["x", "i", "u"], "h": ["h"]}))
    assert "\n" not in text
    assert text.startswith("cfg.toml: [hidden].states: 'h' appears in no output and in no equation")


def test_output_expression_with_an_unknown_name_names_the_key():
    text = message(merged("hidden", **HIDDEN, outputs={"sensor": "x + q"}))
    assert "\n" not in text
    assert text.startswith("cfg.toml: [hidden].outputs.sensor:") and "unknown name 'q'" in text


@pytest.mark.parametrize("keys, expected", [
    ({"states": ["x"]}, "[hidden].states: 'x' is also a measured state"),
    ({"known": {"x": {"i": "big"}}}, "[hidden].known.x.i must be a finite number"),
    ({"initial": {"x": 1.0}}, "[hidden].initial.x: 'x' is not a hidden state"),
    ({"equations": {"y": ["i"]}}, "[hidden].equations.y: 'y' is not a state"),
    ({"scale": "fixed"}, "[hidden].scale must be one of 'unset', 'unit_coupling'"),
])
def test_bad_hidden_keys(keys, expected):
    text = message(merged("hidden", **{**HIDDEN, **keys}))
    assert "\n" not in text and expected in text, text


def test_hidden_keys_without_hidden_states_are_refused():
    assert "[hidden].known applies only with hidden states" in message(merged("hidden", known={"x": {"x": 1.0}}))


def test_measured_only_config_is_unchanged_by_the_hidden_section():
    # No [hidden] states: the effective config and its TOML are those of before the section existed.
    config = validate(BASE, "cfg.toml")
    assert "hidden" not in config.as_dict() and "[hidden]" not in to_toml(config)
    with_hidden = validate(merged("hidden", **HIDDEN), "cfg.toml")
    again = validate(tomllib.loads(to_toml(with_hidden)), "cfg.toml")
    assert again.as_dict() == with_hidden.as_dict()
