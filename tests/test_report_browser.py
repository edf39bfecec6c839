"""The report as a page: rendered by headless Chromium, every image decoded, nothing overflows.

The browser is the Debian ``chromium`` binary (``.ci/run`` installs it in CI). A probe
script is added to a copy of the page; on load it opens every disclosure element and
writes what it measured into the DOM, which ``--dump-dom`` returns. Outside CI
(``CI`` unset) the tests skip when no Chromium is installed.
"""

from __future__ import annotations

import json
import os
import re
import shutil
import subprocess
import tempfile
from pathlib import Path

import pytest

from coldindex.io.files import load_config
from coldindex.release import run_update
from tests.test_pipeline import make_inputs
from tests.test_regions import EAST_N, EAST_S, WEST, _collection

BROWSERS = ("chromium", "chromium-browser", "google-chrome")
FLAGS = ("--headless", "--no-sandbox", "--disable-gpu", "--disable-background-networking",
         "--no-first-run", "--disable-component-update", "--disable-sync",
         "--hide-scrollbars", "--force-device-scale-factor=1")
WIDTH = 1100  # px: a laptop-sized window
ARTIFACTS = Path(os.environ.get("COLDINDEX_TEST_ARTIFACTS",
                                Path(__file__).resolve().parents[1] / "build" / "test-artifacts"))
SECTIONS = {"headlines", "indices", "regions", "maps", "classes", "shifts", "skill",
            "projections", "revisions", "qc", "methods", "provenance"}

PROBE = """<script>
window.__problems = [];
window.addEventListener('error', function (e) {
  var t = e.target;
  window.__problems.push(t && t.tagName ? 'resource failed: ' + t.tagName : 'script error: '
                         + e.message);
}, true);
var __err = console.error;
console.error = function () {
  window.__problems.push('console error: ' + Array.prototype.join.call(arguments, ' '));
  __err.apply(console, arguments);
};
window.addEventListener('load', function () {
  document.querySelectorAll('details').forEach(function (d) { d.open = true; });
  var W = document.documentElement.clientWidth, wide = [];
  document.body.querySelectorAll('*').forEach(function (el) {
    for (var p = el.parentElement; p; p = p.parentElement) {
      var o = getComputedStyle(p).overflowX;
      if (o === 'auto' || o === 'scroll' || o === 'hidden') return;  // scrolls inside its box
    }
    var r = el.getBoundingClientRect();
    if (r.width > 0 && r.right > W + 1) wide.push(el.tagName + ' ' + Math.round(r.right));
  });
  var out = {width: W, scrollWidth: document.documentElement.scrollWidth,
             images: Array.prototype.map.call(document.images, function (i) {
               return {alt: i.alt, width: i.naturalWidth}; }),
             wide: wide.slice(0, 20), problems: window.__problems,
             sections: Array.prototype.map.call(document.querySelectorAll('section[id]'),
                                                function (s) { return s.id; })};
  var pre = document.createElement('pre');
  pre.id = 'probe';
  pre.textContent = JSON.stringify(out);
  pre.style.display = 'none';
  document.body.appendChild(pre);
});
</script>"""


def _browser() -> str:
    for name in BROWSERS:
        path = shutil.which(name)
        if path:
            return path
    if os.environ.get("CI"):
        pytest.fail("No Chromium in CI: .ci/run installs the Debian package chromium.")
    pytest.skip("No Chromium installed (apt-get install chromium); CI runs this test.")


def _run(args: list[str]) -> subprocess.CompletedProcess:
    with tempfile.TemporaryDirectory() as profile:
        return subprocess.run([_browser(), *FLAGS, f"--user-data-dir={profile}", *args],
                              capture_output=True, text=True, timeout=180, check=False)


def probe(page: Path) -> dict:
    """Load a copy of ``page`` with the probe script; return what the probe measured."""
    html = page.read_text(encoding="utf-8")
    probed = page.with_name(page.stem + ".probe.html")
    probed.write_text(html.replace("<head>", "<head>" + PROBE, 1), encoding="utf-8")
    done = _run(["--virtual-time-budget=10000", f"--window-size={WIDTH},900", "--dump-dom",
                 probed.resolve().as_uri()])
    m = re.search(r'<pre id="probe"[^>]*>(.*?)</pre>', done.stdout, re.S)
    assert m, f"the probe did not report (exit {done.returncode}): {done.stderr[-500:]}"
    text = m.group(1).replace("&quot;", '"').replace("&lt;", "<").replace("&gt;", ">")
    return json.loads(text.replace("&amp;", "&"))


def problems(result: dict) -> list[str]:
    """Everything wrong with a rendered page, one line each (empty when fine)."""
    out = [f"image {i['alt']!r} did not decode" for i in result["images"] if i["width"] <= 0]
    out += list(result["problems"])
    out += [f"wider than the page ({result['width']} px): {w}" for w in result["wide"]]
    if result["scrollWidth"] > result["width"] + 1:
        out.append(f"the page scrolls sideways ({result['scrollWidth']} px)")
    return out


@pytest.fixture(scope="module")
def report(tmp_path_factory) -> Path:
    _browser()  # skip before the release is built when there is no browser
    base = tmp_path_factory.mktemp("browser")
    cfg_path = make_inputs(base / "inputs")
    (base / "inputs" / "regions.geojson").write_text(
        json.dumps(_collection(WEST, EAST_S, EAST_N)))
    (base / "inputs" / "coast.geojson").write_text(json.dumps(
        {"type": "LineString", "coordinates": [[178.6, 61.95], [179.5, 61.7],
                                               [-179.5, 61.8], [-178.6, 61.6]]}))
    text = cfg_path.read_text().replace(
        'trajectories = ["traj.csv"]',
        'trajectories = ["traj.csv"]\nregions = "regions.geojson"\ncoastline = "coast.geojson"')
    cfg_path.write_text(text)
    run = run_update(load_config(cfg_path), base / "out")
    return run.release / "report.html"


def test_report_renders_cleanly_in_chromium(report: Path):
    result = probe(report)
    assert problems(result) == []
    assert len(result["images"]) >= 6
    assert SECTIONS <= set(result["sections"])
    # Keep a screenshot of the page as a test artifact.
    ARTIFACTS.mkdir(parents=True, exist_ok=True)
    shot = ARTIFACTS / "report.png"
    shot.unlink(missing_ok=True)
    _run([f"--screenshot={shot}", f"--window-size={WIDTH},2400", report.resolve().as_uri()])
    assert shot.is_file() and shot.read_bytes()[:8] == b"\x89PNG\r\n\x1a\n"


def test_probe_catches_a_broken_image_an_overflow_and_a_script_error(report: Path):
    html = report.read_text(encoding="utf-8")
    broken = report.with_name("broken.html")
    # A PNG cut short, a table wider than the page outside any scroll box, a failing script.
    html = re.sub(r'src="data:image/png;base64,([A-Za-z0-9+/]{60})[^"]*"',
                  r'src="data:image/png;base64,\1"', html, count=1)
    html = html.replace("</body>", '<table style="width:3000px"><tr><td>x</td></tr></table>'
                        "<script>undefinedFunction();</script></body>")
    broken.write_text(html, encoding="utf-8")
    found = problems(probe(broken))
    assert any("did not decode" in p for p in found), found
    assert any("wider than the page" in p for p in found), found
    assert any("script error" in p for p in found), found
