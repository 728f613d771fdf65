"""The self-contained HTML report: sections, embedded PNG figures, escaping, nothing outside.

The HTML is read back with the standard library's parser (html.parser), the images
with base64 (RFC 4648) and Pillow's PNG decoder; the PNG signature is that of the
PNG specification (ISO/IEC 15948, section 5.2).
"""

import base64
import html
import io
from html.parser import HTMLParser
from pathlib import Path

import numpy as np
import pytest
from PIL import Image  # Pillow, a dependency of matplotlib

import discover
import discover.smoothing
from discover import html_report

import tomllib

ROOT = Path(__file__).resolve().parents[1]
CONFIGS = ROOT / "configs"
PNG_SIGNATURE = b"\x89PNG\r\n\x1a\n"  # PNG specification, section 5.2
DATA_PNG = "data:image/png;base64,"
# The sections the report must have (issue: inputs, data overview, derivative check,
# equations, inclusion map, CV curve, ranking, held-out validation, warnings, caution).
SECTION_IDS = {"inputs", "data-overview", "derivative-check", "equations", "inclusion-map", "cv-curve",
               "ranking", "held-out", "warnings", "caution"}
LOADING_ATTRIBUTES = {"src", "href", "srcset", "action", "data", "poster", "background", "formaction", "xlink:href"}


class PageParser(HTMLParser):
    """Collect tags, attributes, heading ids, text, and tables (caption and rows of cells)."""

    def __init__(self):
        super().__init__(convert_charrefs=True)
        self.tags, self.attributes, self.h2_ids, self.text = [], [], [], []
        self.tables = []
        self._cell = self._caption = None

    def handle_starttag(self, tag, attrs):
        self.tags.append(tag)
        self.attributes.extend((tag, name, value) for name, value in attrs)
        if tag == "h2":
            self.h2_ids.append(dict(attrs).get("id"))
        elif tag == "table":
            self.tables.append({"caption": "", "rows": []})
        elif tag == "caption":
            self._caption = ""
        elif tag == "tr":
            self.tables[-1]["rows"].append([])
        elif tag in ("td", "th"):
            self._cell = ""

    def handle_endtag(self, tag):
        if tag in ("td", "th") and self._cell is not None:
            self.tables[-1]["rows"][-1].append(self._cell)
            self._cell = None
        elif tag == "caption":
            self.tables[-1]["caption"], self._caption = self._caption, None

    def handle_data(self, data):
        self.text.append(data)
        if self._cell is not None:
            self._cell += data
        if self._caption is not None:
            self._caption += data

    def table(self, caption_start):
        found = [t for t in self.tables if t["caption"].startswith(caption_start)]
        assert len(found) == 1, (caption_start, [t["caption"] for t in self.tables])
        return found[0]["rows"]


def parse(text):
    parser = PageParser()
    parser.feed(text)
    parser.close()
    return parser


def ship_config(**changes):
    """configs/ship.toml as a dict, data paths absolute (relative to configs/)."""
    config = tomllib.loads((CONFIGS / "ship.toml").read_text())
    config["data"]["files"] = [str((CONFIGS / f).resolve()) for f in config["data"]["files"]]
    config.pop("output", None)
    config["bootstrap"] = {"members": 20}
    # One top candidate in the ranking figure: each one is a simulation (keeps the test fast).
    config.setdefault("ranking", {})["top"] = 1
    for section, values in changes.items():
        config.setdefault(section, {}).update(values)
    return config


@pytest.fixture(scope="module")
def ship_report(tmp_path_factory):
    result = discover.run(ship_config())
    folder = tmp_path_factory.mktemp("ship_report")
    path = html_report.write_report(result, folder)
    return result, path.read_text(encoding="utf-8")


def check_self_contained(page, text):
    """Every image a PNG data URI; nothing that loads from outside the file."""
    for tag, name, value in page.attributes:
        if name.lower() in LOADING_ATTRIBUTES:
            assert value.startswith(DATA_PNG) or value.startswith("#"), (tag, name, value[:80])
    assert not {"script", "link", "iframe", "object", "embed", "base"} & set(page.tags)
    assert "http:" not in text and "https:" not in text and "file:" not in text
    assert "url(" not in text and "@import" not in text
    images = [value for tag, name, value in page.attributes if tag == "img" and name == "src"]
    assert images, "the report embeds figures"
    for uri in images:
        assert uri.startswith(DATA_PNG)
        data = base64.b64decode(uri[len(DATA_PNG):], validate=True)
        assert data.startswith(PNG_SIGNATURE)
        with Image.open(io.BytesIO(data)) as image:
            assert image.format == "PNG"
            image.load()  # decodes every pixel row
            assert image.size[0] > 100 and image.size[1] > 100
    return images


