"""Randomisation strata end to end: declaring the design (assignment_probability, config strata),
ingest -> SQL -> site_estimates equal to linearmodels, the per-stratum sample-ratio alert, degenerate
strata and the report.

Reference: linearmodels ``IV2SLS`` (weights 1/p_s for the treated and 1/(1 - p_s) for controls,
p_s the stratum's realised treated share, stratum dummies as exogenous regressors;
``fit(cov_type="robust" | "clustered", debiased=True)``), 1e-9 relative for estimates and 1e-6
for standard errors (sums accumulated by DuckDB in another order).  Invented data (fixed seeds).
"""

from __future__ import annotations

from datetime import date, timedelta

import duckdb
import numpy as np
import pandas as pd
import pytest
from linearmodels.iv import IV2SLS

from takeup.pipeline.ingest.batch import ingest_file
from takeup.pipeline.pseudonym import load_key
from takeup.pipeline.run.stages import run_monitoring
from takeup.pipeline.warehouse import connect, init_warehouse
from takeup.schemas.config import ConfigError, StudyConfig, parse_config
from tests.conftest import write_csv

START = date(2026, 3, 2)
AS_OF = date(2026, 8, 30)


def _ingest(path, file, config):
    con = connect(path)
    try:
        return ingest_file(con, file, load_key(path), config, today=AS_OF)
    finally:
        con.close()


def _q(path, sql, params=None) -> pd.DataFrame:
    con = duckdb.connect(str(path), read_only=True)
    try:
        return con.execute(sql, params or {}).df()
    finally:
        con.close()


# ----------------------------------------------------------------------------- declaring the design
@pytest.mark.parametrize("value", ["0", "1", "1.5", "-0.2"])
def test_probability_outside_zero_one_is_quarantined(warehouse, tmp_path, value):
    f = write_csv(tmp_path / "a.csv", "site_id,participant_id,arm,assigned_on,stratum,assignment_probability",
                  f"S1,p1,treatment,2026-03-02,w1,{value}", "S1,p2,control,2026-03-02,w1,0.4")
    rep = _ingest(warehouse, f, StudyConfig())
    assert rep.rows_loaded == 1 and rep.reasons == {"out_of_range": 1}
    q = _q(warehouse, "SELECT * FROM quarantine")
    assert q.field.tolist() == ["assignment_probability"] and q.source_row.tolist() == [2]
    assert q.offending_value.tolist() == [value]


def test_conflicting_probability_within_a_stratum(warehouse, tmp_path):
    header = "site_id,participant_id,arm,assigned_on,stratum,assignment_probability"
    first = write_csv(tmp_path / "a1.csv", header, "S1,p1,treatment,2026-03-02,w1,0.5",
                      "S1,p2,control,2026-03-02,w1,0.5", "S1,p3,control,2026-03-09,w2,0.8",
                      "S1,p4,control,2026-03-09,w2,")
    rep = _ingest(warehouse, first, StudyConfig())
    assert rep.rows_loaded == 4 and rep.rows_quarantined == 0
    # against the stored value of w1; the same value in another site or stratum is fine
    second = write_csv(tmp_path / "a2.csv", header, "S1,p5,treatment,2026-03-02,w1,0.6",
                       "S1,p6,treatment,2026-03-02,w1,0.5", "S2,p7,treatment,2026-03-02,w1,0.6")
    rep = _ingest(warehouse, second, StudyConfig())
    assert rep.rows_loaded == 2 and rep.reasons == {"conflicting_probability": 1}
    q = _q(warehouse, "SELECT * FROM quarantine")
    assert q.source_row.tolist() == [2] and q.offending_value.tolist() == ["0.6"]
    # two values in one file for a new stratum: which is right cannot be told, both are held back
    third = write_csv(tmp_path / "a3.csv", header, "S1,p8,treatment,2026-03-16,w3,0.3",
                      "S1,p9,control,2026-03-16,w3,0.4", "S1,p10,control,2026-03-16,w3,")
    rep = _ingest(warehouse, third, StudyConfig())
    assert rep.rows_loaded == 1 and rep.reasons == {"conflicting_probability": 2}
    assert rep.rows_read == rep.rows_loaded + rep.rows_quarantined + rep.rows_duplicate


