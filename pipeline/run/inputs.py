"""Everything a monitoring run reads from the warehouse, gathered in one stage.

:func:`collect_inputs` runs the SQL aggregations (DuckDB does the heavy
lifting) and returns a :class:`RunInputs` of small pandas frames.  All later
stages (site estimates, pooling, trends, alerts) are pure functions of it,
so in an orchestrated run they can execute anywhere — in threads or on Dask
workers — while only the final write touches the warehouse again.
"""

from __future__ import annotations

import hashlib
import secrets
from dataclasses import dataclass, field, replace
from datetime import date, datetime, timedelta, timezone

import duckdb
import numpy as np
import pandas as pd

from takeup.pipeline.batch_activity import site_activity
from takeup.pipeline.participant_state import basis_for, refresh_state
from takeup.pipeline.run.drift_limits import load_limits
from takeup.pipeline.run.adjusted_sql import AdjustedMoments, adjusted_moments
from takeup.pipeline.run.strata_sql import collect_strata
from takeup.pipeline.run.sample_sql import (SampleSpec, build_participants, cluster_moments, covariate_cells,
                                            site_outcome_period_moments,
                                            drop_sample, outcome_names, site_outcome_moments)
from takeup.schemas.config import StudyConfig

from takeup.pipeline.errors import OptionError

__all__ = ["RunContext", "RunInputs", "CentralState", "CENTRAL_STATE_FIELDS", "new_run_context", "collect_inputs",
           "collect_aggregates", "central_state", "with_central_state", "input_fingerprint", "check_as_of",
           "AS_OF_MARGIN_DAYS", "prepare_state"]

#: a cutoff may lie at most this many days after the later of today and the latest record date
AS_OF_MARGIN_DAYS = 366


def check_as_of(con: duckdb.DuckDBPyConnection, as_of: date | None, today: date | None = None) -> None:
    """Refuse a cutoff outside the data's range plus a margin (:class:`OptionError`, a usage error).

    The trends cover every period from the first assignment to the cutoff, so a mistyped
    year would make a run compute (and store) decades of empty periods; a cutoff before the
    first assignment has nothing to estimate.
    """
    if as_of is None:
        return
    today = today or datetime.now(timezone.utc).date()
    first, last = con.execute("""
        SELECT (SELECT min(assigned_on) FROM assignments),
               greatest((SELECT max(assigned_on) FROM assignments), (SELECT max(observed_on) FROM uptake_events),
                        (SELECT max(measured_on) FROM outcome_measurements))
    """).fetchone()
    upper = max(last or today, today) + timedelta(days=AS_OF_MARGIN_DAYS)
    if as_of > upper:
        basis = f"the latest record is dated {last}" if last else "the warehouse holds no records yet"
        raise OptionError(f"--as-of {as_of} is too far ahead: {basis}; a cutoff may be at most {AS_OF_MARGIN_DAYS} "
                          f"days after the later of today and that date (up to {upper})")
    if first is not None and as_of < first:
        raise OptionError(f"--as-of {as_of} is before the first assignment ({first}): nothing would be estimated")


@dataclass(frozen=True)
class RunContext:
    """Identity of one run (serialisable: dates, strings and the config model)."""

    run_id: str
    as_of: date
    started_at: datetime          # UTC, naive
    data_cutoff: datetime         # batches received after this are not read (reproducibility)
    config: StudyConfig
    mode: str = "in_process"
    flow_run_id: str | None = None

    @property
    def config_hash(self) -> str:
        return self.config.config_hash()


def new_run_context(config: StudyConfig, as_of: date | None = None, mode: str = "in_process",
                    flow_run_id: str | None = None, data_cutoff: datetime | None = None) -> RunContext:
    now = datetime.now(timezone.utc).replace(tzinfo=None)
    run_id = f"r{now:%Y%m%dT%H%M%S%f}-{secrets.token_hex(3)}"
    return RunContext(run_id=run_id, as_of=as_of or now.date(), started_at=now,
                      data_cutoff=data_cutoff or now, config=config, mode=mode, flow_run_id=flow_run_id)


