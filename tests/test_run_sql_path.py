"""The whole SQL path (ingest -> analysis sample -> moments -> site_estimates) against linearmodels.

Simulated multi-site data with known structure, written as site files, ingested, run; each
site's stored CACE, SE and first-stage F must equal linearmodels ``IV2SLS`` on the same
participants (reference library; tolerances as for the moment estimators: 1e-9 relative on
estimates, 1e-6 on SEs and F), for individual randomisation (HC1) and cluster
randomisation (CR1, clusters nested in arms).
"""

from __future__ import annotations

from datetime import date

import duckdb
import numpy as np
import pandas as pd
import pytest
from linearmodels.iv import IV2SLS

from takeup.pipeline.ingest.many_files import ingest_paths
from takeup.pipeline.run.stages import run_monitoring
from takeup.pipeline.warehouse import init_warehouse
from takeup.schemas.config import parse_config


def _simulate(rng, clustered: bool):
    rows = []
    for s in range(4):
        n_clusters = 16
        for c in range(n_clusters):
            z_c = c % 2
            m = int(rng.integers(8, 20))
            for i in range(m):
                z = z_c if clustered else int(rng.integers(0, 2))
                typ = rng.random()
                d = 1 if typ < 0.1 else (z if typ < 0.7 else 0)
                y = 20 + 2.5 * d + rng.normal(0, 1 + 0.5 * z) + (rng.normal(0, 1) if clustered else 0.0)
                missing = rng.random() < 0.05
                rows.append((f"S{s}", f"S{s}-{c}-{i}", z, d, round(y, 6), f"K{s}-{c}", missing))
    return pd.DataFrame(rows, columns=["site", "pid", "z", "d", "y", "cluster", "missing"])


def _files(df: pd.DataFrame, root, clustered: bool):
    a = pd.DataFrame({"site_id": df.site, "participant_id": df.pid,
                      "arm": np.where(df.z == 1, "treatment", "control"), "assigned_on": "2026-03-02"})
    if clustered:
        a["cluster_id"] = df.cluster
    u = pd.DataFrame({"site_id": df.site, "participant_id": df.pid, "observed_on": "2026-03-10",
                      "took_up": np.where(df.d == 1, "yes", "no")})
    keep = ~df.missing
    o = pd.DataFrame({"site_id": df.site[keep], "participant_id": df.pid[keep], "outcome": "y",
                      "measured_on": "2026-05-01", "value": df.y[keep]})
    paths = [root / "a.csv", root / "u.csv", root / "o.csv"]
    for frame, p in zip((a, u, o), paths):
        frame.to_csv(p, index=False)
    return paths


@pytest.mark.parametrize("clustered", [False, True], ids=["HC1-individual", "CR1-cluster"])
def test_stored_site_estimates_equal_linearmodels(tmp_path, key_env, clustered):
    rng = np.random.default_rng(2026 + clustered)
    df = _simulate(rng, clustered)
    cfg = parse_config({"randomisation_unit": "cluster" if clustered else "individual",
                        "outcomes": [{"name": "y"}], "follow_up": {"min_days": 0, "max_days": 365}})
    path = tmp_path / "w.duckdb"
    init_warehouse(path, cfg)
    reports = ingest_paths(path, _files(df, tmp_path, clustered))
    assert all(r.status == "loaded" and r.rows_quarantined == 0 for r in reports)
    summary = run_monitoring(path, as_of=date(2026, 6, 1))
    con = duckdb.connect(str(path), read_only=True)
    got = con.execute("SELECT * FROM site_estimates WHERE run_id = $r", {"r": summary.run_id}).df()
    con.close()
    got = got.set_index("site_id")
    for site, g in df[~df.missing].groupby("site"):
        exog = pd.DataFrame({"const": 1.0}, index=g.index)
        model = IV2SLS(g.y, exog, g[["d"]].astype(float), g[["z"]].astype(float))
        if clustered:
            res = model.fit(cov_type="clustered", clusters=pd.factorize(g.cluster)[0], debiased=True)
        else:
            res = model.fit(cov_type="robust", debiased=True)
        row = got.loc[site]
        assert row.se_type == ("CR1" if clustered else "HC1")
        assert row.cace == pytest.approx(res.params["d"], rel=1e-9)
        assert row.cace_se == pytest.approx(res.std_errors["d"], rel=1e-6)
        assert row.first_stage_f == pytest.approx(res.first_stage.diagnostics["f.stat"].iloc[0], rel=1e-6)
        assert row.n_treatment + row.n_control == len(g)
        assert row.missing_outcome_treatment + row.missing_outcome_control == int(df[df.site == site].missing.sum())
        if clustered:
            assert row.n_clusters == g.cluster.nunique()


