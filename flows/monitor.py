"""``monitor_flow``: one monitoring run as a Prefect flow.

The flow walks the same stage list as the in-process runner
(:data:`takeup.pipeline.run.stages.STAGES`), wrapping each stage's function as a
task.  Every stage is one vectorised pass over all sites (the covariate-adjusted
rows too: they come from moments aggregated in DuckDB), so each is a single
task; with the Dask runner the tasks execute on the cluster's workers.
Collecting the inputs and writing the results touch the warehouse: they wait for
its lock (up to ``--wait`` / ``$TAKEUP_LOCK_WAIT`` seconds, see
:func:`takeup.pipeline.warehouse.connect_waiting`) rather than retry.  The ``runs``
row is owned by the flow's process, so a killed flow's run is marked ``abandoned``
by the next run.  A study configured with shards (``[[shards]]``) collects each
shard's aggregates as its own task -- on a Dask worker, which opens the shard
read-only and returns the aggregate frames -- and pools them centrally
(:mod:`takeup.pipeline.run.pooled_inputs`).
A finished run is then published to the study's [publish] targets (a failed
publication is recorded, never fails the flow).
"""

from __future__ import annotations

from datetime import date
from pathlib import Path
from typing import Any, Sequence

import takeup.flows  # noqa: F401  (Prefect defaults)
from prefect import flow, task, unmapped
from prefect.cache_policies import NO_CACHE
from prefect.runtime import flow_run as runtime_flow_run

from takeup.flows.api_server import check_configured_api
from takeup.flows.runners import make_task_runner
from takeup.pipeline.run import stages as core
from takeup.pipeline.run import pooled_inputs, writer
from takeup.pipeline.run.abandoned import process_owner
from takeup.pipeline.run.moments_package import MomentsPackage
from takeup.pipeline.run.inputs import (RunContext, RunInputs, check_as_of, collect_inputs, new_run_context,
                                       prepare_state)
from takeup.pipeline.warehouse import connect
from takeup.schemas.config import StudyConfig, parse_config

__all__ = ["monitor_flow", "run_orchestrated", "AsTasks", "publish_task"]


@task(name="collect-inputs", cache_policy=NO_CACHE)
def collect_task(warehouse: str, as_of: str | None, config_json: str | None, flow_run_id: str | None,
                 owner: dict | None = None) -> tuple[RunContext, RunInputs]:
    import json
    con = connect(warehouse)
    try:
        config = parse_config(json.loads(config_json)) if config_json else core.resolve_config(con, None)
        ctx = new_run_context(config, as_of=date.fromisoformat(as_of) if as_of else None,
                              mode="orchestrated", flow_run_id=flow_run_id)
        writer.start_run(con, ctx, owner)
        try:
            prepare_state(con, ctx.config)
            return ctx, collect_inputs(con, ctx)
        except BaseException as exc:
            writer.finish_run(con, ctx, "failed", None, {}, f"{type(exc).__name__}: {exc}")
            raise
    finally:
        con.close()


@task(name="start-run", cache_policy=NO_CACHE)
def start_task(warehouse: str, as_of: str | None, config: StudyConfig, flow_run_id: str | None,
               owner: dict | None = None) -> RunContext:
    con = connect(warehouse)
    try:
        ctx = new_run_context(config, as_of=date.fromisoformat(as_of) if as_of else None,
                              mode="orchestrated", flow_run_id=flow_run_id)
        pooled_inputs.refuse_local_records(con, warehouse, "a run of a sharded study")
        writer.start_run(con, ctx, owner)
        return ctx
    finally:
        con.close()


@task(name="collect-shard", cache_policy=NO_CACHE)
def shard_task(path: str, label: str, ctx: RunContext) -> MomentsPackage:
    """One shard's aggregates, computed where the task runs (a Dask worker opens the shard read-only)."""
    return pooled_inputs.collect_shard(path, label, ctx)


@task(name="pool-shards", cache_policy=NO_CACHE)
def pool_task(warehouse: str, ctx: RunContext, packages: list[MomentsPackage]) -> RunInputs:
    con = connect(warehouse)
    try:
        inputs = pooled_inputs.pool(con, ctx, packages)
        pooled_inputs.record_sources(con, ctx, pooled_inputs.sources_of(packages, shards=True))
        return inputs
    finally:
        con.close()


def _collect_sharded(warehouse: str, as_of: str | None, config: StudyConfig, flow_run_id: str | None
                     ) -> tuple[RunContext, RunInputs]:
    """Start the run, collect every shard as its own task (in parallel on the runner), pool them centrally."""
    ctx = start_task(warehouse, as_of, config, flow_run_id, process_owner())
    try:
        locations = pooled_inputs.shard_locations(config, warehouse)
        futures = shard_task.map([p for _, p in locations], [label for label, _ in locations], ctx=unmapped(ctx))
        packages = [f.result() for f in futures]
        return ctx, pool_task(warehouse, ctx, packages)
    except BaseException as exc:
        con = connect(warehouse)
        try:
            writer.finish_run(con, ctx, "failed", None, {}, f"{type(exc).__name__}: {exc}")
        finally:
            con.close()
        raise


