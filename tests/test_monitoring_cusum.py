"""Tests for takeup.pipeline.stats.drift (the Bernoulli CUSUM chart, its run lengths, its design, baselines)."""

from __future__ import annotations

import math

import numpy as np
import pytest

from takeup.pipeline.stats.drift.baseline import baseline_rate
from takeup.pipeline.stats.drift.chart import bernoulli_cusum, shifted_rate
from takeup.pipeline.stats.drift.design import (DEFAULT_ODDS_RATIO_FALL, DEFAULT_ODDS_RATIO_RISE, DEFAULT_TARGET_ARL0,
                                                design_cusum)
from takeup.pipeline.stats.drift.run_length import arl_bernoulli, arl_bernoulli_simulated

# Values documented in the module docstring of takeup.pipeline.stats.drift.design for
# the default design (p0 = 0.10, odds ratio 2, target ARL0 1000), printed
# there to 5 decimals (h) and 1 decimal (ARLs).
DOC_P0 = 0.10
DOC_H = 3.15373
DOC_ARL0 = 1000.7
DOC_ARL1 = 80.1
DOC_ARL0_G25 = 3045.6
DOC_ARL1_G25 = 117.6


def _reference_cusum(x, n, p0, p1, h):
    """Plain per-series, per-period recursion, written from the formula."""
    a = math.log(p1 / p0)
    b = math.log((1 - p1) / (1 - p0))
    s, path, first = 0.0, [], -1
    for t, (xt, nt) in enumerate(zip(x, n)):
        if np.isfinite(nt) and nt > 0 and np.isfinite(xt):
            s = max(0.0, s + xt * a + (nt - xt) * b)
        path.append(s)
        if first < 0 and s >= h:
            first = t
    return np.array(path), first


@pytest.fixture(scope="module")
def default_design():
    return design_cusum(DOC_P0, shift_odds_ratio=DEFAULT_ODDS_RATIO_RISE)


# --------------------------------------------------------------------------
# The chart on data
# --------------------------------------------------------------------------


def test_vectorised_chart_equals_reference_loop():
    rng = np.random.default_rng(20240611)
    n_series, n_periods = 60, 40
    n = rng.integers(0, 40, size=(n_series, n_periods)).astype(float)
    n[rng.random(n.shape) < 0.05] = np.nan  # periods not reported
    p0 = rng.uniform(0.05, 0.9, n_series)
    up = rng.random(n_series) < 0.5
    p1 = np.where(up, shifted_rate(p0, 2.0), shifted_rate(p0, 0.5))
    h = rng.uniform(0.5, 4.0, n_series)
    # true rates drift towards p1 in half of the series so that some signal
    p_true = np.where(rng.random(n_series) < 0.5, p1, p0)
    x = rng.binomial(np.nan_to_num(n).astype(int), p_true[:, None]).astype(float)
    x[np.isnan(n)] = np.nan
    x_before, n_before = x.copy(), n.copy()

    res = bernoulli_cusum(x, n, p0, p1, h)

    assert np.array_equal(x, x_before, equal_nan=True) and np.array_equal(n, n_before, equal_nan=True)
    assert res.statistic.shape == (n_series, n_periods)
    assert 5 < res.signalled.sum() < n_series  # both outcomes are exercised
    for i in range(n_series):
        path, first = _reference_cusum(x[i], n[i], p0[i], p1[i], h[i])
        # cumulative sums (Lindley form) vs recursion differ only by float
        # rounding: statistics are at most a few hundred, so 1e-9 absolute.
        np.testing.assert_allclose(res.statistic[i], path, rtol=0, atol=1e-9)
        assert res.first_signal[i] == first
        assert res.signalled[i] == (first >= 0)
        assert res.final_statistic[i] == pytest.approx(path[-1], abs=1e-9)
        assert res.notes[i] == ""
    assert not res.statistic.flags.writeable


