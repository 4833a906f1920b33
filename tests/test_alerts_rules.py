"""Tests of takeup.pipeline.run.alert_rules (alert rules and their new/ongoing/resolved lifecycle).

External references, named beside each check: scipy.stats.chisquare (Pearson
goodness of fit, sample-ratio mismatch), statsmodels proportions_ztest
(pooled two-proportion z test), statsmodels multipletests(method="fdr_bh")
(Benjamini & Hochberg 1995), statsmodels OLS with HC0 errors (Wald test of a
difference of two first stages as an interaction in a saturated linear
probability model), scipy.stats.norm (one-sided z test).  All frames are
small hand-built RunInputs; invented data only where the truth is known.
"""

from __future__ import annotations

import math
from datetime import date, timedelta

import numpy as np
import pandas as pd
import pytest
import statsmodels.api as sm
from scipy import stats
from statsmodels.stats.multitest import multipletests
from statsmodels.stats.proportion import proportions_ztest

from takeup.pipeline.run.alert_rules import SEVERITY, alert_key, apply_lifecycle, compute_alerts
from takeup.pipeline.run.inputs import RunContext, RunInputs
from takeup.pipeline.run.trend_rows import detect_drift
from takeup.schemas.config import StudyConfig
from takeup.schemas.results import AlertRow

START = date(2026, 1, 5)
AS_OF = date(2026, 4, 30)
OUTCOME = "score"


def week(i: int) -> date:
    return START + timedelta(weeks=i)


def counts_frame(rows) -> pd.DataFrame:
    """rows: (site, z, period index, n_assigned, n_observed, n_taken_up)."""
    return pd.DataFrame([(s, z, pd.Timestamp(week(p)), a, o, t) for s, z, p, a, o, t in rows],
                        columns=["site_id", "z", "period_start", "n_assigned", "n_observed", "n_taken_up"])


def balanced_counts(sites, periods=8, n=20, up_t=14, up_c=2) -> list[tuple]:
    return [(s, z, p, n, n, up_t if z else up_c) for s in sites for p in range(periods) for z in (0, 1)]


def activity(sites, last=AS_OF) -> pd.DataFrame:
    return pd.DataFrame({"site_id": list(sites), "last_record_on": [pd.Timestamp(last)] * len(sites),
                         "last_received_at": [pd.Timestamp(last)] * len(sites), "n_batches": [3] * len(sites)})


def make_config(sites=(), sequential: dict | None = None, **alerts) -> StudyConfig:
    """A study config; the alert tests per run by default (the references here are fixed-sample tests).

    ``tests/test_alert_p_values.py`` checks the anytime-valid p-values built on the same statistics.
    """
    data = {"outcomes": [{"name": OUTCOME, "primary": True}], "sites": [{"site_id": s} if isinstance(s, str) else s
                                                                         for s in sites],
            "sequential": sequential if sequential is not None else {"alert_tests": "per_run"}}
    if alerts:
        data["alerts"] = alerts
    return StudyConfig.model_validate(data)


def make_ctx(config: StudyConfig, run_id: str = "r2") -> RunContext:
    now = pd.Timestamp(AS_OF).to_pydatetime()
    return RunContext(run_id=run_id, as_of=AS_OF, started_at=now, data_cutoff=now, config=config)


def make_inputs(cohort: pd.DataFrame, act: pd.DataFrame | None = None, previous: pd.DataFrame | None = None,
                previous_run_id: str | None = None) -> RunInputs:
    sites = tuple(sorted(cohort.site_id.unique())) if len(cohort) else ()
    empty = pd.DataFrame()
    return RunInputs(sites=sites, outcomes=(OUTCOME,), moments=empty, clusters=None, covariate_cells=empty,
                     cohort_counts=cohort, calendar_counts=cohort, site_activity=act if act is not None else
                     activity(sites), previous_alerts=previous if previous is not None else pd.DataFrame(),
                     previous_run_id=previous_run_id, n_batches=1, input_fingerprint="x")


def site_row(site, *, f=200.0, share=0.6, se=0.05, nt=50, nc=50, nta=50, nca=50, cace=5.0, cace_se=1.0,
             pooled=True, status="ok") -> dict:
    return {"run_id": "r2", "site_id": site, "outcome": OUTCOME, "spec": "unadjusted", "first_stage_f": f,
            "complier_share": share, "complier_share_se": se, "n_treatment": nt, "n_control": nc,
            "n_treatment_assigned": nta, "n_control_assigned": nca, "missing_outcome_treatment": nta - nt,
            "missing_outcome_control": nca - nc, "cace": cace, "cace_se": cace_se, "included_in_pool": pooled,
            "status": status}


