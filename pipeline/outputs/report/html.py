"""The self-contained HTML report of one monitoring run.

One file, no network: the CSS is inline, the charts are inline SVG, there
are no fonts or images to fetch; up to 40 sites there is no script, above it one
small inline script sorts and filters the tables (:mod:`.many_sites`).  Every value read from the
database is passed through :func:`html.escape` before it is written.
"""

from __future__ import annotations

import html
import os
import secrets
from pathlib import Path
from typing import Any

import duckdb
import pandas as pd

from takeup.pipeline.outputs.report.cells import esc as _e, integer as _int, interval as _interval, num as _num
from takeup.pipeline.outputs.report.cells import pct as _pct, pval as _p, records as _records, table as _table
from takeup.pipeline.outputs.report.cells import stratified_remark
from takeup.pipeline.outputs.report import many_sites
from takeup.pipeline.outputs.report.charts import figure_svg, forest_figure, uptake_figure
from takeup.pipeline.errors import ReportError
from takeup.pipeline.outputs.report.data import ACTIVE_STATUSES, ReportData, as_text_date, is_uptake_rule, load_report_data

__all__ = ["render_report", "report_html"]

_CSS = """
:root { --ink: #1b1b1b; --muted: #555; --line: #d0d0d0; --band: #f4f4f1; --accent: #0072B2; }
* { box-sizing: border-box; }
body { margin: 0; color: var(--ink); background: #fff;
       font: 15px/1.5 system-ui, -apple-system, "Segoe UI", "Noto Sans", "DejaVu Sans", sans-serif; }
main { max-width: 1120px; margin: 0 auto; padding: 24px 28px 48px; }
header.top { border-bottom: 3px solid var(--accent); padding-bottom: 10px; margin-bottom: 18px; }
h1 { font-size: 1.6rem; margin: 0 0 6px; }
h2 { font-size: 1.25rem; margin: 34px 0 8px; padding-bottom: 4px; border-bottom: 1px solid var(--line); }
h3 { font-size: 1.02rem; margin: 20px 0 6px; }
dl.facts { display: grid; grid-template-columns: repeat(auto-fill, minmax(200px, 1fr)); gap: 4px 18px; margin: 8px 0 0; }
dl.facts div { padding: 2px 0; }
dl.facts dt { font-size: .78rem; text-transform: uppercase; letter-spacing: .04em; color: var(--muted); }
dl.facts dd { margin: 0; font-weight: 600; overflow-wrap: anywhere; }
p.lead { background: var(--band); border-left: 4px solid var(--accent); padding: 10px 14px; }
p.note, p.empty { color: var(--muted); }
p.empty { font-style: italic; }
.banner { border: 2px solid #D55E00; background: #fdf0e6; padding: 8px 12px; margin: 12px 0; }
table { border-collapse: collapse; width: 100%; margin: 6px 0 12px; font-size: .9rem; }
th, td { text-align: left; vertical-align: top; padding: 5px 8px; border-bottom: 1px solid var(--line); }
th { background: var(--band); font-weight: 600; }
td.num, th.num { text-align: right; font-variant-numeric: tabular-nums; white-space: nowrap; }
tbody tr:nth-child(even) { background: #fafafa; }
.badge { display: inline-block; padding: 0 7px; border-radius: 3px; font-size: .8rem; font-weight: 700;
         border: 1px solid #000; white-space: nowrap; }
.sev-critical { background: #D55E00; color: #fff; }
.sev-warning { background: #E69F00; color: #000; }
.sev-info { background: #cfe8f7; color: #000; }
.st-new { font-weight: 700; }
.st-resolved { color: var(--muted); }
.date { white-space: nowrap; }
.weak { color: #B34700; font-weight: 600; }
figure { margin: 8px 0 14px; }
figure svg { width: 100%; height: auto; display: block; }
figcaption { font-size: .88rem; color: var(--muted); margin-top: 4px; }
sup.fn { font-size: .72em; color: var(--muted); margin-left: 2px; }
ol.footnotes { font-size: .84rem; color: var(--muted); margin: -4px 0 14px; padding-left: 22px; }
section#cautions { background: var(--band); padding: 4px 18px 12px; margin-top: 34px; }
section#cautions h2 { border-bottom-color: #bbb; }
footer { margin-top: 30px; font-size: .8rem; color: var(--muted); }
"""