def test_periods_without_participants_add_nothing():
    x = np.array([[3.0, 0.0, np.nan, 5.0]])
    n = np.array([[10.0, 0.0, np.nan, 10.0]])
    res = bernoulli_cusum(x, n, 0.2, 0.4, 100.0)
    # by the formula: period 1 adds 3*log2 + 7*log(0.6/0.8)
    s1 = max(0.0, 3 * math.log(2) + 7 * math.log(0.75))
    s4 = max(0.0, s1 + 5 * math.log(2) + 5 * math.log(0.75))
    np.testing.assert_allclose(res.statistic[0], [s1, s1, s1, s4], atol=1e-12)


@pytest.mark.parametrize(
    "p0, p1, h, fragment",
    [(0.0, 0.2, 3.0, "p0"), (1.0, 0.5, 3.0, "p0"), (0.2, 0.2, 3.0, "no shift"),
     (0.2, 1.0, 3.0, "p1"), (0.2, 0.4, 0.0, "threshold")],
)
def test_undefined_chart_is_nan_with_note(p0, p1, h, fragment):
    x = np.array([[1.0, 2.0], [1.0, 2.0]])
    n = np.array([[5.0, 5.0], [5.0, 5.0]])
    res = bernoulli_cusum(x, n, [p0, 0.2], [p1, 0.4], [h, 3.0])
    assert np.all(np.isnan(res.statistic[0])) and not np.any(np.isinf(res.statistic))
    assert res.first_signal[0] == -1 and not res.signalled[0]
    assert fragment in res.notes[0]
    assert res.notes[1] == "" and np.all(np.isfinite(res.statistic[1]))


def test_invalid_counts_raise():
    with pytest.raises(ValueError):
        bernoulli_cusum([[6.0]], [[5.0]], 0.2, 0.4, 3.0)
    with pytest.raises(ValueError):
        bernoulli_cusum([[1.0, 2.0]], [[5.0]], 0.2, 0.4, 3.0)
    with pytest.raises(ValueError):
        bernoulli_cusum([[0.0]], [[-5.0]], 0.2, 0.4, 3.0)


# --------------------------------------------------------------------------
# ARL: Markov chain vs exact results and simulation
# --------------------------------------------------------------------------


@pytest.mark.parametrize("r", [1, 2, 4])
@pytest.mark.parametrize("where", [0.5, 1.0])  # h = (r - 0.5) u, and h = r u (a tie)
def test_chain_matches_waiting_time_for_a_success_run(r, where):
    # If any failure resets the chart (d >= (r-1) u) and (r-1) u < h <= r u,
    # the chart signals at the first run of r successes.  The mean waiting
    # time for r successes in a row is (1 - p^r) / ((1 - p) p^r) (classical
    # result, e.g. Feller, An Introduction to Probability Theory and Its
    # Applications, vol. 1, ch. XIII -- from memory; r = 1 is the geometric
    # mean 1/p).  p0 = 0.8, p1 = 0.85: u = log(1.0625) = 0.0606,
    # d = log(0.2/0.15) = 0.288 >= 3u.  At h = r u exactly, S = r u >= h signals.
    p0, p1, p = 0.8, 0.85, 0.8
    u = math.log(p1 / p0)
    res = arl_bernoulli(p0, p1, (r - 1 + where) * u, p_true=p)
    expected = (1 - p**r) / ((1 - p) * p**r)
    # exact in both: only linear-algebra rounding, hence 1e-9 relative
    assert res.arl[0] == pytest.approx(expected, rel=1e-9)


@pytest.mark.parametrize(
    "p0, odds_ratio, h, shift",
    [(0.10, 2.0, 3.0, False), (0.10, 2.0, 3.0, True),
     (0.70, 0.5, 3.5, False), (0.70, 0.5, 3.5, True),
     (0.03, 2.0, 2.0, False)],
)
def test_chain_agrees_with_simulation(p0, odds_ratio, h, shift):
    p1 = float(shifted_rate(p0, odds_ratio))
    p_true = p1 if shift else p0
    chain = arl_bernoulli(p0, p1, h, p_true=p_true)
    sim = arl_bernoulli_simulated(p0, p1, h, p_true, np.random.default_rng(7), n_reps=4000)
    assert chain.notes == ("",) and sim.note == ""
    # Monte Carlo error only (the chain's discretisation error is ~1e-6
    # relative): 4 standard errors leaves a false-failure rate of ~6e-5.
    assert abs(chain.arl[0] - sim.arl) <= 4 * sim.se