def run(cohort_rows, site_rows=(), pooled=(), influence=(), config=None, drift=None, **kw):
    cohort = counts_frame(cohort_rows)
    config = config or make_config()
    ctx = make_ctx(config)
    inputs = make_inputs(cohort, **kw)
    rows = compute_alerts(inputs, ctx, list(site_rows), list(pooled), list(influence),
                          drift if drift is not None else detect_drift(cohort.iloc[0:0], 4, 3.0, 2000.0))
    for r in rows:
        AlertRow(**r)  # exact contract columns
        for k, v in r.items():
            if isinstance(v, float):
                assert math.isfinite(v), (k, r)
    return rows


def by_rule(rows, rule):
    return {r["site_id"]: r for r in rows if r["rule"] == rule}


# ----------------------------------------------------------------------------- sample ratio
def test_sample_ratio_mismatch_matches_scipy_chisquare():
    rows = balanced_counts(["A", "B"])
    rows += [("M", 1, p, 35, 35, 20) for p in range(8)] + [("M", 0, p, 15, 15, 1) for p in range(8)]
    # site D is designed 2:1 and runs 2:1 -> no alarm; site E is designed 2:1 but runs 1:1 -> alarm
    rows += [("D", 1, p, 40, 40, 20) for p in range(8)] + [("D", 0, p, 20, 20, 1) for p in range(8)]
    rows += [("E", 1, p, 30, 30, 20) for p in range(8)] + [("E", 0, p, 30, 30, 1) for p in range(8)]
    cfg = make_config(sites=["A", "B", "M", {"site_id": "D", "allocation": {"treatment": 2 / 3, "control": 1 / 3}},
                             {"site_id": "E", "allocation": {"treatment": 2 / 3, "control": 1 / 3}}])
    out = by_rule(run(rows, config=cfg), "sample_ratio_mismatch")
    assert set(out) == {"M", "E"}
    for site, (n_t, n_c, share) in {"M": (280, 120, 0.5), "E": (240, 240, 2 / 3)}.items():
        n = n_t + n_c
        ref = stats.chisquare([n_t, n_c], f_exp=[n * share, n * (1 - share)])   # scipy reference
        assert out[site]["p_value"] == pytest.approx(ref.pvalue, rel=1e-9)       # same formula: rounding only
        assert f"{ref.statistic:.1f}" in out[site]["message"]
        assert out[site]["value"] == pytest.approx(n_t / n, abs=1e-12)
        assert out[site]["threshold"] == 0.001 and out[site]["severity"] == "critical"


# ----------------------------------------------------------------------------- missing outcomes + BH
def test_differential_missing_matches_proportions_ztest_and_fdr_bh():
    specs = {  # site: (n assigned T, observed T, n assigned C, observed C)
        "A": (100, 96, 100, 95), "B": (100, 95, 100, 60), "C": (80, 70, 80, 62), "D": (120, 110, 118, 96),
        "E": (60, 58, 60, 57), "F": (90, 88, 90, 70),
    }
    site_rows = [site_row(s, nta=a, nt=o, nca=ac, nc=oc) for s, (a, o, ac, oc) in specs.items()]
    # not eligible: no outcomes measured yet (everyone "missing" in both arms) and a one-arm site
    site_rows.append(site_row("NEW", nta=40, nt=0, nca=40, nc=0, status="no_outcomes", f=50.0))
    site_rows.append(site_row("ONE", nta=40, nt=20, nca=0, nc=0, f=None, share=None, se=None))
    rows = balanced_counts(list(specs) + ["NEW"]) + [("ONE", 1, p, 5, 5, 3) for p in range(8)]
    out = by_rule(run(rows, site_rows), "differential_missing_outcomes")
    # statsmodels reference: pooled two-proportion z test of missing shares, then BH across the 6 sites
    raw = []
    for s, (a, o, ac, oc) in specs.items():
        _, p = proportions_ztest([a - o, ac - oc], [a, ac])
        raw.append(p)
    reject, adj, _, _ = multipletests(raw, alpha=0.05, method="fdr_bh")
    expected = {s for s, r in zip(specs, reject) if r}
    assert set(out) == expected and expected  # some raised, some not
    assert len(expected) < len(specs)
    for s, p in zip(specs, adj):
        if s in out:
            # identical formulas; tolerance only for floating-point rounding
            assert out[s]["p_value"] == pytest.approx(p, rel=1e-9)
            assert out[s]["outcome"] == OUTCOME and out[s]["threshold"] == 0.05
    assert "NEW" not in out and "ONE" not in out


