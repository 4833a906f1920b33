"""One monitoring run: read aggregates, estimate, pool, follow trends, raise alerts, write.

The run is an ordered list of stages, :data:`STAGES`, defined here once.  Each
entry names a plain function; the in-process runner (:func:`run_monitoring`)
calls the functions directly, the Prefect flow (``takeup.flows.monitor``)
wraps each as a task.  Both go through :func:`compute_all`, which times every
stage under its name.

1. ``collect_inputs`` — :func:`takeup.pipeline.run.inputs.collect_inputs`, every SQL
   aggregation (the only read; done by the runner, which owns the connection);
2. ``site_estimates`` — :func:`compute_site_rows`, per-site estimates from moments
   (vectorised over sites);
3. ``adjusted`` — :func:`compute_adjusted_rows`, optional covariate-adjusted IV for all sites
   from the moments that ``collect_inputs`` aggregated;
4. ``pooling`` — :func:`compute_pooled`, pooled estimates, subgroup tests, influence;
5. ``sequential`` — :func:`takeup.pipeline.run.sequence_rows.add_sequences`, the anytime-valid
   columns of site and pooled rows (running intersection with the previous run);
6. ``precision`` — :func:`takeup.pipeline.run.sequence_rows.precision_rows`, minimum detectable
   effects and forecasts;
7. ``trends`` — :func:`takeup.pipeline.run.trend_rows.compute_trends`;
8. ``alerts`` — :func:`takeup.pipeline.run.alert_rules.compute_alerts`;
9. ``write`` — :func:`takeup.pipeline.run.writer.write_results`, every result table of
   the run in one transaction (done by the runner).
"""

from __future__ import annotations

import time
from contextlib import contextmanager
from dataclasses import dataclass
from datetime import date, datetime
from pathlib import Path
from typing import Any, Callable, Iterator, Protocol, Sequence

import duckdb

from takeup.pipeline.run.alert_rules import compute_alerts
from takeup.pipeline.run.inputs import (RunContext, RunInputs, check_as_of, collect_inputs, new_run_context,
                                       prepare_state)
from takeup.pipeline.run.pooled_inputs import gather_inputs, record_sources
from takeup.pipeline.run.pooled_rows import pool_outcome
from takeup.pipeline.run.sequence_rows import add_sequences, precision_rows
from takeup.pipeline.run.sample_sql import cluster_moments_for_outcome, moments_for_outcome
from takeup.pipeline.run.site_rows import adjusted_row, complier_profile_rows, estimate_sites, is_primary
from takeup.pipeline.run.stratified_rows import stratified_profile_rows, stratify_outcome_rows
from takeup.pipeline.run.trend_rows import compute_trends
from takeup.pipeline.run.writer import RunResults, RunSummary, finish_run, start_run, summarise, write_results
from takeup.pipeline.stats.estimators.adjusted import adjusted_estimates
from takeup.pipeline.warehouse import connect, stored_config
from takeup.schemas.config import StudyConfig

__all__ = ["Stage", "STAGES", "StageCaller", "InProcess", "compute_all", "timed", "run_monitoring",
           "compute_site_rows", "compute_adjusted_rows", "compute_pooled", "resolve_config"]