@dataclass(frozen=True)
class RunInputs:
    """Aggregates read from the warehouse for one run."""

    sites: tuple[str, ...]                 # sites with at least one assignment by the cutoff
    outcomes: tuple[str, ...]
    moments: pd.DataFrame                  # site x outcome x arm (see sample_sql.site_outcome_moments)
    clusters: pd.DataFrame | None          # site x outcome x cluster x arm (cluster randomisation only)
    covariate_cells: pd.DataFrame          # site x covariate x (z, d)
    cohort_counts: pd.DataFrame            # site x arm x cohort period: n_assigned, n_observed, n_taken_up
    calendar_counts: pd.DataFrame          # site x arm x calendar period: n_assigned, n_observed, n_taken_up (cumulative)
    site_activity: pd.DataFrame            # site_id, last_record_on, last_received_at, n_batches
    previous_alerts: pd.DataFrame          # the previous finished run's alerts (all columns)
    previous_run_id: str | None
    n_batches: int
    input_fingerprint: str
    adjusted: dict[str, AdjustedMoments] = field(default_factory=dict)   # outcome -> sums; covariate-adjusted rows
    cluster_cohort_counts: pd.DataFrame | None = None  # site x arm x cohort period x cluster (cluster randomisation)
    previous_sequences: pd.DataFrame = field(default_factory=pd.DataFrame)         # previous run's site sequences
    previous_pooled_sequences: pd.DataFrame = field(default_factory=pd.DataFrame)  # and its pooled ones
    cohort_origin: date | None = None     # first day of the first trend period (None: no participants)
    # randomisation strata (only sites with two or more strata; see run/strata_sql.py)
    stratum_moments: pd.DataFrame = field(default_factory=pd.DataFrame)   # site x outcome x stratum x arm
    stratum_clusters: pd.DataFrame | None = None   # site x outcome x stratum x cluster x arm (cluster randomisation)
    stratum_counts: pd.DataFrame = field(default_factory=pd.DataFrame)    # site x stratum x arm: assigned, clusters,
                                                                          # declared probability
    stratum_covariate_cells: pd.DataFrame = field(default_factory=pd.DataFrame)  # site x stratum x covariate x (z, d)
    drift_limits: pd.DataFrame = field(default_factory=pd.DataFrame)     # drift-chart limits stored by earlier runs

    @property
    def stratified_sites(self) -> tuple[str, ...]:
        """Sites with two or more strata (their primary rows are stratified)."""
        if self.stratum_counts is None or self.stratum_counts.empty:
            return ()
        return tuple(sorted(self.stratum_counts.site_id.astype(str).unique()))


#: the fields of :class:`RunInputs` read from the warehouse that *stores results* (the alert lifecycle, the
#: running intersection of the sequences and the drift-chart limits already computed), not from the
#: participant records; every other field is an aggregate of the records (see :func:`collect_aggregates`)
CENTRAL_STATE_FIELDS = ("previous_alerts", "previous_run_id", "previous_sequences", "previous_pooled_sequences",
                        "drift_limits")


@dataclass(frozen=True)
class CentralState:
    """What a run reads from earlier runs: the previous finished run's alerts and sequence state, and the
    drift-chart limits computed so far (:mod:`takeup.pipeline.run.drift_limits`)."""

    previous_alerts: pd.DataFrame
    previous_run_id: str | None
    previous_sequences: pd.DataFrame
    previous_pooled_sequences: pd.DataFrame
    drift_limits: pd.DataFrame


def input_fingerprint(con: duckdb.DuckDBPyConnection, data_cutoff: datetime) -> tuple[str, int]:
    rows = con.execute("SELECT sha256 FROM batches WHERE status = 'loaded' AND received_at <= $c ORDER BY sha256",
                       {"c": data_cutoff}).fetchall()
    h = hashlib.sha256()
    for (s,) in rows:
        h.update(s.encode())
    return h.hexdigest(), len(rows)


def _period_start_sql(col: str, start_param: str = "$origin") -> str:
    """First day of the ``$period_days`` period containing ``col``, counted from ``$origin``."""
    return (f"({start_param} + to_days(CAST(floor(date_diff('day', {start_param}, {col}) / $period_days) "
            f"* $period_days AS INTEGER)))")


def _cohort_origin(con: duckdb.DuckDBPyConnection, ctx: RunContext) -> date | None:
    origin = con.execute("SELECT min(assigned_on) FROM _participants").fetchall()[0][0]
    # align periods to the Monday on or before the first assignment when weekly
    if origin is not None and ctx.config.trends.period_days == 7:
        origin = origin - timedelta(days=origin.weekday())
    return origin