# ----------------------------------------------------------------------------- first stage
def test_negative_first_stage_one_sided_test_with_bh_only():
    shares = {"A": (0.6, 0.05), "B": (-0.15, 0.05), "C": (-0.04, 0.05), "D": (0.02, 0.2), "E": (-0.3, 0.12)}
    site_rows = [site_row(s, share=sh, se=se, f=(sh / se) ** 2) for s, (sh, se) in shares.items()]
    out = by_rule(run(balanced_counts(list(shares)), site_rows), "negative_first_stage")
    p_raw = [stats.norm.cdf(sh / se) for sh, se in shares.values()]    # H1: share < 0 (scipy normal cdf)
    reject, adj, _, _ = multipletests(p_raw, alpha=0.05, method="fdr_bh")   # statsmodels BH reference
    assert set(out) == {s for s, r in zip(shares, reject) if r}
    assert "C" not in out and "A" not in out
    for s, p in zip(shares, adj):
        if s in out:
            assert out[s]["p_value"] == pytest.approx(p, rel=1e-9)   # same formula: rounding only
            assert out[s]["p_value"] <= out[s]["threshold"]          # the reported p is the one compared
            assert out[s]["severity"] == "critical"


def test_negative_first_stage_f_floor_does_not_bypass_bh():
    # 29 strong sites and one negative site with F = 4 (one-sided p = 0.023): the F floor alone would
    # have raised it; BH across the 30 sites (statsmodels reference) does not.
    site_rows = [site_row(f"S{i:02d}", share=0.6, se=0.05, f=144.0) for i in range(29)]
    site_rows.append(site_row("NEG", share=-0.1, se=0.05, f=4.0))
    p_raw = [stats.norm.cdf(12.0)] * 29 + [stats.norm.cdf(-2.0)]
    reject, _, _, _ = multipletests(p_raw, alpha=0.05, method="fdr_bh")
    sites = [r["site_id"] for r in site_rows]
    for floor in (0.0, 3.8416):                  # the floor only gates the tested family
        cfg = make_config(negative_first_stage_min_f=floor)
        out = by_rule(run(balanced_counts(sites), site_rows, config=cfg), "negative_first_stage")
        assert not reject.any() and out == {}


def test_negative_first_stage_uses_t_reference_under_cr1():
    # same z = -3 but G = 6 clusters (ci_df = 5): the one-sided p-value is t(5)'s (scipy), not the normal's
    rows = [dict(site_row("K", share=-0.3, se=0.1, f=9.0), ci_df=5)]
    out = by_rule(run(balanced_counts(["K"]), rows), "negative_first_stage")
    assert out["K"]["p_value"] == pytest.approx(stats.t.cdf(-3.0, 5), rel=1e-9) and "t(5)" in out["K"]["message"]


def test_weak_first_stage_rule_of_thumb_and_message():
    site_rows = [site_row("A", f=9.99), site_row("B", f=10.0), site_row("C", f=2.5, status="no_outcomes")]
    out = by_rule(run(balanced_counts(["A", "B", "C"]), site_rows), "weak_first_stage")
    # Staiger & Stock (1997) rule of thumb: weak when F < 10 (strict)
    assert set(out) == {"A", "C"}
    assert out["A"]["value"] == 9.99 and out["A"]["threshold"] == 10.0
    assert "104.7" in out["A"]["message"] and "tF" in out["A"]["message"]
    assert "no outcome measurements yet" in out["C"]["message"]


def expand(counts: dict) -> pd.DataFrame:
    """Participant-level frame from cell counts {(z, recent): (n, x)} (tiny, for the OLS reference)."""
    parts = []
    for (z, recent), (n, x) in counts.items():
        d = np.r_[np.ones(x), np.zeros(n - x)]
        parts.append(pd.DataFrame({"z": z, "recent": recent, "d": d}))
    return pd.concat(parts, ignore_index=True)


