"""Read what the HTML report shows from the warehouse tables of one run.

Only the result-table contract (:mod:`takeup.schemas.results`) and the storage
tables ``study_configs``, ``batches`` and ``quarantine`` are read.  Every
query binds its values as parameters.
"""

from __future__ import annotations

from takeup.pipeline.errors import ReportError  # noqa: F401  (re-exported)

import json
from dataclasses import dataclass, field
from datetime import date, datetime
from typing import Any

import duckdb
import pandas as pd

from takeup.pipeline.outputs.export import ExportError, resolve_run_id

__all__ = ["ReportError", "ReportData", "load_report_data", "HEADLINE_METHODS", "ACTIVE_STATUSES",
           "is_uptake_rule"]

#: pooled method used for the headline diamond, in order of preference
HEADLINE_METHODS: tuple[str, ...] = ("reml", "dl", "fixed")
#: alert statuses that still need attention
ACTIVE_STATUSES: tuple[str, ...] = ("new", "ongoing")
_STATUS_ORDER = {"new": 0, "ongoing": 1, "resolved": 2}
_SEVERITY_ORDER = {"critical": 0, "warning": 1, "info": 2}
_METHOD_ORDER = {"fixed": 0, "dl": 1, "reml": 2, "pm": 3}




def is_uptake_rule(rule: pd.Series) -> pd.Series:
    """Whether alert rules concern uptake or the first stage (vectorised over rules)."""
    r = rule.fillna("").str.lower()
    return r.str.contains("uptake") | r.str.contains("first_stage")


@dataclass(frozen=True)
class ReportData:
    """Everything the report shows, for one run (read-only; frames are copies)."""

    run: dict[str, Any]
    study_id: str
    primary_outcome: str | None
    weak_f: float
    site_estimates: pd.DataFrame      # primary outcome, primary rows (spec 'unadjusted' or 'stratified'),
                                      # with unstratified_cace beside the stratified ones
    pooled: pd.DataFrame              # primary outcome, all quantities / methods / groups
    headline: dict[str, Any] | None   # pooled CACE row shown as the diamond
    subgroup_tests: pd.DataFrame
    trends: pd.DataFrame              # basis 'cohort'
    alerts: pd.DataFrame              # sorted new, ongoing, resolved
    batches: pd.DataFrame
    quarantine_by_reason: pd.DataFrame
    other_outcomes: tuple[str, ...]
    influence: pd.DataFrame = field(default_factory=pd.DataFrame)  # site_influence, primary outcome, CACE
    precision: pd.DataFrame = field(default_factory=pd.DataFrame)  # precision_forecasts: pooled first, then sites
    alert_tests: str = "anytime_valid"                              # [sequential] alert_tests of the run


def _df(con: duckdb.DuckDBPyConnection, sql: str, params: list[Any]) -> pd.DataFrame:
    return con.execute(sql, params).df()


def _config(con: duckdb.DuckDBPyConnection, config_hash: str | None) -> dict[str, Any]:
    """The run's configuration if stored, else the latest stored one (empty dict when none)."""
    rows = []
    if config_hash:
        rows = con.execute("SELECT config_json FROM study_configs WHERE config_hash = ? "
                           "ORDER BY stored_at DESC LIMIT 1", [config_hash]).fetchall()
    if not rows:
        rows = con.execute("SELECT config_json FROM study_configs ORDER BY stored_at DESC LIMIT 1").fetchall()
    if not rows:
        return {}
    row = rows[0]
    try:
        cfg = json.loads(row[0])
    except (TypeError, ValueError):
        return {}
    return cfg if isinstance(cfg, dict) else {}


def _primary_outcome(cfg: dict[str, Any], outcomes_in_run: list[str]) -> str | None:
    declared = [o for o in cfg.get("outcomes", ()) if isinstance(o, dict) and o.get("name")]
    primary = [o["name"] for o in declared if o.get("primary")]
    for name in primary + [o["name"] for o in declared]:
        if name in outcomes_in_run:
            return name
    if primary:
        return primary[0]
    return outcomes_in_run[0] if outcomes_in_run else None


def _sort_alerts(alerts: pd.DataFrame) -> pd.DataFrame:
    if alerts.empty:
        return alerts
    key = pd.DataFrame({
        "s": alerts["status"].map(_STATUS_ORDER).fillna(9),
        "v": alerts["severity"].map(_SEVERITY_ORDER).fillna(9),
        "site": alerts["site_id"].fillna(""),
        "rule": alerts["rule"],
    })
    order = key.sort_values(["s", "v", "site", "rule"], kind="stable").index
    return alerts.loc[order].reset_index(drop=True)


