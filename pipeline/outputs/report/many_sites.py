"""Sections of the HTML report for studies with many sites (more than ``MANY_SITES``).

A forest plot or one trend panel per site stops being readable (and fast) at a few
dozen sites.  For many sites the report shows instead:

* a **summary** first: active alerts by rule and severity, sites by status;
* every pooled site in **one funnel plot** (estimate against standard error, pooled line,
  pseudo-confidence region);
* the **forest plot and the uptake-trend panels only for the detail sites**: sites with
  an active alert (most severe first, at most ``max_flagged``) plus the
  ``n_influential`` sites whose removal moves the pooled CACE most;
* **every site in one table** that sorts (click a column header) and filters (text,
  alert rule, status) with a small inline script -- no external file, no network;
* a **collapsible detail block per site** (``<details>``), opened from the table.

Everything read from the database is escaped (:mod:`.cells`).
"""

from __future__ import annotations

import html
from dataclasses import dataclass

import numpy as np
import pandas as pd

from takeup.pipeline.outputs.report.cells import (esc, integer, interval, num, pct, records, stratified_remark,
                                                  table)
from takeup.pipeline.outputs.report.charts import figure_svg, forest_figure, funnel_figure, uptake_figure
from takeup.pipeline.outputs.report.data import ACTIVE_STATUSES, ReportData, is_uptake_rule

__all__ = ["MANY_SITES", "DetailChoice", "choose_detail_sites", "summary_section", "site_effects_section",
           "trends_section", "TABLE_SCRIPT", "TABLE_CSS"]

#: above this many sites the report switches to the many-site layout
MANY_SITES = 40
_SEVERITY_RANK = {"critical": 0, "warning": 1, "info": 2}

TABLE_CSS = """
td, th { overflow-wrap: anywhere; }
td.num, th.num { white-space: normal; }
.filters { display: flex; flex-wrap: wrap; gap: 8px 16px; align-items: center; margin: 8px 0; }
.filters input, .filters select { font: inherit; padding: 3px 6px; }
table.sites { table-layout: fixed; font-size: .82rem; }
table.sites th { cursor: pointer; user-select: none; }
table.sites th[aria-sort="ascending"]::after { content: " \\25B2"; }
table.sites th[aria-sort="descending"]::after { content: " \\25BC"; }
table.sites td, table.sites th { padding: 4px 5px; overflow-wrap: anywhere; }
table.sites td.num, table.sites th.num { white-space: normal; }
details.site { border-bottom: 1px solid var(--line); padding: 2px 0; }
details.site summary { cursor: pointer; }
details.site dl { display: grid; grid-template-columns: repeat(auto-fill, minmax(230px, 1fr)); gap: 2px 16px;
                  margin: 4px 0 8px; font-size: .86rem; }
details.site dt { color: var(--muted); }
details.site dd { margin: 0 0 2px; }
.sev { font-weight: 700; }
div.scroll { max-height: 36em; overflow-y: auto; border-bottom: 1px solid var(--line); }
div.scroll thead th { position: sticky; top: 0; z-index: 1; }
"""

#: sorting, filtering and opening the detail blocks: plain DOM, no library, no network
TABLE_SCRIPT = """
(function () {
  function rows(t) { return Array.prototype.slice.call(t.tBodies[0].rows); }
  function key(cell, numeric) {
    var v = cell.getAttribute('data-v');
    if (v === null) v = cell.textContent;
    if (!numeric) return v.toLowerCase();
    var x = parseFloat(v);
    return isNaN(x) ? Infinity : x;
  }
  document.querySelectorAll('table[data-sortable]').forEach(function (t) {
    t.tHead.rows[0].querySelectorAll('th').forEach(function (th, i) {
      th.setAttribute('tabindex', '0');
      function sort() {
        var numeric = th.classList.contains('num');
        var asc = th.getAttribute('aria-sort') !== 'ascending';
        t.tHead.rows[0].querySelectorAll('th').forEach(function (o) { o.removeAttribute('aria-sort'); });
        th.setAttribute('aria-sort', asc ? 'ascending' : 'descending');
        var r = rows(t).map(function (row, j) { return [key(row.cells[i], numeric), j, row]; });
        r.sort(function (a, b) { return (a[0] < b[0] ? -1 : a[0] > b[0] ? 1 : a[1] - b[1]) * (asc ? 1 : -1); });
        var body = t.tBodies[0];
        r.forEach(function (x) { body.appendChild(x[2]); });
      }
      th.addEventListener('click', sort);
      th.addEventListener('keydown', function (e) { if (e.key === 'Enter') sort(); });
    });
  });
  document.querySelectorAll('[data-filter-for]').forEach(function (box) {
    var t = document.getElementById(box.getAttribute('data-filter-for'));
    var text = box.querySelector('input[type=search]');
    var selects = box.querySelectorAll('select');
    var count = box.querySelector('.count');
    function apply() {
      var q = text ? text.value.trim().toLowerCase() : '';
      var shown = 0, all = rows(t);
      all.forEach(function (row) {
        var ok = !q || row.textContent.toLowerCase().indexOf(q) >= 0;
        selects.forEach(function (s) {
          if (s.value) ok = ok && (' ' + (row.getAttribute(s.getAttribute('data-attr')) || '') + ' ')
                                    .indexOf(' ' + s.value + ' ') >= 0;
        });
        row.hidden = !ok;
        if (ok) shown += 1;
      });
      if (count) count.textContent = shown + ' of ' + all.length + ' shown';
    }
    if (text) text.addEventListener('input', apply);
    selects.forEach(function (s) { s.addEventListener('change', apply); });
    apply();
  });
  function openHash() {
    var id = decodeURIComponent(location.hash.slice(1));
    var el = id && document.getElementById(id);
    if (el && el.tagName === 'DETAILS') { el.open = true; el.scrollIntoView(); }
  }
  window.addEventListener('hashchange', openHash);
  openHash();
})();
"""


