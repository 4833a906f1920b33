"""One monitoring run: read aggregates, estimate, pool, follow trends, raise alerts, write.

The stages are plain functions so that the in-process path
(:func:`run_monitoring`) and the Prefect flow (``flows.monitor``) call the
same code:

1. :func:`pipeline.run_inputs.collect_inputs` — every SQL aggregation (one pass per table);
2. :func:`compute_site_rows` — per-site estimates from moments (vectorised over sites);
3. :func:`compute_adjusted_row` — optional covariate-adjusted IV, one site at a time;
4. :func:`compute_pooled` — pooled estimates, subgroup tests, influence;
5. :func:`pipeline.trends.compute_trends` and :func:`pipeline.alerts.compute_alerts`;
6. :func:`write_results` — every result table of the run in one transaction.

A ``runs`` row is written (status ``running``) before the work and updated at
the end (``ok``, ``partial`` when some site tasks failed, or ``failed``).
"""

from __future__ import annotations

import json
import time
from dataclasses import dataclass, field
from datetime import date, datetime, timezone
from importlib import metadata
from pathlib import Path

import duckdb
import pyarrow as pa

from pipeline.alerts import compute_alerts
from pipeline.estimators.adjusted import fit_covariate_adjusted
from pipeline.run_inputs import RunContext, RunInputs, collect_inputs, new_run_context
from pipeline.sample_sql import cluster_moments_for_outcome, moments_for_outcome
from pipeline.site_estimation import adjusted_row, complier_profile_rows, estimate_sites
from pipeline.pooling_stage import pool_outcome
from pipeline.trends import compute_trends
from pipeline.warehouse import connect, store_config, stored_config, transaction
from schemas.config import StudyConfig
from schemas.ddl import columns_of
from schemas.results import RESULT_TABLES

__all__ = ["RunResults", "RunSummary", "run_monitoring", "compute_site_rows", "compute_adjusted_row",
           "compute_pooled", "write_results", "start_run", "finish_run", "code_version", "site_error_rows"]


def code_version() -> str:
    try:
        return metadata.version("takeup")
    except metadata.PackageNotFoundError:  # pragma: no cover - running from a source tree
        return "0+unknown"


@dataclass
class RunResults:
    """The rows one run writes, per result table."""

    site_estimates: list[dict] = field(default_factory=list)
    complier_profile: list[dict] = field(default_factory=list)
    pooled_estimates: list[dict] = field(default_factory=list)
    subgroup_tests: list[dict] = field(default_factory=list)
    site_influence: list[dict] = field(default_factory=list)
    uptake_trends: list[dict] = field(default_factory=list)
    alerts: list[dict] = field(default_factory=list)
    errors: list[str] = field(default_factory=list)


@dataclass(frozen=True)
class RunSummary:
    run_id: str
    mode: str
    as_of: date
    status: str
    n_sites: int
    rows: dict
    alerts_by_status: dict
    timings: dict
    message: str | None
    flow_run_id: str | None = None


# ----------------------------------------------------------------------------- stages
def compute_site_rows(inputs: RunInputs, ctx: RunContext) -> tuple[list[dict], list[dict]]:
    """``site_estimates`` (unadjusted) and ``complier_profile`` rows for every outcome."""
    sites = list(inputs.sites)
    rows: list[dict] = []
    for outcome in inputs.outcomes:
        table = moments_for_outcome(inputs.moments, outcome, sites)
        clusters = (cluster_moments_for_outcome(inputs.clusters, outcome, sites)
                    if inputs.clusters is not None else None)
        rows.extend(estimate_sites(table, ctx.config, ctx.run_id, clusters=clusters))
    profile = complier_profile_rows(inputs.covariate_cells, inputs.sites, list(ctx.config.covariates), ctx.run_id)
    return rows, profile


def compute_adjusted_row(frame, base_row: dict, ctx: RunContext) -> dict:
    """The covariate-adjusted row of one site x outcome (does not vectorise: one IV2SLS fit)."""
    cluster = "cluster_id" if ctx.config.randomisation_unit == "cluster" else None
    fit = fit_covariate_adjusted(frame, outcome="y", treatment="d", instrument="z",
                                 covariates=list(ctx.config.covariates), cluster=cluster)
    return adjusted_row(base_row, fit, ctx.run_id)