# --------------------------------------------------------------------------
# sections
# --------------------------------------------------------------------------
def _header(d: ReportData) -> str:
    r = d.run
    facts = [
        ("Study", d.study_id), ("Run", r.get("run_id")), ("Data as of", as_text_date(r.get("as_of"))),
        ("Run status", r.get("status")), ("Mode", r.get("mode")),
        ("Started", as_text_date(r.get("started_at"))), ("Finished", as_text_date(r.get("finished_at"))),
        ("Sites", r.get("n_sites")), ("Batches read", r.get("n_batches")),
        ("Primary outcome", d.primary_outcome or "none"), ("takeup version", r.get("code_version")),
    ]
    items = "".join(f"<div><dt>{html.escape(k)}</dt><dd>{_e(v) or 'n/a'}</dd></div>" for k, v in facts)
    banner = ""
    if r.get("status") != "ok":
        banner = (f'<div class="banner"><strong>This run finished with status {_e(r.get("status"))}.</strong> '
                  "Some results may be missing; see the run message below.</div>")
    msg = f'<p class="note"><strong>Run message:</strong> {_e(r.get("message"))}</p>' if r.get("message") else ""
    return (f'<header class="top"><h1>Take-up monitoring report: {_e(d.study_id)}</h1>'
            f'<dl class="facts">{items}</dl></header>{banner}{msg}')


def _how_to_read(d: ReportData) -> str:
    return (
        '<section id="how-to-read"><h2>How to read this report</h2><p class="lead">'
        "Each site randomly offers the programme to some participants (treatment) and not to others (control). "
        "Not everyone offered takes it up, and some who were not offered get it anyway. The "
        "<em>complier share</em> is the difference in take-up between the arms; the <em>intent-to-treat effect</em> "
        "(ITT) is the difference in outcomes between the arms; and the <em>complier average causal effect</em> "
        "(CACE = ITT divided by the complier share) is the effect of the programme on the people who take it up "
        "because they were offered it. Intervals are 95% confidence intervals unless stated. Where take-up barely "
        f"differs between the arms (first-stage F below {d.weak_f:g}), a site's CACE is unreliable and the report "
        "shows an interval built for that case instead. Alerts come first: they are prompts to look at a site "
        "more closely, not verdicts.</p></section>"
    )


def _alerts(d: ReportData) -> str:
    rows = []
    a = d.alerts
    for rec in _records(a):
        sev, st = str(rec.get("severity") or ""), str(rec.get("status") or "")
        first = rec.get("first_seen_as_of") or rec.get("first_seen_run_id")
        rows.append([
            _e(rec.get("rule")), _e(rec.get("site_id")) or "<em>study-wide</em>",
            f'<span class="badge sev-{_e(sev)}">{_e(sev)}</span>',
            f'<span class="st-{_e(st)}">{_e(st)}</span>', _e(rec.get("message")),
            f'<span class="date" title="run {_e(rec.get("first_seen_run_id"))}">{_e(first)}</span>',
        ])
    if a.empty:
        summary = '<p class="empty">No alerts were raised in this run.</p>'
    else:
        counts = a["status"].value_counts()
        sev = a.loc[a["status"].isin(ACTIVE_STATUSES), "severity"].value_counts()
        parts = [f"{int(counts.get(s, 0))} {s}" for s in ("new", "ongoing", "resolved")]
        active = ", ".join(f"{int(n)} {html.escape(str(k))}" for k, n in sev.items()) or "none"
        summary = (f"<p>{', '.join(parts)}. Active alerts by severity: {active}. "
                   "New alerts are listed first, then ongoing ones, then those resolved since the previous run.</p>")
    table = _table([("Rule", False), ("Site", False), ("Severity", False), ("Status", False), ("Message", False),
                    ("First seen", False)], rows, table_id="alerts-table", empty="No alerts.")
    return f'<section id="alerts"><h2>Alerts</h2>{summary}{_looks_note(d)}{table}</section>'