def test_first_stage_decline_matches_interaction_wald_test_and_bh():
    # per site: early periods 0-3 and recent periods 4-7 (first_stage_decline_periods = 4)
    sites = {"A": (14, 2, 14, 2), "B": (14, 2, 6, 2), "C": (14, 2, 12, 3), "D": (15, 1, 8, 4)}
    rows = []
    for s, (te, ce, tr, cr) in sites.items():
        for p in range(8):
            rows += [(s, 1, p, 20, 20, te if p < 4 else tr), (s, 0, p, 20, 20, ce if p < 4 else cr)]
    out = by_rule(run(rows), "first_stage_decline")
    raw = []
    for s, (te, ce, tr, cr) in sites.items():
        df = expand({(1, 0): (80, 4 * te), (0, 0): (80, 4 * ce), (1, 1): (80, 4 * tr), (0, 1): (80, 4 * cr)})
        X = sm.add_constant(np.column_stack([df.z, df.recent, df.z * df.recent]).astype(float))
        fit = sm.OLS(df.d.to_numpy(float), X).fit(cov_type="HC0")   # statsmodels reference
        raw.append(stats.norm.cdf(fit.tvalues[3]))                  # one-sided: interaction < 0
    reject, adj, _, _ = multipletests(raw, alpha=0.05, method="fdr_bh")
    assert set(out) == {s for s, r in zip(sites, reject) if r} == {"B", "D"}
    for s, p in zip(sites, adj):
        if s in out:
            # same Wald statistic computed two ways (OLS sandwich vs closed form): 1e-8 relative
            assert out[s]["p_value"] == pytest.approx(p, rel=1e-8)
            assert out[s]["value"] < 0 and str(week(4)) in out[s]["message"]


# ----------------------------------------------------------------------------- drift, stale, outliers
def test_drift_alerts_carry_evidence():
    rng = np.random.default_rng(7)  # simulation with known truth: control uptake 0.08 -> 0.40 from period 6
    rows = []
    for p in range(12):
        rows.append(("K", 0, p, 40, 40, int(rng.binomial(40, 0.08 if p < 6 else 0.40))))
        rows.append(("K", 1, p, 40, 40, int(rng.binomial(40, 0.70))))
    cohort = counts_frame(rows)
    drift = detect_drift(cohort, 4, 3.0, 2000.0)
    out = run(rows, drift=drift)
    ctrl = by_rule(out, "control_uptake_drift")
    assert set(ctrl) == {"K"} and not by_rule(out, "treatment_uptake_drift")
    i = drift.index("K", "control")
    a = ctrl["K"]
    assert a["value"] == pytest.approx(drift.peak_statistic[i]) and a["value"] >= a["threshold"]
    assert a["threshold"] == pytest.approx(drift.h[i]) and a["outcome"] is None
    assert f"{100 * drift.recent_uptake[i]:.0f}%" in a["message"]
    assert str(drift.first_signal_period[i]) in a["message"]


def test_stale_sites_including_registry_sites_without_data():
    rows = balanced_counts(["A", "B"])
    act = pd.DataFrame({"site_id": ["A", "B"], "last_record_on": [pd.Timestamp(AS_OF - timedelta(days=15)),
                                                                  pd.Timestamp(AS_OF - timedelta(days=14))],
                        "last_received_at": [pd.Timestamp(AS_OF)] * 2, "n_batches": [1, 1]})
    out = by_rule(run(rows, config=make_config(sites=["A", "B", "Z"]), act=act), "stale_site")
    assert set(out) == {"A", "Z"}                 # 15 > 14 days; 14 days is not older than 14
    assert out["A"]["value"] == 15 and out["A"]["threshold"] == 14
    assert out["Z"]["value"] is None and "No records" in out["Z"]["message"]


# outlier_site: tests/test_alerts_outlier.py


# ----------------------------------------------------------------------------- lifecycle
def prev_frame(rows: list[dict]) -> pd.DataFrame:
    return pd.DataFrame(rows, columns=list(AlertRow.model_fields))