def site_error_rows(base_row: dict, message: str) -> dict:
    """Row written when a site task fails: the site's row with ``status='error'``."""
    row = dict(base_row)
    row.update({"spec": "covariate_adjusted", "status": "error", "note": f"site task failed: {message}",
                "included_in_pool": False, "pool_exclusion_reason": "site task failed"})
    for k in ("complier_share", "complier_share_se", "itt", "itt_se", "cace", "cace_se", "cace_ci_low",
              "cace_ci_high", "first_stage_f", "ar_set", "ar_ci_low", "ar_ci_high", "tf_ci_low", "tf_ci_high",
              "tf_se", "se_type"):
        row[k] = None
    return row


def compute_pooled(inputs: RunInputs, ctx: RunContext, site_rows: list[dict]
                   ) -> tuple[list[dict], list[dict], list[dict]]:
    """``pooled_estimates``, ``subgroup_tests`` and ``site_influence`` rows for every outcome."""
    groups = {s.site_id: s.group for s in ctx.config.sites}
    pooled, subgroup, influence = [], [], []
    sites = list(inputs.sites)
    for outcome in inputs.outcomes:
        rows = [r for r in site_rows if r["outcome"] == outcome and r["spec"] == "unadjusted"]
        table = moments_for_outcome(inputs.moments, outcome, sites)
        p, s, i = pool_outcome(ctx.run_id, outcome, rows, table.moments, sites, ctx.config, groups)
        pooled += p
        subgroup += s
        influence += i
    return pooled, subgroup, influence


# ----------------------------------------------------------------------------- writing
def _arrow_table(table: str, rows: list[dict]) -> pa.Table:
    model = RESULT_TABLES[table]
    types = {"VARCHAR": pa.string(), "BIGINT": pa.int64(), "DOUBLE": pa.float64(), "BOOLEAN": pa.bool_(),
             "DATE": pa.date32(), "TIMESTAMP": pa.timestamp("us")}
    cols = columns_of(model)
    schema = pa.schema([pa.field(c.name, types[c.sql_type]) for c in cols])
    names = [c.name for c in cols]
    for r in rows:
        extra = set(r) - set(names)
        if extra:
            raise ValueError(f"{table}: unexpected column(s) {sorted(extra)}")
    data = {n: [r.get(n) for r in rows] for n in names}
    out = pa.Table.from_pydict(data, schema=schema)
    import pyarrow.compute as pc
    for c in cols:
        if c.sql_type == "DOUBLE":
            col = out.column(c.name)
            if col.null_count < len(col) and not pc.all(pc.is_finite(col.drop_null())).as_py():
                raise ValueError(f"{table}.{c.name}: NaN or infinite value reached the writer")
    return out


def write_results(con: duckdb.DuckDBPyConnection, ctx: RunContext, results: RunResults) -> dict:
    """Append every result table of the run in one transaction; returns row counts."""
    counts = {}
    with transaction(con):
        for table in ("site_estimates", "complier_profile", "pooled_estimates", "subgroup_tests",
                      "site_influence", "uptake_trends", "alerts"):
            rows = getattr(results, table)
            counts[table] = len(rows)
            if not rows:
                continue
            arrow = _arrow_table(table, rows)
            con.register("_result_rows", arrow)
            try:
                con.execute(f'INSERT INTO "{table}" SELECT * FROM _result_rows')
            finally:
                con.unregister("_result_rows")
    return counts


def start_run(con: duckdb.DuckDBPyConnection, ctx: RunContext) -> None:
    store_config(con, ctx.config)
    con.execute("INSERT INTO runs VALUES ($run, $flow, $mode, $as_of, $start, NULL, 'running', $ver, $cfg, '', 0, 0, "
                "NULL, NULL)", {"run": ctx.run_id, "flow": ctx.flow_run_id, "mode": ctx.mode, "as_of": ctx.as_of,
                                "start": ctx.started_at, "ver": code_version(), "cfg": ctx.config_hash})


