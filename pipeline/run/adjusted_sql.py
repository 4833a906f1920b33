"""The sums behind the covariate-adjusted IV rows, aggregated in DuckDB for all sites at once.

Two passes over the analysis sample joined to the declared covariates
(complete rows only: in the uptake sample under the study's missing-uptake rule,
outcome and every covariate reported and finite):

1. the cross-product matrix of the site-centred ``(1, Z, D, Y, X)`` per
   site x outcome (:class:`~takeup.pipeline.stats.estimators.adjusted.CrossMoments`);
   the coefficients follow by algebra;
2. with each site's coefficients joined in, the robust "meat" per site x
   outcome — sums of squared residuals times ``q q'`` (HC), or of products
   of per-cluster score sums (cluster randomisation) — for the 2SLS and for
   the first stage (:class:`~takeup.pipeline.stats.estimators.adjusted.ScoreMoments`).

Only aggregates leave DuckDB.  Covariate names are bound as parameters; the
SQL uses positional aliases ``x1 .. xp``.
"""

from __future__ import annotations

from dataclasses import dataclass

import duckdb
import numpy as np
import pandas as pd

from takeup.pipeline.stats.estimators.adjusted import (CrossMoments, ScoreMoments, adjusted_coefficients, q_index,
                                                       w_index)

__all__ = ["AdjustedMoments", "adjusted_moments"]


@dataclass(frozen=True)
class AdjustedMoments:
    """Both passes' sums for one outcome, for the sites of the run (in ``sites`` order)."""

    outcome: str
    sites: tuple[str, ...]
    cross: CrossMoments
    scores: ScoreMoments


def _names(p: int) -> list[str]:
    return ["one", "z", "d", "y", *[f"x{j}" for j in range(1, p + 1)]]


def _build_rows(con: duckdb.DuckDBPyConnection, covariates: list[str], data_cutoff, within_strata: bool = False
                ) -> None:
    p = len(covariates)
    pivot = ", ".join(f"max(value) FILTER (WHERE covariate = $cov{j}) AS x{j}" for j in range(1, p + 1))
    complete = " AND ".join(["s.in_uptake", "s.y IS NOT NULL", "isfinite(s.y)"]
                            + [f"c.x{j} IS NOT NULL AND isfinite(c.x{j})" for j in range(1, p + 1)])
    raw = ", ".join(["s.site_id", "s.outcome", "coalesce(s.cluster_id, '') AS cluster_id", "CAST(s.z AS DOUBLE) AS z",
                     "CAST(s.d AS DOUBLE) AS d", "s.y"] + [f"c.x{j}" for j in range(1, p + 1)])
    variables = ["z", "d", "y", *[f"x{j}" for j in range(1, p + 1)]]
    means = ", ".join(f"avg({v}) AS m_{v}" for v in variables)
    centred = ", ".join(["r.site_id", "r.outcome", "r.cluster_id", "r.stratum"]
                        + [f"r.{v} - m.m_{v} AS {v}" for v in variables])
    # within strata (sites with declared strata): centre at the site x stratum means (stratum fixed effects)
    stratum = "coalesce(t.stratum, '')" if within_strata else "''"
    join = " LEFT JOIN _strata t USING (participant_key)" if within_strata else ""
    params = {f"cov{j}": name for j, name in enumerate(covariates, start=1)}
    params["cutoff"] = data_cutoff
    con.execute(f"""
        CREATE OR REPLACE TEMP TABLE _adjusted AS
        WITH c AS (
            SELECT participant_key, {pivot} FROM assignment_covariates
            WHERE batch_id IN (SELECT batch_id FROM batches WHERE status = 'loaded' AND received_at <= $cutoff)
            GROUP BY participant_key
        ), r AS (
            SELECT {raw}, {stratum} AS stratum FROM _sample s JOIN c USING (participant_key){join} WHERE {complete}
        ), m AS (
            SELECT site_id, outcome, stratum, {means} FROM r GROUP BY site_id, outcome, stratum
        )
        SELECT {centred} FROM r JOIN m USING (site_id, outcome, stratum)
    """, params)


def _cross(con: duckdb.DuckDBPyConnection, p: int) -> pd.DataFrame:
    names = _names(p)
    expr = lambda a, b: "count(*)" if a == b == "one" else (  # noqa: E731
        f"sum({b})" if a == "one" else f"sum({a} * {b})")
    cols = [f"{expr(a, b)} AS c_{i}_{j}" for i, a in enumerate(names) for j, b in enumerate(names) if i <= j]
    return con.execute(f"SELECT site_id, outcome, count(DISTINCT stratum) AS n_strata, {', '.join(cols)} "
                       "FROM _adjusted GROUP BY site_id, outcome").df()


def _cross_array(frame: pd.DataFrame, sites: list[str], p: int) -> tuple[np.ndarray, np.ndarray]:
    m = p + 4
    cross = np.zeros((len(sites), m, m))
    pos = {s: i for i, s in enumerate(sites)}
    idx = frame.site_id.map(pos).to_numpy()
    for i in range(m):
        for j in range(i, m):
            v = frame[f"c_{i}_{j}"].to_numpy(dtype=float)
            cross[idx, i, j] = v
            cross[idx, j, i] = v
    return cross[:, 0, 0].copy(), cross


