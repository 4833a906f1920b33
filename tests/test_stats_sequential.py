"""Tests of takeup.pipeline.stats.sequential (anytime-valid confidence sequences and p-values)
and takeup.pipeline.stats.precision (minimum detectable effects and forecasts).

Outside references: the closed form of the normal-mixture sequence for a mean
(Waudby-Smith et al. 2024; Howard et al. 2021; as recorded in
shared/reference/published-values.md section 10, form from memory there), the
mixture martingale integrated numerically with scipy.integrate.quad, the
repeated-looks error rates of Armitage, McPherson & Rowe (1969) as tabulated by
Jennison & Turnbull (2000, Table 1.1), statsmodels' NormalIndPower for the MDE,
and the multiplier 2.801585 of the same reference file (section 12).
"""

from __future__ import annotations

import math

import numpy as np
import pytest
from scipy import integrate, optimize, stats

from takeup.pipeline.stats.estimators.weak_iv import anderson_rubin_set
from takeup.pipeline.stats.precision import mde_multiplier, precision_forecast
from takeup.pipeline.stats.sequential import (anytime_ar_set, confidence_sequence, intersect_sets,
                                              mixture_multiplier, mixture_p_value, mixture_rho2,
                                              running_intersection)

ALPHA = 0.05


# ----------------------------------------------------------------------------- the boundary
@pytest.mark.parametrize("t,t_star", [(10, 500), (100, 500), (500, 500), (5000, 500), (37, 2000), (2000, 2000)])
def test_multiplier_equals_the_published_closed_form(t, t_star):
    # sigma * sqrt(2 (t rho2 + 1) / (t^2 rho2) * log(sqrt(t rho2 + 1) / alpha)) for a mean of t
    # unit-variance terms (published-values.md section 10), written here independently.
    rho2 = mixture_rho2(t_star, ALPHA)
    published = math.sqrt(2 * (t * rho2 + 1) / (t**2 * rho2) * math.log(math.sqrt(t * rho2 + 1) / ALPHA))
    se = 1.0 / math.sqrt(t)
    assert float(mixture_multiplier(t, ALPHA, rho2)) * se == pytest.approx(published, rel=1e-12)


@pytest.mark.parametrize("alpha", [0.01, 0.05, 0.1])
def test_tuning_minimises_the_width_at_the_horizon(alpha):
    t_star = 800.0
    rho2 = mixture_rho2(t_star, alpha)
    res = optimize.minimize_scalar(lambda r: float(mixture_multiplier(t_star, alpha, r)),
                                   bounds=(1e-6, 1.0), method="bounded", options={"xatol": 1e-12})
    assert rho2 == pytest.approx(res.x, rel=1e-5)
    # and the approximation (-2 log a + log(1 - 2 log a)) / t* is within a few per cent of it
    approx = (-2 * math.log(alpha) + math.log(1 - 2 * math.log(alpha))) / t_star
    assert approx == pytest.approx(rho2, rel=0.05)


@pytest.mark.parametrize("z,t", [(0.0, 50), (1.5, 200), (2.5, 1000), (3.2, 80), (-2.2, 400)])
def test_p_value_is_the_reciprocal_of_the_mixture_martingale(z, t):
    # M_t = integral over lambda ~ N(0, rho2) of exp(lambda S - lambda^2 V / 2) for the
    # standardised sum S = z sqrt(t), V = t (Howard et al. 2021), integrated numerically.
    rho2 = mixture_rho2(1000, ALPHA)
    s, v, sd = z * math.sqrt(t), float(t), math.sqrt(rho2)
    m, _ = integrate.quad(lambda lam: math.exp(lam * s - lam**2 * v / 2) * stats.norm.pdf(lam, scale=sd),
                          -40 * sd, 40 * sd, points=[s / v], limit=400)
    assert float(mixture_p_value(z, t, rho2)) == pytest.approx(min(1.0, 1.0 / m), rel=1e-7)


def test_sequence_and_p_value_agree():
    """0 lies outside the sequence exactly when the anytime p-value is below alpha."""
    rng = np.random.default_rng(3)
    est, se = rng.normal(0, 1, 500), rng.uniform(0.2, 1.0, 500)
    t = rng.integers(20, 3000, 500)
    cs = confidence_sequence(est, se, t, ALPHA, horizon=1000)
    p = mixture_p_value(est / se, t, cs.rho2)
    outside = (cs.low > 0) | (cs.high < 0)
    assert np.array_equal(outside, p < ALPHA)


