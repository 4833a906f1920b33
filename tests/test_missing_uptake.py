"""Missing uptake reports: complete case by default, the old rule on request, bounds and the alert.

Known-truth simulation (fixed seed): 3 sites, individual lottery 50/50, compliance types
always-taker 8% / complier 62% / never-taker 30%, complier effect 6 (true complier share 0.62,
true CACE 6).  20% of the treated arm's uptake reports never arrive, at random.  The files go
through ingestion and a run.  Checks:

* default (``uptake_missing = "complete_case"``): each site's CACE, SE and F equal linearmodels
  ``IV2SLS`` on the complete-case participants (outcome and uptake report present), and the
  estimates recover the truth (within 4 SEs; pooled over sites within 0.03 / 0.6);
* ``uptake_missing = "not_taken_up"``: equal to ``IV2SLS`` with D = 0 for the missing reports (the
  rule of earlier versions), which is biased: complier share about 0.8 x 0.70 - 0.08 = 0.48;
* ``uptake_missing_*`` counts and the worst-case bounds (Manski 1990, from memory) equal the
  counts and formulas applied to the participant data with numpy;
* ``missing_uptake_reports`` is raised for the sites with 20% missing and not for a clean one.
"""

from __future__ import annotations

import duckdb
import numpy as np
import pandas as pd
import pytest
from linearmodels.iv import IV2SLS

from takeup.pipeline.ingest.many_files import ingest_paths
from takeup.pipeline.run.stages import run_monitoring
from takeup.pipeline.warehouse import init_warehouse
from takeup.schemas.config import parse_config

SITES = ("S1", "S2", "S3", "CLEAN")