def load_report_data(con: duckdb.DuckDBPyConnection, run_id: str | None = None) -> ReportData:
    """Read the report's contents for ``run_id`` (default: latest finished run).

    Parameters
    ----------
    con : duckdb.DuckDBPyConnection
        Open warehouse (read-only connections work).
    run_id : str, optional
        Run to read; ``None`` selects the latest run with status ``ok`` or
        ``partial``.

    Returns
    -------
    ReportData
        The run's row, the study id and primary outcome from the run's
        stored configuration (else the latest one), the primary outcome's
        unadjusted site estimates and pooled rows, the headline pooled CACE
        (``reml``, else ``dl``, else ``fixed``; all sites), subgroup tests,
        cohort-basis uptake trends, alerts ordered new / ongoing / resolved
        (then by severity, site, rule), and the batches and quarantined rows
        received up to the run's start.

    Raises
    ------
    ReportError
        When there is no finished run, or ``run_id`` is unknown.
    """
    try:
        rid = resolve_run_id(con, run_id)
    except ExportError as exc:
        raise ReportError(str(exc).replace("to export", "to report on")) from None
    cur = con.execute("SELECT * FROM runs WHERE run_id = ?", [rid])
    run = dict(zip([d[0] for d in cur.description], cur.fetchall()[0]))
    cfg = _config(con, run.get("config_hash"))
    study_id = str(cfg.get("study_id") or "(not recorded)")
    thresholds = cfg.get("alerts") if isinstance(cfg.get("alerts"), dict) else {}
    weak_f = float(thresholds.get("weak_first_stage_f", 10.0))

    outcomes = [r[0] for r in con.execute(
        "SELECT outcome FROM site_estimates WHERE run_id = ? GROUP BY outcome ORDER BY count(*) DESC, outcome",
        [rid]).fetchall()]
    primary = _primary_outcome(cfg, outcomes)

    # the primary row of each site (stratified for sites with strata) and, beside it, the unstratified CACE
    sites = _df(con, "SELECT s.*, u.cace AS unstratified_cace FROM site_estimates s LEFT JOIN site_estimates u "
                     "ON u.run_id = s.run_id AND u.site_id = s.site_id AND u.outcome = s.outcome "
                     "AND u.spec = 'unstratified' WHERE s.run_id = ? AND s.outcome = ? "
                     "AND s.spec IN ('unadjusted', 'stratified') ORDER BY s.site_id", [rid, primary])
    pooled = _df(con, "SELECT * FROM pooled_estimates WHERE run_id = ? AND outcome = ?", [rid, primary])
    if not pooled.empty:
        rank = pooled["method"].map(_METHOD_ORDER).fillna(
            pooled["method"].str.endswith("_hksj").map({True: 4, False: 6}))
        rank = rank.where(pooled["method"] != "pooled_2sls", 5)
        pooled = (pooled.assign(_r=rank, _g=pooled["group"].notna())
                  .sort_values(["quantity", "_g", "group_field", "group", "_r"], kind="stable", na_position="first")
                  .drop(columns=["_r", "_g"]).reset_index(drop=True))
    headline = None
    overall_cace = pooled[(pooled["quantity"] == "cace") & pooled["group"].isna()] if not pooled.empty else pooled
    for m in HEADLINE_METHODS:
        hit = overall_cace[overall_cace["method"] == m] if not overall_cace.empty else overall_cace
        if not hit.empty:
            headline = {k: (None if pd.isna(v) else v) for k, v in hit.iloc[0].to_dict().items()}
            break

    subgroup = _df(con, "SELECT * FROM subgroup_tests WHERE run_id = ? AND outcome = ? "
                        "ORDER BY quantity, group_field, method", [rid, primary])
    influence = _df(con, "SELECT * FROM site_influence WHERE run_id = ? AND outcome = ? AND quantity = 'cace' "
                         "ORDER BY site_id", [rid, primary])
    trends = _df(con, "SELECT * FROM uptake_trends WHERE run_id = ? AND basis = 'cohort' "
                      "ORDER BY site_id, arm, period_start", [rid])
    alerts = _df(con, "SELECT a.*, CAST(r.as_of AS VARCHAR) AS first_seen_as_of FROM alerts a "
                      "LEFT JOIN runs r ON r.run_id = a.first_seen_run_id WHERE a.run_id = ?", [rid])
    alerts = _sort_alerts(alerts)
    precision = _df(con, "SELECT * FROM precision_forecasts WHERE run_id = ? AND outcome = ? "
                         "ORDER BY scope = 'site', site_id", [rid, primary])
    alert_tests = str((cfg.get("sequential") or {}).get("alert_tests") or "anytime_valid")

    # files received before the run started are the ones it could have read
    started = run.get("started_at")
    batches = _df(con, "SELECT * FROM batches WHERE received_at <= ? ORDER BY received_at, batch_id", [started])
    quarantine = _df(con, "SELECT q.reason, q.field, count(*) AS n_rows, count(DISTINCT q.batch_id) AS n_batches "
                          "FROM quarantine q JOIN batches b ON b.batch_id = q.batch_id "
                          "WHERE b.received_at <= ? GROUP BY q.reason, q.field "
                          "ORDER BY n_rows DESC, q.reason, q.field NULLS FIRST", [started])
    return ReportData(
        run=run, study_id=study_id, primary_outcome=primary, weak_f=weak_f,
        site_estimates=sites, pooled=pooled, headline=headline, subgroup_tests=subgroup,
        trends=trends, alerts=alerts, batches=batches, quarantine_by_reason=quarantine,
        other_outcomes=tuple(o for o in outcomes if o != primary), influence=influence,
        precision=precision, alert_tests=alert_tests,
    )


def as_text_date(value: Any) -> str:
    """ISO date/time text of a database value ('' for null)."""
    if value is None or (isinstance(value, float) and pd.isna(value)) or value is pd.NaT:
        return ""
    if isinstance(value, pd.Timestamp):
        value = value.to_pydatetime()
    if isinstance(value, datetime):
        return value.strftime("%Y-%m-%d %H:%M") + " UTC"
    if isinstance(value, date):
        return value.isoformat()
    return str(value)
