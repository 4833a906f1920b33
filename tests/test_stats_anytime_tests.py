"""Anytime-valid p-values of the alert tests (pipeline/stats/anytime_tests.py).

Closed forms are checked against independent computations: the one-sided normal mixture
against scipy's numerical integration of the mixture martingale (Howard et al. 2021: the
integral of exp(lambda S - lambda^2 V / 2) over the half-normal mixing law), the
beta-binomial Bayes factor against scipy.stats.betabinom / binom probabilities (Lindon &
Malek 2022, two-arm case).  Validity over many looks is a simulation with known truth
(fixed seed; Monte Carlo tolerances stated beside each check).
"""

from __future__ import annotations

import numpy as np
import pytest
from scipy import integrate, stats

from takeup.pipeline.stats import anytime_tests as at
from takeup.pipeline.stats.sequential import mixture_rho2
from takeup.pipeline.stats.significance import sample_ratio_test, two_proportion_z


@pytest.mark.parametrize("z,t", [(0.0, 10.0), (1.5, 200.0), (-1.0, 50.0), (3.2, 1000.0), (4.5, 5000.0)])
def test_one_sided_mixture_equals_numerical_integral(z, t):
    alpha, horizon = 0.05, 1000.0
    rho2 = mixture_rho2(horizon, alpha)
    s = z * np.sqrt(t)                     # sum of t standardised terms with this z
    rho = np.sqrt(rho2)

    def integrand(lam):
        return np.exp(lam * s - lam**2 * t / 2.0) * 2.0 * stats.norm.pdf(lam, scale=rho)

    m, _ = integrate.quad(integrand, 0.0, np.inf, epsabs=0, epsrel=1e-11, limit=200)
    p = at.one_sided_mixture_p_value(z, t, alpha, horizon, "larger")
    # scipy quad to 1e-11 relative; the closed form uses log_ndtr: 1e-7 leaves room for both
    assert float(p) == pytest.approx(min(1.0, 1.0 / m), rel=1e-7)
    # "smaller" is the mirror image
    assert float(at.one_sided_mixture_p_value(-z, t, alpha, horizon, "smaller")) == pytest.approx(float(p), rel=1e-12)


@pytest.mark.parametrize("nt,nc,share", [(0, 0, 0.5), (12, 8, 0.5), (140, 60, 0.5), (70, 30, 2 / 3), (501, 499, 0.5)])
def test_ratio_mixture_equals_betabinomial_over_binomial(nt, nc, share):
    c = at.ratio_concentration(0.001, 1000.0)
    a, b = c * share, c * (1 - share)
    n = nt + nc
    # the binomial coefficients cancel in the ratio of the two probabilities (scipy.stats, exact to rounding)
    bf = stats.betabinom.pmf(nt, n, a, b) / stats.binom.pmf(nt, n, share)
    p = float(at.ratio_mixture_p_value(nt, nc, share, c))
    assert p == pytest.approx(min(1.0, 1.0 / bf), rel=1e-9)


def test_ratio_mixture_rejects_bad_input_as_nan():
    p = at.ratio_mixture_p_value([10, -1, 5], [10, 3, 5], [0.5, 0.5, 1.0], 50.0)
    assert np.isfinite(p[0]) and np.isnan(p[1]) and np.isnan(p[2])
    with pytest.raises(ValueError, match="concentration"):
        at.ratio_mixture_p_value(1, 1, 0.5, 0.0)


def test_spending_sums_to_at_most_one_and_is_flat_over_the_planned_looks():
    k = np.arange(1, 2_000_001)
    g = at.look_spending(k, 52)
    assert g.sum() <= 1.0 and g.sum() > 0.99           # tail beyond 2e6 looks is 52/2e6 / 2 < 1.3e-5
    assert np.all(g[:52] == pytest.approx(1 / 104))
    assert np.all(np.diff(g[51:]) <= 0)
    assert float(at.spent_p_value(0.001, 3, 52)) == pytest.approx(0.104)
    with pytest.raises(ValueError, match="planned_looks"):
        at.look_spending(1, 0)


def test_z_from_p_value_recovers_the_normal_z():
    z = np.array([0.3, 1.96, 4.0, 9.0])
    np.testing.assert_allclose(at.z_from_p_value(2 * stats.norm.sf(z)), z, rtol=1e-10)
    np.testing.assert_allclose(at.z_from_p_value(stats.norm.sf(z), two_sided=False), z, rtol=1e-10)


# ----------------------------------------------------------------------------- many looks, known truth
SITES, LOOKS, WEEKLY = 4000, 52, 10


def _ever(p: np.ndarray, level: float, strict: bool = False) -> float:
    hit = (p < level) if strict else (p <= level)
    return float(np.mean(np.any(hit & np.isfinite(p), axis=1)))


