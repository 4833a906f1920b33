"""Moments per randomisation stratum (SQL), for the sites that declare two or more strata.

A site *has strata* when its participants in the analysis sample carry at least two
distinct ``stratum`` values (a missing stratum counts as one more, labelled ``''``).
For those sites only, this module adds, next to the frames of
:mod:`takeup.pipeline.run.sample_sql` (whose SQL is left as it is):

* :func:`stratum_moments` - site x outcome x stratum x arm: the sums of
  :func:`~takeup.pipeline.run.sample_sql.site_outcome_moments` (analysis sample and
  first-stage sample);
* :func:`stratum_cluster_moments` - site x outcome x stratum x cluster x arm (cluster
  randomisation: cluster-robust variances);
* :func:`stratum_counts` - site x stratum x arm: everyone assigned, clusters, and the
  declared ``assignment_probability`` (the per-stratum sample-ratio check);
* :func:`stratum_covariate_cells` - site x stratum x covariate x (z, d): the kappa-weighted
  complier profile with stratum-specific shares.

Every query reads the temp tables built by
:func:`~takeup.pipeline.run.sample_sql.build_participants` joined to the stratum of each
participant (``_strata``, made by :func:`build_strata`); only aggregates leave DuckDB.
When no assignment carries a stratum nothing is computed.
"""

from __future__ import annotations

from dataclasses import dataclass
from datetime import datetime

import duckdb
import pandas as pd

__all__ = ["StratumFrames", "collect_strata"]


@dataclass(frozen=True)
class StratumFrames:
    """The stratum aggregates of one run (empty frames when no site has strata)."""

    sites: tuple[str, ...]                 # sites with two or more strata
    moments: pd.DataFrame                  # site x outcome x stratum x arm
    clusters: pd.DataFrame | None          # site x outcome x stratum x cluster x arm (cluster randomisation)
    counts: pd.DataFrame                   # site x stratum x arm: n_assigned, n_clusters, declared_probability
    covariate_cells: pd.DataFrame          # site x stratum x covariate x (z, d): n, sum_x


_MOMENT_COLS = ["site_id", "outcome", "stratum", "z", "n", "sum_d", "sum_y", "sum_dd", "sum_yy", "sum_dy",
                "n_first_stage", "sum_d_first_stage"]
_COUNT_COLS = ["site_id", "stratum", "z", "n_assigned", "n_clusters", "declared_probability"]
_CELL_COLS = ["site_id", "stratum", "covariate", "z", "d", "n", "sum_x"]


def empty_frames() -> StratumFrames:
    return StratumFrames(sites=(), moments=pd.DataFrame(columns=_MOMENT_COLS), clusters=None,
                         counts=pd.DataFrame(columns=_COUNT_COLS), covariate_cells=pd.DataFrame(columns=_CELL_COLS))


def build_strata(con: duckdb.DuckDBPyConnection) -> tuple[str, ...]:
    """Materialise ``_strata`` (participant_key, site_id, stratum, p) for the sites with strata.

    Returns those sites (empty, and no table, when no assignment carries a stratum).
    """
    if not con.execute("SELECT EXISTS (SELECT 1 FROM assignments WHERE stratum IS NOT NULL)").fetchone()[0]:
        return ()
    con.execute("""
        CREATE OR REPLACE TEMP TABLE _strata AS
        WITH s AS (
            SELECT p.participant_key, p.site_id, coalesce(a.stratum, '') AS stratum,
                   a.assignment_probability AS p
            FROM _participants p JOIN assignments a USING (participant_key)
        ), multi AS (
            SELECT site_id FROM s GROUP BY site_id HAVING count(DISTINCT stratum) > 1
        )
        SELECT s.* FROM s WHERE site_id IN (SELECT site_id FROM multi)
    """)
    return tuple(r[0] for r in con.execute("SELECT DISTINCT site_id FROM _strata ORDER BY 1").fetchall())