def _looks_note(d: ReportData) -> str:
    """One sentence on whether the alert tests allow for weekly looks."""
    if d.alert_tests == "per_run":
        return ('<p class="note" id="alert-validity">The tests behind the alert rules use per-run p-values '
                "(this study's setting): each run's tests hold for that run only, so over many weekly runs a "
                "clean site is flagged more often than the stated levels.</p>")
    return ('<p class="note" id="alert-validity">The tests behind the alert rules (negative or declining first '
            "stage, missing outcomes or uptake reports differing between arms, sample-ratio mismatch) stay valid "
            "across weekly looks: a site where nothing is wrong raises a given rule in any run of the study at most "
            "with that rule's stated level (5% by default), however many weekly runs there are.</p>")


def _footnotes(notes: list[Any]) -> tuple[list[str], str]:
    """Marks per row and one footnote per distinct note (so a shared note is stated once)."""
    order: dict[str, int] = {}
    marks = []
    for n in notes:
        text = "" if n is None else str(n).strip()
        if not text:
            marks.append("")
            continue
        k = order.setdefault(text, len(order) + 1)
        marks.append(f'<sup class="fn">{k}</sup>')
    if not order:
        return marks, ""
    items = "".join(f"<li>{_e(t)}</li>" for t in order)
    return marks, f'<ol class="footnotes">{items}</ol>'


def _forest(d: ReportData) -> str:
    s = d.site_estimates
    title = f"<h2>Site effects on the primary outcome{(': ' + _e(d.primary_outcome)) if d.primary_outcome else ''}</h2>"
    if s.empty:
        return (f'<section id="site-effects">{title}<div id="forest-plot"><p class="empty">'
                "No site estimates for the primary outcome in this run.</p></div></section>")
    fig = forest_figure(s, d.headline, weak_f=d.weak_f, outcome=d.primary_outcome)
    svg = figure_svg(fig, "fp", "Forest plot of site complier average causal effects with the pooled estimate")
    if d.headline is None:
        pooled_txt = "There is no pooled estimate in this run."
    else:
        pooled_txt = ("The blue diamond is the pooled CACE (its width is the confidence interval); the orange line is "
                      "the prediction interval, the range in which a new, similar site's effect is expected to fall.")
    caption = ("<figcaption>Squares: site CACE with its conventional 95% interval. Open circles and dashed lines mark "
               f"sites whose first stage is weak (F below {d.weak_f:g}): the dashed line is the tF interval "
               "(Lee et al. 2022), or the Anderson-Rubin set where tF is unbounded; an arrow means the interval "
               f"continues beyond the plotted range or is unbounded. {pooled_txt} The thin sky-blue line above each "
               "site is its anytime-valid set: unlike the conventional interval, it stays valid however often the "
               "report is rerun as data arrive, so it is wider.</figcaption>")
    f = pd.to_numeric(s["first_stage_f"], errors="coerce")
    weak = (f < d.weak_f).fillna(False).to_numpy()
    rows = []
    for rec, w in zip(_records(s), weak):
        site = _e(rec.get("site_id"))
        rows.append([
            f'<span class="weak">{site} (weak)</span>' if w else site,
            f'{_int(rec.get("n_treatment_assigned"))} / {_int(rec.get("n_control_assigned"))}',
            f'{_pct(rec.get("uptake_treatment"))} / {_pct(rec.get("uptake_control"))}',
            _num(rec.get("complier_share")), _num(rec.get("first_stage_f"), 1), _num(rec.get("itt")),
            _num(rec.get("cace")) + stratified_remark(rec),
            _interval(rec.get("cace_ci_low"), rec.get("cace_ci_high")),
            "yes" if rec.get("included_in_pool") else "no",
            _site_note(rec),
        ])
    table = _table([("Site", False), ("Assigned T / C", True), ("Uptake T / C", True), ("Complier share", True), ("First-stage F", True), ("ITT", True),
                    ("CACE", True), ("95% CI", True), ("In pool", False), ("Note", False)], rows,
                   table_id="site-table")
    return (f'<section id="site-effects">{title}<figure id="forest-plot">{svg}{caption}</figure>'
            f"<h3>Site figures</h3>{table}</section>")


