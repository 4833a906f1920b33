"""The analysis sample and its sufficient statistics, computed in DuckDB.

Analysis sample as of a cutoff date (``$as_of``), using only batches loaded
at or before the run's data cutoff (``$data_cutoff``, a timestamp) so that a
run can be recomputed exactly later:

* assigned participants: ``assignments.assigned_on <= as_of``;
* uptake ``D`` = 1 when any uptake observation on or before the cutoff says
  ``took_up``, 0 when the reports say not taken up.  A participant with **no
  uptake report** by the cutoff (``uptake_observed`` false) is handled by the
  study's ``uptake_missing`` rule: ``complete_case`` (default) leaves them out
  of the uptake and outcome moments (``in_uptake`` false), the way a missing
  outcome is left out; ``not_taken_up`` counts them as ``D = 0`` (for
  programmes that record only positive uptake).  Either way they are counted
  (``uptake_missing_*``);
* outcome ``Y``: measurements of that outcome with
  ``min_days <= measured_on - assigned_on <= max_days`` and
  ``measured_on <= as_of``; with several, the study's ``follow_up.rule``
  picks the last (default), the first, or their mean.  Participants
  assigned at least ``min_days`` before the cutoff are *due* an outcome
  (``outcome_due``); those due without such a measurement have a missing
  outcome (``missing_outcome_*`` = due - measured).  The analysis sample of an
  outcome is the complete case: outcome measured and (under
  ``complete_case``) uptake reported.

Only aggregates leave DuckDB: one row per site x outcome x arm (and per
cluster cell, per covariate cell) — never participant rows.
"""

from __future__ import annotations

from dataclasses import dataclass
from datetime import date, datetime

import duckdb
import numpy as np
import pandas as pd

from takeup.pipeline.participant_state import StateBasis, state_is_current
from takeup.pipeline.stats.estimators.moments import ArmMoments, ClusterMoments, SiteMoments
from takeup.schemas.config import StudyConfig

__all__ = ["SampleSpec", "build_participants", "drop_sample", "site_outcome_moments", "cluster_moments", "covariate_cells",
           "outcome_names", "MomentTable", "moments_for_outcome"]


@dataclass(frozen=True)
class SampleSpec:
    as_of: date
    data_cutoff: datetime
    min_days: int
    max_days: int
    rule: str
    uptake_missing: str = "complete_case"
    uptake_window_days: int = 14

    @classmethod
    def from_config(cls, config: StudyConfig, as_of: date, data_cutoff: datetime) -> "SampleSpec":
        return cls(as_of, data_cutoff, config.follow_up.min_days, config.follow_up.max_days, config.follow_up.rule,
                   config.uptake_missing, config.trends.uptake_window_days)

    def params(self) -> dict:
        return {"as_of": self.as_of, "data_cutoff": self.data_cutoff}


_AGG = {"last": "arg_max(m.value, m.measured_on)", "first": "arg_min(m.value, m.measured_on)", "mean": "avg(m.value)"}


def outcome_names(con: duckdb.DuckDBPyConnection, config: StudyConfig) -> list[str]:
    """Declared outcomes, or (no declaration) every outcome name present in the warehouse."""
    if config.outcomes:
        return [o.name for o in config.outcomes]
    return [r[0] for r in con.execute("SELECT DISTINCT outcome FROM outcome_measurements ORDER BY 1").fetchall()]


def _batch_filter(con: duckdb.DuckDBPyConnection, spec: SampleSpec, alias: str) -> str:
    """SQL restricting ``alias`` to batches received by the data cutoff ('' when every batch is)."""
    later = con.execute("SELECT count(*) FROM batches WHERE received_at > $c", {"c": spec.data_cutoff}).fetchone()[0]
    if not later:
        return ""
    return (f" AND {alias}.batch_id IN (SELECT batch_id FROM batches WHERE status = 'loaded' "
            f"AND received_at <= $data_cutoff)")