def test_ship_report_has_every_section_and_embedded_pngs(ship_report):
    result, text = ship_report
    page = parse(text)
    assert SECTION_IDS <= set(page.h2_ids)
    images = check_self_contained(page, text)
    # Figures: coefficients, held-out run, state coverage, inclusion map, CV curve, Pareto,
    # top candidates, one overview per run (5 runs), derivative check.
    assert len(images) == 7 + 5 + 1
    # Internal links point at sections that exist.
    anchors = {value[1:] for tag, name, value in page.attributes if name == "href"}
    assert anchors <= set(page.h2_ids)


def test_ship_report_tables_are_real_tables_with_the_results(ship_report):
    result, text = ship_report
    page = parse(text)
    assert len(page.tables) >= 6 and "th" in page.tags and "caption" in page.tags
    # The ranking table lists every candidate (8 here, under the row limit), in rank order.
    ranking = page.table(f"{len(result.ranking.table)} candidate structures")
    assert ranking[0][:2] == ["rank", "candidate"]
    assert [row[1] for row in ranking[1:]] == list(result.ranking.table["candidate"])
    # Held-out fit percentages, as the terminal summary prints them (one decimal).
    fits = page.table("held-out fit")
    for item in result.validation:
        for state, fit in zip(result.model.state_names, item.metrics["fit_percent"]):
            assert [item.run, state, f"{fit:.1f} %"] in [row[:3] for row in fits[1:]]
    # Each kept term: refined coefficient, derivative fit and confidence interval (refinement is on
    # by default), then inclusion probability and member spread.
    assert {"inclusion_probability", "coefficient_low", "coefficient_high"} <= set(result.model.term_stats)
    assert {"derivative_fit", "interval_low", "interval_high"} <= set(result.model.term_stats)
    for state, kept in result.model.equations():
        rows = page.table(f"terms of d({state})/dt")
        assert rows[0][:3] == ["term", "coefficient", "derivative fit"]
        assert "inclusion probability" in rows[0]
        assert rows[1:] == [[discover.report.pretty_term(expr), f"{coefficient:.6g}",
                             f"{values['derivative_fit']:.6g}", f"{values['interval_low']:.6g}",
                             f"{values['interval_high']:.6g}",
                             f"{values['inclusion_probability']:.3g}", f"{values['coefficient_low']:.4g}",
                             f"{values['coefficient_high']:.4g}"] for expr, coefficient, values in kept]
    # Data files with their SHA-256 (hashlib's, via the provenance record).
    files = page.table("data files")
    for entry in discover.provenance.provenance(result)["data_files"]:
        assert [entry["run"], entry["path"], entry["sha256"]] in [[r[0], r[3], r[4]] for r in files[1:]]
    # The caution before the equations; the config as run in a <pre>.
    assert text.index(discover.report.CAUTION) < text.index('id="equations"')
    assert "pre" in page.tags and "[bootstrap]" in text and "members = 20" in text


@pytest.fixture(scope="module")
def hostile_folder(tmp_path_factory):
    """Ship runs whose file names and yaw-rate column carry HTML."""
    folder = tmp_path_factory.mktemp("hostile")
    names = {"steps_a": "a<b>", "zigzag_20": "zig&zag \"20\"", "heldout_sine": "held<i>out&'x'"}
    for stem, new in names.items():
        source = (ROOT / "data_demo" / "ship" / f"{stem}.csv").read_text().splitlines()
        source[0] = source[0].replace("yaw_rate", "<script>alert(1)</script>")
        try:
            (folder / f"{new}.csv").write_text("\n".join(source) + "\n")
        except OSError:  # pragma: no cover - a file system refusing < > in names
            pytest.skip("the file system refuses HTML characters in file names")
    return folder, names


