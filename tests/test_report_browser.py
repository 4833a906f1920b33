"""The HTML report rendered by a real browser engine (headless Chromium).

External references used here:
* Debian's ``chromium`` package in headless mode: ``--screenshot`` writes a
  PNG of the window size, ``--dump-dom`` prints the DOM after parsing;
* matplotlib's PNG reader (``matplotlib.image.imread``) to decode the
  screenshot;
* the Okabe & Ito (2008) palette values (blue #0072B2, vermillion #D55E00)
  that the charts use, to find the charts' pixels in the screenshot.

The test installs nothing: without Chromium it is skipped (``.ci/run``
installs the package).
"""

from __future__ import annotations

import os
import shutil
import signal
import subprocess
from pathlib import Path

import numpy as np
import pytest
from matplotlib import image as mpimg

from takeup.pipeline.outputs.report import render_report
from tests.test_report import build_warehouse

TIMEOUT_S = 60    # generous: a cold Chromium start takes a few seconds on 2 cores
WIDTH, HEIGHT = 1280, 4000


def _chromium() -> str | None:
    found = shutil.which("chromium")
    if found:
        return found
    return "/usr/bin/chromium" if os.access("/usr/bin/chromium", os.X_OK) else None


@pytest.fixture(scope="module")
def chromium() -> str:
    exe = _chromium()
    if exe is None:
        pytest.skip("Chromium is not installed here; .ci/run installs it (apt-get install -y chromium)")
    return exe


@pytest.fixture(scope="module")
def report(tmp_path_factory) -> Path:
    with pytest.MonkeyPatch.context() as mp:
        con = build_warehouse(tmp_path_factory.mktemp("wh"), mp)
    try:
        return render_report(con, tmp_path_factory.mktemp("html") / "report.html")
    finally:
        con.close()


def _run(exe: str, profile: Path, *args: str) -> subprocess.CompletedProcess:
    """Run headless Chromium in its own process group; kill that group on timeout."""
    cmd = [exe, "--headless", "--no-sandbox", "--disable-gpu", "--disable-background-networking", "--no-first-run",
           "--disable-component-update", "--disable-sync", f"--user-data-dir={profile}", *args]
    proc = subprocess.Popen(cmd, stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True, start_new_session=True)
    try:
        out, err = proc.communicate(timeout=TIMEOUT_S)
    except subprocess.TimeoutExpired:
        os.killpg(proc.pid, signal.SIGKILL)
        proc.communicate()
        pytest.fail(f"chromium did not finish within {TIMEOUT_S} s: {' '.join(cmd)}")
    return subprocess.CompletedProcess(cmd, proc.returncode, out, err)


def _near(rgb: np.ndarray, hex_colour: str, tol: float) -> np.ndarray:
    target = np.array([int(hex_colour[i:i + 2], 16) for i in (1, 3, 5)]) / 255.0
    return np.all(np.abs(rgb - target) <= tol, axis=-1)


def test_screenshot_is_not_blank(chromium, report, tmp_path):
    png = tmp_path / "report.png"
    r = _run(chromium, tmp_path / "profile", f"--screenshot={png}", f"--window-size={WIDTH},{HEIGHT}",
             report.as_uri())
    assert r.returncode == 0, r.stderr[-2000:]
    assert png.exists() and png.stat().st_size > 10_000
    img = mpimg.imread(str(png))              # floats in [0, 1], H x W x (3 or 4)
    assert img.shape[:2] == (HEIGHT, WIDTH)   # Chromium's screenshot is the window size
    rgb = img[..., :3]
    grey = rgb.mean(axis=-1)
    # a blank page has variance 0; text, tables and charts give far more than this small threshold
    assert grey.var() > 0.005
    assert (grey < 0.5).mean() > 0.01         # at least 1% dark pixels (text)
    # the charts were drawn by the browser: the pooled diamond's blue and the weak-site / alert vermillion.
    # Tolerance 0.06 (about 15 of 255 levels) absorbs anti-aliasing and colour management.
    assert _near(rgb, "#0072B2", 0.06).sum() > 500
    assert _near(rgb, "#D55E00", 0.06).sum() > 500


def test_dumped_dom_has_the_sections(chromium, report, tmp_path):
    r = _run(chromium, tmp_path / "profile", "--dump-dom", report.as_uri())
    assert r.returncode == 0, r.stderr[-2000:]
    dom = r.stdout
    for i in ("forest-plot", "alerts-table", "uptake-trends", "cautions"):
        assert f'id="{i}"' in dom, i
    assert dom.count("<svg") == 2             # both charts parsed as inline SVG
    assert "<script" not in dom


_WIDTH_PROBE = """<script>
window.addEventListener('load', function () {
  var out = {too_wide: [], tables: 0};
  document.querySelectorAll('table').forEach(function (tb, i) {
    out.tables += 1;
    var w = tb.getBoundingClientRect().width, c = tb.parentElement.clientWidth;
    if (w > c + 1) out.too_wide.push((tb.id || ('table ' + i)) + ': ' + w + ' > ' + c);
  });
  out.page_overflow = document.documentElement.scrollWidth > window.innerWidth;
  var pre = document.createElement('pre'); pre.id = 'probe-result'; pre.textContent = JSON.stringify(out);
  document.body.appendChild(pre);
});
</script>"""


def test_small_study_tables_fit_the_page_at_1280(chromium, report, tmp_path):
    """Every table of the small-study layout (pooling, precision, sites, alerts, data) fits its container.

    The probe script is added to a copy of the page only (the report itself has no script).
    """
    import json
    import re
    page = tmp_path / "probe.html"
    # a control that must be caught: a table with an unbreakable cell inside a 200 px box
    control = ('<div style="width:200px;overflow:hidden"><table id="wide-control"><tr><td class="num">'
               + "9" * 300 + "</td></tr></table></div>")
    page.write_text(report.read_text(encoding="utf-8").replace("</body>", control + _WIDTH_PROBE + "</body>", 1),
                    encoding="utf-8")
    r = _run(chromium, tmp_path / "profile", "--virtual-time-budget=5000", f"--window-size={WIDTH},3000",
             "--dump-dom", page.as_uri())
    assert r.returncode == 0, r.stderr[-2000:]
    m = re.search(r'<pre id="probe-result">(.*?)</pre>', r.stdout, re.S)
    assert m, "the page did not finish loading"
    out = json.loads(m.group(1).replace("&quot;", '"').replace("&gt;", ">").replace("&lt;", "<").replace("&amp;", "&"))
    assert out["tables"] >= 6
    assert [w.split(":")[0] for w in out["too_wide"]] == ["wide-control"]
    assert out["page_overflow"] is False
    text = report.read_text(encoding="utf-8")
    assert 'id="precision-table"' in text and 'id="alert-validity"' in text