def _build_from_records(con: duckdb.DuckDBPyConnection, spec: SampleSpec, outcomes: list[str],
                        keys: str | None = None, participants: str = "_participants", sample: str = "_sample") -> None:
    """Materialise the temp tables of the analysis sample from the record tables (the join).

    ``keys`` (a table of ``participant_key``) restricts it to those participants; ``participants``
    and ``sample`` name the tables made.

    ``_participants``: one row per assigned participant (site_id, participant_key, cluster_id,
    assigned_on, z, d, uptake_observed, in_uptake (enters the uptake moments under the study's
    ``uptake_missing`` rule), outcome_due (assigned at least ``min_days`` before the cutoff),
    first_obs, first_yes — the first uptake report and the first report of uptake, for the
    calendar trends).
    ``_sample``: one row per assigned participant x outcome (site_id, cluster_id, z, d,
    uptake_observed, in_uptake, outcome_due, outcome, y, assigned_on).

    Joins use ``participant_key`` alone: the pseudonym already encodes the site.
    """
    agg = _AGG[spec.rule]
    fa, fu, fo = (_batch_filter(con, spec, t) for t in ("t", "t", "t"))
    only = f" AND t.participant_key IN (SELECT participant_key FROM {keys})" if keys else ""
    con.execute(f"""
        CREATE OR REPLACE TEMP TABLE {participants} AS
        WITH u AS (
            SELECT t.participant_key, bool_or(t.took_up) AS took_up, min(t.observed_on) AS first_obs,
                   min(t.observed_on) FILTER (WHERE t.took_up) AS first_yes
            FROM uptake_events t WHERE t.observed_on <= $as_of{fu}{only}
            GROUP BY t.participant_key
        )
        SELECT t.site_id, t.participant_key, t.cluster_id, t.assigned_on,
               CASE WHEN t.arm = 'treatment' THEN 1 ELSE 0 END AS z,
               CASE WHEN coalesce(u.took_up, FALSE) THEN 1.0 ELSE 0.0 END AS d,
               u.took_up IS NOT NULL AS uptake_observed,
               (u.took_up IS NOT NULL OR NOT $complete_case) AS in_uptake,
               date_diff('day', t.assigned_on, $as_of) >= $min_days AS outcome_due,
               CASE WHEN u.first_obs IS NOT NULL THEN greatest(u.first_obs, t.assigned_on) END AS first_obs,
               CASE WHEN u.first_yes IS NOT NULL THEN greatest(u.first_yes, t.assigned_on) END AS first_yes
        FROM assignments t LEFT JOIN u USING (participant_key)
        WHERE t.assigned_on <= $as_of{fa}{only}
    """, {**(spec.params() if fa or fu else {"as_of": spec.as_of}),
          "complete_case": spec.uptake_missing == "complete_case", "min_days": spec.min_days})
    if not outcomes:
        con.execute(f"CREATE OR REPLACE TEMP TABLE {sample} AS SELECT site_id, participant_key, cluster_id, z, d, "
                    "uptake_observed, in_uptake, outcome_due, CAST(NULL AS VARCHAR) AS outcome, "
                    f"CAST(NULL AS DOUBLE) AS y, assigned_on FROM {participants} WHERE FALSE")
        return
    con.execute(f"""
        CREATE OR REPLACE TEMP TABLE {sample} AS
        WITH o AS (
            SELECT t.participant_key, t.outcome, {agg.replace('m.', 't.')} AS y
            FROM outcome_measurements t JOIN {participants} a USING (participant_key)
            WHERE t.measured_on <= $as_of{fo}
              AND date_diff('day', a.assigned_on, t.measured_on) BETWEEN $min_days AND $max_days
              AND list_contains($outcomes, t.outcome)
            GROUP BY t.participant_key, t.outcome
        ), names AS (SELECT unnest($outcomes) AS outcome)
        SELECT a.site_id, a.participant_key, a.cluster_id, a.z, a.d, a.uptake_observed, a.in_uptake,
               a.outcome_due, names.outcome, o.y, a.assigned_on
        FROM {participants} a CROSS JOIN names
        LEFT JOIN o ON o.participant_key = a.participant_key AND o.outcome = names.outcome
    """, {**(spec.params() if fo else {"as_of": spec.as_of}), "min_days": spec.min_days,
          "max_days": spec.max_days, "outcomes": list(outcomes)})


