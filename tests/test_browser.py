"""report.html in a real browser: headless Chromium, network off.

Checks that the page logs no console error, that every image decodes and that every
section anchor of the navigation resolves; saves a screenshot in the test's temporary
folder. Skipped, with the reason, where Chromium is not installed (`.ci/run` installs
Debian's ``chromium``). The harness page is ours; the checks use only standard DOM
properties (``HTMLImageElement.naturalWidth``, ``document.getElementById``).
"""

from __future__ import annotations

import json
import re
import shutil
import subprocess
from pathlib import Path

import pytest

import discover

ROOT = Path(__file__).resolve().parents[1]
BROWSER = next((shutil.which(name) for name in ("chromium", "chromium-browser", "google-chrome")
                if shutil.which(name)), None)
pytestmark = pytest.mark.skipif(BROWSER is None, reason="Chromium is not installed (apt-get install chromium)")

HARNESS = """<!DOCTYPE html><html><head><meta charset="utf-8"></head><body>
<iframe id="page" src="report.html" style="width:1200px;height:800px"></iframe>
<pre id="result">pending</pre>
<script>
document.getElementById("page").addEventListener("load", function () {
  var doc = this.contentDocument;
  var images = Array.from(doc.images);
  var broken = images.filter(function (img) { return !(img.complete && img.naturalWidth > 0); }).length;
  var links = Array.from(doc.querySelectorAll('a[href^="#"]'));
  var missing = links.filter(function (a) { return !doc.getElementById(a.getAttribute("href").slice(1)); })
                     .map(function (a) { return a.getAttribute("href"); });
  var external = Array.from(doc.querySelectorAll("[src],[href]")).filter(function (el) {
    var v = el.getAttribute("src") || el.getAttribute("href");
    return !(v.startsWith("#") || v.startsWith("data:"));
  }).length;
  document.getElementById("result").textContent = JSON.stringify(
    {images: images.length, broken: broken, links: links.length, missing: missing, external: external});
});
</script></body></html>"""

FLAGS = ["--headless", "--no-sandbox", "--disable-gpu", "--disable-quic", "--no-first-run",
         "--disable-background-networking", "--disable-component-update", "--disable-sync",
         "--host-resolver-rules=MAP * ~NOTFOUND", "--allow-file-access-from-files"]


def chromium(args, profile, timeout=120):
    return subprocess.run([BROWSER, *FLAGS, f"--user-data-dir={profile}", *args], capture_output=True,
                          text=True, timeout=timeout)


@pytest.fixture(scope="module")
def report_folder(tmp_path_factory):
    result = discover.run(ROOT / "configs" / "ship.toml")
    return discover.write_outputs(result, tmp_path_factory.mktemp("browser") / "ship")


def test_report_in_headless_chromium(report_folder, tmp_path):
    (report_folder / "harness.html").write_text(HARNESS)
    proc = chromium(["--enable-logging=stderr", "--v=0", "--virtual-time-budget=15000", "--dump-dom",
                     (report_folder / "harness.html").as_uri()], tmp_path / "profile")
    match = re.search(r'<pre id="result">(\{.*?\})</pre>', proc.stdout)
    assert match, f"the harness did not report: {proc.stdout[-500:]} {proc.stderr[-2000:]}"
    found = json.loads(match.group(1).replace("&quot;", '"'))
    assert found["images"] >= 5 and found["broken"] == 0, found
    assert found["links"] >= 5 and found["missing"] == [], found
    assert found["external"] == 0, found
    # Console errors of the report page itself (the harness has none of its own).
    errors = [line for line in proc.stderr.splitlines() if "CONSOLE" in line and "report.html" in line]
    assert not errors, errors
    shot = tmp_path / "report.png"
    chromium(["--window-size=1200,2400", f"--screenshot={shot}", (report_folder / "report.html").as_uri()],
             tmp_path / "profile2")
    assert shot.exists() and shot.stat().st_size > 10_000