def test_config_strata_are_checked_with_a_clear_message():
    cfg = parse_config({"sites": [{"site_id": "S1", "strata": {"g1": 0.3, "g2": 0.6}}]})
    assert cfg.stratum_design("S1", "g1") == 0.3 and cfg.stratum_design("S1", "g9") is None
    assert cfg.stratum_design("S2", "anything") == 0.5          # no strata table: the site's allocation
    with pytest.raises(ConfigError, match=r"sites\[0\]\.strata.*'g2'.*strictly between 0 and 1"):
        parse_config({"sites": [{"site_id": "S1", "strata": {"g1": 0.3, "g2": 1.0}}]})
    # configurations without strata keep the hash they had before strata existed
    assert '"strata"' not in parse_config({"sites": [{"site_id": "S1"}]}).canonical_json()


def test_existing_warehouse_gains_the_new_column_on_open(warehouse):
    con = duckdb.connect(str(warehouse))
    con.execute("ALTER TABLE assignments DROP COLUMN assignment_probability")
    con.close()
    con = connect(warehouse)
    try:
        cols = [r[0] for r in con.execute("SELECT column_name FROM information_schema.columns "
                                          "WHERE table_name = 'assignments'").fetchall()]
    finally:
        con.close()
    assert "assignment_probability" in cols


# ----------------------------------------------------------------------------- the whole path
def _simulate(seed: int, clusters: bool = False) -> pd.DataFrame:
    """Three sites: S1 and S2 randomise weekly with changing odds (strata), S3 without strata."""
    rng = np.random.default_rng(seed)
    rows = []
    plan = {"S1": (0.5, 0.5, 0.8, 0.8), "S2": (0.3, 0.6, 0.45), "S3": (0.5,)}
    for site, odds in plan.items():
        for k, p in enumerate(odds):
            n = 160
            stratum = f"week-{k + 1:02d}" if len(odds) > 1 else ""
            if clusters:
                cl = rng.integers(0, 12, n)
                zc = rng.permutation(12) < round(12 * p)
                z = zc[cl].astype(int)
                cluster = [f"{site}-{stratum}-g{c}" for c in cl]
            else:
                z = (rng.permutation(n) < round(n * p)).astype(int)
                cluster = [""] * n
            comp = rng.random(n) < 0.6
            always = rng.random(n) < 0.1
            d = np.where(always, 1, np.where(comp, z, 0))
            x1 = np.round(rng.normal(30, 8, n), 3)
            x2 = np.round(rng.normal(0, 1, n) + 0.5 * k, 3)
            y = 40 + 6 * k + (5 + k) * d + 0.2 * x1 - x2 + rng.normal(0, 4, n)
            for i in range(n):
                rows.append((site, f"{site}-{k}-{i}", z[i], d[i], round(float(y[i]), 6), stratum, p, cluster[i],
                             START + timedelta(weeks=k), x1[i], x2[i]))
    return pd.DataFrame(rows, columns=["site_id", "pid", "z", "d", "y", "stratum", "p", "cluster", "assigned_on",
                                       "x1", "x2"])


def _load(tmp_path, key_env, df: pd.DataFrame, config: StudyConfig, declare: bool = True):
    path = tmp_path / "s.duckdb"
    init_warehouse(path, config)
    a = pd.DataFrame({"site_id": df.site_id, "participant_id": df.pid,
                      "arm": np.where(df.z == 1, "treatment", "control"),
                      "assigned_on": [d.isoformat() for d in df.assigned_on],
                      "stratum": df.stratum.replace("", None)})
    if declare:
        a["assignment_probability"] = np.where(df.stratum != "", df.p, np.nan)
    if (df.cluster != "").any():
        a["cluster_id"] = df.cluster
    if config.covariates:
        a["x1"], a["x2"] = df.x1, df.x2
    a.to_csv(tmp_path / "assign.csv", index=False)
    u = pd.DataFrame({"site_id": df.site_id, "participant_id": df.pid,
                      "observed_on": [(d + timedelta(days=7)).isoformat() for d in df.assigned_on],
                      "took_up": df.d})
    u.to_csv(tmp_path / "uptake.csv", index=False)
    o = pd.DataFrame({"site_id": df.site_id, "participant_id": df.pid, "outcome": "score",
                      "measured_on": [(d + timedelta(days=40)).isoformat() for d in df.assigned_on],
                      "value": df.y})
    o.to_csv(tmp_path / "outcome.csv", index=False)
    for name in ("assign.csv", "uptake.csv", "outcome.csv"):
        rep = _ingest(path, tmp_path / name, config)
        assert rep.status == "loaded" and rep.rows_quarantined == 0, rep
    return path


def _reference(df: pd.DataFrame, site: str, **fit):
    s = df[df.site_id == site]
    z, d, y = s.z.to_numpy(float), s.d.to_numpy(float), s.y.to_numpy(float)
    ph = s.groupby("stratum").z.transform("mean").to_numpy()
    w = np.where(z == 1, 1 / ph, 1 / (1 - ph))
    dum = pd.get_dummies(s.stratum).astype(float).to_numpy()
    if "clusters" in fit:
        fit = {**fit, "clusters": pd.factorize(s.cluster)[0]}
    return IV2SLS(y, dum, d[:, None], z[:, None], weights=w).fit(debiased=True, **fit)