def finish_run(con: duckdb.DuckDBPyConnection, ctx: RunContext, status: str, inputs: RunInputs | None,
               timings: dict, message: str | None) -> None:
    con.execute("UPDATE runs SET finished_at = $end, status = $status, input_fingerprint = $fp, n_batches = $nb, "
                "n_sites = $ns, timings_json = $t, message = $m WHERE run_id = $run",
                {"end": datetime.now(timezone.utc).replace(tzinfo=None), "status": status,
                 "fp": inputs.input_fingerprint if inputs else "", "nb": inputs.n_batches if inputs else 0,
                 "ns": len(inputs.sites) if inputs else 0, "t": json.dumps(timings), "m": message,
                 "run": ctx.run_id})


def compute_all(inputs: RunInputs, ctx: RunContext, timings: dict) -> RunResults:
    """Stages 2-5 in process."""
    res = RunResults()
    t = time.perf_counter()
    res.site_estimates, res.complier_profile = compute_site_rows(inputs, ctx)
    timings["site_estimates"] = round(time.perf_counter() - t, 4)
    if inputs.participant_frames:
        t = time.perf_counter()
        base = {(r["site_id"], r["outcome"]): r for r in res.site_estimates}
        for key, frame in inputs.participant_frames.items():
            try:
                res.site_estimates.append(compute_adjusted_row(frame, base[key], ctx))
            except Exception as exc:  # a failing site task must not stop the run
                res.site_estimates.append(site_error_rows(base[key], f"{type(exc).__name__}: {exc}"))
                res.errors.append(f"{key[0]}/{key[1]}: {exc}")
        timings["adjusted"] = round(time.perf_counter() - t, 4)
    t = time.perf_counter()
    res.pooled_estimates, res.subgroup_tests, res.site_influence = compute_pooled(inputs, ctx, res.site_estimates)
    timings["pooling"] = round(time.perf_counter() - t, 4)
    t = time.perf_counter()
    res.uptake_trends, drift = compute_trends(inputs, ctx)
    timings["trends"] = round(time.perf_counter() - t, 4)
    t = time.perf_counter()
    res.alerts = compute_alerts(inputs, ctx, res.site_estimates, res.pooled_estimates, res.site_influence, drift)
    timings["alerts"] = round(time.perf_counter() - t, 4)
    return res


def summarise(ctx: RunContext, status: str, inputs: RunInputs | None, counts: dict, alerts: list[dict],
              timings: dict, message: str | None) -> RunSummary:
    by_status: dict[str, int] = {}
    for a in alerts:
        by_status[a["status"]] = by_status.get(a["status"], 0) + 1
    return RunSummary(run_id=ctx.run_id, mode=ctx.mode, as_of=ctx.as_of, status=status,
                      n_sites=len(inputs.sites) if inputs else 0, rows=counts, alerts_by_status=by_status,
                      timings=timings, message=message, flow_run_id=ctx.flow_run_id)


def resolve_config(con: duckdb.DuckDBPyConnection, config: StudyConfig | None) -> StudyConfig:
    return config or stored_config(con) or StudyConfig()


def run_monitoring(warehouse: Path | str, as_of: date | None = None, config: StudyConfig | None = None,
                   data_cutoff: datetime | None = None) -> RunSummary:
    """Compute one run in process (no orchestration API) and write it."""
    con = connect(warehouse)
    try:
        ctx = new_run_context(resolve_config(con, config), as_of=as_of, data_cutoff=data_cutoff)
        timings: dict = {}
        start_run(con, ctx)
        inputs = None
        try:
            t = time.perf_counter()
            inputs = collect_inputs(con, ctx)
            timings["collect_inputs"] = round(time.perf_counter() - t, 4)
            results = compute_all(inputs, ctx, timings)
            t = time.perf_counter()
            counts = write_results(con, ctx, results)
            timings["write"] = round(time.perf_counter() - t, 4)
        except BaseException as exc:
            finish_run(con, ctx, "failed", inputs, timings, f"{type(exc).__name__}: {exc}")
            raise
        status = "partial" if results.errors else "ok"
        message = "; ".join(results.errors) if results.errors else None
        finish_run(con, ctx, status, inputs, timings, message)
        return summarise(ctx, status, inputs, counts, results.alerts, timings, message)
    finally:
        con.close()