def drop_sample(con: duckdb.DuckDBPyConnection) -> None:
    """Drop the run's ``_sample`` / ``_participants`` (views or tables) and their helpers."""
    kinds = dict(con.execute("SELECT table_name, table_type FROM information_schema.tables "
                             "WHERE table_catalog = 'temp'").fetchall())
    for name in ("_sample", "_participants", "_sample_re", "_participants_re", "_inexact", "_cut"):
        if name in kinds:
            con.execute(f"DROP {'VIEW' if kinds[name] == 'VIEW' else 'TABLE'} {name}")


#: when more than this share of the assigned participants have records after the cutoff, the
#: sample is built from the records directly rather than from the state plus a recomputation
RECOMPUTE_SHARE = 0.5


def build_participants(con: duckdb.DuckDBPyConnection, spec: SampleSpec, outcomes: list[str]) -> str:
    """Make the temp relations of the analysis sample; returns ``"state"``, ``"state+records"`` or ``"records"``.

    ``_participants``: one row per assigned participant (site_id, participant_key, cluster_id,
    assigned_on, z, d, uptake_observed, in_uptake (enters the uptake moments under the study's
    ``uptake_missing`` rule), outcome_due (assigned at least ``min_days`` before the cutoff),
    first_obs, first_yes — the first uptake report and the first report of uptake, for the
    calendar trends).
    ``_sample``: one row per assigned participant x outcome (site_id, participant_key, cluster_id, z, d,
    uptake_observed, in_uptake, outcome_due, outcome, y, assigned_on).

    When ``participant_state`` is current for the run's follow-up basis, they are views over
    it: the participants whose records all lie within the cutoffs are read from the state (one
    scan), the others — records dated after ``as_of`` or received after ``data_cutoff`` — are
    recomputed from the record tables and appended.  Otherwise everything is computed
    from the record tables (the same rows either way).
    """
    drop_sample(con)
    basis = StateBasis(spec.min_days, spec.max_days, spec.rule, tuple(outcomes))
    if not state_is_current(con, basis):
        _build_from_records(con, spec, outcomes)
        return "records"
    con.execute("CREATE TEMP TABLE _cut AS SELECT CAST($as_of AS DATE) AS as_of, "
                "CAST($data_cutoff AS TIMESTAMP) AS data_cutoff, CAST($cc AS BOOLEAN) AS complete_case, "
                "CAST($min_days AS INTEGER) AS min_days",
                {**spec.params(), "cc": spec.uptake_missing == "complete_case", "min_days": spec.min_days})
    con.execute("CREATE TEMP TABLE _inexact AS SELECT s.participant_key FROM participant_state s, _cut c "
                "WHERE s.slot = 0 AND s.assigned_on <= c.as_of "
                "AND (s.last_event_on > c.as_of OR s.last_received_at > c.data_cutoff)")
    n_inexact, n_assigned = con.execute(
        "SELECT (SELECT count(*) FROM _inexact), (SELECT count(*) FROM participant_state s, _cut c "
        "WHERE s.slot = 0 AND s.assigned_on <= c.as_of)").fetchone()
    if n_inexact > RECOMPUTE_SHARE * n_assigned:
        drop_sample(con)
        _build_from_records(con, spec, outcomes)
        return "records"
    exact = ("FROM participant_state s, _cut c WHERE s.last_event_on <= c.as_of "
             "AND s.last_received_at <= c.data_cutoff")
    common = ("CASE WHEN coalesce(s.took_up, FALSE) THEN 1.0 ELSE 0.0 END AS d, "
              "s.took_up IS NOT NULL AS uptake_observed, (s.took_up IS NOT NULL OR NOT c.complete_case) AS in_uptake, "
              "date_diff('day', s.assigned_on, c.as_of) >= c.min_days AS outcome_due")
    participants = ("SELECT s.site_id, s.participant_key, s.cluster_id, s.assigned_on, CAST(s.z AS INTEGER) AS z, "
                    f"{common}, "
                    "CASE WHEN s.first_obs IS NOT NULL THEN greatest(s.first_obs, s.assigned_on) END AS first_obs, "
                    "CASE WHEN s.first_yes IS NOT NULL THEN greatest(s.first_yes, s.assigned_on) END AS first_yes "
                    f"{exact} AND s.slot = 0")
    sample = ("SELECT s.site_id, s.participant_key, s.cluster_id, CAST(s.z AS INTEGER) AS z, "
              f"{common}, s.outcome, s.y, s.assigned_on {exact}" + ("" if outcomes else " AND FALSE"))
    mode = "state"
    if n_inexact:
        _build_from_records(con, spec, outcomes, keys="_inexact", participants="_participants_re",
                            sample="_sample_re")
        participants += " UNION ALL SELECT * FROM _participants_re"
        sample += " UNION ALL SELECT * FROM _sample_re"
        mode = "state+records"
    con.execute(f"CREATE TEMP VIEW _participants AS {participants}")
    con.execute(f"CREATE TEMP VIEW _sample AS {sample}")
    return mode