@dataclass(frozen=True)
class DetailChoice:
    """Sites drawn in the forest plot and the trend panels, and why."""

    sites: tuple[str, ...]
    flagged: tuple[str, ...]          # with an active alert, most severe first (capped)
    influential: tuple[str, ...]      # largest shift of the pooled CACE when left out
    n_flagged_total: int              # sites with an active alert, before the cap


def _active_site_alerts(d: ReportData) -> pd.DataFrame:
    a = d.alerts
    if a.empty:
        return a
    return a[a["status"].isin(ACTIVE_STATUSES) & a["site_id"].notna()]


def choose_detail_sites(d: ReportData, max_flagged: int = 30, n_influential: int = 10) -> DetailChoice:
    """Flagged sites (critical, then warning, then info; then by number of alerts), at most
    ``max_flagged``, plus the ``n_influential`` other sites with the largest
    ``|pooled CACE - leave-one-out CACE|`` (``site_influence``)."""
    act = _active_site_alerts(d)
    flagged: list[str] = []
    n_total = 0
    if not act.empty:
        g = act.assign(_r=act["severity"].map(_SEVERITY_RANK).fillna(3)).groupby("site_id")
        rank = pd.DataFrame({"sev": g["_r"].min(), "n": g.size()}).reset_index()
        rank = rank.sort_values(["sev", "n", "site_id"], ascending=[True, False, True], kind="stable")
        n_total = len(rank)
        flagged = [str(s) for s in rank["site_id"].head(max_flagged)]
    infl: list[str] = []
    inf = d.influence
    if n_influential > 0 and not inf.empty and d.headline is not None and d.headline.get("estimate") is not None:
        shift = (pd.to_numeric(inf["loo_estimate"], errors="coerce") - float(d.headline["estimate"])).abs()
        order = inf.assign(_s=shift).dropna(subset=["_s"]).sort_values(["_s", "site_id"], ascending=[False, True])
        infl = [str(s) for s in order["site_id"] if str(s) not in flagged][:n_influential]
    return DetailChoice(sites=tuple(flagged + infl), flagged=tuple(flagged), influential=tuple(infl),
                        n_flagged_total=n_total)