@pytest.mark.parametrize("clustered", [False, True], ids=["HC1-individual", "CR1-cluster"])
def test_stored_covariate_adjusted_rows_equal_linearmodels(tmp_path, key_env, clustered):
    """Covariates in the assignment files -> two passes of sums in DuckDB -> covariate_adjusted rows.

    Reference: linearmodels IV2SLS with the covariates as exogenous regressors, per site, on the
    complete rows (outcome and both covariates reported); tolerances as above.
    """
    rng = np.random.default_rng(31 + clustered)
    df = _simulate(rng, clustered)
    df["age"] = np.round(rng.normal(40, 12, len(df)), 3)
    df["score0"] = np.round(50 + 3 * df.y + rng.normal(0, 5, len(df)), 3)
    df.loc[rng.random(len(df)) < 0.04, "age"] = np.nan           # some covariates not reported
    cfg = parse_config({"randomisation_unit": "cluster" if clustered else "individual", "covariates": ["age", "score0"],
                        "estimation": {"adjust_covariates": True},
                        "outcomes": [{"name": "y"}], "follow_up": {"min_days": 0, "max_days": 365}})
    path = tmp_path / "w.duckdb"
    init_warehouse(path, cfg)
    paths = _files(df, tmp_path, clustered)
    a = pd.read_csv(paths[0])
    a["age"], a["score0"] = df.age.to_numpy(), df.score0.to_numpy()
    a.to_csv(paths[0], index=False)
    reports = ingest_paths(path, paths, config=cfg)
    assert all(r.status == "loaded" for r in reports)
    summary = run_monitoring(path, as_of=date(2026, 6, 1), config=cfg)
    con = duckdb.connect(str(path), read_only=True)
    got = con.execute("SELECT * FROM site_estimates WHERE run_id = $r AND spec = 'covariate_adjusted'",
                      {"r": summary.run_id}).df().set_index("site_id")
    con.close()
    assert len(got) == df.site.nunique()
    complete = df[~df.missing & df.age.notna()]
    for site, g in complete.groupby("site"):
        exog = pd.DataFrame({"const": 1.0, "age": g.age, "score0": g.score0}, index=g.index)
        model = IV2SLS(g.y, exog, g[["d"]].astype(float), g[["z"]].astype(float))
        if clustered:
            res = model.fit(cov_type="clustered", clusters=pd.factorize(g.cluster)[0], debiased=True)
        else:
            res = model.fit(cov_type="robust", debiased=True)
        row = got.loc[site]
        assert row.status == "ok" and row.se_type == ("CR1-adjusted" if clustered else "HC1-adjusted")
        assert row.cace == pytest.approx(res.params["d"], rel=1e-9)
        assert row.cace_se == pytest.approx(res.std_errors["d"], rel=1e-6)
        fs = res.first_stage.individual["d"]
        assert row.complier_share == pytest.approx(fs.params["z"], rel=1e-9)
        assert row.complier_share_se == pytest.approx(fs.std_errors["z"], rel=1e-6)
        ci = res.conf_int(level=0.95).loc["d"]
        assert row.cace_ci_low == pytest.approx(ci["lower"], rel=1e-6)
