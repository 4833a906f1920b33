"""Tests of takeup.pipeline.stats.meta_analysis.influence (leave-one-out, residuals, empirical Bayes).

External references: statsmodels.stats.meta_analysis.combine_effects for the
DerSimonian-Laird leave-one-out fits; a Monte Carlo simulation with known
truth for the empirical-Bayes (BLUP) standard error (Raudenbush & Bryk 2002,
ch. 3; Robinson 1991); the definitions of Viechtbauer & Cheung (2010) for the
studentised deleted residual.
"""

from __future__ import annotations

import dataclasses
import math
import warnings

import numpy as np
import pytest
from statsmodels.stats.meta_analysis import combine_effects

from takeup.pipeline.stats.meta_analysis.influence import empirical_bayes, site_influence
from takeup.pipeline.stats.meta_analysis.meta import METHODS, combine


def random_sites(seed: int, k_min: int = 3, k_max: int = 25):
    """Simulated per-site effects and variances (invented data, fixed seed)."""
    rng = np.random.default_rng(seed)
    k = int(rng.integers(k_min, k_max + 1))
    v = rng.uniform(0.005, 0.5, k)
    tau2 = float(rng.choice([0.0, 0.02, 0.2]))
    y = rng.normal(0.2, np.sqrt(v + tau2))
    return y, v


@pytest.mark.parametrize("method", METHODS)
@pytest.mark.parametrize("seed", range(4))
def test_leave_one_out_equals_brute_force(method, seed):
    y, v = random_sites(seed)
    y0, v0 = y.copy(), v.copy()
    res = site_influence(y, v, method=method)
    np.testing.assert_array_equal(y, y0)  # inputs not mutated
    np.testing.assert_array_equal(v, v0)
    for i in range(len(y)):
        ref = combine(np.delete(y, i), np.delete(v, i), method)
        # identical computation on identical data: equal up to round-off
        assert res.loo_estimate[i] == pytest.approx(ref.estimate, rel=1e-12, abs=1e-15)
        assert res.loo_se[i] == pytest.approx(ref.se, rel=1e-12)
        assert res.loo_tau2[i] == pytest.approx(ref.tau2, rel=1e-10, abs=1e-15)
        # studentised deleted residual (Viechtbauer & Cheung 2010)
        z = (y[i] - ref.estimate) / math.sqrt(v[i] + ref.tau2 + ref.se**2)
        assert res.std_residual[i] == pytest.approx(z, rel=1e-10, abs=1e-13)


@pytest.mark.parametrize("seed", range(4))
def test_leave_one_out_dl_matches_statsmodels(seed):
    y, v = random_sites(seed)
    res = site_influence(y, v, method="dl")
    for i in range(len(y)):
        yi, vi = np.delete(y, i), np.delete(v, i)
        with warnings.catch_warnings():  # statsmodels' unclipped DL tau2 may warn
            warnings.simplefilter("ignore", RuntimeWarning)
            sm = combine_effects(yi, vi, method_re="dl")  # statsmodels reference
        if sm.tau2 >= 0:
            mu, se, t2 = sm.mean_effect_re, sm.sd_eff_w_re, sm.tau2
        else:  # clipped at 0 -> fixed effect
            mu, se, t2 = sm.mean_effect_fe, sm.sd_eff_w_fe, 0.0
        # same closed form in double precision: 1e-10 relative
        assert res.loo_estimate[i] == pytest.approx(mu, rel=1e-10)
        assert res.loo_se[i] == pytest.approx(se, rel=1e-10)
        assert res.loo_tau2[i] == pytest.approx(t2, rel=1e-10, abs=1e-15)


@pytest.mark.parametrize("method", ["reml", "dl", "pm"])
@pytest.mark.parametrize("seed", range(6))
def test_empirical_bayes_shrinks_toward_pooled(method, seed):
    y, v = random_sites(seed)
    res = site_influence(y, v, method=method)
    mu, tau2 = res.pooled.estimate, res.pooled.tau2
    eb = res.eb_estimate
    slack = 1e-12  # round-off in mu + B (y - mu)
    assert np.all(eb >= np.minimum(y, mu) - slack)
    assert np.all(eb <= np.maximum(y, mu) + slack)
    assert np.all(np.abs(eb - mu) <= np.abs(y - mu) + slack)
    # shrinkage factor B_i = tau2 / (tau2 + v_i) (Raudenbush & Bryk 2002, ch. 3)
    b = tau2 / (tau2 + v)
    np.testing.assert_allclose(eb, mu + b * (y - mu), rtol=1e-12, atol=1e-15)
    se_mu = res.pooled.se
    np.testing.assert_allclose(res.eb_se, np.sqrt(b * v + (1 - b) ** 2 * se_mu**2), rtol=1e-12)
    if tau2 == 0.0:  # complete pooling
        np.testing.assert_allclose(eb, mu, rtol=0, atol=1e-15)