def _config(**kw) -> StudyConfig:
    return parse_config({"outcomes": [{"name": "score", "primary": True}],
                         "follow_up": {"min_days": 0, "max_days": 120}, **kw})


def test_site_estimates_equal_linearmodels_through_the_whole_path(tmp_path, key_env):
    df = _simulate(31)
    path = _load(tmp_path, key_env, df, _config())
    run = run_monitoring(path, as_of=AS_OF)
    se = _q(path, "SELECT * FROM site_estimates WHERE run_id = $r", {"r": run.run_id})
    specs = se.groupby("site_id").spec.apply(set).to_dict()
    assert specs == {"S1": {"stratified", "unstratified"}, "S2": {"stratified", "unstratified"},
                     "S3": {"unadjusted"}}
    rows = se.set_index(["site_id", "spec"])
    for site, n_strata in (("S1", 4), ("S2", 3)):
        ref = _reference(df, site, cov_type="robust")
        r = rows.loc[(site, "stratified")]
        assert r.cace == pytest.approx(ref.params.iloc[-1], rel=1e-9)
        assert r.cace_se == pytest.approx(ref.std_errors.iloc[-1], rel=1e-6)
        assert r.first_stage_f == pytest.approx(ref.first_stage.diagnostics["f.stat"].iloc[0], rel=1e-6)
        assert r.n_strata == n_strata and r.n_strata_dropped == 0 and r.included_in_pool
        u = rows.loc[(site, "unstratified")]
        s = df[df.site_id == site]
        plain = IV2SLS(s.y.to_numpy(), np.ones(len(s)), s.d.to_numpy(float), s.z.to_numpy(float)).fit(
            cov_type="robust", debiased=True)
        assert u.cace == pytest.approx(plain.params.iloc[-1], rel=1e-9) and not u.included_in_pool
    assert pd.isna(rows.loc[("S3", "unadjusted"), "n_strata"])
    # pooling uses the stratified rows
    pooled = _q(path, "SELECT * FROM pooled_estimates WHERE run_id = $r AND quantity = 'cace' AND method = 'fixed' "
                      "AND group_field IS NULL", {"r": run.run_id})
    est = [rows.loc[("S1", "stratified")], rows.loc[("S2", "stratified")], rows.loc[("S3", "unadjusted")]]
    w = np.array([1 / r.cace_se ** 2 for r in est])
    assert pooled.estimate.iloc[0] == pytest.approx(np.dot(w, [r.cace for r in est]) / w.sum(), rel=1e-9)
    # declared odds fit: no sample-ratio alert
    alerts = _q(path, "SELECT * FROM alerts WHERE run_id = $r", {"r": run.run_id})
    assert "sample_ratio_mismatch" not in set(alerts.rule)


def test_cluster_randomised_strata_equal_linearmodels_clustered(tmp_path, key_env):
    df = _simulate(32, clusters=True)
    path = _load(tmp_path, key_env, df, _config(randomisation_unit="cluster"))
    run = run_monitoring(path, as_of=AS_OF)
    rows = _q(path, "SELECT * FROM site_estimates WHERE run_id = $r", {"r": run.run_id}).set_index(
        ["site_id", "spec"])
    for site in ("S1", "S2"):
        ref = _reference(df, site, cov_type="clustered", clusters=True)
        r = rows.loc[(site, "stratified")]
        assert r.se_type == "CR1"
        assert r.cace == pytest.approx(ref.params.iloc[-1], rel=1e-9)
        assert r.cace_se == pytest.approx(ref.std_errors.iloc[-1], rel=1e-6)


def test_per_stratum_sample_ratio_alert_names_the_stratum(tmp_path, key_env):
    """Odds declared in the config only; S2's week-02 actually ran at 0.6 against a designed 0.2."""
    df = _simulate(33)
    config = _config(sites=[{"site_id": "S1"},
                            {"site_id": "S2", "strata": {"week-01": 0.3, "week-02": 0.2, "week-03": 0.45}},
                            {"site_id": "S3"}],
                     alerts={"srm_p_value": 0.001})
    path = _load(tmp_path, key_env, df, config, declare=False)
    run = run_monitoring(path, as_of=AS_OF)
    alerts = _q(path, "SELECT * FROM alerts WHERE run_id = $r AND rule = 'sample_ratio_mismatch'",
                {"r": run.run_id})
    # S1 has no strata table: its strata have the site's allocation (0.5), and weeks 3-4 ran at 0.8
    assert set(alerts.site_id) == {"S1", "S2"}
    msg = alerts.set_index("site_id").message
    assert "Stratum week-02 contributes most" in msg["S2"] and "summed over 3 strata" in msg["S2"]
    assert "designed 20%" in msg["S2"]


