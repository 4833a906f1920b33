"""Tests of takeup.pipeline.outputs.report (the self-contained HTML report).

External references used here:
* Python's ``html.parser`` (the HTML tokenizer of the standard library) to
  parse the page, collect ids / src / href attributes and check nesting;
* the HTML5 list of void elements (WHATWG HTML Living Standard, section
  13.1.2 "Elements": area, base, br, col, embed, hr, img, input, link, meta,
  source, track, wbr) for the nesting check;
* matplotlib's own artists (Polygon vertices, tick labels) to check what the
  forest plot draws against the rows inserted into the warehouse;
* DuckDB aggregates over the inserted storage rows for the data-quality
  figures.

The warehouse content is a small invented run (6 sites, two with weak first
stages, 8 weekly cohorts, alerts of every status); it is plausible but not
a simulation, so no value here is an estimate: every check compares the page
with the rows put into the tables.
"""

from __future__ import annotations

import html
import math
import re
from datetime import date, datetime, timedelta
from html.parser import HTMLParser
from pathlib import Path

import numpy as np
import pandas as pd
import pytest

from matplotlib.patches import Polygon

from takeup.pipeline.outputs.report import ReportError, load_report_data, render_report
from takeup.pipeline.outputs.report.charts import forest_figure, robust_intervals, uptake_figure
from takeup.pipeline.warehouse import init_warehouse, connect
from takeup.schemas.config import OutcomeSpec, StudyConfig

STUDY_ID = "evening-numeracy-pilot"
RUN_OLD = "20260720T060000Z-a1b2"
RUN = "20260727T060000Z-c3d4"
RUN_FAILED = "20260728T060000Z-e5f6"
SITES = ("Alder Street", "Brookfield", "Canal Wharf", "Dunmore Library", "Eastgate", "Fernhill")
START = datetime(2026, 7, 27, 6, 0, 0)

# --------------------------------------------------------------------------
# the invented warehouse content
# --------------------------------------------------------------------------
#: per site: (nT, nC, uptake T, uptake C, F, itt, cace, cace_se, tF low, tF high, AR set, AR low, AR high)
#: sites 4 and 5 have weak first stages: F = 6.25 with a bounded tF interval (c(F=6.25) = 4.92 from Lee et al.
#: 2022 Table 3, sqrt(F) = 2.5: 4.0 +- 4.92 * 3.2), and F = 2.1 < 3.84 where tF is unbounded and the AR set is two
#: rays.  The conventional intervals are estimate +- 1.96 se.
_SITE_VALUES = [
    (120, 118, 0.62, 0.08, 86.0, 3.29, 6.10, 1.90, None, None, "interval", 2.2, 10.1),
    (95, 101, 0.55, 0.10, 64.0, 2.43, 5.40, 2.14, None, None, "interval", 1.0, 10.0),
    (140, 137, 0.70, 0.12, 41.0, 4.58, 7.90, 2.50, None, None, "interval", 3.0, 13.5),
    (60, 58, 0.30, 0.18, 6.25, 0.48, 4.00, 3.20, 4.0 - 4.92 * 3.2, 4.0 + 4.92 * 3.2, "interval", -9.5, 25.1),
    (40, 44, 0.25, 0.15, 2.10, 0.95, 9.50, 6.60, None, None, "two_rays", -14.2, 21.7),
    (110, 105, 0.58, 0.09, 70.0, 2.84, 5.80, 2.00, None, None, "interval", 1.9, 9.9),
]
#: pooled CACE rows of the latest run (outcome 'score'): method -> (est, se, ci, pi, tau2, Q, df, p, I2)
_POOLED = {
    "fixed": (6.31, 0.96, (4.43, 8.19), (None, None), 0.0, 1.21, 3, 0.75, 0.0),
    "dl": (6.30, 0.98, (4.38, 8.22), (2.9, 9.7), 0.12, 1.21, 3, 0.75, 0.0),
    "reml": (6.28, 1.05, (4.22, 8.34), (1.75, 10.81), 0.35, 1.21, 3, 0.75, 0.06),
    "pm": (6.29, 1.01, (4.31, 8.27), (2.2, 10.4), 0.20, 1.21, 3, 0.75, 0.02),
}