def _site_note(rec: dict[str, Any]) -> str:
    """Why a site is not pooled, and the estimate's note (escaped)."""
    parts = []
    if not rec.get("included_in_pool"):
        parts.append("Not pooled: " + (_e(rec.get("pool_exclusion_reason")) or "excluded") + ".")
    if rec.get("note"):
        parts.append(_e(rec.get("note")))
    elif rec.get("status") not in (None, "ok"):
        parts.append(_e(rec.get("status")))
    return " ".join(parts)


def _heterogeneity(d: ReportData) -> str:
    head = '<section id="heterogeneity"><h2>Pooling and heterogeneity</h2>'
    p = d.pooled
    if p.empty:
        body = ('<p class="empty">No pooled estimates in this run (for example, too few sites had a strong enough '
                "first stage to be pooled).</p>")
    else:
        overall = p[p["group"].isna() & (p["method"] != "pooled_2sls")]
        recs = _records(overall)
        marks, notes = _footnotes([r.get("note") for r in recs])
        rows = [[_e(r["quantity"]), _e(r["method"]) + mk, _int(r.get("n_sites")), _num(r.get("estimate")),
                 _interval(r.get("ci_low"), r.get("ci_high")), _interval(r.get("pi_low"), r.get("pi_high")),
                 _num(r.get("tau2"), 3), _interval(r.get("tau2_ci_low"), r.get("tau2_ci_high")),
                 _pct(r.get("i2")), _num(r.get("q")), _int(r.get("q_df")), _p(r.get("q_pvalue"))]
                for r, mk in zip(recs, marks)]
        body = ("<p>Each method combines the site estimates. τ² is the between-site variance; I² is the share of the "
                "spread in site estimates that reflects real differences between sites rather than chance; Q is "
                "Cochran's test of equal effects (a small p-value suggests the effect differs between sites).</p>")
        body += _table([("Quantity", False), ("Method", False), ("Sites", True), ("Estimate", True), ("95% CI", True),
                        ("Prediction interval", True), ("τ²", True), ("τ² CI", True), ("I²", True), ("Q", True),
                        ("df", True), ("p", True)], rows, table_id="pooled-table",
                       empty="No pooled rows for all sites.")
        body += notes
        tsls = p[p["method"] == "pooled_2sls"]
        if tsls.empty:
            body += '<p class="empty">No pooled two-stage least squares estimate in this run.</p>'
        else:
            rows = [[_e(r["quantity"]), _e(r.get("group")) or "all sites", _int(r.get("n_sites")),
                     _num(r.get("estimate")), _interval(r.get("ci_low"), r.get("ci_high")), _num(r.get("q")),
                     _int(r.get("q_df")), _p(r.get("q_pvalue")), _e(r.get("note"))] for r in _records(tsls)]
            body += ("<h3>Pooled two-stage least squares</h3><p>One instrumental-variable regression over all sites "
                     "with site-specific assignment as instruments. Hansen's J tests whether the sites agree on one "
                     "common effect.</p>")
            body += _table([("Quantity", False), ("Group", False), ("Sites", True), ("Estimate", True),
                            ("95% CI", True), ("J", True), ("df", True), ("p", True), ("Note", False)], rows,
                           table_id="pooled-2sls-table")
        grouped = p[p["group"].notna() & (p["method"] != "pooled_2sls")]
        if d.headline is not None and not grouped.empty:
            grouped = grouped[(grouped["method"] == d.headline["method"]) & (grouped["quantity"] == "cace")]
            rows = [[_e(r.get("group_field")), _e(r.get("group")), _int(r.get("n_sites")), _num(r.get("estimate")),
                     _interval(r.get("ci_low"), r.get("ci_high")), _num(r.get("tau2"), 3), _pct(r.get("i2")),
                     _e(r.get("note"))] for r in _records(grouped)]
            if rows:
                body += f"<h3>Pooled CACE by group ({_e(d.headline['method'])})</h3>"
                body += _table([("Grouping", False), ("Group", False), ("Sites", True), ("Estimate", True),
                                ("95% CI", True), ("τ²", True), ("I²", True), ("Note", False)], rows,
                               table_id="group-table")
    rows = [[_e(r.get("group_field")), _e(r.get("quantity")), _e(r.get("method")), _int(r.get("n_groups")),
             _num(r.get("q_between")), _int(r.get("q_between_df")), _p(r.get("q_between_pvalue")), _e(r.get("note"))]
            for r in _records(d.subgroup_tests)]
    body += "<h3>Differences between groups of sites</h3>"
    if rows:
        body += _table([("Grouping", False), ("Quantity", False), ("Method", False), ("Groups", True),
                        ("Q between", True), ("df", True), ("p", True), ("Note", False)], rows,
                       table_id="subgroup-table")
    else:
        body += '<p class="empty">No subgroup tests in this run.</p>'
    if d.other_outcomes:
        body += ('<p class="note">Results for the other outcomes (' + ", ".join(_e(o) for o in d.other_outcomes)
                 + ") are in the exported tables.</p>")
    return head + body + "</section>"