def _cluster_cohort_counts(con: duckdb.DuckDBPyConnection, ctx: RunContext, origin: date | None) -> pd.DataFrame:
    """Cohort counts per site x arm x period x cluster (cluster randomisation: cluster-level tests)."""
    cols = ["site_id", "z", "period_start", "cluster_id", "n_assigned", "n_observed", "n_taken_up"]
    if origin is None:
        return pd.DataFrame(columns=cols)
    return con.execute(f"""
        SELECT site_id, z, CAST({_period_start_sql('assigned_on')} AS DATE) AS period_start,
               coalesce(cluster_id, '') AS cluster_id,
               count(*) AS n_assigned, count(*) FILTER (WHERE uptake_observed) AS n_observed,
               CAST(sum(d) AS BIGINT) AS n_taken_up
        FROM _participants GROUP BY ALL ORDER BY ALL
    """, {"origin": origin, "period_days": ctx.config.trends.period_days}).df()


def _period_index_sql(col: str) -> str:
    """Index (0, 1, ...) of the ``$period_days`` period containing ``col``, counted from ``$origin``
    (dates on or after the origin; integer day arithmetic, no per-row date construction)."""
    return f"(({col} - CAST($origin AS DATE)) // $period_days)"


def _period_starts(index: pd.Series, origin: date, period: int) -> pd.Series:
    """First day of each period index, as the DATE column DuckDB would have returned."""
    days = index.to_numpy(dtype="int64") * period
    return pd.Series(np.datetime64(origin, "D") + days.astype("timedelta64[D]"), index=index.index).astype(
        "datetime64[us]")


def _trend_counts(con: duckdb.DuckDBPyConnection, ctx: RunContext, origin: date | None,
                  cohort_periods: pd.DataFrame | None = None) -> tuple[pd.DataFrame, pd.DataFrame]:
    """Cohort counts per site x arm x period and the calendar basis.

    The cohort counts are each period's assignments, uptake reports and uptakes: taken from
    ``cohort_periods`` when the run already has them (the per-period moments of one outcome,
    :func:`~takeup.pipeline.run.sample_sql.site_outcome_period_moments`), otherwise from one scan
    of the participants.  The calendar basis needs in addition the per-period counts of first
    uptake reports and first reports of uptake (one more scan), cumulated over the (small) period
    grid: no participant x period join.  Periods are grouped by their integer index and turned
    into dates on the small result.
    """
    period = ctx.config.trends.period_days
    cols = ["site_id", "z", "period_start", "n_assigned", "n_observed", "n_taken_up"]
    if origin is None:
        empty = pd.DataFrame(columns=cols)
        return empty, empty.copy()
    params = {"origin": origin, "period_days": period}
    if cohort_periods is not None:
        cohort = pd.DataFrame({
            "site_id": cohort_periods["site_id"], "z": cohort_periods["z"].astype("int32"),
            "period_index": cohort_periods["period_index"],
            "n_assigned": cohort_periods["n_assigned"].astype("int64"),
            "n_observed": cohort_periods["n_uptake_observed"].astype("int64"),
            "n_taken_up": cohort_periods["sum_d_assigned"].round().astype("int64")})
        cohort = cohort.sort_values(["site_id", "z", "period_index"]).reset_index(drop=True)
    else:
        cohort = con.execute(f"""
            SELECT site_id, z, {_period_index_sql('assigned_on')} AS period_index,
                   count(*) AS n_assigned, count(*) FILTER (WHERE uptake_observed) AS n_observed,
                   CAST(sum(d) AS BIGINT) AS n_taken_up
            FROM _participants GROUP BY ALL ORDER BY ALL
        """, params).df()
    firsts = con.execute(f"""
        SELECT site_id, z, {_period_index_sql('first_obs')} AS period_index, 0 AS n_assigned, count(*) AS n_observed,
               0 AS n_taken_up
        FROM _participants WHERE first_obs IS NOT NULL GROUP BY ALL
        UNION ALL
        SELECT site_id, z, {_period_index_sql('first_yes')}, 0, 0, count(*)
        FROM _participants WHERE first_yes IS NOT NULL GROUP BY ALL
    """, params).df()
    index_cols = ["site_id", "z", "period_index", *cols[3:]]
    events = pd.concat([cohort[index_cols[:4]].assign(n_observed=0, n_taken_up=0), firsts[index_cols]],
                       ignore_index=True)
    calendar = _cumulate_calendar(events, origin, ctx.as_of, period)
    cohort.insert(2, "period_start", _period_starts(cohort.pop("period_index"), origin, period))
    return cohort, calendar