def _insert(con, table: str, rows: list[dict]) -> None:
    df = pd.DataFrame(rows)
    con.register("_rows", df)
    con.execute(f'INSERT INTO "{table}" BY NAME SELECT * FROM _rows')
    con.unregister("_rows")


def _site_rows(run_id: str, site_ids, shift: float = 0.0) -> list[dict]:
    rows = []
    for site, v in zip(site_ids, _SITE_VALUES):
        nT, nC, uT, uC, F, itt, cace, se, tlo, thi, ar, alo, ahi = v
        weak = F < 10
        rows.append(dict(
            run_id=run_id, site_id=site, outcome="score", spec="unadjusted",
            n_treatment=nT - 3, n_control=nC - 2, n_treatment_assigned=nT, n_control_assigned=nC,
            missing_outcome_treatment=3, missing_outcome_control=2,
            uptake_treatment=uT, uptake_control=uC, complier_share=uT - uC, complier_share_se=(uT - uC) / math.sqrt(F),
            always_taker_share=uC, never_taker_share=1 - uT, itt=itt, itt_se=0.9,
            cace=cace + shift, cace_se=se, cace_ci_low=cace + shift - 1.96 * se, cace_ci_high=cace + shift + 1.96 * se,
            first_stage_f=F, ar_set=ar, ar_ci_low=alo, ar_ci_high=ahi, tf_ci_low=tlo, tf_ci_high=thi,
            tf_se=None, se_type="HC1", included_in_pool=not weak,
            pool_exclusion_reason="first-stage F below 10" if weak else None,
            status="weak_first_stage" if weak else "ok",
            note="first stage is weak: the conventional interval is unreliable" if weak else None,
        ))
    return rows


def _trend_rows(run_id: str, site_ids) -> list[dict]:
    rows = []
    weeks = [date(2026, 6, 1) + timedelta(weeks=k) for k in range(8)]
    for s, (site, v) in enumerate(zip(site_ids, _SITE_VALUES)):
        uT, uC = v[2], v[3]
        for k, wk in enumerate(weeks):
            # site 4 (index 3): treated uptake falls from week 5 on -- the planted drift behind its alert
            t_share = uT if (s != 3 or k < 4) else max(uC, uT - 0.12 * (k - 3))
            for arm, share in (("treatment", t_share), ("control", uC)):
                n = 15 + s
                taken = int(round(share * n))
                for basis in ("cohort", "calendar"):
                    rows.append(dict(run_id=run_id, site_id=site, arm=arm, basis=basis, period_start=wk,
                                     n_assigned=n, n_taken_up=taken, uptake_share=taken / n,
                                     cumulative_uptake_share=taken / n, first_stage=t_share - uC,
                                     first_stage_se=0.1, cusum=0.0, cusum_limit=4.5))
    return rows


