"""Covariate-adjusted IV for many sites: the moment path against a per-site linearmodels loop.

    .venv/bin/python benchmarks/adjusted_benchmark.py [--sites 1000 --per-site 10000 --covariates 5]

Builds one study in an in-memory DuckDB (invented data, fixed seed): the analysis sample
``_sample`` (site, Z, D, Y) and the declared covariates in the warehouse's long format
(``assignment_covariates``).  Then, on the same data in the same run:

* **moment path** - ``run/adjusted_sql.adjusted_moments`` (pivot of the covariates, the two
  passes of sums in DuckDB) and ``stats/estimators/adjusted.adjusted_estimates`` (algebra),
  for all sites at once;
* **two passes only** - the same after the covariates have been pivoted (the cost the
  estimator itself adds);
* **linearmodels loop** - ``IV2SLS(y, [1, X], d, z).fit(cov_type="robust", debiased=True)``
  site by site on numpy arrays already in memory (pulling the rows out of DuckDB is timed
  separately and not charged to the loop);
* **floor** - one DuckDB scan of the sample (``sum`` of Y per site): no aggregation over
  participant rows can be faster.

Prints a table of wall times and ratios, and the largest differences between the two
estimates (they must agree to 1e-9 relative for the CACE, 1e-6 for its SE).
"""

from __future__ import annotations

import argparse
import os
import sys
import time
from datetime import datetime

import duckdb
import numpy as np
import pandas as pd
import pyarrow as pa


def _build(con: duckdb.DuckDBPyConnection, k: int, m: int, p: int, seed: int) -> None:
    rng = np.random.default_rng(seed)
    n = k * m
    site_idx = np.repeat(np.arange(k), m)
    key = np.arange(n, dtype=np.int64)
    z = (rng.random(n) < 0.5).astype(np.int32)
    x = rng.normal(size=(n, p))
    complier = rng.random(n) < 0.6
    always = rng.random(n) < 0.1
    d = np.where(always, 1.0, np.where(complier, z, 0)).astype(float)
    y = 1.0 + 3.0 * d + x @ np.linspace(0.5, 1.5, p) + rng.normal(size=n)
    sites = np.array([f"S{i:05d}" for i in range(k)])
    con.register("_s", pa.table({"site_id": pa.DictionaryArray.from_arrays(pa.array(site_idx.astype(np.int32)),
                                                                          pa.array(sites)),
                                 "participant_key": key, "z": z, "d": d, "y": y}))
    con.execute("""CREATE TEMP TABLE _sample AS SELECT CAST(site_id AS VARCHAR) AS site_id, participant_key,
                   CAST(NULL AS VARCHAR) AS cluster_id, z, d, TRUE AS in_uptake, 'score' AS outcome, y FROM _s""")
    con.unregister("_s")
    con.execute("CREATE TABLE batches (batch_id VARCHAR, status VARCHAR, received_at TIMESTAMP)")
    con.execute("INSERT INTO batches VALUES ('b1', 'loaded', TIMESTAMP '2026-01-01 00:00:00')")
    covs = [f"c{j + 1}" for j in range(p)]
    con.execute("CREATE TABLE assignment_covariates (batch_id VARCHAR, participant_key BIGINT, covariate VARCHAR, "
                "value DOUBLE)")
    for j, name in enumerate(covs):
        con.register("_c", pa.table({"participant_key": key, "value": x[:, j]}))
        con.execute("INSERT INTO assignment_covariates SELECT 'b1', participant_key, $c, value FROM _c", {"c": name})
        con.unregister("_c")


def _timed(fn):
    t = time.perf_counter()
    out = fn()
    return time.perf_counter() - t, out