#: the sums of :func:`site_outcome_moments` (SQL expressions over ``_sample``), in output order
_MOMENT_SUMS = (
    ("n_assigned", "count(*)"),
    ("sum_d_assigned", "sum(d)"),
    ("n_uptake_observed", "count(*) FILTER (WHERE uptake_observed)"),
    ("n_first_stage", "count(*) FILTER (WHERE in_uptake)"),
    ("sum_d_first_stage", "coalesce(sum(d) FILTER (WHERE in_uptake), 0)"),
    ("n_due", "count(*) FILTER (WHERE outcome_due)"),
    ("n_measured", "count(y)"),
    ("n", "count(y) FILTER (WHERE in_uptake)"),
    ("sum_d", "coalesce(sum(d) FILTER (WHERE y IS NOT NULL AND in_uptake), 0)"),
    ("sum_y", "coalesce(sum(y) FILTER (WHERE in_uptake), 0)"),
    ("sum_dd", "coalesce(sum(d * d) FILTER (WHERE y IS NOT NULL AND in_uptake), 0)"),
    ("sum_yy", "coalesce(sum(y * y) FILTER (WHERE in_uptake), 0)"),
    ("sum_dy", "coalesce(sum(d * y) FILTER (WHERE in_uptake), 0)"),
)


def site_outcome_moments(con: duckdb.DuckDBPyConnection) -> pd.DataFrame:
    """One row per site x outcome x arm with counts and the sums of D, Y, D², Y², DY.

    ``n``/``sum_*`` cover the analysis sample (outcome observed and, under the
    complete-case rule, uptake reported); ``n_assigned`` counts every assigned
    participant and ``sum_d_assigned`` those reported as taken up;
    ``n_first_stage``/``sum_d_first_stage`` cover the first-stage sample (every
    assigned participant in ``in_uptake``: the first stage of a site without
    outcomes); ``n_uptake_observed`` counts those with an uptake report;
    ``n_due`` those due an outcome and ``n_measured`` those with a measurement.
    """
    sums = ", ".join(f"{expr} AS {name}" for name, expr in _MOMENT_SUMS)
    return con.execute(f"SELECT site_id, outcome, z, {sums} FROM _sample "
                       "GROUP BY site_id, outcome, z ORDER BY site_id, outcome, z").df()