def build_warehouse(tmp_path: Path, monkeypatch, site_ids=SITES, with_alerts: bool = True,
                    with_pooled: bool = True, with_runs: bool = True):
    """Create a warehouse holding an old run, the latest finished run and a newer failed run."""
    monkeypatch.setenv("TAKEUP_ID_KEY", "test-key-not-secret")
    cfg = StudyConfig(study_id=STUDY_ID, outcomes=(OutcomeSpec(name="score", primary=True, unit="points"),
                                                     OutcomeSpec(name="attendance")))
    path, _ = init_warehouse(tmp_path / "w.duckdb", cfg)
    con = connect(path)
    if not with_runs:
        return con
    h = con.execute("SELECT config_hash FROM study_configs").fetchall()[0][0]
    runs = [
        dict(run_id=RUN_OLD, mode="in_process", as_of=date(2026, 7, 19), started_at=START - timedelta(days=7),
             finished_at=START - timedelta(days=7) + timedelta(minutes=2), status="ok", code_version="0.1.0",
             config_hash=h, input_fingerprint="f" * 64, n_batches=4, n_sites=6),
        dict(run_id=RUN, mode="orchestrated", as_of=date(2026, 7, 26), started_at=START,
             finished_at=START + timedelta(minutes=3), status="partial", code_version="0.1.0", config_hash=h,
             input_fingerprint="e" * 64, n_batches=5, n_sites=6, message="site Fernhill: covariates missing"),
        dict(run_id=RUN_FAILED, mode="in_process", as_of=date(2026, 7, 27), started_at=START + timedelta(days=1),
             status="failed", code_version="0.1.0", config_hash=h, input_fingerprint="d" * 64, n_batches=6,
             n_sites=6, message="interrupted"),
    ]
    _insert(con, "runs", runs)
    _insert(con, "site_estimates", _site_rows(RUN, site_ids) + _site_rows(RUN_OLD, site_ids, shift=-0.5))
    _insert(con, "uptake_trends", _trend_rows(RUN, site_ids))
    if with_pooled:
        pooled = []
        for m, (e, se, ci, pi, t2, q, df, p, i2) in _POOLED.items():
            pooled.append(dict(run_id=RUN, outcome="score", quantity="cace", method=m, estimate=e, se=se,
                               ci_low=ci[0], ci_high=ci[1], pi_low=pi[0], pi_high=pi[1], tau2=t2, q=q, q_df=df,
                               q_pvalue=p, i2=i2, h2=1 / (1 - i2), n_sites=4))
        pooled.append(dict(run_id=RUN, outcome="score", quantity="cace", method="pooled_2sls", estimate=6.2, se=0.97,
                           ci_low=4.3, ci_high=8.1, q=1.4, q_df=3, q_pvalue=0.71, n_sites=4))
        pooled.append(dict(run_id=RUN, outcome="score", quantity="itt", method="reml", estimate=2.9, se=0.5,
                           ci_low=1.92, ci_high=3.88, tau2=0.0, q=2.0, q_df=5, q_pvalue=0.85, i2=0.0, n_sites=6))
        for g, e in (("North", 5.9), ("South", 6.7)):
            pooled.append(dict(run_id=RUN, outcome="score", quantity="cace", method="reml", group_field="region",
                               group=g, estimate=e, se=1.5, ci_low=e - 2.94, ci_high=e + 2.94, tau2=0.1, i2=0.05,
                               n_sites=2))
        _insert(con, "pooled_estimates", pooled)
        _insert(con, "subgroup_tests", [dict(run_id=RUN, outcome="score", quantity="cace", method="reml",
                                             group_field="region", n_groups=2, q_between=0.14, q_between_df=1,
                                             q_between_pvalue=0.71)])
        _insert(con, "site_influence", [dict(run_id=RUN, outcome="score", quantity="cace", method="reml",
                                             site_id=s, estimate=v[6], se=v[7], loo_estimate=6.2, loo_se=1.1,
                                             loo_tau2=0.3, std_residual=0.1, eb_estimate=6.2, eb_se=0.9)
                                        for s, v in zip(site_ids, _SITE_VALUES) if v[4] >= 10])
    _insert(con, "complier_profile", [dict(run_id=RUN, site_id=s, covariate="age", n=v[0] + v[1], mean_all=38.0,
                                           mean_compliers=36.5, mean_always_takers=41.0, mean_never_takers=39.2)
                                      for s, v in zip(site_ids, _SITE_VALUES)])
    _insert(con, "precision_forecasts",
            [dict(run_id=RUN, scope="site", site_id=s, outcome="score", n=v[0] + v[1], mde_itt=1.4 + 0.1 * i,
                  mde_cace=2.8 + 0.2 * i, complier_share=0.5, accrual_per_week=12.0, target_mde=2.0,
                  weeks_to_target=6.0 + i, forecast_date=date(2026, 9, 7) + timedelta(days=7 * i))
             for i, (s, v) in enumerate(zip(site_ids, _SITE_VALUES))]
            + [dict(run_id=RUN, scope="pooled", site_id=None, outcome="score", n=1200, mde_itt=0.6, mde_cace=1.2,
                    complier_share=0.5, accrual_per_week=70.0, target_mde=2.0, weeks_to_target=0.0,
                    forecast_date=date(2026, 7, 27))])
    if with_alerts:
        s = site_ids
        alerts = [
            ("weak_first_stage", s[4], "warning", "ongoing", RUN_OLD, f"First-stage F at {s[4]} is 2.1 (below 10)."),
            ("treatment_uptake_drift", s[3], "critical", "new", RUN,
             f"Treated uptake at {s[3]} fell from 30% to 18% over the last 4 weeks (CUSUM 6.1 > 4.5)."),
            ("control_uptake_drift", s[1], "warning", "resolved", RUN_OLD,
             f"Control uptake at {s[1]} is back at its baseline level."),
            ("stale_site", s[5], "warning", "ongoing", RUN_OLD, f"No batch from {s[5]} for 17 days."),
            ("weak_first_stage", s[3], "warning", "new", RUN, f"First-stage F at {s[3]} is 6.2 (below 10)."),
            ("heterogeneity", None, "info", "new", RUN, "Between-site variance tau2 = 0.35 (I2 = 6%)."),
        ]
        _insert(con, "alerts", [dict(run_id=RUN, alert_key=f"k{i}", site_id=site, outcome="score", rule=rule,
                                     severity=sev, status=st, first_seen_run_id=first, last_seen_run_id=RUN,
                                     message=msg, value=1.0, threshold=2.0)
                                for i, (rule, site, sev, st, first, msg) in enumerate(alerts)])
        _insert(con, "alerts", [dict(run_id=RUN_OLD, alert_key="k0", site_id=s[4], outcome="score",
                                     rule="weak_first_stage", severity="warning", status="new",
                                     first_seen_run_id=RUN_OLD, last_seen_run_id=RUN_OLD, message="old run alert")])
    # batches: five received before the latest run started (one rejected), one after it
    b = []
    for i in range(6):
        received = START - timedelta(days=30 - 6 * i) if i < 5 else START + timedelta(hours=2)
        rejected = i == 2
        b.append(dict(batch_id=f"b{i}", file_name=f"site{i}_week{i}.csv", sha256=f"{i}" * 64,
                      kind=None if rejected else "assignment", site_ids=None if rejected else site_ids[i % 6],
                      received_at=received, rows_read=100 + 10 * i, rows_loaded=0 if rejected else 95 + 10 * i,
                      rows_quarantined=0 if rejected else 3, rows_duplicate=0 if rejected else 2,
                      status="rejected" if rejected else "loaded",
                      message="could not be read: not a CSV file" if rejected else None))
    _insert(con, "batches", b)
    q = [("b0", "invalid_arm", "arm", "treatmnet"), ("b0", "invalid_arm", "arm", "ctrl"),
         ("b1", "future_date", "assigned_on", "2031-01-01"), ("b3", "missing_identifier", "participant_id", None),
         ("b4", "unknown_site", "site_id", "C99"), ("b5", "invalid_arm", "arm", "late batch, not counted")]
    _insert(con, "quarantine", [dict(batch_id=bid, source_file=f"{bid}.csv", source_row=2 + i, field=f, reason=r,
                                     offending_value=v) for i, (bid, r, f, v) in enumerate(q)])
    return con