def test_degenerate_strata_through_the_path_and_the_report(tmp_path, key_env):
    """A stratum with treated only and a stratum with a single control: left out with a note; no exception."""
    df = _simulate(34)
    extra = pd.DataFrame({"site_id": "S2", "pid": [f"x{i}" for i in range(5)], "z": [1, 1, 1, 1, 0],
                          "d": [1, 0, 1, 1, 0], "y": [50.0, 51, 52, 53, 54],
                          "stratum": ["lone", "lone", "tiny", "tiny", "tiny"], "p": 0.5, "cluster": "",
                          "assigned_on": START})
    # S4: each stratum has one arm only (the site as a whole has both): no usable stratum
    lone = pd.DataFrame({"site_id": "S4", "pid": [f"y{i}" for i in range(8)], "z": [1, 1, 1, 1, 0, 0, 0, 0],
                         "d": [1, 1, 0, 1, 0, 0, 1, 0], "y": np.arange(8.0) + 40,
                         "stratum": ["a"] * 4 + ["b"] * 4, "p": 0.5, "cluster": "", "assigned_on": START})
    df = pd.concat([df, extra, lone], ignore_index=True)
    path = _load(tmp_path, key_env, df, _config())
    run = run_monitoring(path, as_of=AS_OF)
    r = _q(path, "SELECT * FROM site_estimates WHERE run_id = $r AND site_id = 'S2' AND spec = 'stratified'",
           {"r": run.run_id}).iloc[0]
    assert r.n_strata == 3 and r.n_strata_dropped == 2
    assert "2 of 5 strata left out" in r.note and "5 participants not used" in r.note
    ref = _reference(df[~df.stratum.isin(["lone", "tiny"])], "S2", cov_type="robust")
    assert r.cace == pytest.approx(ref.params.iloc[-1], rel=1e-9)
    s4 = _q(path, "SELECT * FROM site_estimates WHERE run_id = $r AND site_id = 'S4'", {"r": run.run_id}
            ).set_index("spec")
    r4 = s4.loc["stratified"]
    assert r4.status == "no_usable_strata" and pd.isna(r4.cace) and not r4.included_in_pool
    assert "2 of 2 strata left out" in r4.note and "8 participants not used" in r4.note
    assert s4.loc["unstratified", "cace"] == pytest.approx(
        (np.mean([43, 42, 41, 40][::-1]) - np.mean([44, 45, 46, 47])) / (0.75 - 0.25), rel=1e-9)
    from takeup.pipeline.outputs.report.html import render_report
    con = connect(path)
    try:
        out = render_report(con, tmp_path / "report.html")
    finally:
        con.close()
    text = out.read_text()
    assert "stratified over 3 strata; unstratified" in text


def test_covariate_adjusted_rows_centre_within_strata(tmp_path, key_env):
    """Covariate-adjusted 2SLS within strata = linearmodels IV2SLS of Y on D, X and the stratum dummies
    (instruments Z, X, dummies), robust, debiased (n/(n - p - 1 - S)); a site without strata keeps (1, X)."""
    df = _simulate(35)
    config = _config(covariates=["x1", "x2"], estimation={"adjust_covariates": True})
    path = _load(tmp_path, key_env, df, config)
    run = run_monitoring(path, as_of=AS_OF)
    rows = _q(path, "SELECT * FROM site_estimates WHERE run_id = $r AND spec = 'covariate_adjusted'",
              {"r": run.run_id}).set_index("site_id")
    for site in ("S1", "S2", "S3"):
        s = df[df.site_id == site]
        fe = (pd.get_dummies(s.stratum).astype(float).to_numpy() if site != "S3" else np.ones((len(s), 1)))
        exog = np.column_stack([fe, s.x1, s.x2])
        ref = IV2SLS(s.y.to_numpy(), exog, s.d.to_numpy(float), s.z.to_numpy(float)).fit(cov_type="robust",
                                                                                         debiased=True)
        r = rows.loc[site]
        assert r.cace == pytest.approx(ref.params.iloc[-1], rel=1e-9)
        assert r.cace_se == pytest.approx(ref.std_errors.iloc[-1], rel=1e-6)
        if site != "S3":
            assert "randomisation strata" in r.note