def test_names_from_the_data_are_escaped(hostile_folder, tmp_path):
    folder, names = hostile_folder
    script = "<script>alert(1)</script>"
    held = names["heldout_sine"]
    config = {
        "seed": 1,
        "data": {"files": [str(folder / "*.csv")], "states": ["heading", "yaw_rate"], "inputs": ["rudder"],
                 "rename": {"yaw_rate": script}, "held_out": [held]},
        "derivatives": {"method": "savitzky_golay", "window": 15, "order": 3},
        "terms": {"degree": 3, "variables": ["yaw_rate", "rudder"], "input_degree": 1},
        # The absent parts at once: fixed threshold (no CV), no ensemble, no ranking.
        "selection": {"threshold": 0.1},
        "bootstrap": {"members": 0},
        "ranking": {"enabled": False},
    }
    result = discover.run(config)
    text = html_report.write_report(result, tmp_path).read_text(encoding="utf-8")
    page = parse(text)
    assert SECTION_IDS <= set(page.h2_ids)
    check_self_contained(page, text)
    assert "script" not in page.tags
    # html.escape (standard library) is the reference for the escaped forms.
    for raw in [script] + list(names.values()):
        assert raw not in text, raw
        assert html.escape(raw, quote=True) in text, raw
    # And the parser reads the names back as text, unharmed.
    joined = "".join(page.text)
    assert script in joined and held in joined and names["steps_a"] in joined
    assert "The bootstrap ensemble was off" in joined
    assert "The ranking was off" in joined
    assert "not cross-validated" in joined


def test_report_without_held_out_runs_says_so(tmp_path):
    ship = ROOT / "data_demo" / "ship"
    config = {
        "seed": 1,
        "data": {"files": [str(ship / "steps_a.csv"), str(ship / "zigzag_10.csv")],
                 "states": ["heading", "yaw_rate"], "inputs": ["rudder"], "held_out_count": 0},
        "terms": {"degree": 2, "variables": ["yaw_rate", "rudder"], "input_degree": 1},
        "selection": {"cv_folds": 2},
        "bootstrap": {"members": 0},
        "ranking": {"enabled": False},
    }
    result = discover.run(config)
    assert not result.validation
    text = html_report.render_report(result)
    page = parse(text)
    assert SECTION_IDS <= set(page.h2_ids)
    joined = "".join(page.text)
    assert "No run was held out" in joined
    assert "No run is held out: the model is not validated on unseen data." in joined  # the warning


def test_figure_functions_label_axes_with_column_names():
    # One figure function per plot, callable from a notebook on a result's parts.
    t = np.linspace(0.0, 10.0, 101)
    x = np.column_stack([np.sin(t), np.cos(t)])
    u = np.column_stack([np.where(t > 5, 1.0, 0.0)])
    run = discover.data.Run("demo", t, x, u)
    fig = html_report.plot_run_overview(run, ["angle", "rate"], ["torque"])
    labels = [ax.get_ylabel() for ax in fig.axes]
    assert [label.split("\n")[0] for label in labels] == ["angle", "rate", "torque"]
    assert fig.axes[-1].get_xlabel() == "time"
    x_dot = np.column_stack([np.cos(t), -np.sin(t)])  # d/dt of sin and cos (calculus)
    smoothed = discover.smoothing.Smoothed("demo", t[5:-5], x[5:-5], x_dot[5:-5], u[5:-5], x[5:-5] + 0.01)
    fig = html_report.plot_derivative_check(smoothed, t, x + 0.01, ["angle", "rate"])
    assert [fig.axes[k].get_ylabel() for k in (0, 3)] == ["angle", "rate"]
    assert [fig.axes[k].get_ylabel() for k in (2, 5)] == ["d(angle)/dt", "d(rate)/dt"]
    np.testing.assert_allclose(fig.axes[1].lines[0].get_ydata(), 0.01)  # raw − smoothed
    # Central differences of the raw samples: (sin(t+h) - sin(t-h)) / 2h = cos(t)·sin(h)/h exactly
    # (angle-sum identity) inside the run.
    h = t[1] - t[0]
    raw_slope = fig.axes[2].lines[0].get_ydata()
    np.testing.assert_allclose(raw_slope[1:-1], np.cos(t[1:-1]) * np.sin(h) / h, rtol=1e-9, atol=1e-12)
    uri = html_report.figure_uri(fig)
    assert base64.b64decode(uri[len(DATA_PNG):]).startswith(PNG_SIGNATURE)