# --------------------------------------------------------------------------
# an HTML checker on the standard library's tokenizer
# --------------------------------------------------------------------------
#: WHATWG HTML Living Standard, 13.1.2: void elements have no end tag
VOID = {"area", "base", "br", "col", "embed", "hr", "img", "input", "link", "meta", "source", "track", "wbr"}


class PageParser(HTMLParser):
    def __init__(self) -> None:
        super().__init__(convert_charrefs=True)
        self.ids: list[str] = []
        self.tags: list[str] = []
        self.urls: list[tuple[str, str, str]] = []   # (tag, attribute, value)
        self.styles: list[str] = []
        self.errors: list[str] = []
        self.stack: list[str] = []
        self._in_style = False
        # cells of tables by id: table id -> list of rows (lists of cell text)
        self.tables: dict[str, list[list[str]]] = {}
        self._table: str | None = None
        self._cell: list[str] | None = None
        self.text_by_id: dict[str, list[str]] = {}
        self._id_stack: list[str | None] = []

    def _attrs(self, tag, attrs):
        self.tags.append(tag)
        for k, v in attrs:
            if k == "id" and v is not None:
                self.ids.append(v)
            if k in ("src", "href", "xlink:href", "srcset", "action", "poster", "data") and v is not None:
                self.urls.append((tag, k, v))
            if k == "style" and v:
                self.styles.append(v)

    def handle_starttag(self, tag, attrs):
        self._attrs(tag, attrs)
        a = dict(attrs)
        if tag == "style":
            self._in_style = True
        if tag == "table" and a.get("id"):
            self._table = a["id"]
            self.tables[self._table] = []
        if self._table and tag == "tr":
            self.tables[self._table].append([])
        if self._table and tag in ("td", "th"):
            self._cell = []
        if tag not in VOID:
            self.stack.append(tag)
            self._id_stack.append(a.get("id"))

    def handle_startendtag(self, tag, attrs):
        self._attrs(tag, attrs)

    def handle_endtag(self, tag):
        if tag == "style":
            self._in_style = False
        if self._table and tag in ("td", "th") and self._cell is not None:
            self.tables[self._table][-1].append("".join(self._cell).strip())
            self._cell = None
        if tag == "table":
            self._table = None
        if tag in VOID:
            return
        if not self.stack or self.stack[-1] != tag:
            self.errors.append(f"</{tag}> closes <{self.stack[-1] if self.stack else None}>")
            return
        self.stack.pop()
        self._id_stack.pop()

    def handle_data(self, data):
        if self._in_style:
            self.styles.append(data)
        if self._cell is not None:
            self._cell.append(data)
        for i in self._id_stack:
            if i:
                self.text_by_id.setdefault(i, []).append(data)


