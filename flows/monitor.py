"""``monitor_flow``: one monitoring run as a Prefect flow.

Stages that touch the warehouse (collect, write) and stages that are one
vectorised pass over all sites (site estimates, pooling, trends, alerts)
run as single tasks in the flow's process; the per-site work that does not
vectorise (covariate-adjusted IV fits) is mapped across sites and is what a
Dask cluster spreads.  A failing site task marks that site's row
``status='error'`` and the run finishes as ``partial``.
"""

from __future__ import annotations

import time
from datetime import date
from pathlib import Path

import flows  # noqa: F401  (Prefect defaults)
from prefect import flow, task
from prefect.cache_policies import NO_CACHE
from prefect.runtime import flow_run as runtime_flow_run

from flows.runners import make_task_runner
from pipeline import run as core
from pipeline.run_inputs import RunContext, RunInputs, collect_inputs, new_run_context
from pipeline.warehouse import connect
from schemas.config import StudyConfig, parse_config

__all__ = ["monitor_flow", "run_orchestrated"]


@task(name="collect-inputs", cache_policy=NO_CACHE, retries=3, retry_delay_seconds=[1, 4, 16])
def collect_task(warehouse: str, as_of: str | None, config_json: str | None, flow_run_id: str | None
                 ) -> tuple[RunContext, RunInputs]:
    import json
    con = connect(warehouse)
    try:
        config = parse_config(json.loads(config_json)) if config_json else core.resolve_config(con, None)
        ctx = new_run_context(config, as_of=date.fromisoformat(as_of) if as_of else None,
                              mode="orchestrated", flow_run_id=flow_run_id)
        core.start_run(con, ctx)
        try:
            return ctx, collect_inputs(con, ctx)
        except BaseException as exc:
            core.finish_run(con, ctx, "failed", None, {}, f"{type(exc).__name__}: {exc}")
            raise
    finally:
        con.close()


@task(name="site-estimates", cache_policy=NO_CACHE)
def site_rows_task(inputs: RunInputs, ctx: RunContext):
    return core.compute_site_rows(inputs, ctx)


@task(name="covariate-adjusted-site", cache_policy=NO_CACHE)
def adjusted_task(frame, base_row: dict, ctx: RunContext) -> dict:
    return core.compute_adjusted_row(frame, base_row, ctx)


@task(name="pooling", cache_policy=NO_CACHE)
def pooled_task(inputs: RunInputs, ctx: RunContext, site_rows: list[dict]):
    return core.compute_pooled(inputs, ctx, site_rows)


@task(name="trends", cache_policy=NO_CACHE)
def trends_task(inputs: RunInputs, ctx: RunContext):
    from pipeline.trends import compute_trends
    return compute_trends(inputs, ctx)


@task(name="alerts", cache_policy=NO_CACHE)
def alerts_task(inputs, ctx, site_rows, pooled, influence, drift):
    from pipeline.alerts import compute_alerts
    return compute_alerts(inputs, ctx, site_rows, pooled, influence, drift)


@task(name="write-results", cache_policy=NO_CACHE, retries=3, retry_delay_seconds=[1, 4, 16])
def write_task(warehouse: str, ctx: RunContext, results: core.RunResults, inputs: RunInputs, timings: dict):
    con = connect(warehouse)
    try:
        t = time.perf_counter()
        counts = core.write_results(con, ctx, results)
        timings["write"] = round(time.perf_counter() - t, 4)
        status = "partial" if results.errors else "ok"
        message = "; ".join(results.errors) if results.errors else None
        core.finish_run(con, ctx, status, inputs, timings, message)
        return core.summarise(ctx, status, inputs, counts, results.alerts, timings, message)
    except BaseException as exc:
        core.finish_run(con, ctx, "failed", inputs, timings, f"{type(exc).__name__}: {exc}")
        raise
    finally:
        con.close()


@flow(name="takeup-monitor", log_prints=False)
def monitor_flow(warehouse: str, as_of: str | None = None, config_json: str | None = None):
    """Compute and write one monitoring run (see :mod:`pipeline.run`)."""
    flow_run_id = str(runtime_flow_run.id) if runtime_flow_run.id else None
    timings: dict = {}
    t = time.perf_counter()
    ctx, inputs = collect_task(warehouse, as_of, config_json, flow_run_id)
    timings["collect_inputs"] = round(time.perf_counter() - t, 4)
    try:
        results = core.RunResults()
        t = time.perf_counter()
        results.site_estimates, results.complier_profile = site_rows_task(inputs, ctx)
        timings["site_estimates"] = round(time.perf_counter() - t, 4)
        if inputs.participant_frames:
            t = time.perf_counter()
            base = {(r["site_id"], r["outcome"]): r for r in results.site_estimates}
            keys = list(inputs.participant_frames)
            futures = [adjusted_task.submit(inputs.participant_frames[k], base[k], ctx) for k in keys]
            for k, fut in zip(keys, futures):
                try:
                    results.site_estimates.append(fut.result())
                except Exception as exc:  # a failing site task marks the site, the run goes on
                    results.site_estimates.append(core.site_error_rows(base[k], f"{type(exc).__name__}: {exc}"))
                    results.errors.append(f"{k[0]}/{k[1]}: {exc}")
            timings["adjusted"] = round(time.perf_counter() - t, 4)
        t = time.perf_counter()
        results.pooled_estimates, results.subgroup_tests, results.site_influence = pooled_task(
            inputs, ctx, results.site_estimates)
        timings["pooling"] = round(time.perf_counter() - t, 4)
        t = time.perf_counter()
        results.uptake_trends, drift = trends_task(inputs, ctx)
        timings["trends"] = round(time.perf_counter() - t, 4)
        t = time.perf_counter()
        results.alerts = alerts_task(inputs, ctx, results.site_estimates, results.pooled_estimates,
                                     results.site_influence, drift)
        timings["alerts"] = round(time.perf_counter() - t, 4)
    except BaseException as exc:
        con = connect(warehouse)
        try:
            core.finish_run(con, ctx, "failed", inputs, timings, f"{type(exc).__name__}: {exc}")
        finally:
            con.close()
        raise
    return write_task(warehouse, ctx, results, inputs, timings)


def run_orchestrated(warehouse: Path | str, as_of: date | None = None, config: StudyConfig | None = None,
                     runner: str | None = None, dask_address: str | None = None):
    """Execute :func:`monitor_flow` through Prefect with the chosen task runner."""
    cfg_for_runner = config
    if cfg_for_runner is None:
        con = connect(warehouse, read_only=False)
        try:
            cfg_for_runner = core.resolve_config(con, None)
        finally:
            con.close()
    task_runner = make_task_runner(cfg_for_runner, runner, dask_address)
    f = monitor_flow.with_options(task_runner=task_runner)
    return f(str(warehouse), as_of.isoformat() if as_of else None,
             config.canonical_json() if config is not None else None)