def _precision(d: ReportData, pooled_only: bool = False) -> str:
    head = '<section id="precision"><h2>How precise are we, and when will we know?</h2>'
    f = d.precision
    if f is None or f.empty:
        return head + '<p class="empty">No precision figures in this run.</p></section>'
    more = ""
    if pooled_only:      # many sites: the pooled row here, every site's row in the exported table
        n_sites = int((f["scope"] == "site").sum())
        f = f[f["scope"] == "pooled"]
        more = (f'<p class="note">The figures of each of the {n_sites} sites are in the exported '
                "<code>precision_forecasts</code> table.</p>")
    recs = _records(f)
    marks, notes = _footnotes([r.get("note") for r in recs])
    rows = []
    for r, mk in zip(recs, marks):
        who = "<strong>all sites (pooled)</strong>" if r.get("scope") == "pooled" else _e(r.get("site_id"))
        when = r.get("forecast_date")
        rows.append([who + mk, _int(r.get("n")), _num(r.get("mde_itt")), _num(r.get("mde_cace")),
                     _num(r.get("complier_share")), _num(r.get("accrual_per_week"), 1),
                     f'<span class="date">{_e(as_text_date(when))}</span>' if when is not None else "n/a"])
    target = next((r.get("target_mde") for r in recs if r.get("target_mde") is not None), None)
    lead = ("<p>The smallest effect each site (and the pool) could reliably detect now: the minimum detectable "
            "ITT and CACE at 80% power (in outcome units; the CACE's grows as the complier share falls). "
            + (f"The last column is when the CACE's reaches the target of {_num(target)} at the current pace "
               "of enrolment. " if target is not None else
               "No target precision is configured ([planning] target_mde), so there is no forecast date. ")
            + "These are planning figures, not results.</p>")
    table = _table([("Site", False), ("Participants", True), ("Detectable ITT", True), ("Detectable CACE", True),
                    ("Complier share", True), ("New per week", True), ("Target reached", True)], rows,
                   table_id="precision-table")
    return head + lead + table + notes + more + "</section>"