def site_outcome_period_moments(con: duckdb.DuckDBPyConnection, origin, period_days: int
                                ) -> tuple[pd.DataFrame, pd.DataFrame]:
    """:func:`site_outcome_moments` and, from the same scan, the sums per assignment period.

    One pass over ``_sample`` grouped by site x outcome x arm x period (the period of the
    assignment date, counted in ``period_days`` from ``origin``) and by the participant's flags
    (D, in the uptake sample, uptake reported, outcome due, outcome measured), with only three
    aggregates per group: the count and the sums of Y and Y².  Every sum of
    :func:`site_outcome_moments` is a sum of these over the flag groups it selects, because D
    is 0 or 1 (so ``sum(D) = count`` over D = 1, ``sum(D²) = sum(D)``, ``sum(DY) = sum(Y)``
    over D = 1); three aggregates instead of thirteen make the scan about a third faster.
    ``_sample`` holds every assigned participant once per outcome, so the per-period rows of
    any one outcome carry the cohort counts.  The counts are exact; the float sums are added in
    another order than one ``GROUP BY`` would (differences of the order of 1e-16 relative).

    Returns
    -------
    moments : DataFrame
        As :func:`site_outcome_moments`.
    periods : DataFrame
        site_id, outcome, z, period_index and the same sums, per period.
    """
    g = con.execute("""
        SELECT site_id, outcome, z, (assigned_on - CAST($origin AS DATE)) // $period_days AS period_index,
               CAST(d AS INTEGER) + 2 * CAST(in_uptake AS INTEGER) + 4 * CAST(uptake_observed AS INTEGER)
                 + 8 * CAST(outcome_due AS INTEGER) + 16 * CAST(y IS NOT NULL AS INTEGER) AS flags,
               count(*) AS c, coalesce(sum(y), 0) AS sy, coalesce(sum(y * y), 0) AS syy
        FROM _sample GROUP BY ALL
    """, {"origin": origin, "period_days": period_days}).df()
    flags = g["flags"].to_numpy()
    d, iu, uo, due, has_y = ((flags >> k) & 1 == 1 for k in range(5))
    c = g["c"].to_numpy(dtype=np.int64)
    sy, syy = g["sy"].to_numpy(dtype=float), g["syy"].to_numpy(dtype=float)
    keys = ["site_id", "outcome", "z", "period_index"]
    parts = g[keys].copy()
    parts["n_assigned"] = c
    parts["sum_d_assigned"] = np.where(d, c, 0).astype(float)
    parts["n_uptake_observed"] = np.where(uo, c, 0)
    parts["n_first_stage"] = np.where(iu, c, 0)
    parts["sum_d_first_stage"] = np.where(iu & d, c, 0).astype(float)
    parts["n_due"] = np.where(due, c, 0)
    parts["n_measured"] = np.where(has_y, c, 0)
    parts["n"] = np.where(has_y & iu, c, 0)
    parts["sum_d"] = np.where(has_y & iu & d, c, 0).astype(float)
    parts["sum_y"] = np.where(iu, sy, 0.0)
    parts["sum_dd"] = parts["sum_d"]
    parts["sum_yy"] = np.where(iu, syy, 0.0)
    parts["sum_dy"] = np.where(iu & d, sy, 0.0)
    names = [n for n, _ in _MOMENT_SUMS]
    periods = parts.groupby(keys, sort=True, as_index=False)[names].sum()
    moments = periods.groupby(["site_id", "outcome", "z"], sort=True, as_index=False)[names].sum()
    return moments.reset_index(drop=True), periods


def cluster_moments(con: duckdb.DuckDBPyConnection) -> pd.DataFrame:
    """One row per site x outcome x cluster x arm (analysis sample), for CR1 variances.

    ``n_due``/``n_measured`` (every participant of the cell due an outcome / with one) feed
    the cluster-level missing-outcome test; cells without any participant in the analysis
    sample have ``n = 0`` and are ignored by the estimators.
    """
    return con.execute("""
        SELECT site_id, outcome, coalesce(cluster_id, '') AS cluster_id, z,
               count(y) FILTER (WHERE in_uptake) AS n,
               coalesce(sum(d) FILTER (WHERE y IS NOT NULL AND in_uptake), 0) AS sum_d,
               coalesce(sum(y) FILTER (WHERE in_uptake), 0) AS sum_y,
               count(*) FILTER (WHERE outcome_due) AS n_due, count(y) AS n_measured
        FROM _sample GROUP BY ALL ORDER BY ALL
    """).df()


def covariate_cells(con: duckdb.DuckDBPyConnection, spec: SampleSpec, covariates: list[str]) -> pd.DataFrame:
    """Per site x covariate x (z, d) cell: count and sum of the covariate (reported values only)."""
    if not covariates:
        return pd.DataFrame(columns=["site_id", "covariate", "z", "d", "n", "sum_x"])
    return con.execute("""
        SELECT p.site_id, c.covariate, p.z, CAST(p.d AS INTEGER) AS d, count(c.value) AS n, coalesce(sum(c.value), 0) AS sum_x
        FROM _participants p JOIN assignment_covariates c USING (participant_key)
        WHERE list_contains($covs, c.covariate) AND c.value IS NOT NULL AND p.in_uptake
          AND c.batch_id IN (SELECT batch_id FROM batches WHERE status = 'loaded' AND received_at <= $data_cutoff)
        GROUP BY ALL ORDER BY ALL
    """, {"covs": list(covariates), "data_cutoff": spec.data_cutoff}).df()