def parse(text: str) -> PageParser:
    p = PageParser()
    p.feed(text)
    p.close()
    return p


@pytest.fixture(scope="module")
def shared(tmp_path_factory):
    """One warehouse for the tests that only read it (rendering takes about a second)."""
    with pytest.MonkeyPatch.context() as mp:
        con = build_warehouse(tmp_path_factory.mktemp("wh"), mp)
        yield con
    con.close()


@pytest.fixture(scope="module")
def page(shared, tmp_path_factory):
    out = render_report(shared, tmp_path_factory.mktemp("report") / "sub" / "index.html")
    return out.read_text(encoding="utf-8")


@pytest.fixture()
def own_wh(tmp_path, monkeypatch):
    """A warehouse of its own, for tests that change it."""
    con = build_warehouse(tmp_path, monkeypatch)
    yield con
    con.close()


# --------------------------------------------------------------------------
# structure, self-containment, escaping
# --------------------------------------------------------------------------
def test_page_parses_with_balanced_tags_and_required_ids(page):
    p = parse(page)
    assert p.errors == []          # every non-void element closed in order (html.parser tokens)
    assert p.stack == ["html"] or p.stack == []  # </html> present
    for i in ("alerts-table", "forest-plot", "uptake-trends", "cautions"):
        assert p.ids.count(i) == 1, i
    # sections appear in the order the report promises
    order = ['class="top"', 'id="how-to-read"', 'id="alerts"', 'id="forest-plot"', 'id="heterogeneity"',
             'id="uptake-trends"', 'id="data-quality"', 'id="cautions"']
    pos = [page.index(o) for o in order]
    assert pos == sorted(pos)
    # element ids unique across the page although it holds two matplotlib SVGs
    assert len(p.ids) == len(set(p.ids))


def test_page_is_self_contained(page):
    p = parse(page)
    # every src/href points inside the document (#fragment); nothing is fetched
    assert p.urls, "the SVG markers are referenced by href, so some must exist"
    assert all(v.startswith("#") for _, _, v in p.urls), [u for u in p.urls if not u[2].startswith("#")][:3]
    assert not re.search(r"""(src|href)\s*=\s*["']?\s*(https?:)?//""", page, re.I)
    assert not {"script", "link", "img", "iframe", "object", "embed"} & set(p.tags)
    css = "\n".join(p.styles)
    assert "@import" not in css and not re.search(r"url\(\s*['\"]?(https?:)?//", css)
    assert "@font-face" not in css