def test_eb_se_matches_monte_carlo_with_known_tau2():
    """Known-truth simulation of the BLUP prediction error (invented data).

    With tau2 known, Var(theta_hat_i - theta_i) = B_i v_i + (1 - B_i)^2 Var(mu_hat)
    exactly (Raudenbush & Bryk 2002, ch. 3; Robinson 1991).  The design has
    strong shrinkage (B = 0.2), where the Var(mu_hat) term is 80 % of the
    conditional term B v, so the conditional SE alone would be far off.
    """
    k, tau2, mu_true = 5, 0.25, 0.3
    v = np.full(k, 1.0)
    n_rep = 4000
    rng = np.random.default_rng(20240611)
    theta = rng.normal(mu_true, math.sqrt(tau2), (n_rep, k))
    y = rng.normal(theta, np.sqrt(v))
    # GLS mean at the true tau2 (equal weights here) and its variance
    mu_hat = y.mean(axis=1)
    var_mu = (tau2 + 1.0) / k
    template = combine(y[0], v, "reml")
    sq_err = np.empty((n_rep, k))
    eb_se = None
    for r in range(n_rep):  # replicates, each a vectorised call over sites
        known = dataclasses.replace(template, tau2=tau2, estimate=float(mu_hat[r]),
                                    se=math.sqrt(var_mu))
        est, se = empirical_bayes(y[r], v, known)
        sq_err[r] = (est - theta[r]) ** 2
        eb_se = se
    mse = sq_err.mean()
    # 20,000 squared normal errors: relative MC SE of the mean ~ sqrt(2/20000) = 1 %;
    # 5 % is five MC standard errors
    assert mse == pytest.approx(float(np.mean(eb_se**2)), rel=0.05)
    b = tau2 / (tau2 + 1.0)
    assert not mse == pytest.approx(b * 1.0, rel=0.05)  # conditional-only SE is wrong


@pytest.mark.parametrize("method", ["reml", "dl", "pm", "fixed"])
@pytest.mark.parametrize("seed", range(5))
def test_planted_outlier_has_largest_residual(method, seed):
    rng = np.random.default_rng(500 + seed)
    k = 15
    v = rng.uniform(0.01, 0.1, k)
    y = rng.normal(0.0, np.sqrt(v + 0.02))
    j = int(rng.integers(k))
    y[j] += 6.0 * math.sqrt(v[j] + 0.02)  # six total SDs away: a clear outlier
    res = site_influence(y, v, method=method)
    assert int(np.nanargmax(np.abs(res.std_residual))) == j
    assert abs(res.std_residual[j]) > 3.0


def quiet_influence(y, v, method):
    with warnings.catch_warnings():
        warnings.simplefilter("error")
        res = site_influence(y, v, method=method)
    for name in ("loo_estimate", "loo_se", "loo_tau2", "std_residual", "eb_estimate", "eb_se"):
        arr = getattr(res, name)
        assert arr.shape == (len(np.atleast_1d(y)),) and not np.isinf(arr).any(), name
        assert not arr.flags.writeable
    return res


@pytest.mark.parametrize("method", METHODS)
def test_influence_edge_cases(method):
    res = quiet_influence([], [], method)
    assert "no usable sites" in res.note
    res = quiet_influence([0.3], [0.1], method)
    assert np.isnan(res.loo_estimate).all() and "at least 2" in res.note
    res = quiet_influence([0.1, 0.5], [0.1, 0.2], method)
    np.testing.assert_allclose(res.loo_estimate, [0.5, 0.1])  # the other site
    if method != "fixed":
        assert np.isnan(res.std_residual).all() and "two sites" in res.note
    else:
        assert np.isfinite(res.std_residual).all()
    # invalid sites stay in place as NaN
    res = quiet_influence([0.1, np.nan, 0.4, 0.2, 0.8], [0.1, 0.1, 0.0, 0.2, 0.1], method)
    assert np.isnan(res.loo_estimate[[1, 2]]).all() and np.isnan(res.eb_estimate[[1, 2]]).all()
    assert np.isfinite(res.loo_estimate[[0, 3, 4]]).all()
    assert "dropped" in res.note
    # identical estimates: residuals 0, EB = the common value
    res = quiet_influence([0.2] * 5, [0.1, 0.2, 0.3, 0.1, 0.5], method)
    np.testing.assert_allclose(res.std_residual, 0.0, atol=1e-12)
    np.testing.assert_allclose(res.eb_estimate, 0.2, atol=1e-15)
    with pytest.raises(ValueError, match="Did you mean"):
        site_influence([0.1, 0.2], [0.1, 0.1], method=method + "x")
