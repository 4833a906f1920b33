"""Tests of takeup.pipeline.run.trend_rows (uptake trend rows and drift charts).

External references: the trend shares, cumulative shares and the unpooled
binomial standard error of a difference of two proportions are recomputed
directly with numpy from their textbook definitions; the CUSUM path is
recomputed from the recursion of Reynolds & Stoumbos (1999, J. Quality
Technology 31(1)) / Page (1954) with a plain loop.  Simulated data only where
the truth is known (fixed seeds).
"""

from __future__ import annotations

import math
from datetime import date, timedelta

import numpy as np
import pandas as pd
import pytest

from takeup.pipeline.stats.drift.chart import shifted_rate
from takeup.pipeline.run.inputs import RunContext, RunInputs
from takeup.pipeline.run.trend_rows import compute_trends as _compute_trends, detect_drift, round_level, trend_records
from takeup.schemas.config import StudyConfig
from takeup.schemas.results import UptakeTrendRow

START = date(2026, 1, 5)  # a Monday


def week(i: int) -> date:
    return START + timedelta(weeks=i)


def counts_frame(rows) -> pd.DataFrame:
    """rows: (site, z, period index, n_assigned, n_observed, n_taken_up)."""
    return pd.DataFrame(
        [(s, z, pd.Timestamp(week(p)), a, o, t) for s, z, p, a, o, t in rows],
        columns=["site_id", "z", "period_start", "n_assigned", "n_observed", "n_taken_up"])


def compute_trends(inputs, ctx):
    """The stage's rows as records (dicts, nulls as None) and its drift charts."""
    rows, drift = _compute_trends(inputs, ctx)
    return trend_records(rows), drift


def make_inputs(cohort: pd.DataFrame, calendar: pd.DataFrame | None = None) -> RunInputs:
    empty = pd.DataFrame()
    sites = tuple(sorted(cohort.site_id.unique())) if len(cohort) else ()
    return RunInputs(sites=sites, outcomes=(), moments=empty, clusters=None, covariate_cells=empty,
                     cohort_counts=cohort, calendar_counts=calendar if calendar is not None else cohort.iloc[0:0],
                     site_activity=empty, previous_alerts=empty, previous_run_id=None, n_batches=0,
                     input_fingerprint="")


def make_ctx(**alerts) -> RunContext:
    cfg = StudyConfig.model_validate({"alerts": alerts}) if alerts else StudyConfig()
    now = pd.Timestamp("2026-06-01").to_pydatetime()
    return RunContext(run_id="r1", as_of=date(2026, 6, 1), started_at=now, data_cutoff=now, config=cfg)


def assert_rows_clean(rows):
    for r in rows:
        UptakeTrendRow(**r)  # exact columns (extra fields are forbidden), required fields present
        for k, v in r.items():
            if isinstance(v, float):
                assert math.isfinite(v), (k, r)


# ----------------------------------------------------------------------------- trend rows
def random_counts(seed: int, n_sites: int = 3, n_periods: int = 6) -> pd.DataFrame:
    """Invented period counts (fixed seed), some periods with partial uptake reports."""
    rng = np.random.default_rng(seed)
    rows = []
    for s in range(n_sites):
        for z in (0, 1):
            for p in range(n_periods):
                a = int(rng.integers(5, 40))
                o = int(rng.integers(0, a + 1))
                t = int(rng.binomial(o, 0.7 if z else 0.1))
                rows.append((f"S{s}", z, p, a, o, t))
    return counts_frame(rows)