# --------------------------------------------------------------------------- summary
def summary_section(d: ReportData) -> str:
    """Alerts by rule and severity; sites by status (the first thing a reader sees)."""
    a = d.alerts
    parts = ['<section id="summary"><h2>Summary</h2>']
    if a.empty:
        parts.append('<p class="empty">No alerts were raised in this run.</p>')
    else:
        g = a.groupby(["rule", "severity"], dropna=False)
        counts = g["status"].value_counts().unstack(fill_value=0).reindex(
            columns=["new", "ongoing", "resolved"], fill_value=0)
        act = a[a["status"].isin(ACTIVE_STATUSES)]
        sites = act.groupby(["rule", "severity"], dropna=False)["site_id"].nunique()
        counts["sites"] = sites.reindex(counts.index).fillna(0).astype(int)
        counts = counts.reset_index()
        counts = counts.assign(_r=counts["severity"].map(_SEVERITY_RANK).fillna(3)).sort_values(
            ["_r", "rule"], kind="stable")
        rows = [[esc(r["rule"]), f'<span class="badge sev-{esc(r["severity"])}">{esc(r["severity"])}</span>',
                 integer(r["new"]), integer(r["ongoing"]), integer(r["resolved"]), integer(r["sites"])]
                for r in records(counts)]
        parts.append("<h3>Alerts by rule and severity</h3>")
        parts.append(table([("Rule", False), ("Severity", False), ("New", True), ("Ongoing", True),
                            ("Resolved", True), ("Sites with an active alert", True)], rows,
                           table_id="summary-alerts-table"))
    s = d.site_estimates
    n = len(s)
    act = _active_site_alerts(d)
    worst = (act.assign(_r=act["severity"].map(_SEVERITY_RANK)).groupby("site_id")["_r"].min()
             if not act.empty else pd.Series(dtype=float))
    status = s["status"].fillna("unknown").astype(str).value_counts() if n else pd.Series(dtype=int)
    pooled = int(s["included_in_pool"].fillna(False).astype(bool).sum()) if n else 0
    rows = [[esc(k), integer(v)] for k, v in status.items()]
    rows += [["in the CACE pool", integer(pooled)], ["not in the CACE pool", integer(n - pooled)]]
    for sev, r in _SEVERITY_RANK.items():
        rows.append([f"worst active alert: {sev}", integer(int((worst == r).sum()))])
    rows.append(["no active alert", integer(n - int(worst.notna().sum()))])
    parts.append(f"<h3>Sites by status ({n:,} sites with estimates)</h3>")
    parts.append(table([("Status", False), ("Sites", True)], rows, table_id="summary-sites-table"))
    parts.append("</section>")
    return "".join(parts)


# --------------------------------------------------------------------------- site effects
def _site_alerts(d: ReportData) -> dict[str, list[tuple[str, str, str]]]:
    act = _active_site_alerts(d)
    out: dict[str, list[tuple[str, str, str]]] = {}
    for rec in records(act):
        out.setdefault(str(rec["site_id"]), []).append(
            (str(rec.get("rule") or ""), str(rec.get("severity") or ""), str(rec.get("message") or "")))
    return out


def _anchor(i: int) -> str:
    return f"site-{i}"


def _sites_table(d: ReportData, alerts: dict[str, list[tuple[str, str, str]]]) -> str:
    s = d.site_estimates
    inf = d.influence.drop_duplicates("site_id").set_index("site_id") if not d.influence.empty else None
    head = [("Site", False), ("Status", False), ("Active alerts", False), ("Assigned T / C", True),
            ("Uptake T / C", True), ("F", True), ("CACE", True), ("95% CI", True), ("Residual", True),
            ("Pooled", False)]
    body = []
    # one <tr> per site: string assembly of already-computed values
    for i, rec in enumerate(records(s)):
        site = str(rec.get("site_id"))
        rules = sorted({r for r, _, _ in alerts.get(site, [])})
        worst = min((_SEVERITY_RANK.get(sev, 3) for _, sev, _ in alerts.get(site, [])), default=None)
        res = None
        if inf is not None and site in inf.index:
            res = inf.at[site, "std_residual"]
        status = str(rec.get("status") or "")
        attr = (f' data-rules="{esc(" ".join(rules))}" data-status="{esc(status)}"'
                f' data-alerted="{"yes" if rules else "no"}"')
        nt, nc = rec.get("n_treatment_assigned"), rec.get("n_control_assigned")
        cells = [
            f'<td><a href="#{_anchor(i)}">{esc(site)}</a></td>', f"<td>{esc(status)}</td>",
            f'<td data-v="{"" if worst is None else worst}{esc(" ".join(rules))}">'
            + (", ".join(esc(r) for r in rules) or "") + "</td>",
            f'<td class="num" data-v="{_v((nt or 0) + (nc or 0))}">{integer(nt)} / {integer(nc)}</td>',
            f'<td class="num" data-v="{_v(rec.get("complier_share"))}">{pct(rec.get("uptake_treatment"))} / '
            f'{pct(rec.get("uptake_control"))}</td>',
            f'<td class="num" data-v="{_v(rec.get("first_stage_f"))}">{num(rec.get("first_stage_f"), 1)}</td>',
            f'<td class="num" data-v="{_v(rec.get("cace"))}">{num(rec.get("cace"))}</td>',
            f'<td class="num" data-v="{_v(rec.get("cace_ci_low"))}">'
            f'{interval(rec.get("cace_ci_low"), rec.get("cace_ci_high"))}</td>',
            f'<td class="num" data-v="{_v(res)}">{num(res, 1)}</td>',
            f'<td>{"yes" if rec.get("included_in_pool") else "no"}</td>',
        ]
        body.append(f"<tr{attr}>{''.join(cells)}</tr>")
    widths = [11, 11, 17, 10, 10, 6, 7, 12, 8, 8]
    cols = "".join(f'<col style="width:{w}%">' for w in widths)
    th = "".join(f'<th class="num" scope="col">{h}</th>' if n else f'<th scope="col">{h}</th>' for h, n in head)
    rule_opts = sorted({r for v in alerts.values() for r, _, _ in v})
    status_opts = sorted(s["status"].dropna().astype(str).unique()) if not s.empty else []
    filters = (
        '<div class="filters" data-filter-for="all-sites-table">'
        '<label>Find <input type="search" id="site-filter" placeholder="site, rule, status…"></label>'
        '<label>Alert <select id="site-filter-alerted" data-attr="data-alerted"><option value="">any</option>'
        '<option value="yes">with an active alert</option><option value="no">without</option></select></label>'
        '<label>Rule <select id="site-filter-rule" data-attr="data-rules"><option value="">any</option>'
        + "".join(f'<option value="{esc(r)}">{esc(r)}</option>' for r in rule_opts) + "</select></label>"
        '<label>Status <select id="site-filter-status" data-attr="data-status"><option value="">any</option>'
        + "".join(f'<option value="{esc(x)}">{esc(x)}</option>' for x in status_opts) + "</select></label>"
        '<span class="count" id="site-filter-count"></span></div>')
    return (f"{filters}<div class=\"scroll\"><table id=\"all-sites-table\" class=\"sites\" data-sortable>"
            f"<colgroup>{cols}</colgroup><thead><tr>{th}</tr></thead><tbody>{''.join(body)}</tbody></table></div>")


