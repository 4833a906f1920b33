"""The report for many sites: summary first, one funnel plot, charts for the detail sites
only, every site in one sortable and filterable table, rendered by headless Chromium.

External references used here:
* Python's ``html.parser`` (via tests/test_report.py's PageParser) for ids, tags and tables;
* matplotlib's artists (the scatter's offsets) for what the funnel plot draws;
* DuckDB queries over the run's own tables for every expected count;
* Debian's ``chromium`` in headless mode (``--dump-dom`` after the page's scripts ran) for
  the browser checks; the DOM's own ``getBoundingClientRect`` / ``clientWidth`` for widths.

The warehouse is a clean simulated study (benchmarks/clean_study.py, fixed seed; 70 sites)
with one planted outlier (true CACE 30 instead of about 6), ingested and monitored by
the pipeline.  Speed and file size are measured by benchmarks/false_alarms.py, not here.
"""

from __future__ import annotations

import importlib.util
import json
import re
import sys
from pathlib import Path

import duckdb
import numpy as np
import pytest

from takeup.pipeline.outputs.report import load_report_data, render_report
from takeup.pipeline.outputs.report.charts import funnel_figure
from takeup.pipeline.outputs.report.many_sites import MANY_SITES, choose_detail_sites
from tests.test_report import parse
from tests.test_report_browser import _chromium, _run

ROOT = Path(__file__).resolve().parents[1]
N_SITES = 70
OUTLIER = 16            # index of the planted site: S0017


def _clean_study_module():
    spec = importlib.util.spec_from_file_location("clean_study", ROOT / "benchmarks" / "clean_study.py")
    mod = importlib.util.module_from_spec(spec)
    sys.modules.setdefault("clean_study", mod)
    spec.loader.exec_module(mod)
    return mod


@pytest.fixture(scope="module")
def many(tmp_path_factory):
    cs = _clean_study_module()
    study = cs.simulate_clean_study(N_SITES, seed=20261204, planted_cace={OUTLIER: 30.0})
    root = tmp_path_factory.mktemp("many")
    with pytest.MonkeyPatch.context() as mp:
        mp.setenv("TAKEUP_ID_KEY", "test-key-not-secret")
        path, summary = cs.build_warehouse(study, root)
    con = duckdb.connect(str(path), read_only=True)
    out = render_report(con, root / "report.html", max_flagged=12, n_influential=5)
    yield {"con": con, "run": summary.run_id, "path": out, "text": out.read_text(encoding="utf-8")}
    con.close()


def _q(con, sql, run):
    return con.execute(sql, {"r": run}).df()


def test_planted_outlier_is_flagged_through_the_pipeline(many):
    a = _q(many["con"], "SELECT site_id, rule FROM alerts WHERE run_id = $r AND rule = 'outlier_site'", many["run"])
    assert set(a.site_id) == {f"S{OUTLIER + 1:04d}"}


def test_summary_first_then_charts_then_every_site(many):
    text, con, run = many["text"], many["con"], many["run"]
    assert N_SITES > MANY_SITES
    p = parse(text)
    assert p.errors == []
    order = ['id="summary"', 'id="alerts"', 'id="funnel-plot"', 'id="forest-plot"', 'id="all-sites-table"',
             'id="site-details"', 'id="heterogeneity"', 'id="uptake-trends"', 'id="cautions"']
    pos = [text.index(o) for o in order]
    assert pos == sorted(pos)
    assert len(p.ids) == len(set(p.ids))
    # alerts by rule and severity: counts equal the alerts table grouped in DuckDB
    want = _q(con, "SELECT rule, severity, count(*) FILTER (status = 'new') AS n_new, "
                   "count(DISTINCT site_id) FILTER (status IN ('new', 'ongoing')) AS n_sites "
                   "FROM alerts WHERE run_id = $r GROUP BY ALL", run)
    got = {(r[0], r[1]): (int(r[2]), int(r[5])) for r in p.tables["summary-alerts-table"][1:]}
    assert got == {(r.rule, r.severity): (int(r.n_new), int(r.n_sites)) for r in want.itertuples()}
    # every site once in the table, with a working anchor to its details
    sites = _q(con, "SELECT site_id FROM site_estimates WHERE run_id = $r AND spec = 'unadjusted'", run).site_id
    rows = p.tables["all-sites-table"][1:]
    assert sorted(r[0] for r in rows) == sorted(sites)
    anchors = re.findall(r'<a href="#(site-\d+)">', text)
    assert len(anchors) == len(sites) and all(f'<details class="site" id="{a}">' in text for a in anchors)
    # self-contained: one inline script, no src/href leaving the page
    assert p.tags.count("script") == 1 and "<script src" not in text
    assert all(v.startswith("#") for _, _, v in p.urls)