def test_undefined_inputs_give_nan():
    cs = confidence_sequence([1.0, np.nan, 1.0], [0.1, 0.1, np.nan], [100, 100, 100], ALPHA, 500)
    assert np.isfinite(cs.low[0]) and np.isnan(cs.low[1]) and np.isnan(cs.high[2])
    assert np.isnan(mixture_multiplier(0, ALPHA, 0.01))
    with pytest.raises(ValueError):
        mixture_rho2(0, ALPHA)
    with pytest.raises(ValueError):
        confidence_sequence([1.0], [0.1], [10], 1.5, 100)


def test_running_intersection_never_widens():
    lo, hi = running_intersection([0.0, 1.0, np.nan], [2.0, 3.0, np.nan], [0.5, np.nan, -1.0], [1.5, np.nan, 1.0])
    assert list(lo) == [0.5, 1.0, -1.0] and list(hi) == [1.5, 3.0, 1.0]


def test_set_intersection_shapes():
    kind, lo, hi, note = intersect_sets(
        np.array(["interval", "two_rays", "interval", "real_line", "interval", "undefined", "interval"], dtype=object),
        np.array([0.0, -1.0, 0.0, np.nan, 0.0, np.nan, 5.0]), np.array([10.0, 1.0, 10.0, np.nan, 2.0, np.nan, 6.0]),
        np.array(["interval", "two_rays", "two_rays", "interval", None, "interval", "interval"], dtype=object),
        np.array([2.0, -2.0, 3.0, 1.0, np.nan, 1.0, 0.0]), np.array([12.0, 0.5, 7.0, 2.0, np.nan, 2.0, 1.0]))
    assert (kind[0], lo[0], hi[0]) == ("interval", 2.0, 10.0)
    assert (kind[1], lo[1], hi[1]) == ("two_rays", -2.0, 1.0)     # (-inf,-2] U [1, inf)
    assert (kind[2], lo[2], hi[2]) == ("interval", 0.0, 10.0) and "hull" in note[2]   # [0,3] U [7,10]
    assert (kind[3], lo[3], hi[3]) == ("interval", 1.0, 2.0)
    assert (kind[4], lo[4], hi[4]) == ("interval", 0.0, 2.0)       # no previous look
    assert (kind[5], lo[5], hi[5]) == ("interval", 1.0, 2.0)       # an undefined look does not widen
    assert kind[6] == "empty"


def test_ar_set_with_critical_equals_level_form():
    """``critical=q`` reproduces the chi-square form when q is the chi-square quantile."""
    rng = np.random.default_rng(5)
    g, p = rng.normal(1, 1, 50), rng.normal(0.4, 0.3, 50)
    vg, vp = rng.uniform(0.05, 0.3, 50), rng.uniform(0.01, 0.05, 50)
    c = 0.3 * np.sqrt(vg * vp)
    a = anderson_rubin_set(g, p, vg, vp, c, level=0.9)
    b = anderson_rubin_set(g, p, vg, vp, c, critical=stats.chi2.ppf(0.9, 1))
    assert list(a.kind) == list(b.kind)
    np.testing.assert_allclose(a.low, b.low, rtol=1e-12, equal_nan=True)
    np.testing.assert_allclose(a.high, b.high, rtol=1e-12, equal_nan=True)