def _trends(d: ReportData) -> str:
    head = '<section id="uptake"><h2>Uptake by arm over time</h2>'
    t = d.trends
    if t.empty:
        return head + '<div id="uptake-trends"><p class="empty">No uptake trends in this run.</p></div></section>'
    a = d.alerts
    flagged: dict[str, list[str]] = {}
    if not a.empty:
        active = a[a["status"].isin(ACTIVE_STATUSES) & is_uptake_rule(a["rule"]) & a["site_id"].notna()]
        flagged = {str(k): sorted(set(v.astype(str))) for k, v in active.groupby("site_id")["rule"]}
    fig = uptake_figure(t, flagged)
    svg = figure_svg(fig, "ut", "Uptake share by week of assignment, treatment and control, one panel per site")
    n_flag = len(flagged)
    caption = ("<figcaption>Share of each weekly cohort who took up the offer by the cutoff, by arm. A wide gap "
               "between the lines is a strong first stage; lines drifting together weaken it. "
               f"{n_flag} site(s) with an active uptake or first-stage alert have a thick vermillion frame, the rule "
               "in the panel title and a triangle on the latest week. Recent cohorts have had less time to take up "
               "the offer.</figcaption>")
    return f'{head}<figure id="uptake-trends">{svg}{caption}</figure></section>'


def _missing_uptake(d: ReportData) -> str:
    """Sites with participants lacking an uptake report, with the worst-case complier-share bounds."""
    head = "<h3>Missing uptake reports</h3>"
    s = d.site_estimates
    if s.empty or "uptake_missing_treatment" not in s.columns:
        return head + '<p class="empty">No site estimates in this run.</p>'
    mt = pd.to_numeric(s["uptake_missing_treatment"], errors="coerce").fillna(0)
    mc = pd.to_numeric(s["uptake_missing_control"], errors="coerce").fillna(0)
    sub = s[(mt + mc) > 0]
    if sub.empty:
        return head + '<p class="empty">Every assigned participant has an uptake report by the cutoff.</p>'
    rows = [[_e(r.get("site_id")),
             f'{_int(r.get("uptake_missing_treatment"))} of {_int(r.get("n_treatment_assigned"))}',
             f'{_int(r.get("uptake_missing_control"))} of {_int(r.get("n_control_assigned"))}',
             _num(r.get("complier_share")),
             _interval(r.get("complier_share_bound_low"), r.get("complier_share_bound_high"))]
            for r in _records(sub)]
    intro = ("<p>Participants without an uptake report by the cutoff are left out of the uptake estimates "
             "(complete case) unless the study counts them as not taken up. The bounds are the worst case "
             "(Manski 1990): every missing report counted as not taken up in one arm and taken up in the other. "
             "Recent participants may simply not be reported yet.</p>")
    return head + intro + _table([("Site", False), ("Missing T", True), ("Missing C", True),
                                  ("Complier share", True), ("Worst-case bounds", True)], rows,
                                 table_id="missing-uptake-table")