def test_cumulative_tests_stay_calibrated_over_52_looks_where_fixed_sample_tests_do_not():
    """Null sites observed every week for a year: share of sites ever below the level.

    Monte Carlo tolerance: with 4,000 sites the standard error of a rate near 0.05 is 0.0034;
    the anytime-valid rates must be <= level + 0.01 (about 3 SE), the fixed-sample rates at
    least three times the level.
    """
    rng = np.random.default_rng(20261202)
    level = 0.05
    # differential missingness: 10% missing in both arms, 10 participants a week per arm
    n = WEEKLY * np.arange(1, LOOKS + 1)[None, :].repeat(SITES, 0)
    m_t = np.cumsum(rng.binomial(WEEKLY, 0.1, (SITES, LOOKS)), axis=1)
    m_c = np.cumsum(rng.binomial(WEEKLY, 0.1, (SITES, LOOKS)), axis=1)
    res = two_proportion_z(m_t.ravel(), n.ravel(), m_c.ravel(), n.ravel(), alternative="two-sided")
    p_fixed = np.asarray(res.p_value, float).reshape(SITES, LOOKS)
    z = at.z_from_p_value(p_fixed)
    p_any = at.two_sided_mixture_p_value(z, 2 * n, level, 1000.0)
    assert _ever(p_fixed, level) >= 3 * level
    assert _ever(p_any, level) <= level + 0.01
    # arm counts of a 50/50 lottery, 20 a week: the beta-binomial test at 0.05 (and the chi-square)
    nt = np.cumsum(rng.binomial(2 * WEEKLY, 0.5, (SITES, LOOKS)), axis=1)
    nc = 2 * n - nt
    chi = sample_ratio_test(np.column_stack([nt.ravel(), nc.ravel()]), np.full((nt.size, 2), 0.5))
    p_chi = np.asarray(chi.p_value, float).reshape(SITES, LOOKS)
    p_ratio = at.ratio_mixture_p_value(nt, nc, 0.5, at.ratio_concentration(level, 1000.0))
    assert _ever(p_chi, level, strict=True) >= 3 * level
    assert _ever(p_ratio, level, strict=True) <= level + 0.01
    # a first stage at the null boundary (complier share 0): uptake 30% in both arms
    u_t = np.cumsum(rng.binomial(WEEKLY, 0.3, (SITES, LOOKS)), axis=1)
    u_c = np.cumsum(rng.binomial(WEEKLY, 0.3, (SITES, LOOKS)), axis=1)
    share = (u_t - u_c) / n
    se = np.sqrt((u_t / n) * (1 - u_t / n) / n + (u_c / n) * (1 - u_c / n) / n)
    zs = np.where(se > 0, share / np.where(se > 0, se, 1.0), 0.0)
    p_lower = stats.norm.cdf(zs)
    p_neg = at.one_sided_mixture_p_value(at.z_from_p_value(p_lower, two_sided=False), 2 * n, level, 1000.0)
    assert _ever(p_lower, level) >= 3 * level
    assert _ever(p_neg, level) <= level + 0.01


def test_moving_window_test_with_spending_stays_calibrated():
    """Latest 4 cohorts against earlier ones, re-tested weekly: spending keeps the ever-rate at the level.

    Same Monte Carlo tolerance as above (rates near 0.05, 4,000 sites: +0.01).
    """
    rng = np.random.default_rng(7)
    level, window = 0.05, 4
    x = rng.binomial(WEEKLY, 0.5, (SITES, LOOKS + window))     # one arm's uptake per cohort, constant rate
    p_fixed = np.full((SITES, LOOKS), np.nan)
    for k in range(LOOKS):                                      # 52 looks, each vectorised over sites
        last = window + 1 + k
        recent = x[:, last - window:last].sum(1)
        early = x[:, :last - window].sum(1)
        n_r, n_e = WEEKLY * window, WEEKLY * (last - window)
        res = two_proportion_z(recent, np.full(SITES, n_r), early, np.full(SITES, n_e), alternative="smaller")
        p_fixed[:, k] = res.p_value
    p_spent = at.spent_p_value(p_fixed, np.arange(1, LOOKS + 1)[None, :], 52)
    assert _ever(p_fixed, level) >= 3 * level
    assert _ever(p_spent, level) <= level + 0.01


def test_one_sided_mixture_at_infinite_z():
    p = at.one_sided_mixture_p_value([-np.inf, np.inf, np.nan], 100.0, 0.05, 1000.0)
    assert p[0] == 1.0 and p[1] < 1e-100 and np.isnan(p[2])
    q = at.two_sided_mixture_p_value(at.z_from_p_value([0.0, 1.0, np.nan]), 100.0, 0.05, 1000.0)
    assert q[0] < 1e-100 and q[1] == 1.0 and np.isnan(q[2])