# ----------------------------------------------------------------------------- coverage by simulation
def _weekly_looks(rng, reps, looks, per_arm, share, effect, null_itt=False):
    """Cumulative ITT, complier share and their (Neyman) variances at every weekly look.

    Encouragement design with known truth: compliers are ``share`` of participants, never-takers the rest;
    Y = 1 + effect * D + N(0, 1). Returns arrays of shape (reps, looks).
    """
    shape = (reps, looks, per_arm)
    out = {}
    for arm in (0, 1):
        complier = rng.random(shape) < share
        d = (complier & (arm == 1)).astype(float)
        y = 1.0 + (0.0 if null_itt else effect) * d + rng.normal(0, 1, shape)
        for name, v in (("d", d), ("y", y), ("dd", d * d), ("yy", y * y), ("dy", d * y)):
            out[(arm, name)] = np.cumsum(v.sum(axis=2), axis=1)
    n = per_arm * np.arange(1, looks + 1)[None, :]

    def mean(arm, k):
        return out[(arm, k)] / n

    def cov(arm, a, b, ab):
        return (out[(arm, ab)] - n * mean(arm, a) * mean(arm, b)) / (n - 1) / n

    itt = mean(1, "y") - mean(0, "y")
    fs = mean(1, "d") - mean(0, "d")
    v_itt = cov(1, "y", "y", "yy") + cov(0, "y", "y", "yy")
    v_fs = cov(1, "d", "d", "dd") + cov(0, "d", "d", "dd")
    c = cov(1, "y", "d", "dy") + cov(0, "y", "d", "dy")
    return itt, fs, v_itt, v_fs, c, 2 * n * np.ones((reps, 1))


def test_time_uniform_coverage_26_weekly_looks():
    """>= 2,000 replications x 26 looks: the sequences cover at every look; fixed intervals do not.

    Tolerance: 0.015 below 1 - alpha, three Monte Carlo SEs at 2,000 replications (sqrt(.05 * .95 / 2000) = 0.005).
    """
    rng = np.random.default_rng(20261202)
    reps, looks, share, effect = 2000, 26, 0.6, 0.5
    itt, fs, v_itt, v_fs, c, t = _weekly_looks(rng, reps, looks, per_arm=20, share=share, effect=effect)
    true_itt, true_fs = effect * share, share
    horizon = 1040.0   # the full season's participants
    cs_itt = confidence_sequence(itt.ravel(), np.sqrt(v_itt.ravel()), t.ravel(), ALPHA, horizon)
    cs_fs = confidence_sequence(fs.ravel(), np.sqrt(v_fs.ravel()), t.ravel(), ALPHA, horizon)
    ar = anytime_ar_set(itt.ravel(), fs.ravel(), v_itt.ravel(), v_fs.ravel(), c.ravel(), t.ravel(), ALPHA, horizon)

    def ever_missed(low, high, truth):
        low, high = low.reshape(reps, looks), high.reshape(reps, looks)
        return np.mean(np.any(~((low <= truth) & (truth <= high)), axis=1))

    miss_itt = ever_missed(cs_itt.low, cs_itt.high, true_itt)
    miss_fs = ever_missed(cs_fs.low, cs_fs.high, true_fs)
    kind = ar.kind.reshape(reps, looks)
    lo, hi = ar.low.reshape(reps, looks), ar.high.reshape(reps, looks)
    covered = np.where(kind == "interval", (lo <= effect) & (effect <= hi),
                       np.where(kind == "two_rays", (effect <= lo) | (effect >= hi), kind == "real_line"))
    miss_cace = np.mean(np.any(~covered, axis=1))
    for miss in (miss_itt, miss_fs, miss_cace):
        assert miss <= ALPHA + 0.015
    # the fixed-sample 95% interval recomputed at each look misses at least once far more often
    z = stats.norm.ppf(0.975)
    fixed_miss = np.mean(np.any(np.abs(itt - true_itt) > z * np.sqrt(v_itt), axis=1))
    assert fixed_miss > 3 * ALPHA


@pytest.mark.parametrize("looks,published", [(2, 0.083), (5, 0.142), (10, 0.193), (20, 0.248)])
def test_simulation_reproduces_the_repeated_looks_table(looks, published):
    """Armitage, McPherson & Rowe (1969) / Jennison & Turnbull (2000, Table 1.1), from memory as recorded
    in published-values.md: fixed 5% tests at K equally spaced looks under the null.

    40,000 Brownian paths sampled at the looks; tolerance 0.008 (about 4 Monte Carlo SEs).
    """
    rng = np.random.default_rng(looks)
    paths = np.cumsum(rng.normal(size=(40_000, looks)), axis=1)
    z = paths / np.sqrt(np.arange(1, looks + 1))
    rate = np.mean(np.any(np.abs(z) > stats.norm.ppf(0.975), axis=1))
    assert rate == pytest.approx(published, abs=0.008)