# ----------------------------------------------------------------------------- stage functions
def compute_site_rows(inputs: RunInputs, ctx: RunContext) -> tuple[list[dict], list[dict]]:
    """``site_estimates`` and ``complier_profile`` rows for every outcome.

    Sites without strata get an ``unadjusted`` row; sites with two or more strata a
    ``stratified`` row (their primary row) and an ``unstratified`` one for comparison.
    """
    sites = list(inputs.sites)
    strat_sites = inputs.stratified_sites
    rows: list[dict] = []
    for outcome in inputs.outcomes:
        table = moments_for_outcome(inputs.moments, outcome, sites)
        clusters = (cluster_moments_for_outcome(inputs.clusters, outcome, sites)
                    if inputs.clusters is not None else None)
        out = estimate_sites(table, ctx.config, ctx.run_id, clusters=clusters)
        if strat_sites:
            out = stratify_outcome_rows(out, table, inputs.stratum_moments, inputs.stratum_clusters, ctx.config,
                                        ctx.run_id, strat_sites)
        rows.extend(out)
    profile = complier_profile_rows(inputs.covariate_cells, inputs.sites, list(ctx.config.covariates), ctx.run_id)
    if strat_sites:
        profile = stratified_profile_rows(profile, inputs.stratum_covariate_cells, inputs.sites,
                                          list(ctx.config.covariates), strat_sites, ctx.run_id)
    return rows, profile


def compute_adjusted_rows(inputs: RunInputs, ctx: RunContext, site_rows: list[dict]) -> list[dict]:
    """``covariate_adjusted`` rows for every site x outcome, vectorised over sites (from moments)."""
    base = {(r["site_id"], r["outcome"]): r for r in site_rows if is_primary(r)}
    rows = []
    for outcome, moments in inputs.adjusted.items():
        est = adjusted_estimates(moments.cross, moments.scores, level=ctx.config.estimation.level)
        strata = moments.cross.n_strata
        for j, site in enumerate(moments.sites):
            if (site, outcome) in base:
                row = adjusted_row(base[(site, outcome)], est, j, ctx.run_id)
                if strata is not None and strata[j] > 1:
                    row["note"] = "; ".join(x for x in (row["note"], f"within the site's {int(strata[j])} "
                                                        "randomisation strata (stratum fixed effects)") if x)
                rows.append(row)
    return rows


def compute_pooled(inputs: RunInputs, ctx: RunContext, site_rows: list[dict]
                   ) -> tuple[list[dict], list[dict], list[dict]]:
    """``pooled_estimates``, ``subgroup_tests`` and ``site_influence`` rows for every outcome."""
    groups = {s.site_id: s.group for s in ctx.config.sites}
    pooled, subgroup, influence = [], [], []
    sites = list(inputs.sites)
    for outcome in inputs.outcomes:
        rows = [r for r in site_rows if r["outcome"] == outcome and is_primary(r)]
        table = moments_for_outcome(inputs.moments, outcome, sites)
        p, s, i = pool_outcome(ctx.run_id, outcome, rows, table.moments, sites, ctx.config, groups)
        pooled += p
        subgroup += s
        influence += i
    return pooled, subgroup, influence


# ----------------------------------------------------------------------------- the stage list
class StageCaller(Protocol):
    """How a stage's function is executed: directly (:class:`InProcess`) or as a Prefect task."""

    def one(self, stage: "Stage", *args: Any) -> Any:
        """Call the stage's function once and return its value."""


@dataclass(frozen=True)
class Stage:
    """One entry of :data:`STAGES`.

    ``function`` is the plain computation (what a flow wraps as a task, named
    ``task_name``); ``apply`` feeds it from the run's inputs and earlier rows and
    stores what it returns in the :class:`RunResults`.
    """

    name: str
    task_name: str
    function: Callable[..., Any]
    apply: Callable[["Stage", StageCaller, RunInputs, RunContext, RunResults], None]


def _apply_site_rows(stage, call, inputs, ctx, res):
    res.site_estimates, res.complier_profile = call.one(stage, inputs, ctx)


def _apply_adjusted(stage, call, inputs, ctx, res):
    res.site_estimates = res.site_estimates + call.one(stage, inputs, ctx, res.site_estimates)


def _apply_pooled(stage, call, inputs, ctx, res):
    res.pooled_estimates, res.subgroup_tests, res.site_influence = call.one(stage, inputs, ctx, res.site_estimates)


def _apply_sequences(stage, call, inputs, ctx, res):
    res.site_estimates, res.pooled_estimates = call.one(stage, inputs, ctx, res.site_estimates, res.pooled_estimates)