@dataclass(frozen=True)
class MomentTable:
    """Moments of one outcome for the sites in ``sites`` (same order everywhere)."""

    outcome: str
    sites: tuple[str, ...]
    moments: SiteMoments            # analysis sample
    n_assigned: np.ndarray          # shape (k, 2): [:, 0] control, [:, 1] treatment
    sum_d_assigned: np.ndarray      # reported as taken up, among all assigned
    first_stage_moments: SiteMoments  # all assigned in the uptake sample, Y := 0 (first stage only)
    n_uptake_observed: np.ndarray   # shape (k, 2): with an uptake report by the cutoff
    n_due: np.ndarray               # shape (k, 2): due an outcome (assigned at least min_days before the cutoff)
    n_measured: np.ndarray          # shape (k, 2): with an outcome in the window (uptake reported or not)


def _arm(frame: pd.DataFrame, z: int, sites: list[str], cols: dict[str, str]) -> dict[str, np.ndarray]:
    sub = frame[frame.z == z].set_index("site_id").reindex(sites)
    return {k: sub[v].fillna(0).to_numpy(dtype=float) for k, v in cols.items()}


def moments_for_outcome(frame: pd.DataFrame, outcome: str, sites: list[str]) -> MomentTable:
    """Arrange the SQL moments of one outcome into :class:`SiteMoments` (site order ``sites``)."""
    f = frame[frame.outcome == outcome]
    main = {"n": "n", "sum_d": "sum_d", "sum_y": "sum_y", "sum_dd": "sum_dd", "sum_yy": "sum_yy", "sum_dy": "sum_dy"}
    t = _arm(f, 1, sites, main)
    c = _arm(f, 0, sites, main)
    fs_cols = {"n": "n_first_stage", "sum_d": "sum_d_first_stage"}
    ft = _arm(f, 1, sites, fs_cols)
    fc = _arm(f, 0, sites, fs_cols)
    count_cols = {"n_assigned": "n_assigned", "sum_d_assigned": "sum_d_assigned",
                  "n_uptake_observed": "n_uptake_observed", "n_due": "n_due", "n_measured": "n_measured"}
    ct = _arm(f, 1, sites, count_cols)
    cc = _arm(f, 0, sites, count_cols)

    def fs_arm(a):
        zero = np.zeros_like(a["n"])
        return ArmMoments(n=a["n"], sum_d=a["sum_d"], sum_y=zero, sum_dd=a["sum_d"], sum_yy=zero, sum_dy=zero)

    return MomentTable(
        outcome=outcome, sites=tuple(sites),
        moments=SiteMoments(treated=ArmMoments(**t), control=ArmMoments(**c)),
        n_assigned=np.column_stack([cc["n_assigned"], ct["n_assigned"]]),
        sum_d_assigned=np.column_stack([cc["sum_d_assigned"], ct["sum_d_assigned"]]),
        first_stage_moments=SiteMoments(treated=fs_arm(ft), control=fs_arm(fc)),
        n_uptake_observed=np.column_stack([cc["n_uptake_observed"], ct["n_uptake_observed"]]),
        n_due=np.column_stack([cc["n_due"], ct["n_due"]]),
        n_measured=np.column_stack([cc["n_measured"], ct["n_measured"]]),
    )


def cluster_moments_for_outcome(frame: pd.DataFrame, outcome: str, sites: list[str]) -> ClusterMoments:
    f = frame[frame.outcome == outcome]
    pos = {s: i for i, s in enumerate(sites)}
    f = f[f.site_id.isin(pos)]
    clusters = pd.factorize(f.site_id + "\x1f" + f.cluster_id)[0]
    return ClusterMoments(site_index=f.site_id.map(pos).to_numpy(), cluster_index=clusters,
                          z=f.z.to_numpy(dtype=float), n=f.n.to_numpy(dtype=float),
                          sum_d=f.sum_d.to_numpy(dtype=float), sum_y=f.sum_y.to_numpy(dtype=float))