@pytest.mark.parametrize("seed", [1, 2])
def test_cohort_shares_cumulative_and_first_stage_match_numpy(seed):
    cohort = random_counts(seed)
    before = cohort.copy(deep=True)
    rows, _ = compute_trends(make_inputs(cohort), make_ctx())
    pd.testing.assert_frame_equal(cohort, before)          # input not mutated
    assert_rows_clean(rows)
    got = pd.DataFrame([r for r in rows if r["basis"] == "cohort"])
    assert len(got) == len(cohort)
    for (site, z), sub in cohort.groupby(["site_id", "z"]):
        sub = sub.sort_values("period_start")
        arm = "treatment" if z == 1 else "control"
        g = got[(got.site_id == site) & (got.arm == arm)].sort_values("period_start")
        o = sub.n_observed.to_numpy(float)
        t = sub.n_taken_up.to_numpy(float)
        # direct definitions: share among uptake reports; cumulative = pooled over periods so far
        share = np.where(o > 0, t / np.where(o > 0, o, 1), np.nan)
        cum = np.cumsum(t) / np.where(np.cumsum(o) > 0, np.cumsum(o), np.nan)
        gs = g.uptake_share.astype(float).to_numpy()
        gc = g.cumulative_uptake_share.astype(float).to_numpy()
        # exact arithmetic on the same integers: only float rounding (1e-12)
        np.testing.assert_allclose(gs, share, rtol=0, atol=1e-12, equal_nan=True)
        np.testing.assert_allclose(gc, cum, rtol=0, atol=1e-12, equal_nan=True)
        np.testing.assert_array_equal(g.n_assigned.to_numpy(), sub.n_assigned.to_numpy())
        np.testing.assert_array_equal(g.n_taken_up.to_numpy(), sub.n_taken_up.to_numpy())
    # first stage and its unpooled binomial SE: sqrt(pT(1-pT)/nT + pC(1-pC)/nC)
    got["ps"] = pd.to_datetime(got.period_start)
    for (site, ps), sub in cohort.groupby(["site_id", "period_start"]):
        t_row = sub[sub.z == 1].iloc[0]
        c_row = sub[sub.z == 0].iloc[0]
        nt, nc = float(t_row.n_observed), float(c_row.n_observed)
        sel = got[(got.site_id == site) & (got.ps == ps)]
        assert len(sel) == 2
        if nt == 0 or nc == 0:
            assert sel.first_stage.isna().all() and sel.first_stage_se.isna().all()
            continue
        pt, pc = t_row.n_taken_up / nt, c_row.n_taken_up / nc
        se = math.sqrt(pt * (1 - pt) / nt + pc * (1 - pc) / nc)
        # both arm rows carry the same value; float rounding only
        np.testing.assert_allclose(sel.first_stage.astype(float), pt - pc, rtol=0, atol=1e-12)
        np.testing.assert_allclose(sel.first_stage_se.astype(float), se, rtol=0, atol=1e-12)


def test_calendar_basis_cumulative_equals_share():
    cal = random_counts(5, n_sites=2, n_periods=4)
    rows, _ = compute_trends(make_inputs(random_counts(6, 2, 4), cal), make_ctx())
    cal_rows = [r for r in rows if r["basis"] == "calendar"]
    assert len(cal_rows) == len(cal)
    for r in cal_rows:
        assert r["cumulative_uptake_share"] == r["uptake_share"]
        assert r["cusum"] is None and r["cusum_limit"] is None
        src = cal[(cal.site_id == r["site_id"]) & (cal.z == (r["arm"] == "treatment"))
                  & (cal.period_start == pd.Timestamp(r["period_start"]))].iloc[0]
        expect = src.n_taken_up / src.n_observed if src.n_observed > 0 else None
        if expect is None:
            assert r["uptake_share"] is None
        else:
            assert r["uptake_share"] == pytest.approx(expect, abs=1e-12)  # float rounding only


# ----------------------------------------------------------------------------- drift charts
def cusum_by_hand(x, n, p0, p1):
    """Page's recursion S_t = max(0, S_{t-1} + x log(p1/p0) + (n-x) log((1-p1)/(1-p0)))
    (Reynolds & Stoumbos 1999, grouped Bernoulli observations), written as a plain loop."""
    s, out = 0.0, []
    for xi, ni in zip(x, n):
        s = max(0.0, s + xi * math.log(p1 / p0) + (ni - xi) * math.log((1 - p1) / (1 - p0)))
        out.append(s)
    return np.array(out)


def test_cusum_path_in_cohort_rows_matches_recursion_and_detects_planted_rise():
    # simulation with known truth (fixed seed): control uptake 0.10 for 6 periods, then 0.40;
    # treatment 0.70 throughout
    rng = np.random.default_rng(11)
    rows = []
    for p in range(12):
        n_c, n_t = 50, 50
        rows.append(("A", 0, p, n_c, n_c, int(rng.binomial(n_c, 0.10 if p < 6 else 0.40))))
        rows.append(("A", 1, p, n_t, n_t, int(rng.binomial(n_t, 0.70))))
    cohort = counts_frame(rows)
    rows_out, drift = compute_trends(make_inputs(cohort), make_ctx())
    k = make_ctx().config.alerts.drift_baseline_periods
    orr = make_ctx().config.alerts.drift_odds_ratio
    ctrl = cohort[cohort.z == 0].sort_values("period_start")
    x, n = ctrl.n_taken_up.to_numpy(float), ctrl.n_observed.to_numpy(float)
    # pooled baseline rate (no clipping needed; one site, so no shrinkage), rounded as documented
    p0 = float(round_level(x[:k].sum() / n[:k].sum()))
    p1 = orr * p0 / (1 - p0 + orr * p0)                # odds ratio shift, by hand
    path = cusum_by_hand(x[k:], n[k:], p0, p1)
    i = drift.index("A", "control")
    assert drift.p0[i] == pytest.approx(p0, abs=1e-12)
    assert drift.p1[i] == pytest.approx(p1, abs=1e-12)
    got = [r for r in rows_out if r["basis"] == "cohort" and r["arm"] == "control"]
    got.sort(key=lambda r: r["period_start"])
    assert all(r["cusum"] is None and r["cusum_limit"] is None for r in got[:k])  # baseline: not charted
    # same arithmetic in another order (cumulative sums vs loop): 1e-9
    np.testing.assert_allclose([r["cusum"] for r in got[k:]], path, rtol=0, atol=1e-9)
    assert all(r["cusum_limit"] == pytest.approx(drift.h[i]) for r in got[k:])
    # planted rise from period 6 is detected, not before it
    assert drift.signalled[i]
    assert drift.first_signal_period[i] >= week(6)
    assert drift.direction[i] == "up"
    # recent / earlier uptake: pooled over the periods from the change point on / before it
    c = [j for j, pstart in enumerate(sorted(ctrl.period_start.dt.date)) if pstart == drift.change_period[i]][0]
    assert drift.recent_uptake[i] == pytest.approx(x[c:].sum() / n[c:].sum(), abs=1e-12)
    assert drift.earlier_uptake[i] == pytest.approx(x[:c].sum() / n[:c].sum(), abs=1e-12)
    assert drift.recent_uptake[i] > 0.25 > drift.earlier_uptake[i]
    # the treatment chart is downward and, with constant truth, reports a finite statistic
    j = drift.index("A", "treatment")
    assert drift.direction[j] == "down" and drift.p1[j] < drift.p0[j]
    assert np.isfinite(drift.statistic[j])