def test_header_shows_study_run_date_status_mode(page):
    p = parse(page)
    head = page[:page.index('id="how-to-read"')]
    for text in (STUDY_ID, RUN, "2026-07-26", "partial", "orchestrated"):
        assert text in head
    assert "site Fernhill: covariates missing" in head   # the run message of a partial run
    assert RUN_FAILED not in page                       # the newer run failed: not the default


def test_malicious_site_name_is_escaped(tmp_path, monkeypatch):
    evil = '<script>alert("x")</script>'
    evil2 = '"><img src=x onerror=alert(1)>'
    con = build_warehouse(tmp_path, monkeypatch, site_ids=(evil, "Brookfield", "Canal Wharf", evil2,
                                                           "Eastgate", "Fern & Hill"))
    text = render_report(con, tmp_path / "r.html").read_text(encoding="utf-8")
    con.close()
    p = parse(text)
    assert "script" not in p.tags and "img" not in p.tags   # the tokenizer saw no injected element
    assert "<script" not in text.lower()
    assert html.escape(evil) in text                        # shown as text in the tables
    assert "Fern &amp; Hill" in text
    # the alert message quoting the evil name is escaped too, and the SVG text is XML-escaped
    assert text.count("&lt;script&gt;") >= 3
    assert p.errors == []


# --------------------------------------------------------------------------
# sections with and without content
# --------------------------------------------------------------------------
def _alert_rows(p: PageParser) -> list[list[str]]:
    return p.tables["alerts-table"][1:]   # row 0 is the header


def test_alert_table_order_and_columns(page):
    p = parse(page)
    assert p.tables["alerts-table"][0] == ["Rule", "Site", "Severity", "Status", "Message", "First seen"]
    rows = _alert_rows(p)
    assert len(rows) == 6                                   # the latest run's six alerts, not the old run's
    status = [r[3] for r in rows]
    rank = {"new": 0, "ongoing": 1, "resolved": 2}
    assert [rank[s] for s in status] == sorted(rank[s] for s in status)
    assert status.count("new") == 3 and status[-1] == "resolved"
    assert rows[0][2] == "critical"                         # within 'new': critical before warning and info
    # 'first seen' shows the as-of date of the run that first raised the alert
    weak = next(r for r in rows if r[0] == "weak_first_stage" and r[3] == "ongoing")
    assert weak[5] == "2026-07-19"
    assert "old run alert" not in page


def test_run_without_alerts_or_pooled_rows_renders(tmp_path, monkeypatch):
    con = build_warehouse(tmp_path, monkeypatch, with_alerts=False, with_pooled=False)
    text = render_report(con, tmp_path / "r.html").read_text(encoding="utf-8")
    con.close()
    p = parse(text)
    assert p.errors == []
    # empty alerts table: the section says so, the table keeps its id with one explanatory row
    assert "No alerts were raised in this run." in text
    assert p.tables["alerts-table"][1] == ["No alerts."]
    assert "No site is stale" in text
    # no pooled rows: heterogeneity and forest sections say so, no diamond is drawn
    assert "No pooled estimates in this run" in text
    assert "There is no pooled estimate in this run." in text
    assert "No subgroup tests in this run." in text
    assert "pooled-diamond" not in text and "no pooled estimate" in text
    for i in ("alerts-table", "forest-plot", "uptake-trends", "cautions"):
        assert i in p.ids


def test_no_run_and_unknown_run_raise_report_error(tmp_path, monkeypatch):
    con = build_warehouse(tmp_path, monkeypatch, with_runs=False)
    with pytest.raises(ReportError, match="no runs yet"):
        render_report(con, tmp_path / "r.html")
    assert not (tmp_path / "r.html").exists()
    # only a failed run: still nothing finished
    con.execute("INSERT INTO runs (run_id, mode, as_of, started_at, status, code_version, config_hash, "
                "input_fingerprint, n_batches, n_sites) VALUES ('r1', 'in_process', DATE '2026-07-01', "
                "TIMESTAMP '2026-07-01 06:00:00', 'failed', '0.1.0', 'h', 'f', 0, 0)")
    with pytest.raises(ReportError, match="none finished"):
        render_report(con, tmp_path / "r.html")
    with pytest.raises(ReportError, match="unknown run 'nope'"):
        render_report(con, tmp_path / "r.html", run_id="nope")
    con.close()