def simulate(rng):
    rows = []
    for s in SITES:
        n = 1500
        z = (rng.permutation(n) < n // 2).astype(int)
        u = rng.random(n)
        d = np.where(u < 0.08, 1, np.where(u < 0.70, z, 0))
        y = 50 + 6.0 * d + 3 * (u < 0.08) + rng.normal(0, 5, n)
        lost = (z == 1) & (rng.random(n) < 0.20) if s != "CLEAN" else np.zeros(n, bool)
        for i in range(n):
            rows.append((s, f"{s}-{i}", z[i], d[i], round(y[i], 4), lost[i]))
    return pd.DataFrame(rows, columns=["site", "pid", "z", "d", "y", "lost"])


@pytest.fixture(scope="module")
def data(tmp_path_factory):
    return simulate(np.random.default_rng(515))


def _run(tmp_path, df, rule, key_env):
    a = pd.DataFrame({"site_id": df.site, "participant_id": df.pid,
                      "arm": np.where(df.z == 1, "treatment", "control"), "assigned_on": "2026-03-02"})
    keep = ~df.lost
    u = pd.DataFrame({"site_id": df.site[keep], "participant_id": df.pid[keep], "observed_on": "2026-03-10",
                      "took_up": np.where(df.d[keep] == 1, "yes", "no")})
    o = pd.DataFrame({"site_id": df.site, "participant_id": df.pid, "outcome": "y", "measured_on": "2026-05-01",
                      "value": df.y})
    paths = []
    for name, frame in (("a", a), ("u", u), ("o", o)):
        p = tmp_path / f"{name}.csv"
        frame.to_csv(p, index=False)
        paths.append(p)
    cfg = parse_config({"outcomes": [{"name": "y", "primary": True}], "uptake_missing": rule,
                        "follow_up": {"min_days": 30, "max_days": 90}})
    w = tmp_path / "w.duckdb"
    init_warehouse(w, cfg)
    ingest_paths(w, paths)
    summary = run_monitoring(w, as_of=pd.Timestamp("2026-06-30").date())
    with duckdb.connect(str(w), read_only=True) as con:
        est = con.execute("SELECT * FROM site_estimates WHERE run_id = ? ORDER BY site_id",
                          [summary.run_id]).df().set_index("site_id")
        alerts = con.execute("SELECT * FROM alerts WHERE run_id = ?", [summary.run_id]).df()
    return est, alerts, summary


def _iv(frame):
    const = np.ones((len(frame), 1))
    return IV2SLS(frame.y.to_numpy(), const, frame.d.to_numpy(float), frame.z.to_numpy(float)).fit(
        cov_type="robust", debiased=True)


def test_complete_case_equals_iv2sls_and_recovers_truth(tmp_path, key_env, data):
    est, alerts, summary = _run(tmp_path, data, "complete_case", key_env)
    pooled_cs, pooled_cace = [], []
    for s in SITES:
        cc = data[(data.site == s) & ~data.lost]
        fit = _iv(cc)                                                 # linearmodels reference
        row = est.loc[s]
        assert row.cace == pytest.approx(fit.params.iloc[1], rel=1e-9)
        assert row.cace_se == pytest.approx(fit.std_errors.iloc[1], rel=1e-6)
        assert row.first_stage_f == pytest.approx(fit.first_stage.diagnostics["f.stat"].iloc[0], rel=1e-6)
        assert row.n_treatment + row.n_control == len(cc)
        # known truth: complier share 0.62, CACE 6
        assert abs(row.complier_share - 0.62) < 4 * row.complier_share_se
        assert abs(row.cace - 6.0) < 4 * row.cace_se
        pooled_cs.append(row.complier_share)
        pooled_cace.append(row.cace)
        # counts and worst-case bounds from the participant data (numpy)
        site = data[data.site == s]
        mt, mc = int((site.lost & (site.z == 1)).sum()), int((site.lost & (site.z == 0)).sum())
        assert (row.uptake_missing_treatment, row.uptake_missing_control) == (mt, mc)
        nt, nc = int((site.z == 1).sum()), int((site.z == 0).sum())
        xt = int(((site.d == 1) & (site.z == 1) & ~site.lost).sum())
        xc = int(((site.d == 1) & (site.z == 0) & ~site.lost).sum())
        assert row.complier_share_bound_low == pytest.approx(xt / nt - (xc + mc) / nc, abs=1e-12)
        assert row.complier_share_bound_high == pytest.approx((xt + mt) / nt - xc / nc, abs=1e-12)
        assert row.complier_share_bound_low <= row.complier_share <= row.complier_share_bound_high
        if mt:
            assert "no uptake report" in row.note and "complete case" in row.note
    assert abs(np.mean(pooled_cs) - 0.62) < 0.03 and abs(np.mean(pooled_cace) - 6.0) < 0.6
    raised = set(alerts[alerts.rule == "missing_uptake_reports"].site_id)
    assert raised == {"S1", "S2", "S3"}                               # 20% > the 10% threshold; CLEAN not
    msg = alerts[(alerts.rule == "missing_uptake_reports") & (alerts.site_id == "S1")].message.iloc[0]
    assert "complete case" in msg and "bounds" in msg
    # the run summary (printed by `takeup run`) and the report show the missing reports
    lost_t = int((data.lost & (data.z == 1)).sum())
    assert summary.missing_uptake and f"{lost_t} of {int((data.z == 1).sum())} treated" in summary.missing_uptake
    from takeup.pipeline.outputs.report.html import render_report
    out = tmp_path / "report.html"
    with duckdb.connect(str(tmp_path / "w.duckdb"), read_only=True) as con:
        render_report(con, out)
    html = out.read_text()
    table = html[html.index('id="missing-uptake-table"'):]
    table = table[:table.index("</table>")]
    assert all(s in table for s in ("S1", "S2", "S3")) and "CLEAN" not in table


def test_not_taken_up_rule_reproduces_the_old_numbers(tmp_path, key_env, data):
    est, _, _ = _run(tmp_path, data, "not_taken_up", key_env)
    for s in SITES:
        site = data[data.site == s].assign(d=lambda f: np.where(f.lost, 0, f.d))   # no report = not taken up
        fit = _iv(site)                                              # linearmodels reference
        row = est.loc[s]
        assert row.cace == pytest.approx(fit.params.iloc[1], rel=1e-9)
        assert row.cace_se == pytest.approx(fit.std_errors.iloc[1], rel=1e-6)
        assert row.n_treatment + row.n_control == len(site)
    biased = est.loc[["S1", "S2", "S3"]]
    assert biased.complier_share.mean() < 0.52 and biased.cace.mean() > 7.0     # the bias of the old rule