def _data_quality(d: ReportData) -> str:
    b = d.batches
    out = ['<section id="data-quality"><h2>Data quality</h2>']
    if b.empty:
        out.append('<p class="empty">No files had been received when this run started.</p>')
    else:
        status = b["status"].value_counts()
        sums = b[["rows_read", "rows_loaded", "rows_quarantined", "rows_duplicate"]].sum()
        out.append("<p>Files received up to the start of this run.</p>")
        out.append(_table(
            [("Files loaded", True), ("Files rejected", True), ("Rows read", True), ("Rows loaded", True),
             ("Rows quarantined", True), ("Duplicate rows dropped", True)],
            [[_int(status.get("loaded", 0)), _int(status.get("rejected", 0)), _int(sums["rows_read"]),
              _int(sums["rows_loaded"]), _int(sums["rows_quarantined"]), _int(sums["rows_duplicate"])]],
            table_id="batches-table"))
        rej = b[b["status"] == "rejected"]
        if not rej.empty:
            out.append("<h3>Rejected files</h3>")
            out.append(_table([("File", False), ("Received", False), ("Reason", False)],
                              [[_e(r.get("file_name")), _e(as_text_date(r.get("received_at"))), _e(r.get("message"))]
                               for r in _records(rej)], table_id="rejected-table"))
    out.append("<h3>Quarantined rows by reason</h3>")
    q = d.quarantine_by_reason
    if q.empty:
        out.append('<p class="empty">No rows were quarantined.</p>')
    else:
        out.append(_table([("Reason", False), ("Field", False), ("Rows", True), ("Files", True)],
                          [[_e(r.get("reason")), _e(r.get("field")) or "(whole row)", _int(r.get("n_rows")),
                            _int(r.get("n_batches"))] for r in _records(q)], table_id="quarantine-table"))
    out.append(_missing_uptake(d))
    out.append("<h3>Stale sites</h3>")
    a = d.alerts
    stale = a[(a["rule"] == "stale_site") & a["status"].isin(ACTIVE_STATUSES)] if not a.empty else a
    if stale.empty:
        out.append('<p class="empty">No site is stale: every site has sent data recently enough.</p>')
    else:
        out.append(_table([("Site", False), ("Status", False), ("Message", False)],
                          [[_e(r.get("site_id")), _e(r.get("status")), _e(r.get("message"))] for r in _records(stale)],
                          table_id="stale-table"))
    out.append("</section>")
    return "".join(out)


def _cautions() -> str:
    return """<section id="cautions"><h2>Cautions</h2>
<p>The numbers in this report are only as good as the assumptions behind them:</p>
<ul>
<li><strong>Random assignment.</strong> Who was offered the programme was decided by the lottery and nothing
else. A sample-ratio alert, or arms that look different at baseline, are reasons to doubt this.</li>
<li><strong>The offer works only through take-up.</strong> Being offered a place should change outcomes only by
changing whether people take the programme up (the exclusion restriction). If the offer itself has an effect, for
example through extra attention, the CACE is misleading.</li>
<li><strong>Nobody takes up because they were not offered</strong> (monotonicity). If some people do the opposite of
their assignment, the complier share and the CACE lose their meaning.</li>
<li><strong>No interference.</strong> One participant's assignment should not affect another's uptake or outcome, for
instance by sharing places or materials.</li>
</ul>
<p>The CACE describes <em>compliers</em> only: people who take the programme up when offered and not otherwise. It
need not apply to people who would always or never take it up, nor to other places or times.</p>
<p>Flags and alerts are prompts for a person to review the data and the site. They are not decisions about sites or
about people, and nothing in this report should be used to judge an individual participant. Before acting on a
result, check it with the people running the site, and follow the study's ethics board approval, data-protection
rules and local regulation, which take precedence over anything suggested here.</p>
</section>"""