def test_anytime_p_value_controls_the_ever_rejected_rate():
    """Null ITT over 52 weekly looks: P(p_t <= alpha at some look) <= alpha (Ville), tolerance 3 MC SEs."""
    rng = np.random.default_rng(11)
    itt, fs, v_itt, *_, t = _weekly_looks(rng, 2000, 52, per_arm=10, share=0.6, effect=0.5, null_itt=True)
    rho2 = mixture_rho2(1040, ALPHA)
    p = mixture_p_value(itt / np.sqrt(v_itt), t, rho2)
    assert np.mean(np.any(p <= ALPHA, axis=1)) <= ALPHA + 0.015
    fixed = 2 * stats.norm.sf(np.abs(itt / np.sqrt(v_itt)))
    assert np.mean(np.any(fixed <= ALPHA, axis=1)) > 3 * ALPHA


# ----------------------------------------------------------------------------- precision
def test_mde_multiplier_reference_value():
    # 1.959964 + 0.841621 = 2.801585 (published-values.md section 12, computed there)
    assert mde_multiplier(0.05, 0.8) == pytest.approx(2.801585, abs=5e-7)


@pytest.mark.parametrize("n1,n0,sd", [(100, 100, 1.0), (250, 120, 3.5), (40, 900, 12.0)])
def test_mde_equals_statsmodels_normal_power(n1, n0, sd):
    """statsmodels NormalIndPower solves for the standardised effect of a two-sample z-test.

    Its power counts both rejection tails; Bloom's MDE counts the far tail as zero (it is
    Phi(-4.76) = 1e-6 here), so the two differ by about 1e-6 relative: tolerance 1e-5.
    """
    from statsmodels.stats.power import NormalIndPower
    d = NormalIndPower().solve_power(effect_size=None, nobs1=n1, alpha=0.05, power=0.8, ratio=n0 / n1)
    se = sd * math.sqrt(1 / n1 + 1 / n0)
    f = precision_forecast([se], [1.0], [0.5], [n1 + n0], [10.0], None, 0.05, 0.8)
    assert float(f.mde_itt[0]) == pytest.approx(d * sd, rel=1e-5)


def test_mde_cace_and_forecast():
    f = precision_forecast(itt_se=[0.5, 0.5, 0.5, 0.5], complier_share=[0.5, 0.5, 0.05, 0.5],
                           complier_share_low=[0.3, 0.3, -0.1, 0.3], n=[400, 400, 400, 400],
                           accrual_per_week=[50, 0, 50, 50], target_mde=1.0, alpha=0.05, power=0.8)
    k = mde_multiplier(0.05, 0.8)
    assert f.mde_cace[0] == pytest.approx(k * 0.5 / 0.5)
    need = 400 * (k / 1.0) ** 2
    assert f.weeks_to_target[0] == pytest.approx((need - 400) / 50)
    assert f.weeks_to_target[1] == np.inf and "never" in f.note[1]
    assert np.isnan(f.mde_cace[2]) and "includes 0" in f.note[2]


def test_forecast_lands_near_the_true_date():
    """Simulated accrual at a known rate: the SE after the forecast number of weeks meets the target.

    Truth: per-arm outcome SD 2, 30 participants a week in each arm, complier share 0.5; target MDE_CACE 1.2.
    The forecast from week 8 is compared with the first week at which the simulated SE gives MDE <= target;
    tolerance 2 weeks (sampling noise in the SE).
    """
    rng = np.random.default_rng(8)
    weekly, share, sd, target = 60, 0.5, 2.0, 1.2
    k = mde_multiplier(0.05, 0.8)
    y = rng.normal(0, sd, (200, weekly))
    z = np.tile(np.r_[np.ones(weekly // 2), np.zeros(weekly // 2)], (200, 1))

    def se_after(weeks):
        yy, zz = y[:weeks].ravel(), z[:weeks].ravel()
        return math.sqrt(yy[zz == 1].var(ddof=1) / (zz == 1).sum() + yy[zz == 0].var(ddof=1) / (zz == 0).sum())

    f = precision_forecast([se_after(8)], [share], [0.3], [8 * weekly], [weekly], target, 0.05, 0.8)
    forecast_week = 8 + float(f.weeks_to_target[0])
    true_week = next(w for w in range(8, 200) if k * se_after(w) / share <= target)
    assert abs(forecast_week - true_week) <= 2