def _cumulate_calendar(events: pd.DataFrame, origin: date, as_of: date, period: int) -> pd.DataFrame:
    """Cumulative counts per site x arm on the regular period grid from ``origin`` to ``as_of``.

    ``events`` holds per-period counts by integer ``period_index``; the series are the site x arm
    pairs with an event on the grid, cumulated along the grid (a series x periods array), and
    only periods with at least one participant assigned so far are kept.
    """
    cols = ["site_id", "z", "period_start", "n_assigned", "n_observed", "n_taken_up"]
    n_grid = (as_of - origin).days // period + 1
    ev = events[(events["period_index"] >= 0) & (events["period_index"] < n_grid)]
    if ev.empty:
        return pd.DataFrame(columns=cols)
    pairs = ev[["site_id", "z"]].drop_duplicates().sort_values(["site_id", "z"]).reset_index(drop=True)
    series = pd.MultiIndex.from_frame(pairs).get_indexer(pd.MultiIndex.from_frame(ev[["site_id", "z"]]))
    cell = series * n_grid + ev["period_index"].to_numpy(dtype=np.int64)
    counts = {}
    for col in cols[3:]:
        total = np.bincount(cell, weights=ev[col].to_numpy(dtype=float), minlength=len(pairs) * n_grid)
        counts[col] = np.cumsum(total.reshape(len(pairs), n_grid), axis=1).round().astype("int64").ravel()
    grid_dates = [origin + timedelta(days=period * k) for k in range(n_grid)]
    out = pd.DataFrame({"site_id": np.repeat(pairs["site_id"].to_numpy(), n_grid),
                        "z": np.repeat(pairs["z"].to_numpy(), n_grid),
                        "period_start": np.array(grid_dates * len(pairs), dtype=object), **counts})
    out = out[out["n_assigned"] > 0].reset_index(drop=True)
    out["site_id"] = out["site_id"].astype(events["site_id"].dtype)
    return out


def _site_activity(con: duckdb.DuckDBPyConnection, ctx: RunContext) -> pd.DataFrame:
    return site_activity(con, ctx.as_of, ctx.data_cutoff)


def _previous_alerts(con: duckdb.DuckDBPyConnection, ctx: RunContext) -> tuple[str | None, pd.DataFrame]:
    prev = con.execute("SELECT run_id FROM runs WHERE status IN ('ok', 'partial') AND started_at < $t "
                       "ORDER BY started_at DESC, run_id DESC LIMIT 1", {"t": ctx.started_at}).fetchone()
    if prev is None:
        return None, con.execute("SELECT * FROM alerts WHERE FALSE").df()
    return prev[0], con.execute("SELECT * FROM alerts WHERE run_id = $r", {"r": prev[0]}).df()


_SITE_SEQUENCE_COLUMNS = ("site_id", "outcome", "spec", "look", "cs_itt_low", "cs_itt_high", "cs_complier_share_low",
                          "cs_complier_share_high", "cs_cace_set", "cs_cace_low", "cs_cace_high")
_POOLED_SEQUENCE_COLUMNS = ("outcome", "quantity", "look", "cs_low", "cs_high")


def _previous_sequences(con: duckdb.DuckDBPyConnection, prev_id: str | None) -> tuple[pd.DataFrame, pd.DataFrame]:
    """The previous finished run's sequence state (for the running intersection and the look count)."""
    site_cols = ", ".join(f'"{c}"' for c in _SITE_SEQUENCE_COLUMNS)
    pooled_cols = ", ".join(f'"{c}"' for c in _POOLED_SEQUENCE_COLUMNS)
    site = con.execute(f"SELECT {site_cols} FROM site_estimates WHERE run_id = $r AND look IS NOT NULL",
                       {"r": prev_id or ""}).df()
    pooled = con.execute(f"SELECT {pooled_cols} FROM pooled_estimates WHERE run_id = $r AND look IS NOT NULL "
                         "AND method = 'fixed' AND group_field IS NULL", {"r": prev_id or ""}).df()
    return site, pooled