def _v(x) -> str:
    """A sort key for data-v (empty for null)."""
    try:
        v = float(x)
    except (TypeError, ValueError):
        return ""
    return "" if not np.isfinite(v) else f"{v:.6g}"


def _details(d: ReportData, alerts: dict[str, list[tuple[str, str, str]]]) -> str:
    inf = d.influence.drop_duplicates("site_id").set_index("site_id") if not d.influence.empty else None
    out = []
    # one <details> per site: string assembly of already-computed values
    for i, rec in enumerate(records(d.site_estimates)):
        site = str(rec.get("site_id"))
        al = alerts.get(site, [])
        tag = f" — {len(al)} active alert{'s' if len(al) != 1 else ''}" if al else ""
        facts = [
            ("Complier share", f'{num(rec.get("complier_share"))} (SE {num(rec.get("complier_share_se"))})'),
            ("ITT", f'{num(rec.get("itt"))} (SE {num(rec.get("itt_se"))})'),
            ("CACE", f'{num(rec.get("cace"))} (SE {num(rec.get("cace_se"))}){stratified_remark(rec)}'),
            ("tF interval", interval(rec.get("tf_ci_low"), rec.get("tf_ci_high"))),
            ("Anderson-Rubin", f'{esc(rec.get("ar_set")) or "n/a"} '
                               f'{interval(rec.get("ar_ci_low"), rec.get("ar_ci_high"))}'),
            ("Missing outcomes T / C", f'{integer(rec.get("missing_outcome_treatment"))} / '
                                       f'{integer(rec.get("missing_outcome_control"))}'),
        ]
        if inf is not None and site in inf.index:
            r = inf.loc[site]
            facts += [("Pooled CACE without this site", num(r.get("loo_estimate"))),
                      ("Shrunken (empirical-Bayes) CACE", f'{num(r.get("eb_estimate"))} (SE {num(r.get("eb_se"))})')]
        note = rec.get("note") or (rec.get("pool_exclusion_reason") if not rec.get("included_in_pool") else None)
        if note:
            facts.append(("Note", esc(note)))
        dl = "".join(f"<div><dt>{html.escape(k)}</dt><dd>{v}</dd></div>" for k, v in facts)
        msgs = "".join(f'<li><span class="badge sev-{esc(sev)}">{esc(sev)}</span> <strong>{esc(rule)}</strong>: '
                       f"{esc(msg)}</li>" for rule, sev, msg in al)
        out.append(f'<details class="site" id="{_anchor(i)}"><summary>{esc(site)}{tag}</summary><dl>{dl}</dl>'
                   + (f"<ul>{msgs}</ul>" if msgs else "") + "</details>")
    return "".join(out)