def test_grouped_chain_agrees_with_simulation_and_bounds_hold(default_design):
    h, p1 = default_design.h[0], default_design.p1[0]
    chain = arl_bernoulli(DOC_P0, p1, h, p_true=[DOC_P0, p1], group_size=25)
    sim0 = arl_bernoulli_simulated(DOC_P0, p1, h, DOC_P0, np.random.default_rng(11),
                                   n_reps=3000, group_size=25)
    sim1 = arl_bernoulli_simulated(DOC_P0, p1, h, p1, np.random.default_rng(12),
                                   n_reps=3000, group_size=25)
    # Monte Carlo tolerance of 4 standard errors, as above
    assert abs(chain.arl[0] - sim0.arl) <= 4 * sim0.se
    assert abs(chain.arl[1] - sim1.arl) <= 4 * sim1.se
    # documented grouped values (1 decimal printed)
    assert chain.arl[0] == pytest.approx(DOC_ARL0_G25, abs=0.05)
    assert chain.arl[1] == pytest.approx(DOC_ARL1_G25, abs=0.05)
    # the grouped chart never signals before the per-participant one
    assert chain.arl[0] >= default_design.arl0[0]


def test_discretisation_is_stable():
    # A finer rational approximation of the step ratio must not move the ARL:
    # at a threshold away from reachable values the chain is exact, so the
    # two agree to ~1e-6 relative (allowing solver rounding).
    p0, p1, h = 0.2, float(shifted_rate(0.2, 2.0)), 3.3
    coarse = arl_bernoulli(p0, p1, h, p_true=[p0, p1], rel_tol=1e-5)
    fine = arl_bernoulli(p0, p1, h, p_true=[p0, p1], rel_tol=1e-7)
    assert fine.n_states > coarse.n_states
    np.testing.assert_allclose(coarse.arl, fine.arl, rtol=1e-6)


def test_falling_chart_mirrors_rising_chart():
    # Swapping success and failure maps a falling chart at p0 onto the
    # rising chart at 1 - p0 (exact identity of the two chains).
    fall = arl_bernoulli(0.7, float(shifted_rate(0.7, 0.5)), 3.0, p_true=[0.7, 0.6])
    rise = arl_bernoulli(0.3, float(shifted_rate(0.3, 2.0)), 3.0, p_true=[0.3, 0.4])
    np.testing.assert_allclose(fall.arl, rise.arl, rtol=1e-9)


def test_arl_edge_cases_are_nan_with_note():
    res = arl_bernoulli(0.0, 0.2, 3.0)
    assert np.isnan(res.arl[0]) and "p0" in res.notes[0]
    res = arl_bernoulli(1.0, 0.5, 3.0)
    assert np.isnan(res.arl[0]) and "p0" in res.notes[0]
    res = arl_bernoulli(0.1, 0.2, 3.0, p_true=[0.0, 0.1])
    assert np.isnan(res.arl[0]) and res.notes[0] and np.isfinite(res.arl[1])
    sim = arl_bernoulli_simulated(0.0, 0.2, 3.0, None, np.random.default_rng(1))
    assert math.isnan(sim.arl) and "p0" in sim.note
    sim = arl_bernoulli_simulated(0.1, 0.2, 20.0, None, np.random.default_rng(1),
                                  n_reps=20, max_run_length=500)
    assert math.isnan(sim.arl) and sim.n_censored == 20 and "not signalled" in sim.note