def _flow_config(warehouse: str, config_json: str | None) -> StudyConfig:
    import json
    if config_json:
        return parse_config(json.loads(config_json))
    con = connect(warehouse, read_only=True)
    try:
        return core.resolve_config(con, None)
    finally:
        con.close()


@task(name="write-results", cache_policy=NO_CACHE)
def write_task(warehouse: str, ctx: RunContext, results: writer.RunResults, inputs: RunInputs, timings: dict):
    con = connect(warehouse)
    try:
        with core.timed(timings, "write"):
            counts = writer.write_results(con, ctx, results)
        status, message = "ok", None
        writer.finish_run(con, ctx, status, inputs, timings, message)
        return writer.summarise(ctx, status, inputs, counts, results.alerts, timings, message)
    except BaseException as exc:
        writer.finish_run(con, ctx, "failed", inputs, timings, f"{type(exc).__name__}: {exc}")
        raise
    finally:
        con.close()


@task(name="publish", cache_policy=NO_CACHE)
def publish_task(warehouse: str) -> dict:
    """Publish finished runs to the study's [publish] targets; never fails the flow.

    Each attempt (failures too) is recorded in the warehouse's `publications`
    table; a failure is logged as a warning and retried by the next publication.
    """
    from prefect import get_run_logger
    from takeup.pipeline.outputs.publish.attempts import publish_warehouse
    try:
        outcome = publish_warehouse(warehouse, require_targets=False)
    except Exception as exc:  # the run is finished and stays ok whatever happens here
        get_run_logger().warning("publication failed: %s; the next 'takeup publish' retries it",
                                 str(exc).splitlines()[0] if str(exc) else type(exc).__name__)
        return {"failed": 1, "attempts": 0}
    for a in outcome.failed:
        get_run_logger().warning("publication of run %s to %s failed: %s", a.run_id, a.target, a.message)
    return {"failed": len(outcome.failed), "attempts": len(outcome.attempts)}


class AsTasks:
    """A :class:`~takeup.pipeline.run.stages.StageCaller` that runs each stage's function as a Prefect task."""

    def __init__(self, stages: Sequence[core.Stage]):
        self._tasks = {s.name: task(s.function, name=s.task_name, cache_policy=NO_CACHE) for s in stages}

    def one(self, stage: core.Stage, *args: Any) -> Any:
        return self._tasks[stage.name](*args)


@flow(name="takeup-monitor", log_prints=False)
def monitor_flow(warehouse: str, as_of: str | None = None, config_json: str | None = None):
    """Compute and write one monitoring run (see :mod:`takeup.pipeline.run.stages`)."""
    flow_run_id = str(runtime_flow_run.id) if runtime_flow_run.id else None
    timings: dict = {}
    config = _flow_config(warehouse, config_json)
    with core.timed(timings, "collect_inputs"):
        if config.shards:
            ctx, inputs = _collect_sharded(warehouse, as_of, config, flow_run_id)
        else:
            ctx, inputs = collect_task(warehouse, as_of, config_json, flow_run_id, process_owner())
    try:
        stages = core.STAGES
        results = core.compute_all(inputs, ctx, timings, call=AsTasks(stages), stages=stages)
    except BaseException as exc:
        con = connect(warehouse)
        try:
            writer.finish_run(con, ctx, "failed", inputs, timings, f"{type(exc).__name__}: {exc}")
        finally:
            con.close()
        raise
    summary = write_task(warehouse, ctx, results, inputs, timings)
    if summary.status == "ok":
        publish_task(warehouse)
    return summary


def run_orchestrated(warehouse: Path | str, as_of: date | None = None, config: StudyConfig | None = None,
                     runner: str | None = None, dask_address: str | None = None):
    """Execute :func:`monitor_flow` through Prefect with the chosen task runner.

    Against the server in ``PREFECT_API_URL`` when it is set (checked first:
    :func:`takeup.flows.api_server.check_configured_api`), else Prefect's ephemeral API.
    """
    check_configured_api()
    cfg_for_runner = config
    con = connect(warehouse, read_only=False)
    try:
        check_as_of(con, as_of)            # a usage error, before any task (and its retries) starts
        if cfg_for_runner is None:
            cfg_for_runner = core.resolve_config(con, None)
    finally:
        con.close()
    task_runner = make_task_runner(cfg_for_runner, runner, dask_address)
    f = monitor_flow.with_options(task_runner=task_runner)
    return f(str(warehouse), as_of.isoformat() if as_of else None,
             config.canonical_json() if config is not None else None)