def test_charts_only_for_the_detail_sites(many):
    d = load_report_data(many["con"], many["run"])
    choice = choose_detail_sites(d, max_flagged=12, n_influential=5)
    act = d.alerts[d.alerts.status.isin(["new", "ongoing"]) & d.alerts.site_id.notna()]
    assert set(choice.flagged) <= set(act.site_id) and len(choice.flagged) == min(12, act.site_id.nunique())
    rank = {"critical": 0, "warning": 1, "info": 2}
    worst = act.assign(r=act.severity.map(rank)).groupby("site_id").r.min()
    assert list(worst[list(choice.flagged)]) == sorted(worst[list(choice.flagged)])   # most severe first
    assert worst[list(choice.flagged)].max() <= worst.drop(list(choice.flagged)).min(skipna=True) or len(worst) == len(choice.flagged)
    # the influential sites: largest |pooled - leave-one-out| among the others (numpy reference)
    inf = d.influence.set_index("site_id")
    shift = (inf.loo_estimate - d.headline["estimate"]).abs().drop(list(choice.flagged), errors="ignore")
    assert list(choice.influential) == list(shift.sort_values(ascending=False, kind="stable").index[:5])
    text = many["text"]
    forest = text[text.index('id="forest-plot"'):text.index('id="all-sites-table"')]
    trends = text[text.index('id="uptake-trends"'):text.index('id="data-quality"')]
    for s in d.site_estimates.site_id:
        assert (s in forest) == (s in choice.sites), s
        assert (s in trends) == (s in choice.sites and s in set(d.trends.site_id)), s


def test_funnel_draws_every_pooled_site_once(many):
    d = load_report_data(many["con"], many["run"])
    fig = funnel_figure(d.site_estimates, d.headline, flagged=["S0017"])
    ax = fig.axes[0]
    pts = np.concatenate([c.get_offsets() for c in ax.collections if hasattr(c, "get_offsets")
                          and len(c.get_offsets()) and c.get_offsets().shape[1] == 2 and c.get_sizes().size])
    pooled = d.site_estimates[d.site_estimates.included_in_pool.astype(bool)]
    assert len(pts) == len(pooled)
    np.testing.assert_allclose(np.sort(pts[:, 0]), np.sort(pooled.cace.to_numpy(float)))
    assert ax.get_ylim()[0] > ax.get_ylim()[1]            # standard error runs downwards


def test_small_report_keeps_its_layout(tmp_path, monkeypatch):
    from tests.test_report import build_warehouse
    con = build_warehouse(tmp_path, monkeypatch)
    text = render_report(con, tmp_path / "r.html").read_text(encoding="utf-8")
    con.close()
    assert "<script" not in text and 'id="funnel-plot"' not in text and 'id="summary"' not in text


# --------------------------------------------------------------------------- the browser
_PROBE_HEAD = ("<script>window.__errors = []; window.addEventListener('error', function (e) "
               "{ window.__errors.push(String(e.message)); });</script>")