# --------------------------------------------------------------------------
# Default design: documented values, and planted shifts on simulated data
# --------------------------------------------------------------------------


def test_default_design_matches_documented_values(default_design):
    assert DEFAULT_TARGET_ARL0 == 1000.0
    d = default_design
    assert d.notes == ("",)
    assert d.p1[0] == pytest.approx(2 / 11, rel=1e-12)  # odds 1/9 doubled = 2/9 -> 2/11
    assert d.h[0] == pytest.approx(DOC_H, abs=5e-6)  # printed to 5 decimals
    assert d.arl0[0] == pytest.approx(DOC_ARL0, abs=0.05)  # printed to 1 decimal
    assert d.arl1[0] == pytest.approx(DOC_ARL1, abs=0.05)
    assert d.arl0[0] >= d.target_arl0
    # recomputing the chain at the reported h reproduces the design's ARLs
    again = arl_bernoulli(DOC_P0, d.p1[0], d.h[0], p_true=[DOC_P0, d.p1[0]])
    np.testing.assert_allclose(again.arl, [d.arl0[0], d.arl1[0]], rtol=1e-6)


def test_default_design_in_control_arl_by_simulation(default_design):
    h, p1 = default_design.h[0], default_design.p1[0]
    sim = arl_bernoulli_simulated(DOC_P0, p1, h, DOC_P0, np.random.default_rng(3), n_reps=4000)
    # 4 Monte Carlo standard errors (SE ~ 16 participants here)
    assert abs(sim.arl - DOC_ARL0) <= 4 * sim.se


def test_planted_shift_detected_within_documented_delay(default_design):
    # Per-participant chart run by bernoulli_cusum itself (one participant
    # per period), in control for 300 participants, then odds doubled.
    h, p1 = default_design.h[0], default_design.p1[0]
    rng = np.random.default_rng(99)
    n_series, change, total = 2000, 300, 1400
    p = np.where(np.arange(total) < change, DOC_P0, p1)
    x = (rng.random((n_series, total)) < p).astype(float)
    res = bernoulli_cusum(x, np.ones_like(x), DOC_P0, p1, h)
    first = res.first_signal
    clean = first >= change  # no false alarm before the shift
    assert clean.mean() > 0.6  # ARL0 ~ 1000 >> 300
    assert np.all(first[clean] >= 0)  # every shifted series was detected
    delay = first[clean] - change + 1
    se = delay.std(ddof=1) / math.sqrt(delay.size)
    # Starting above zero can only speed a CUSUM up, so the mean delay after
    # an in-control stretch is at most the zero-state ARL1; 3 MC standard
    # errors of slack.
    assert delay.mean() <= DOC_ARL1 + 3 * se


def test_planted_shift_from_start_matches_documented_arl1(default_design):
    # Zero-state delay with the shift present from the start, run through
    # bernoulli_cusum (per participant and with weekly cohorts of 25).
    h, p1 = default_design.h[0], default_design.p1[0]
    rng = np.random.default_rng(5)
    x = (rng.random((2000, 1200)) < p1).astype(float)
    res = bernoulli_cusum(x, np.ones_like(x), DOC_P0, p1, h)
    assert res.signalled.all()
    rl = res.first_signal + 1
    assert abs(rl.mean() - DOC_ARL1) <= 4 * rl.std(ddof=1) / math.sqrt(rl.size)  # 4 MC SEs

    xg = rng.binomial(25, p1, size=(4000, 60)).astype(float)
    resg = bernoulli_cusum(xg, np.full_like(xg, 25.0), DOC_P0, p1, h)
    assert resg.signalled.all()
    rlg = 25 * (resg.first_signal + 1)
    assert abs(rlg.mean() - DOC_ARL1_G25) <= 4 * rlg.std(ddof=1) / math.sqrt(rlg.size)