def site_effects_section(d: ReportData, choice: DetailChoice) -> str:
    """Funnel plot of all sites, forest plot of the detail sites, the all-sites table, details."""
    s = d.site_estimates
    title = f"<h2>Site effects on the primary outcome{(': ' + esc(d.primary_outcome)) if d.primary_outcome else ''}</h2>"
    if s.empty:
        return (f'<section id="site-effects">{title}<div id="forest-plot"><p class="empty">'
                "No site estimates for the primary outcome in this run.</p></div></section>")
    act = _active_site_alerts(d)
    outliers = sorted(act.loc[act["rule"] == "outlier_site", "site_id"].astype(str)) if not act.empty else []
    fig = funnel_figure(s, d.headline, flagged=outliers, outcome=d.primary_outcome)
    n_pooled = int(s["included_in_pool"].fillna(False).astype(bool).sum())
    funnel = (f'<figure id="funnel-plot">{figure_svg(fig, "fn", "Funnel plot of every pooled site CACE against its standard error")}'
              f"<figcaption>Each dot is one of the {n_pooled:,} pooled sites: its CACE (across) against its standard "
              "error (down: precise sites at the top). The solid line is the pooled CACE; the dashed lines enclose the "
              "range in which 95% of site estimates are expected if the sites differ only by chance and by the "
              "estimated between-site variance τ². Sites outside it are not necessarily outliers: with many sites "
              "about 5% fall outside by chance, which is why the outlier alert (triangles) tests each site against "
              f"the others and controls the false discovery rate. {len(s) - n_pooled:,} site(s) not in the pool "
              "are not drawn.</figcaption></figure>")
    sub = s[s["site_id"].astype(str).isin(choice.sites)]
    order = {site: i for i, site in enumerate(choice.sites)}
    sub = sub.assign(_o=sub["site_id"].astype(str).map(order)).sort_values("_o").drop(columns="_o")
    if sub.empty:
        forest = '<div id="forest-plot"><p class="empty">No site has an active alert or stands out.</p></div>'
    else:
        ff = forest_figure(sub.reset_index(drop=True), d.headline, weak_f=d.weak_f, outcome=d.primary_outcome)
        more = (f" {choice.n_flagged_total - len(choice.flagged):,} further site(s) with an active alert are in the "
                "table below (filter: with an active alert)." if choice.n_flagged_total > len(choice.flagged) else "")
        forest = (f'<figure id="forest-plot">{figure_svg(ff, "fp", "Forest plot of the flagged and most influential sites")}'
                  f"<figcaption>The {len(choice.flagged)} site(s) with an active alert (most severe first), then the "
                  f"{len(choice.influential)} other site(s) whose removal moves the pooled CACE most. Squares: site "
                  "CACE with its conventional 95% interval; open circles and dashed lines: weak first stage (tF or "
                  f"Anderson-Rubin interval); the diamond is the pooled CACE over all pooled sites.{more}"
                  "</figcaption></figure>")
    alerts = _site_alerts(d)
    return (f'<section id="site-effects">{title}{funnel}<h3>Flagged and most influential sites</h3>{forest}'
            f"<h3>All sites</h3><p>Click a column header to sort; type or choose to filter; click a site for its "
            f"details.</p>{_sites_table(d, alerts)}<h3>Site details</h3>"
            f'<div id="site-details">{_details(d, alerts)}</div></section>')


def trends_section(d: ReportData, choice: DetailChoice) -> str:
    """Uptake-trend panels of the detail sites only."""
    head = '<section id="uptake"><h2>Uptake by arm over time</h2>'
    t = d.trends
    t = t[t["site_id"].astype(str).isin(choice.sites)] if not t.empty else t
    if t.empty:
        return head + ('<div id="uptake-trends"><p class="empty">No uptake trends of flagged or influential sites '
                       "in this run.</p></div></section>")
    a = d.alerts
    flagged: dict[str, list[str]] = {}
    if not a.empty:
        active = a[a["status"].isin(ACTIVE_STATUSES) & is_uptake_rule(a["rule"]) & a["site_id"].notna()]
        flagged = {str(k): sorted(set(v.astype(str))) for k, v in active.groupby("site_id")["rule"]}
    fig = uptake_figure(t, flagged)
    svg = figure_svg(fig, "ut", "Uptake share by week of assignment for the flagged and most influential sites")
    caption = ("<figcaption>Share of each weekly cohort who took up the offer by the cutoff, by arm, for the sites of "
               "the forest plot above (panels in site order). Panels with an active uptake or first-stage alert have a "
               "thick vermillion frame, the rule in the title and a triangle on the latest week. Recent cohorts have "
               "had less time to take up the offer.</figcaption>")
    return f'{head}<figure id="uptake-trends">{svg}{caption}</figure></section>'