_PROBE = """<script>
window.addEventListener('load', function () {
  var out = {};
  function visible(t) { return Array.prototype.filter.call(t.tBodies[0].rows, function (r) {
    return !r.hidden && r.offsetParent !== null; }); }
  try {
    var t = document.getElementById('all-sites-table');
    out.total = t.tBodies[0].rows.length;
    out.visible_before = visible(t).length;
    var box = document.getElementById('site-filter');
    box.value = '%(site)s'; box.dispatchEvent(new Event('input'));
    out.text_filter = visible(t).map(function (r) { return r.cells[0].textContent; });
    out.count_text = document.getElementById('site-filter-count').textContent;
    box.value = ''; box.dispatchEvent(new Event('input'));
    var sel = document.getElementById('site-filter-alerted');
    sel.value = 'yes'; sel.dispatchEvent(new Event('change'));
    out.alerted = visible(t).map(function (r) { return r.cells[0].textContent; });
    sel.value = ''; sel.dispatchEvent(new Event('change'));
    t.tHead.rows[0].cells[6].click();
    out.sorted_cace = visible(t).map(function (r) { return r.cells[6].getAttribute('data-v'); });
    out.too_wide = [];
    document.querySelectorAll('table').forEach(function (tb, i) {
      var w = tb.getBoundingClientRect().width, c = tb.parentElement.clientWidth;
      if (w > c + 1) out.too_wide.push((tb.id || ('table ' + i)) + ': ' + w + ' > ' + c);
    });
    out.main_width = document.querySelector('main').clientWidth;
    out.page_overflow = document.documentElement.scrollWidth > window.innerWidth;
  } catch (e) { window.__errors.push('probe: ' + e); }
  out.errors = window.__errors;
  var pre = document.createElement('pre'); pre.id = 'probe-result'; pre.textContent = JSON.stringify(out);
  document.body.appendChild(pre);
});
</script>"""


@pytest.fixture(scope="module")
def chromium() -> str:
    exe = _chromium()
    if exe is None:
        pytest.skip("Chromium is not installed here; .ci/run installs it (apt-get install -y chromium)")
    return exe


@pytest.mark.parametrize("width", [1280, 900])
def test_browser_opens_filters_sorts_and_fits(chromium, many, tmp_path, width):
    site = "S0007"
    probed = many["text"].replace("<head>", "<head>" + _PROBE_HEAD, 1).replace(
        "</body>", _PROBE % {"site": site} + "</body>", 1)
    page = tmp_path / "probe.html"
    page.write_text(probed, encoding="utf-8")
    r = _run(chromium, tmp_path / "profile", "--virtual-time-budget=10000", f"--window-size={width},3000",
             "--dump-dom", page.as_uri())
    assert r.returncode == 0, r.stderr[-2000:]
    m = re.search(r'<pre id="probe-result">(.*?)</pre>', r.stdout, re.S)
    assert m, "the page did not finish loading"
    out = json.loads(m.group(1).replace("&quot;", '"').replace("&gt;", ">").replace("&lt;", "<")
                     .replace("&amp;", "&"))
    assert out["errors"] == []
    con, run = many["con"], many["run"]
    n = int(con.execute("SELECT count(*) FROM site_estimates WHERE run_id = $r AND spec = 'unadjusted'",
                        {"r": run}).fetchone()[0])
    assert out["total"] == n
    # the scroll box shows rows lazily, but none is hidden before filtering
    assert out["text_filter"] == [site] and out["count_text"] == f"1 of {n} shown"
    alerted = {s for (s,) in con.execute("SELECT DISTINCT site_id FROM alerts WHERE run_id = $r AND site_id "
                                        "IS NOT NULL AND status IN ('new', 'ongoing')", {"r": run}).fetchall()}
    assert set(out["alerted"]) == alerted and alerted
    vals = [float(v) for v in out["sorted_cace"] if v]
    assert vals == sorted(vals) and len(vals) >= n - 10
    assert out["too_wide"] == []
    assert out["page_overflow"] is False