def test_falling_default_design_detects_non_delivery():
    # Treatment uptake 0.7 halving its odds: documented h 3.78327, ARL0
    # 1000.7, ARL1 54.0 (module docstring); delay checked by simulation.
    d = design_cusum(0.7, shift_odds_ratio=DEFAULT_ODDS_RATIO_FALL)
    assert d.h[0] == pytest.approx(3.78327, abs=5e-6)
    assert d.arl0[0] == pytest.approx(1000.7, abs=0.05)
    assert d.arl1[0] == pytest.approx(54.0, abs=0.05)
    sim = arl_bernoulli_simulated(0.7, d.p1[0], d.h[0], d.p1[0], np.random.default_rng(8),
                                  n_reps=4000)
    assert abs(sim.arl - d.arl1[0]) <= 4 * sim.se  # 4 MC SEs


def test_design_edge_cases():
    d = design_cusum([0.0, 1.0, 0.2], shift_odds_ratio=2.0)
    assert np.isnan(d.h[:2]).all() and all(d.notes[:2]) and np.isfinite(d.h[2])
    assert not np.isinf(d.arl0).any()
    with pytest.raises(ValueError):
        design_cusum(0.2, 0.4, shift_odds_ratio=2.0)
    with pytest.raises(ValueError):
        design_cusum(0.2)


# --------------------------------------------------------------------------
# Baseline rate
# --------------------------------------------------------------------------


def test_baseline_rate_pools_first_periods():
    x = np.array([[2, 3, np.nan, 9], [0, 0, 0, 5], [1, 1, 1, 1], [np.nan, 0, 0, 3]], dtype=float)
    n = np.array([[10, 20, np.nan, 10], [30, 10, 0, 10], [1, 1, 1, 1], [np.nan, 0, 0, 10]],
                 dtype=float)
    x0, n0 = x.copy(), n.copy()
    res = baseline_rate(x, n, 3)
    assert np.array_equal(x, x0, equal_nan=True) and np.array_equal(n, n0, equal_nan=True)
    assert res.rate[0] == pytest.approx(5 / 30, rel=1e-12)  # pooled, NaN period skipped
    assert res.rate[1] == pytest.approx(0.5 / 40, rel=1e-12)  # floor: half a participant
    assert res.rate[2] == pytest.approx(1 - 0.5 / 3, rel=1e-12)  # ceiling
    assert res.clipped.tolist() == [False, True, True, False]
    assert np.isnan(res.rate[3]) and "no participants" in res.notes[3]
    assert res.notes[0] == "" and res.notes[1]
    assert np.all((res.rate[:3] > 0) & (res.rate[:3] < 1))


@pytest.mark.parametrize("p0, odds_ratio, h, q", [(0.1, 1.5, 4.5, 0.1), (0.1, 1 / 1.5, 4.5, 0.9),
                                                  (0.5, 3.0, 2.0, 0.4), (0.8, 1 / 3.0, 3.0, 0.3)])
def test_two_point_chain_equals_a_dense_solve_of_the_same_chain(p0, odds_ratio, h, q):
    """The per-participant chain is built directly in sparse form (speed); check it against the
    textbook construction solved densely with numpy: L = (I - Q)^-1 1, Q[s, s+U] = q,
    Q[s, max(0, s-D)] += 1 - q, states >= H absorbing (Brook & Evans 1972)."""
    from takeup.pipeline.stats.drift import run_length as rl

    u, d, _ = rl._steps(p0, float(shifted_rate(p0, odds_ratio)))
    grid = rl._grid(u, d, 1e-3, 5000)
    n = rl._n_states(h, grid.delta)
    Q = np.zeros((n, n))
    for s in range(n):
        if s + grid.up_units < n:
            Q[s, s + grid.up_units] += q
        Q[s, max(0, s - grid.down_units)] += 1 - q
    dense = np.linalg.solve(np.eye(n) - Q, np.ones(n))[0]
    assert rl._two_point_chain_arl(grid, n, q) == pytest.approx(dense, rel=1e-9)
    assert rl._chain_arl(grid, n, q) == pytest.approx(dense, rel=1e-9)
