"""Data checks: each bad input gives a message naming file, column and row."""

import numpy as np
import pandas as pd
import pytest

import discover
from discover.data import load_run
from discover.exceptions import DataError, ExpressionError


def good_frame(n=200):
    t = np.arange(n) * 0.1
    return pd.DataFrame({"t": t, "x": np.sin(t), "u": np.cos(0.3 * t)})


def load(path, **kw):
    options = dict(time="t", states=("x",), inputs=("u",), rename={}, missing="refuse", max_gap=3)
    options.update(kw)
    return load_run(path, **options)


def write(tmp_path, frame, name="run.csv"):
    path = tmp_path / name
    frame.to_csv(path, index=False)
    return path


def test_missing_column_names_file_and_close_match(tmp_path):
    path = write(tmp_path, good_frame().rename(columns={"u": "uu"}))
    with pytest.raises(DataError) as info:
        load(path)
    assert str(path) in str(info.value) and "missing column 'u'" in str(info.value)
    assert "Did you mean 'uu'?" in str(info.value)


def test_non_numeric_cell_names_row(tmp_path):
    frame = good_frame().astype({"x": object})
    frame.loc[17, "x"] = "n/a?"
    path = write(tmp_path, frame)
    with pytest.raises(DataError, match=r"column 'x' has a non-numeric value 'n/a\?' at row 18 \(line 19"):
        load(path)


def test_non_increasing_time_names_row(tmp_path):
    frame = good_frame()
    frame.loc[50, "t"] = frame.loc[49, "t"]
    with pytest.raises(DataError, match=r"time column 't' repeats at row 51"):
        load(write(tmp_path, frame))
    frame = good_frame()
    frame.loc[80, "t"] = 1.0
    with pytest.raises(DataError, match=r"time column 't' goes backwards at row 81"):
        load(write(tmp_path, frame))


def test_nan_refused_by_default_and_counted(tmp_path):
    frame = good_frame()
    frame.loc[[30, 31, 90], "u"] = np.nan
    path = write(tmp_path, frame)
    with pytest.raises(DataError, match=r"column 'u' has 3 NaN or infinite values \(first at row 31\)"):
        load(path)
    run = load(path, missing="interpolate")
    assert run.touched == 3 and np.isfinite(run.u).all() and len(run.t) == 200
    # Linear interpolation in time (numpy.interp, reference library).
    assert run.u[30, 0] == pytest.approx(np.interp(3.0, [2.9, 3.2], [np.cos(0.87), np.cos(0.96)]))
    run = load(path, missing="drop")
    assert run.touched == 3 and len(run.t) == 197


def test_gap_longer_than_max_gap(tmp_path):
    frame = good_frame()
    frame.loc[40:45, "x"] = np.inf
    with pytest.raises(DataError, match=r"gap of 6 consecutive samples .* \[data\].max_gap = 3"):
        load(write(tmp_path, frame), missing="interpolate")


def test_semicolon_delimited_file_with_decimal_commas(tmp_path):
    path = tmp_path / "run.csv"
    good_frame().to_csv(path, index=False, sep=";", decimal=",")
    with pytest.raises(DataError, match=r"run.csv: the columns are separated by semicolons and commas as decimal marks"):
        load(path)


def test_decimal_commas_in_a_comma_separated_file(tmp_path):
    path = tmp_path / "run.csv"
    path.write_text("t,x,u\n0,1,5,2\n1,2,5,3\n")
    with pytest.raises(DataError, match=r"line 2 has 4 fields but the header has 3; are commas used as decimal marks"):
        load(path)


def test_duplicate_columns_named(tmp_path):
    path = tmp_path / "run.csv"
    path.write_text("t,x,x,u\n0,1,1,2\n1,2,2,3\n")
    with pytest.raises(DataError, match=r"run.csv: duplicate column names \['x'\]"):
        load(path)


@pytest.mark.parametrize("content, fragment", [
    (b"", "the file is empty"),
    (b"t,x,u\n", "header but no data rows"),
    (b"\xff\xfe\x00t\x00", "not a UTF-8 text file"),
])
def test_unreadable_files(tmp_path, content, fragment):
    path = tmp_path / "run.csv"
    path.write_bytes(content)
    with pytest.raises(DataError, match=fragment):
        load(path)


def test_corrupt_parquet(tmp_path):
    path = tmp_path / "run.parquet"
    path.write_bytes(b"PAR1 not really")
    with pytest.raises(DataError, match="not a readable Parquet file"):
        load(path)


def test_parquet_is_read(tmp_path):
    pytest.importorskip("pyarrow")
    path = tmp_path / "run.parquet"
    good_frame().to_parquet(path)
    run = load(path)
    np.testing.assert_array_equal(run.x[:, 0], good_frame()["x"].to_numpy())


def config_for(tmp_path, **data):
    section = {"files": [str(tmp_path / "*.csv")], "states": ["x"], "inputs": ["u"], "held_out": []}
    section.update(data)
    return {"data": section, "derivatives": {"method": "savitzky_golay", "window": 11},
            "output": {"figures": False}}


def test_too_few_samples_for_the_derivative_window(tmp_path):
    write(tmp_path, good_frame(200), "long.csv")
    write(tmp_path, good_frame(12), "short.csv")
    with pytest.raises(DataError, match=r"short.csv: 12 samples is too few for \[derivatives\].method = .savitzky_golay. with window = 11, order = 3, trim = 5 \(needs at least 13\)"):
        discover.run(config_for(tmp_path, held_out_count=0))


def test_all_runs_held_out_and_unknown_held_out(tmp_path):
    write(tmp_path, good_frame(), "a.csv")
    with pytest.raises(DataError, match="every run is held out"):
        discover.run(config_for(tmp_path, held_out=["a"]))
    with pytest.raises(DataError, match=r"\[data\].held_out names \['b'\]"):
        discover.run(config_for(tmp_path, held_out=["b"]))


def test_column_name_that_is_not_an_identifier_needs_rename(tmp_path):
    frame = good_frame().rename(columns={"x": "x [m]"})
    write(tmp_path, frame, "a.csv")
    with pytest.raises(DataError, match=r"column 'x \[m\]' cannot be used in term expressions"):
        discover.run(config_for(tmp_path, states=["x [m]"], held_out_count=0))
    result = discover.run(config_for(tmp_path, rename={"x": "x [m]"}, held_out_count=0))
    assert result.model.state_names == ("x",)


def test_custom_term_naming_unknown_column(tmp_path):
    write(tmp_path, good_frame(), "a.csv")
    config = config_for(tmp_path, held_out_count=0)
    config["terms"] = {"custom": ["x*sin(v)"]}
    with pytest.raises(ExpressionError, match=r"\[terms\].custom\[0\]: 'x\*sin\(v\)' at column 7: unknown name 'v'"):
        discover.run(config)


def test_library_larger_than_data(tmp_path):
    write(tmp_path, good_frame(30), "a.csv")
    config = config_for(tmp_path, held_out_count=0)
    config["terms"] = {"degree": 6}
    config["derivatives"] = {"method": "finite_difference"}
    config["data"]["inputs"] = ["u"]
    with pytest.raises(DataError, match="the library has .* terms but the training runs give only"):
        discover.run(config)