def report_html(d: ReportData, max_flagged: int = 30, n_influential: int = 10) -> str:
    """The complete HTML document for ``d``.

    Up to :data:`~takeup.pipeline.outputs.report.many_sites.MANY_SITES` sites the page has
    no script: forest plot and trend panels of every site.  Above it, the many-site layout
    of :mod:`~takeup.pipeline.outputs.report.many_sites` (summary first, one funnel plot,
    forest and trends for at most ``max_flagged`` flagged plus ``n_influential`` most
    influential sites, a sortable and filterable table of every site with a small inline
    script).
    """
    title = f"Take-up monitoring report: {_e(d.study_id)}, run {_e(d.run.get('run_id'))}"
    css, script = _CSS, ""
    if len(d.site_estimates) > many_sites.MANY_SITES:
        choice = many_sites.choose_detail_sites(d, max_flagged=max_flagged, n_influential=n_influential)
        alerts = _alerts(d).replace('<table id="alerts-table">', '<div class="filters" data-filter-for='
                                    '"alerts-table"><label>Find <input type="search" id="alert-filter" '
                                    'placeholder="rule, site, status…"></label><span class="count"></span></div>'
                                    '<div class="scroll"><table id="alerts-table" data-sortable>', 1).replace(
            "</table></section>", "</table></div></section>", 1)
        body = "".join([_header(d), _how_to_read(d), many_sites.summary_section(d), alerts,
                        many_sites.site_effects_section(d, choice), _precision(d, pooled_only=True), _heterogeneity(d),
                        many_sites.trends_section(d, choice), _data_quality(d), _cautions()])
        css += many_sites.TABLE_CSS
        script = f"<script>{many_sites.TABLE_SCRIPT}</script>"
        note = "The only script is the inline one that sorts and filters the tables; "
    else:
        body = "".join([_header(d), _how_to_read(d), _alerts(d), _forest(d), _precision(d), _heterogeneity(d),
                        _trends(d), _data_quality(d), _cautions()])
        note = ""
    return ("<!DOCTYPE html>\n<html lang=\"en\"><head><meta charset=\"utf-8\">"
            "<meta name=\"viewport\" content=\"width=device-width, initial-scale=1\">"
            f"<title>{title}</title><style>{css}</style></head><body><main>{body}"
            f"<footer>Produced by takeup {_e(d.run.get('code_version'))} from run {_e(d.run.get('run_id'))}. "
            f"{note}This file is self-contained and makes no network requests.</footer></main>{script}</body></html>\n")


def render_report(con: duckdb.DuckDBPyConnection, out_path: Path, run_id: str | None = None,
                  max_flagged: int = 30, n_influential: int = 10, mode: int = 0o600) -> Path:
    """Write the self-contained HTML report of one run.

    Parameters
    ----------
    con : duckdb.DuckDBPyConnection
        Open warehouse (read-only connections work).
    out_path : Path
        HTML file to write (parent directories are created).  It is written
        under a temporary name in the same directory and then renamed.
    run_id : str, optional
        Run to report; default the latest finished run (status ``ok`` or
        ``partial``).
    max_flagged, n_influential : int
        Many-site layout only (more than 40 sites): the forest plot and trend panels show
        at most ``max_flagged`` sites with an active alert and the ``n_influential``
        other sites whose removal moves the pooled CACE most.
    mode : int
        Permission bits of the file (default 0600: owner only; the report shows
        per-site results and data-quality details).

    Returns
    -------
    Path
        ``out_path``.

    Raises
    ------
    takeup.pipeline.outputs.report.ReportError
        No finished run yet, ``run_id`` unknown, or ``out_path`` is a directory.

    References
    ----------
    Lee, D. S., McCrary, J., Moreira, M. J. and Porter, J. (2022). Valid
    t-ratio inference for IV. American Economic Review 112(10), 3260-3290.

    Anderson, T. W. and Rubin, H. (1949). Estimation of the parameters of a
    single equation in a complete system of stochastic equations. Annals of
    Mathematical Statistics 20(1), 46-63.

    Higgins, J. P. T. and Thompson, S. G. (2002). Quantifying heterogeneity
    in a meta-analysis. Statistics in Medicine 21(11), 1539-1558.
    """
    out = Path(out_path)
    if out.is_dir():
        raise ReportError(f"--out {out} is a directory; give the HTML file to write, e.g. {out / 'report.html'}")
    if out.parent.exists() and not out.parent.is_dir():
        raise ReportError(f"--out {out}: {out.parent} is not a directory")
    data = load_report_data(con, run_id)
    text = report_html(data, max_flagged=max_flagged, n_influential=n_influential)
    out.parent.mkdir(parents=True, exist_ok=True)
    tmp = out.with_name(f".{out.name}.{secrets.token_hex(6)}.tmp")
    try:
        fd = os.open(tmp, os.O_WRONLY | os.O_CREAT | os.O_EXCL, 0o600)
        with os.fdopen(fd, "w", encoding="utf-8") as fh:
            fh.write(text)
        os.chmod(tmp, mode)
        os.replace(tmp, out)
    except BaseException:
        tmp.unlink(missing_ok=True)
        raise
    return out