def test_constant_uptake_at_baseline_level_never_charts_above_zero():
    # every period exactly at the baseline rate: each increment is n*KL-type negative drift, so S stays 0
    rows = [("B", z, p, 100, 100, 10 if z == 0 else 70) for p in range(10) for z in (0, 1)]
    drift = detect_drift(counts_frame(rows), 4, 3.0, 2000.0)
    np.testing.assert_array_equal(drift.statistic, [0.0, 0.0])
    assert not drift.signalled.any()
    # p0 is the pooled baseline rate; p1 shifts the odds by 3 up (control) and down (treatment)
    level = round_level(np.array([0.1, 0.7]))      # within 5% in odds of the baseline, as documented
    np.testing.assert_allclose(drift.p0, level, atol=1e-12)
    assert np.all(np.abs(np.log(level / (1 - level)) - np.log(np.array([0.1, 0.7]) / [0.9, 0.3])) <= 0.05 + 1e-12)
    np.testing.assert_allclose(drift.p1, shifted_rate(level, np.array([3.0, 1 / 3])), atol=1e-12)
    # threshold chosen for ARL0 >= 2000: positive and finite
    assert np.all(np.isfinite(drift.h)) and np.all(drift.h > 0)


def test_treatment_delivery_failure_detected_by_downward_chart():
    rng = np.random.default_rng(3)
    rows = []
    for p in range(12):
        rows.append(("C", 0, p, 40, 40, int(rng.binomial(40, 0.08))))
        rows.append(("C", 1, p, 40, 40, int(rng.binomial(40, 0.70 if p < 7 else 0.08))))
    drift = detect_drift(counts_frame(rows), 4, 3.0, 2000.0)
    j = drift.index("C", "treatment")
    assert drift.signalled[j] and drift.first_signal_period[j] >= week(7)
    assert drift.recent_uptake[j] < 0.3 < drift.earlier_uptake[j]


# ----------------------------------------------------------------------------- bad data
def test_bad_data_defined_output_no_nan_inf():
    rows = [
        # site with one arm only (no controls at all)
        *[("ONE", 1, p, 10, 10, 7) for p in range(6)],
        # site with a gap (no assignments in periods 2-3) and a zero-count row
        ("GAP", 0, 0, 10, 10, 1), ("GAP", 1, 0, 10, 10, 7),
        ("GAP", 0, 1, 0, 0, 0), ("GAP", 1, 1, 0, 0, 0),
        ("GAP", 0, 4, 10, 10, 1), ("GAP", 1, 4, 10, 10, 7),
        # site without any uptake report yet
        ("NEW", 0, 5, 12, 0, 0), ("NEW", 1, 5, 12, 0, 0),
    ]
    cohort = counts_frame(rows)
    rows_out, drift = compute_trends(make_inputs(cohort, cohort), make_ctx())
    assert_rows_clean(rows_out)
    one_c = [r for r in rows_out if r["site_id"] == "ONE" and r["arm"] == "control"]
    assert one_c and all(r["n_assigned"] == 0 and r["uptake_share"] is None and r["first_stage"] is None
                         for r in one_c)
    new = [r for r in rows_out if r["site_id"] == "NEW"]
    assert all(r["uptake_share"] is None and r["first_stage"] is None for r in new)
    # drift: charts without enough baseline get a reason, no signal, no exception
    for site in ("ONE", "GAP", "NEW"):
        for arm in ("control", "treatment"):
            i = drift.index(site, arm)
            assert not drift.signalled[i]
    assert drift.notes[drift.index("ONE", "control")]            # undefined: no participants
    assert drift.notes[drift.index("NEW", "treatment")]


def test_empty_inputs():
    empty = counts_frame([])
    rows, drift = compute_trends(make_inputs(empty, empty), make_ctx())
    assert rows == [] and drift.site_id == ()