def _apply_precision(stage, call, inputs, ctx, res):
    res.precision_forecasts = call.one(stage, inputs, ctx, res.site_estimates, res.pooled_estimates)


def _apply_trends(stage, call, inputs, ctx, res):
    res.uptake_trends, res.drift = call.one(stage, inputs, ctx)


def _apply_alerts(stage, call, inputs, ctx, res):
    res.alerts = call.one(stage, inputs, ctx, res.site_estimates, res.pooled_estimates, res.site_influence,
                          res.drift)


#: The run's computing stages, in order (collect and write, which touch the warehouse, are the runner's).
STAGES: tuple[Stage, ...] = (
    Stage("site_estimates", "site-estimates", compute_site_rows, _apply_site_rows),
    Stage("adjusted", "covariate-adjusted", compute_adjusted_rows, _apply_adjusted),
    Stage("pooling", "pooling", compute_pooled, _apply_pooled),
    Stage("sequential", "anytime-valid-sequences", add_sequences, _apply_sequences),
    Stage("precision", "precision-forecasts", precision_rows, _apply_precision),
    Stage("trends", "trends", compute_trends, _apply_trends),
    Stage("alerts", "alerts", compute_alerts, _apply_alerts),
)


class InProcess:
    """Run every stage function directly in this process."""

    def one(self, stage: Stage, *args: Any) -> Any:
        return stage.function(*args)


@contextmanager
def timed(timings: dict, name: str) -> Iterator[None]:
    """Record the wall time of the block in ``timings[name]`` (seconds, 4 decimals)."""
    t = time.perf_counter()
    try:
        yield
    finally:
        timings[name] = round(time.perf_counter() - t, 4)


def compute_all(inputs: RunInputs, ctx: RunContext, timings: dict, call: StageCaller | None = None,
                stages: Sequence[Stage] | None = None) -> RunResults:
    """Every computing stage of :data:`STAGES`, in order, each timed under its name."""
    call = call or InProcess()
    res = RunResults()
    for stage in (STAGES if stages is None else stages):
        if stage.name == "adjusted" and not inputs.adjusted:
            continue
        with timed(timings, stage.name):
            stage.apply(stage, call, inputs, ctx, res)
    return res


# ----------------------------------------------------------------------------- in-process runner
def resolve_config(con: duckdb.DuckDBPyConnection, config: StudyConfig | None) -> StudyConfig:
    return config or stored_config(con) or StudyConfig()


def run_monitoring(warehouse: Path | str, as_of: date | None = None, config: StudyConfig | None = None,
                   data_cutoff: datetime | None = None) -> RunSummary:
    """Compute one run in process (no orchestration API) and write it."""
    con = connect(warehouse)
    try:
        check_as_of(con, as_of)
        ctx = new_run_context(resolve_config(con, config), as_of=as_of, data_cutoff=data_cutoff)
        timings: dict = {}
        start_run(con, ctx)
        inputs = None
        try:
            with timed(timings, "collect_inputs"):
                if not ctx.config.shards:
                    prepare_state(con, ctx.config)      # the participant state of this warehouse's records
                inputs, sources = gather_inputs(con, ctx, warehouse)   # one warehouse, or the study's shards
            if sources is not None:
                record_sources(con, ctx, sources)
            results = compute_all(inputs, ctx, timings)
            with timed(timings, "write"):
                counts = write_results(con, ctx, results)
        except BaseException as exc:
            try:
                finish_run(con, ctx, "failed", inputs, timings, f"{type(exc).__name__}: {exc}")
            except Exception:     # the warehouse cannot take even that (disk full): the next run marks it abandoned
                pass
            raise
        status, message = "ok", None
        finish_run(con, ctx, status, inputs, timings, message)
        return summarise(ctx, status, inputs, counts, results.alerts, timings, message)
    finally:
        con.close()