def test_explicit_older_run(shared, tmp_path):
    text = render_report(shared, tmp_path / "old.html", run_id=RUN_OLD).read_text(encoding="utf-8")
    assert RUN_OLD in text and "2026-07-19" in text
    # the old run has site estimates (shifted by -0.5) but no pooled rows, alerts of its own: one
    p = parse(text)
    assert len(_alert_rows(p)) == 1
    site_rows = p.tables["site-table"][1:]
    alder = next(r for r in site_rows if r[0] == "Alder Street")
    assert alder[6] == "5.60"     # 6.10 - 0.5 inserted for the old run, printed with 2 decimals


def test_data_quality_figures_match_the_storage_tables(shared, page):
    # totals over batches received up to the run's start (DuckDB aggregate over the inserted rows)
    want = shared.execute(
        "SELECT count(*) FILTER (status = 'loaded'), count(*) FILTER (status = 'rejected'), sum(rows_read), "
        "sum(rows_loaded), sum(rows_quarantined), sum(rows_duplicate) FROM batches WHERE received_at <= ?",
        [START]).fetchall()[0]
    p = parse(page)
    got = p.tables["batches-table"][1]
    assert got == [f"{int(v):,}" for v in want]
    q = {(r[0], r[1]): int(r[2]) for r in p.tables["quarantine-table"][1:]}
    # the late batch b5 (received after the start) is left out: invalid_arm counts b0's two rows only
    assert q == {("invalid_arm", "arm"): 2, ("future_date", "assigned_on"): 1,
                 ("missing_identifier", "participant_id"): 1, ("unknown_site", "site_id"): 1}
    assert [r[0] for r in p.tables["stale-table"][1:]] == ["Fernhill"]
    assert [r[0] for r in p.tables["rejected-table"][1:]] == ["site2_week2.csv"]


def test_heterogeneity_tables(page):
    p = parse(page)
    rows = p.tables["pooled-table"][1:]
    cace = {r[1]: r for r in rows if r[0] == "cace"}
    assert set(cace) == {"fixed", "dl", "reml", "pm"}
    assert cace["reml"][3] == "6.28" and cace["reml"][4] == "[4.22, 8.34]" and cace["reml"][5] == "[1.75, 10.81]"
    assert cace["reml"][8] == "6%"                          # I2 = 0.06 shown as a percentage
    j = p.tables["pooled-2sls-table"][1]
    assert j[5] == "1.40" and j[6] == "3" and j[7] == "0.710"   # Hansen J, df, p as inserted
    sub = p.tables["subgroup-table"][1]
    assert sub[0] == "region" and sub[4] == "0.14" and sub[6] == "0.710"
    groups = {r[1]: r[3] for r in p.tables["group-table"][1:]}
    assert groups == {"North": "5.90", "South": "6.70"}


# --------------------------------------------------------------------------
# what the charts draw
# --------------------------------------------------------------------------
def test_forest_plot_draws_the_pooled_row_and_marks_weak_sites(shared):
    d = load_report_data(shared)
    assert d.headline["method"] == "reml"                   # preferred over dl and fixed when present
    fig = forest_figure(d.site_estimates, d.headline, weak_f=d.weak_f, outcome="score")
    ax = fig.axes[0]
    diamonds = [a for a in ax.patches if isinstance(a, Polygon) and a.get_gid() == "pooled-diamond"]
    assert len(diamonds) == 1
    xs = diamonds[0].get_xy()[:, 0]
    # vertices: CI low, estimate, CI high, estimate (the inserted REML row)
    assert np.allclose(xs[:4], [4.22, 6.28, 8.34, 6.28], rtol=0, atol=1e-12)
    # the plotted range holds the prediction interval and zero
    lo, hi = ax.get_xlim()
    assert lo < min(0.0, 1.75) and hi > 10.81
    labels = [t.get_text() for t in ax.get_yticklabels()]
    weak = [lab for lab in labels if lab.endswith("\nweak first stage")]
    assert weak == ["Dunmore Library\nweak first stage", "Eastgate\nweak first stage"]   # F = 6.25 and 2.1
    right = [t.get_text() for t in fig.axes[1].get_yticklabels()]
    assert "tF [\u221211.74, 19.74]" in right[3]            # 4.0 -+ 4.92 * 3.2
    assert "AR (\u2212inf, \u221214.20] \u222a [21.70, inf)" in right[4]
    assert right[-1].startswith("6.28 [4.22, 8.34]") and "PI [1.75, 10.81]" in right[-1]