def stratum_moments(con: duckdb.DuckDBPyConnection) -> pd.DataFrame:
    """Site x outcome x stratum x arm sums (the columns of ``site_outcome_moments``' analysis sample)."""
    return con.execute("""
        SELECT s.site_id, s.outcome, t.stratum, s.z,
               count(s.y) FILTER (WHERE s.in_uptake) AS n,
               coalesce(sum(s.d) FILTER (WHERE s.y IS NOT NULL AND s.in_uptake), 0) AS sum_d,
               coalesce(sum(s.y) FILTER (WHERE s.in_uptake), 0) AS sum_y,
               coalesce(sum(s.d * s.d) FILTER (WHERE s.y IS NOT NULL AND s.in_uptake), 0) AS sum_dd,
               coalesce(sum(s.y * s.y) FILTER (WHERE s.in_uptake), 0) AS sum_yy,
               coalesce(sum(s.d * s.y) FILTER (WHERE s.in_uptake), 0) AS sum_dy,
               count(*) FILTER (WHERE s.in_uptake) AS n_first_stage,
               coalesce(sum(s.d) FILTER (WHERE s.in_uptake), 0) AS sum_d_first_stage
        FROM _sample s JOIN _strata t USING (participant_key)
        GROUP BY ALL ORDER BY ALL
    """).df()


def stratum_cluster_moments(con: duckdb.DuckDBPyConnection) -> pd.DataFrame:
    """Site x outcome x stratum x cluster x arm sums of the analysis sample (cluster-robust variances)."""
    return con.execute("""
        SELECT s.site_id, s.outcome, t.stratum, coalesce(s.cluster_id, '') AS cluster_id, s.z,
               count(s.y) FILTER (WHERE s.in_uptake) AS n,
               coalesce(sum(s.d) FILTER (WHERE s.y IS NOT NULL AND s.in_uptake), 0) AS sum_d,
               coalesce(sum(s.y) FILTER (WHERE s.in_uptake), 0) AS sum_y
        FROM _sample s JOIN _strata t USING (participant_key)
        GROUP BY ALL ORDER BY ALL
    """).df()


def stratum_counts(con: duckdb.DuckDBPyConnection) -> pd.DataFrame:
    """Site x stratum x arm: everyone assigned, distinct clusters, the declared treatment probability."""
    return con.execute("""
        SELECT p.site_id, t.stratum, p.z, count(*) AS n_assigned,
               count(DISTINCT coalesce(p.cluster_id, '')) AS n_clusters,
               max(t.p) AS declared_probability
        FROM _participants p JOIN _strata t USING (participant_key)
        GROUP BY ALL ORDER BY ALL
    """).df()


def stratum_covariate_cells(con: duckdb.DuckDBPyConnection, covariates: list[str],
                            data_cutoff: datetime) -> pd.DataFrame:
    """Site x stratum x covariate x (z, d): count and sum of the covariate (reported values only)."""
    if not covariates:
        return pd.DataFrame(columns=_CELL_COLS)
    return con.execute("""
        SELECT p.site_id, t.stratum, c.covariate, p.z, CAST(p.d AS INTEGER) AS d, count(c.value) AS n,
               coalesce(sum(c.value), 0) AS sum_x
        FROM _participants p JOIN _strata t USING (participant_key)
        JOIN assignment_covariates c ON c.participant_key = p.participant_key
        WHERE list_contains($covs, c.covariate) AND c.value IS NOT NULL AND p.in_uptake
          AND c.batch_id IN (SELECT batch_id FROM batches WHERE status = 'loaded' AND received_at <= $data_cutoff)
        GROUP BY ALL ORDER BY ALL
    """, {"covs": list(covariates), "data_cutoff": data_cutoff}).df()


def collect_strata(con: duckdb.DuckDBPyConnection, clustered: bool, covariates: list[str],
                   data_cutoff: datetime) -> StratumFrames:
    """Every stratum aggregate of a run (after ``build_participants``).

    Leaves ``_strata`` in place when some site has strata (the covariate-adjusted pass
    centres within strata); the caller drops it with the run's other temp tables.
    """
    sites = build_strata(con)
    if not sites:
        return empty_frames()
    return StratumFrames(sites=sites, moments=stratum_moments(con),
                         clusters=stratum_cluster_moments(con) if clustered else None,
                         counts=stratum_counts(con),
                         covariate_cells=stratum_covariate_cells(con, covariates, data_cutoff))