def main(argv=None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--sites", type=int, default=1000)
    ap.add_argument("--per-site", type=int, default=10000)
    ap.add_argument("--covariates", type=int, default=5)
    ap.add_argument("--seed", type=int, default=20261202)
    ap.add_argument("--memory-limit", default="6GB")
    args = ap.parse_args(argv)
    from linearmodels.iv import IV2SLS

    from takeup.pipeline.run.adjusted_sql import adjusted_moments
    from takeup.pipeline.stats.estimators.adjusted import adjusted_estimates

    k, m, p = args.sites, args.per_site, args.covariates
    con = duckdb.connect(":memory:", config={"memory_limit": args.memory_limit})
    t_build, _ = _timed(lambda: _build(con, k, m, p, args.seed))
    sites = [f"S{i:05d}" for i in range(k)]
    covs = [f"c{j + 1}" for j in range(p)]
    cutoff = datetime(2026, 6, 1)

    t_floor, _ = _timed(lambda: con.execute("SELECT site_id, sum(y) FROM _sample GROUP BY site_id").fetchall())

    def moment_path():
        mom = adjusted_moments(con, sites, ["score"], covs, False, cutoff)["score"]
        return adjusted_estimates(mom.cross, mom.scores)

    t_moment, est = _timed(moment_path)

    # the two passes alone, on covariates already pivoted (wide)
    pivot = ", ".join(f"max(value) FILTER (WHERE covariate = '{c}') AS {c}" for c in covs)
    con.execute(f"CREATE TEMP TABLE _wide AS SELECT participant_key, {pivot} FROM assignment_covariates "
                "GROUP BY participant_key")
    from takeup.pipeline.run import adjusted_sql as a_sql
    from takeup.pipeline.stats.estimators.adjusted import CrossMoments, adjusted_coefficients

    def passes():
        names = ", ".join(["s.site_id", "s.outcome", "'' AS cluster_id", "CAST(s.z AS DOUBLE) AS z", "s.d",
                           "s.y"] + [f"w.{c} AS x{j + 1}" for j, c in enumerate(covs)])
        variables = ["z", "d", "y", *[f"x{j}" for j in range(1, p + 1)]]
        means = ", ".join(f"avg({v}) AS m_{v}" for v in variables)
        centred = ", ".join(["r.site_id", "r.outcome", "r.cluster_id", "'' AS stratum"]
                            + [f"r.{v} - m.m_{v} AS {v}" for v in variables])
        con.execute(f"""CREATE OR REPLACE TEMP TABLE _adjusted AS
            WITH r AS (SELECT {names} FROM _sample s JOIN _wide w USING (participant_key)),
            m AS (SELECT site_id, outcome, {means} FROM r GROUP BY ALL)
            SELECT {centred} FROM r JOIN m USING (site_id, outcome)""")
        frame = a_sql._cross(con, p)
        n, cross = a_sql._cross_array(frame, sites, p)
        cm = CrossMoments(n=n, cross=cross, n_covariates=p)
        beta, gamma, status = adjusted_coefficients(cm)
        coef = pd.DataFrame({"site_id": sites, "outcome": "score"})
        for i in range(p + 2):
            coef[f"b{i}"] = beta[:, i]
            coef[f"g{i}"] = gamma[:, i]
        meat = a_sql._meat(con, coef, p, False)
        est2 = adjusted_estimates(cm, a_sql._meat_arrays(meat, sites, p, False))
        con.execute("DROP TABLE _adjusted")
        return est2

    t_passes, est2 = _timed(passes)
    assert np.allclose(est2.cace, est.cace, rtol=1e-9, atol=0)

    t_pull, frame = _timed(lambda: con.execute(
        "SELECT s.site_id, s.z, s.d, s.y, " + ", ".join(f"w.{c}" for c in covs)
        + " FROM _sample s JOIN _wide w USING (participant_key) ORDER BY s.site_id").df())
    arr = frame[["z", "d", "y", *covs]].to_numpy(dtype=float)
    bounds = np.searchsorted(frame.site_id.to_numpy(), sites + ["\uffff"])

    def loop():
        out = np.zeros((k, 2))
        for i in range(k):
            a = arr[bounds[i]:bounds[i + 1]]
            exog = np.column_stack([np.ones(len(a)), a[:, 3:]])
            r = IV2SLS(a[:, 2], exog, a[:, 1:2], a[:, 0:1]).fit(cov_type="robust", debiased=True)
            out[i] = r.params.iloc[-1], r.std_errors.iloc[-1]
        return out

    t_loop, ref = _timed(loop)
    d_est = np.max(np.abs(ref[:, 0] - est.cace) / np.abs(ref[:, 0]))
    d_se = np.max(np.abs(ref[:, 1] - est.cace_se) / ref[:, 1])
    rows = [
        ("build the study (numpy -> DuckDB)", t_build, None),
        ("floor: one scan of the sample (sum of Y per site)", t_floor, t_floor / t_floor),
        ("moment path (covariate pivot + two passes + algebra)", t_moment, t_moment / t_floor),
        ("two passes + algebra (covariates already wide)", t_passes, t_passes / t_floor),
        ("pull the rows into pandas (not charged to the loop)", t_pull, t_pull / t_floor),
        ("linearmodels IV2SLS loop, one fit per site", t_loop, t_loop / t_floor),
    ]
    print(f"covariate-adjusted 2SLS: {k:,} sites x {m:,} participants, {p} covariates "
          f"({k * m:,} rows; DuckDB {duckdb.__version__}, {args.memory_limit})")
    print("load average at the end (1, 5, 15 min): " + " ".join(f"{x:.2f}" for x in os.getloadavg()))
    print(f"{'step':<56} {'seconds':>9} {'x floor':>9}")
    for name, t, r in rows:
        print(f"{name:<56} {t:>9.2f} {('' if r is None else f'{r:.1f}'):>9}")
    print(f"loop / moment path:               {t_loop / t_moment:8.1f}x")
    print(f"(loop + pull) / moment path:      {(t_loop + t_pull) / t_moment:8.1f}x")
    print(f"loop / two passes:                {t_loop / t_passes:8.1f}x")
    print(f"largest relative difference: CACE {d_est:.1e}, SE {d_se:.1e} (targets 1e-9, 1e-6)")
    return 0 if d_est < 1e-9 and d_se < 1e-6 else 1


if __name__ == "__main__":
    sys.exit(main())