def _meat(con: duckdb.DuckDBPyConnection, coef: pd.DataFrame, p: int, clustered: bool) -> pd.DataFrame:
    k = p + 2
    names = _names(p)
    q = [names[i] for i in q_index(p)]
    w = [names[i] for i in w_index(p)]

    def col(name: str, alias: str = "") -> str:
        return "1.0" if name == "one" else f"{alias}{name}"

    u = "a.y - (" + " + ".join(f"c.b{i} * {col(w[i], 'a.')}" for i in range(k)) + ")"
    v = "a.d - (" + " + ".join(f"c.g{i} * {col(q[i], 'a.')}" for i in range(k)) + ")"
    residuals = f"SELECT a.*, {u} AS u, {v} AS v FROM _adjusted a JOIN _adj_coef c USING (site_id, outcome)"
    pairs = [(i, j) for i in range(k) for j in range(i, k)]
    if not clustered:
        cols = ([f"sum(u * u * {col(q[i])} * {col(q[j])}) AS mi_{i}_{j}" for i, j in pairs]
                + [f"sum(v * v * {col(q[i])} * {col(q[j])}) AS mf_{i}_{j}" for i, j in pairs])
        sql = f"WITH r AS ({residuals}) SELECT site_id, outcome, {', '.join(cols)} FROM r GROUP BY site_id, outcome"
    else:
        inner = ([f"sum(u * {col(q[i])}) AS su_{i}" for i in range(k)]
                 + [f"sum(v * {col(q[i])}) AS sv_{i}" for i in range(k)])
        outer = ([f"sum(su_{i} * su_{j}) AS mi_{i}_{j}" for i, j in pairs]
                 + [f"sum(sv_{i} * sv_{j}) AS mf_{i}_{j}" for i, j in pairs])
        sql = (f"WITH r AS ({residuals}), g AS (SELECT site_id, outcome, cluster_id, {', '.join(inner)} "
               f"FROM r GROUP BY site_id, outcome, cluster_id) "
               f"SELECT site_id, outcome, count(*) AS n_clusters, {', '.join(outer)} FROM g GROUP BY site_id, outcome")
    con.register("_adj_coef", coef)
    try:
        return con.execute(sql).df()
    finally:
        con.unregister("_adj_coef")


def _meat_arrays(frame: pd.DataFrame, sites: list[str], p: int, clustered: bool) -> ScoreMoments:
    k = p + 2
    pos = {s: i for i, s in enumerate(sites)}
    idx = frame.site_id.map(pos).to_numpy()
    mi = np.zeros((len(sites), k, k))
    mf = np.zeros((len(sites), k, k))
    for i in range(k):
        for j in range(i, k):
            for arr, prefix in ((mi, "mi"), (mf, "mf")):
                v = frame[f"{prefix}_{i}_{j}"].to_numpy(dtype=float)
                arr[idx, i, j] = v
                arr[idx, j, i] = v
    g = None
    if clustered:
        g = np.zeros(len(sites))
        g[idx] = frame["n_clusters"].to_numpy(dtype=float)
    return ScoreMoments(meat_iv=mi, meat_fs=mf, n_clusters=g)


def adjusted_moments(con: duckdb.DuckDBPyConnection, sites: list[str], outcomes: list[str], covariates: list[str],
                     clustered: bool, data_cutoff, within_strata: bool = False) -> dict[str, AdjustedMoments]:
    """Both passes for every outcome (needs the run's ``_sample`` temp table).

    ``within_strata``: centre within site x stratum (needs ``_strata`` from
    :mod:`takeup.pipeline.run.strata_sql`); sites without strata are one stratum.
    """
    p = len(covariates)
    _build_rows(con, covariates, data_cutoff, within_strata)
    try:
        cross_frame = _cross(con, p)
        out: dict[str, AdjustedMoments] = {}
        coef_parts = []
        crosses = {}
        for outcome in outcomes:
            sub = cross_frame[cross_frame.outcome == outcome]
            n, cross = _cross_array(sub, sites, p)
            n_strata = (sub.set_index("site_id")["n_strata"].reindex(sites).fillna(1).to_numpy(dtype=float)
                        if within_strata else None)
            cm = CrossMoments(n=n, cross=cross, n_covariates=p, n_strata=n_strata)
            beta, gamma, status = adjusted_coefficients(cm)
            crosses[outcome] = cm
            ok = status == "ok"
            part = pd.DataFrame({"site_id": np.asarray(sites, dtype=object)[ok], "outcome": outcome})
            for i in range(p + 2):
                part[f"b{i}"] = beta[ok, i]
                part[f"g{i}"] = gamma[ok, i]
            coef_parts.append(part)
        coef = pd.concat(coef_parts, ignore_index=True) if coef_parts else pd.DataFrame()
        meat_frame = _meat(con, coef, p, clustered) if len(coef) else None
        for outcome in outcomes:
            sub = (meat_frame[meat_frame.outcome == outcome] if meat_frame is not None
                   else pd.DataFrame(columns=["site_id"]))
            scores = _meat_arrays(sub, sites, p, clustered) if len(sub) else ScoreMoments(
                np.zeros((len(sites), p + 2, p + 2)), np.zeros((len(sites), p + 2, p + 2)),
                np.zeros(len(sites)) if clustered else None)
            out[outcome] = AdjustedMoments(outcome=outcome, sites=tuple(sites), cross=crosses[outcome], scores=scores)
        return out
    finally:
        con.execute("DROP TABLE IF EXISTS _adjusted")