def prepare_state(con: duckdb.DuckDBPyConnection, config: StudyConfig) -> str:
    """Bring ``participant_state`` up to date for ``config`` before a run reads (writable connection).

    Normally a no-op (ingestion keeps it current); after a change of the follow-up settings or
    outcome list it is rebuilt once.  See :mod:`takeup.pipeline.participant_state`.
    """
    return refresh_state(con, basis_for(con, config))


def central_state(con: duckdb.DuckDBPyConnection, ctx: RunContext) -> CentralState:
    """The previous finished run's alerts and sequence state, and the stored drift-chart limits
    (read from the results, not the records)."""
    prev_id, prev = _previous_alerts(con, ctx)
    prev_site_seq, prev_pooled_seq = _previous_sequences(con, prev_id)
    return CentralState(previous_alerts=prev, previous_run_id=prev_id, previous_sequences=prev_site_seq,
                        previous_pooled_sequences=prev_pooled_seq, drift_limits=load_limits(con))


def with_central_state(inputs: RunInputs, state: CentralState) -> RunInputs:
    """``inputs`` with the fields of :data:`CENTRAL_STATE_FIELDS` taken from ``state``."""
    return replace(inputs, **{name: getattr(state, name) for name in CENTRAL_STATE_FIELDS})


def collect_aggregates(con: duckdb.DuckDBPyConnection, ctx: RunContext) -> RunInputs:
    """Every SQL aggregation over the participant records (the fields of :data:`CENTRAL_STATE_FIELDS` are empty).

    Sums add: the aggregates of warehouses holding disjoint sets of sites combine into those of one
    warehouse holding them all (``pipeline/run/moments_package.py``).
    """
    config = ctx.config
    spec = SampleSpec.from_config(config, ctx.as_of, ctx.data_cutoff)
    outcomes = outcome_names(con, config)
    fingerprint, n_batches = input_fingerprint(con, ctx.data_cutoff)
    build_participants(con, spec, outcomes)
    try:
        sites = tuple(r[0] for r in con.execute("SELECT DISTINCT site_id FROM _participants ORDER BY 1").fetchall())
        origin = _cohort_origin(con, ctx)
        if outcomes and origin is not None:      # moments and cohort counts from one scan of the sample
            moments, per_period = site_outcome_period_moments(con, origin, config.trends.period_days)
            cohort, calendar = _trend_counts(con, ctx, origin, per_period[per_period.outcome == outcomes[0]])
        else:
            moments = site_outcome_moments(con)
            cohort, calendar = _trend_counts(con, ctx, origin)
        clusters = cluster_moments(con) if config.randomisation_unit == "cluster" else None
        cells = covariate_cells(con, spec, list(config.covariates))
        cluster_cohort = (_cluster_cohort_counts(con, ctx, origin) if config.randomisation_unit == "cluster"
                          else None)
        activity = _site_activity(con, ctx)
        strata = collect_strata(con, config.randomisation_unit == "cluster", list(config.covariates),
                                ctx.data_cutoff)
        adjusted = {}
        if config.estimation.adjust_covariates and config.covariates and outcomes:
            adjusted = adjusted_moments(con, list(sites), list(outcomes), list(config.covariates),
                                        config.randomisation_unit == "cluster", ctx.data_cutoff,
                                        within_strata=bool(strata.sites))
    finally:
        con.execute("DROP TABLE IF EXISTS _strata")
        drop_sample(con)
    return RunInputs(sites=sites, outcomes=tuple(outcomes), moments=moments, clusters=clusters,
                     covariate_cells=cells, cohort_counts=cohort, calendar_counts=calendar,
                     site_activity=activity, previous_alerts=pd.DataFrame(), previous_run_id=None,
                     n_batches=n_batches, input_fingerprint=fingerprint, adjusted=adjusted,
                     cluster_cohort_counts=cluster_cohort, cohort_origin=origin,
                     stratum_moments=strata.moments, stratum_clusters=strata.clusters,
                     stratum_counts=strata.counts, stratum_covariate_cells=strata.covariate_cells)


def collect_inputs(con: duckdb.DuckDBPyConnection, ctx: RunContext) -> RunInputs:
    """Run every SQL aggregation of the run and return the small frames.

    = :func:`collect_aggregates` (the participant records) + :func:`central_state` (earlier runs).
    """
    return with_central_state(collect_aggregates(con, ctx), central_state(con, ctx))