def test_lifecycle_new_ongoing_resolved_new_again():
    found = [{"rule": "stale_site", "site_id": "A", "outcome": None, "value": 20.0, "threshold": 14.0,
              "p_value": None, "message": "stale"}]
    key = alert_key("stale_site", "A", None)
    # run 1: nothing before -> new
    r1 = apply_lifecycle(found, pd.DataFrame(), "r1")
    assert [(r["status"], r["first_seen_run_id"], r["last_seen_run_id"]) for r in r1] == [("new", "r1", "r1")]
    assert r1[0]["alert_key"] == key and r1[0]["severity"] == SEVERITY["stale_site"]
    # run 2: active before -> ongoing, keeps first seen
    r2 = apply_lifecycle(found, prev_frame(r1), "r2")
    assert [(r["status"], r["first_seen_run_id"], r["last_seen_run_id"]) for r in r2] == [("ongoing", "r1", "r2")]
    # run 3: condition gone -> one resolved row with the previous values
    r3 = apply_lifecycle([], prev_frame(r2), "r3")
    assert len(r3) == 1
    res = r3[0]
    assert (res["status"], res["run_id"], res["first_seen_run_id"], res["last_seen_run_id"]) == \
        ("resolved", "r3", "r1", "r2")
    assert res["value"] == 20.0 and res["threshold"] == 14.0 and res["message"].startswith("resolved: ")
    # run 4: still gone -> resolved alerts are not repeated
    assert apply_lifecycle([], prev_frame(r3), "r4") == []
    # run 4': fires again after being resolved -> new with a new first seen
    r4 = apply_lifecycle(found, prev_frame(r3), "r4")
    assert [(r["status"], r["first_seen_run_id"]) for r in r4] == [("new", "r4")]
    for r in r1 + r2 + r3 + r4:
        AlertRow(**r)


def test_compute_alerts_uses_previous_run_frame():
    rows = balanced_counts(["A"])
    act = activity(["A"], last=AS_OF - timedelta(days=30))
    prev = prev_frame([
        {"run_id": "r1", "alert_key": alert_key("stale_site", "A", None), "site_id": "A", "outcome": None,
         "rule": "stale_site", "severity": "warning", "status": "new", "value": 16.0, "threshold": 14.0,
         "p_value": None, "first_seen_run_id": "r0", "last_seen_run_id": "r1", "message": "old"},
        {"run_id": "r1", "alert_key": alert_key("weak_first_stage", "A", OUTCOME), "site_id": "A",
         "outcome": OUTCOME, "rule": "weak_first_stage", "severity": "warning", "status": "ongoing",
         "value": 4.0, "threshold": 10.0, "p_value": None, "first_seen_run_id": "r0", "last_seen_run_id": "r1",
         "message": "weak"},
    ])
    out = run(rows, [site_row("A")], act=act, previous=prev, previous_run_id="r1")
    got = {r["rule"]: r for r in out}
    assert got["stale_site"]["status"] == "ongoing" and got["stale_site"]["first_seen_run_id"] == "r0"
    assert got["stale_site"]["value"] == 30
    assert got["weak_first_stage"]["status"] == "resolved" and got["weak_first_stage"]["value"] == 4.0


# ----------------------------------------------------------------------------- bad data
def test_bad_data_defined_output():
    rows = [("ONE", 1, p, 10, 10, 7) for p in range(8)]                    # one arm only
    rows += [("GAP", z, p, 10, 10, 7 if z else 1) for p in (0, 1, 5, 6, 7, 8) for z in (0, 1)]  # gap
    rows += [("GAP", z, 9, 0, 0, 0) for z in (0, 1)]                       # a period with no assignments
    rows += [("NEW", z, 8, 12, 0, 0) for z in (0, 1)]                      # no uptake reports yet
    site_rows = [site_row("ONE", f=None, share=None, se=None, nca=0, nc=0, nta=80, nt=0, cace=None,
                          cace_se=None, pooled=False, status="one_arm"),
                 site_row("GAP", f=30.0, nta=60, nt=0, nca=60, nc=0, cace=None, cace_se=None, pooled=False,
                          status="no_outcomes"),
                 site_row("NEW", f=None, share=None, se=None, nta=12, nt=0, nca=12, nc=0, cace=None,
                          cace_se=None, pooled=False, status="no_outcomes")]
    cohort = counts_frame(rows)
    drift = detect_drift(cohort, 4, 3.0, 2000.0)
    out = run(rows, site_rows, drift=drift)
    rules = {(r["site_id"], r["rule"]) for r in out}
    assert ("ONE", "sample_ratio_mismatch") in rules                      # 80 vs 0 is a mismatch
    assert not any(r["rule"] == "differential_missing_outcomes" for r in out)  # nothing measured yet
    assert not any(r["rule"] in ("first_stage_decline", "negative_first_stage") for r in out)
    # empty everything
    assert run([], act=pd.DataFrame(columns=["site_id", "last_record_on"])) == []