def test_robust_intervals_kinds():
    sites = pd.DataFrame({
        "first_stage_f": [50.0, 6.0, 2.0, 2.0, 1.0, np.nan],
        "tf_ci_low": [np.nan, -1.0, np.nan, np.nan, np.nan, np.nan],
        "tf_ci_high": [np.nan, 9.0, np.nan, np.nan, np.nan, np.nan],
        "ar_set": ["interval", "interval", "two_rays", "real_line", "interval", None],
        "ar_ci_low": [1.0, -2.0, -3.0, np.nan, -5.0, np.nan],
        "ar_ci_high": [2.0, 12.0, 4.0, np.nan, 15.0, np.nan],
    })
    r = robust_intervals(sites, 10.0)
    assert r["weak"].tolist() == [False, True, True, True, True, False]
    assert r["kind"].tolist() == ["", "tF", "AR two rays", "AR whole line", "AR", ""]
    assert r["a_low"][1] == -1.0 and r["a_high"][1] == 9.0
    assert r["a_low"][2] == -np.inf and r["a_high"][2] == -3.0 and r["b_low"][2] == 4.0 and r["b_high"][2] == np.inf
    assert np.isinf(r["a_low"][3]) and np.isinf(r["a_high"][3])
    assert (r["a_low"][4], r["a_high"][4]) == (-5.0, 15.0)
    assert sites["first_stage_f"].iloc[0] == 50.0      # input not mutated


def test_forest_plot_with_undefined_cace(own_wh, tmp_path):
    own_wh.execute("UPDATE site_estimates SET cace = NULL, cace_ci_low = NULL, cace_ci_high = NULL, "
                      "first_stage_f = 0.0, ar_set = 'real_line', ar_ci_low = NULL, ar_ci_high = NULL, "
                      "note = 'first stage is zero: CACE undefined' WHERE run_id = ? AND site_id = 'Fernhill'", [RUN])
    text = render_report(own_wh, tmp_path / "r.html").read_text(encoding="utf-8")
    assert "CACE not estimable: first stage is zero: CACE undefined" in text
    assert "AR set unbounded (whole line)" in text
    assert "nan" not in re.sub(r"<[^>]+>", " ", text).split()   # no raw NaN printed


def test_uptake_panels_flag_active_uptake_alerts(shared):
    d = load_report_data(shared)
    assert set(d.trends["basis"]) == {"cohort"}
    flagged = {"Dunmore Library": ["treatment_uptake_drift"]}
    fig = uptake_figure(d.trends, flagged)
    titles = {ax.get_title(loc="left") for ax in fig.axes if ax.get_visible()}
    assert "Dunmore Library\n\u25b2 treatment_uptake_drift" in titles
    assert "Brookfield" in titles                           # its drift alert is resolved: no flag
    panel = next(ax for ax in fig.axes if ax.get_title(loc="left").startswith("Dunmore"))
    # the triangle sits on the latest treated cohort's share (inserted: 3 of 18 -> week 8)
    tri = [ln for ln in panel.lines if ln.get_marker() == "^"]
    assert len(tri) == 1
    assert tri[0].get_ydata()[0] == pytest.approx(round(0.18 * 18) / 18, abs=1e-12)
    # the HTML flags exactly the sites with a new/ongoing uptake or first-stage alert
    page_flags = d.alerts[d.alerts["status"].isin(["new", "ongoing"])]
    assert set(page_flags.loc[page_flags["rule"].str.contains("uptake|first_stage"), "site_id"]) == \
        {"Dunmore Library", "Eastgate"}
