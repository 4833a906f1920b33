"""Tests of takeup.pipeline.stats.meta_analysis.meta (combine) and takeup.pipeline.stats.meta_analysis.subgroups.

External references used here:
* statsmodels.stats.meta_analysis.combine_effects (fixed effect, DL, PM,
  HKSJ variance and intervals) on random inputs;
* the BCG vaccine trials (Colditz et al. 1994, JAMA 271, 698-702) with the
  values documented with Viechtbauer (2010), J. Stat. Softw. 36(3), and the
  metafor documentation;
* scipy (chi-square / t / normal quantiles, a bounded optimiser on an
  independently coded restricted likelihood);
* statsmodels WLS Wald test for the between-group statistic.

statsmodels provides neither REML nor the Q-profile interval for tau2: those
are checked against the published BCG values and against their defining
equations (score = 0, generalised Q = chi-square quantile) only.
"""

from __future__ import annotations

import dataclasses
import math
import warnings

import numpy as np
import pytest
from scipy import optimize, stats
from statsmodels.regression.linear_model import WLS
from statsmodels.stats.meta_analysis import combine_effects, effectsize_2proportions

from takeup.pipeline.stats.meta_analysis.meta import METHODS, MetaResult, combine
from takeup.pipeline.stats.meta_analysis.subgroups import between_group_test

# ---------------------------------------------------------------------------
# helpers
# ---------------------------------------------------------------------------

SEEDS = range(30)


def random_sites(seed: int, k_min: int = 3, k_max: int = 40):
    """Simulated per-site effects and variances (invented data, fixed seed).

    Within-site variances span two orders of magnitude (0.005-0.5, like ITT
    variances of sites of very different size) and tau2 is 0, small or
    large, so both the boundary and the interior cases of tau2 occur.
    """
    rng = np.random.default_rng(seed)
    k = int(rng.integers(k_min, k_max + 1))
    v = rng.uniform(0.005, 0.5, k)
    tau2 = float(rng.choice([0.0, 0.02, 0.2]))
    y = rng.normal(0.2, np.sqrt(v + tau2))
    return y, v


def sm_combine(y, v, **kwargs):
    """statsmodels combine_effects, silencing its RuntimeWarning.

    statsmodels leaves a negative DL tau2 unclipped, which can make weights
    negative and trigger "invalid value in sqrt" inside statsmodels; the
    quantities compared below are unaffected.
    """
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", RuntimeWarning)
        return combine_effects(y, v, **kwargs)


def sm_conf_int(sm, use_t):
    """statsmodels CombineResults.conf_int, silenced for the same reason."""
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", RuntimeWarning)
        return sm.conf_int(use_t=use_t)


def rel_close(a: float, b: float, rtol: float, atol: float = 0.0) -> bool:
    return abs(a - b) <= atol + rtol * abs(b)


def float_fields(res) -> dict[str, float]:
    return {f.name: getattr(res, f.name) for f in dataclasses.fields(res)
            if isinstance(getattr(res, f.name), float)}


def gen_q(y, v, tau2):
    """Generalised Q written out independently (DerSimonian & Kacker 2007)."""
    w = 1.0 / (v + tau2)
    mu = np.sum(w * y) / np.sum(w)
    return float(np.sum(w * (y - mu) ** 2))


def restricted_loglik(y, v, tau2):
    """Restricted log-likelihood in matrix form (Harville 1977), coded independently.

    -1/2 [log|V| + log|X' V^-1 X| + y' P y],  P = V^-1 - V^-1 X (X'V^-1X)^-1 X' V^-1,
    X a column of ones; constants dropped.
    """
    V = np.diag(v + tau2)
    Vi = np.linalg.inv(V)
    X = np.ones((len(y), 1))
    xtvx = X.T @ Vi @ X
    P = Vi - Vi @ X @ np.linalg.inv(xtvx) @ X.T @ Vi
    return -0.5 * (np.linalg.slogdet(V)[1] + np.linalg.slogdet(xtvx)[1] + y @ P @ y)


# Tolerance for equality with statsmodels: both sides evaluate the same
# closed-form expressions in double precision, so agreement to ~1e-12 is
# expected; 1e-8 relative (the brief's requirement) leaves room for
# statsmodels' iterative PM stopping rule (atol below).
RTOL_SM = 1e-8
# statsmodels' PM iteration stops when |Q_gen - (k-1)| < atol; 1e-11 makes its
# tau2 exact to ~1e-13 relative (Newton converges quadratically).
SM_PM_KW = dict(atol=1e-11, maxiter=200)


# ---------------------------------------------------------------------------
# equality with statsmodels combine_effects on random inputs
# ---------------------------------------------------------------------------

@pytest.mark.parametrize("seed", SEEDS)
def test_fixed_effect_matches_statsmodels(seed):
    y, v = random_sites(seed)
    k = len(y)
    ours = combine(y, v, "fixed")
    sm = sm_combine(y, v, method_re="dl", use_t=True)  # statsmodels reference
    ci_z = sm_conf_int(sm, use_t=False)
    ci_t = sm_conf_int(sm, use_t=True)
    hom = sm.test_homogeneity()
    assert ours.n_sites == k and ours.tau2 == 0.0
    checks = {
        "estimate": sm.mean_effect_fe,
        "se": sm.sd_eff_w_fe,
        "ci_low": ci_z[0][0], "ci_high": ci_z[0][1],
        "hksj_se": math.sqrt(sm.var_hksj_fe),            # statsmodels "fixed effect wls"
        "hksj_ci_low": ci_t[2][0], "hksj_ci_high": ci_t[2][1],
        "q": sm.q, "q_pvalue": hom.pvalue,
        # statsmodels does not clip: I2 = 1 - 1/H2 with H2 = Q/(k-1)
        "i2": max(0.0, sm.i2), "h2": max(1.0, sm.h2),
    }
    for name, ref in checks.items():
        assert rel_close(getattr(ours, name), ref, RTOL_SM), name
    assert ours.q_df == hom.df


@pytest.mark.parametrize("seed", SEEDS)
def test_dersimonian_laird_matches_statsmodels(seed):
    y, v = random_sites(seed)
    ours = combine(y, v, "dl")
    sm = sm_combine(y, v, method_re="dl", use_t=True)  # statsmodels reference
    if sm.tau2 < 0:
        # statsmodels leaves the DL moment estimate unclipped; with tau2 clipped
        # at 0 the random-effects fit is the fixed-effect one.
        assert ours.tau2 == 0.0
        ref = {"estimate": sm.mean_effect_fe, "se": sm.sd_eff_w_fe,
               "hksj_se": math.sqrt(sm.var_hksj_fe),
               "hksj_ci_low": sm_conf_int(sm, use_t=True)[2][0]}
        assert ours.i2 == 0.0 and ours.h2 == 1.0
    else:
        ci_z = sm_conf_int(sm, use_t=False)
        ci_t = sm_conf_int(sm, use_t=True)
        ref = {"tau2": sm.tau2, "estimate": sm.mean_effect_re, "se": sm.sd_eff_w_re,
               "ci_low": ci_z[1][0], "ci_high": ci_z[1][1],
               "hksj_se": math.sqrt(sm.var_hksj_re),     # statsmodels "random effect wls"
               "hksj_ci_low": ci_t[3][0], "hksj_ci_high": ci_t[3][1],
               # for DL, tau2/(tau2 + s^2) = (Q - df)/Q = statsmodels' 1 - 1/H2
               "i2": sm.i2, "h2": sm.h2}
    ref["q"] = sm.q
    for name, val in ref.items():
        assert rel_close(getattr(ours, name), val, RTOL_SM), name


@pytest.mark.parametrize("seed", SEEDS)
def test_paule_mandel_matches_statsmodels(seed):
    y, v = random_sites(seed)
    k = len(y)
    ours = combine(y, v, "pm")
    sm = sm_combine(y, v, method_re="pm", use_t=True, **SM_PM_KW)  # reference
    q_fe = gen_q(y, v, 0.0)
    if sm.tau2 == 0.0 and q_fe > k - 1:
        # statsmodels' _fit_tau_iterative tests `ee < 0` before its convergence
        # test, so when its last Newton step lands at Q_gen - (k-1) = -1e-14
        # (round-off) it returns tau2 = 0.  Not a PM solution: check ours
        # solves the PM equation instead and record the case.
        # (test_statsmodels_pm_comparison_is_mostly_direct bounds how often.)
        assert ours.tau2 > 0.0
        assert rel_close(gen_q(y, v, ours.tau2), k - 1, 1e-10)
        return
    ci_t = sm_conf_int(sm, use_t=True)
    ci_z = sm_conf_int(sm, use_t=False)
    ref = {"estimate": sm.mean_effect_re, "se": sm.sd_eff_w_re,
           "ci_low": ci_z[1][0], "ci_high": ci_z[1][1],
           "hksj_se": math.sqrt(sm.var_hksj_re),
           "hksj_ci_low": ci_t[3][0], "hksj_ci_high": ci_t[3][1], "q": sm.q}
    for name, val in ref.items():
        assert rel_close(getattr(ours, name), val, RTOL_SM), name
    # tau2 near 0 is compared with an absolute floor of 1e-12 (statsmodels'
    # stopping rule is on Q, not on tau2)
    assert rel_close(ours.tau2, sm.tau2, RTOL_SM, atol=1e-12)


def test_statsmodels_pm_comparison_is_mostly_direct():
    """Guard: the xfail branch above must stay the exception, not the rule."""
    direct = 0
    for seed in SEEDS:
        y, v = random_sites(seed)
        sm = sm_combine(y, v, method_re="pm", **SM_PM_KW)
        direct += not (sm.tau2 == 0.0 and gen_q(y, v, 0.0) > len(y) - 1)
    assert direct >= 0.8 * len(SEEDS)


@pytest.mark.parametrize("seed", range(6))
def test_hksj_truncation_and_level(seed):
    y, v = random_sites(seed)
    sm = sm_combine(y, v, method_re="dl", use_t=True, alpha=0.10)  # reference
    ours = combine(y, v, "dl", level=0.90, hksj_truncate=True)
    w_sum = 1.0 / sm.sd_eff_w_re**2 if sm.tau2 >= 0 else 1.0 / sm.sd_eff_w_fe**2
    var_hk = sm.var_hksj_re if sm.tau2 >= 0 else sm.var_hksj_fe
    # Knapp & Hartung (2003) truncation: variance max(1, q) / sum w
    assert rel_close(ours.hksj_se, math.sqrt(max(var_hk, 1.0 / w_sum)), RTOL_SM)
    # 90% z interval uses the scipy normal quantile 1.6449
    z = stats.norm.ppf(0.95)
    assert rel_close(ours.ci_high - ours.estimate, z * ours.se, 1e-12)
    t = stats.t.ppf(0.95, len(y) - 1)
    assert rel_close(ours.hksj_ci_high - ours.estimate, t * ours.hksj_se, 1e-12)


# ---------------------------------------------------------------------------
# BCG vaccine trials: published values
# ---------------------------------------------------------------------------

# Colditz et al. (1994), JAMA 271, 698-702; 13 trials (open data).
# columns: trial, vaccinated TB, vaccinated no TB, control TB, control no TB
BCG = np.array([
    [1, 4, 119, 11, 128],
    [2, 6, 300, 29, 274],
    [3, 3, 228, 11, 209],
    [4, 62, 13536, 248, 12619],
    [5, 33, 5036, 47, 5761],
    [6, 180, 1361, 372, 1079],
    [7, 8, 2537, 10, 619],
    [8, 505, 87886, 499, 87892],
    [9, 29, 7470, 45, 7232],
    [10, 17, 1699, 65, 1600],
    [11, 186, 50448, 141, 27197],
    [12, 5, 2493, 3, 2338],
    [13, 27, 16886, 29, 17825],
], dtype=float)
# allocation of the same 13 trials (same source)
BCG_ALLOC = ["random", "random", "random", "random", "alternate", "alternate", "random",
             "random", "random", "systematic", "systematic", "systematic", "systematic"]


def bcg_log_rr():
    """Log risk ratio and its large-sample variance per trial.

    yi = ln[(a/(a+b)) / (c/(c+d))], vi = 1/a - 1/(a+b) + 1/c - 1/(c+d), the
    measure used for these data by Viechtbauer (2010).
    """
    a, b, c, d = BCG[:, 1], BCG[:, 2], BCG[:, 3], BCG[:, 4]
    y = np.log(a / (a + b)) - np.log(c / (c + d))
    v = 1 / a - 1 / (a + b) + 1 / c - 1 / (c + d)
    return y, v


def within_half_unit(value: float, published: float, decimals: int) -> bool:
    """|value - published| <= half a unit in the last published digit.

    (1 + 1e-9) absorbs the binary representation of the decimal bound only.
    """
    return abs(value - published) <= 0.5 * 10.0 ** (-decimals) * (1 + 1e-9)


def test_bcg_effect_sizes_match_statsmodels():
    # statsmodels.stats.meta_analysis.effectsize_2proportions, "risk-ratio"
    y, v = bcg_log_rr()
    a, b, c, d = BCG[:, 1], BCG[:, 2], BCG[:, 3], BCG[:, 4]
    y_sm, v_sm = effectsize_2proportions(a, a + b, c, c + d, statistic="risk-ratio")
    np.testing.assert_allclose(y, y_sm, rtol=1e-12)  # same formula, round-off only
    np.testing.assert_allclose(v, v_sm, rtol=1e-12)


# Published values: Viechtbauer (2010), J. Stat. Softw. 36(3), and the metafor
# documentation [D]; each entry: (value, number of published decimals).
BCG_FIXED = {"estimate": (-0.4303, 4), "se": (0.0405, 4), "ci_low": (-0.5097, 4),
             "ci_high": (-0.3509, 4), "q": (152.2330, 4)}
BCG_DL = {"tau2": (0.3088, 4), "i2": (0.9212, 4),  # I2 = 92.12 %
          "h2": (12.69, 2), "estimate": (-0.7141, 4), "se": (0.1787, 4),
          "ci_low": (-1.0644, 4), "ci_high": (-0.3638, 4),
          "tau2_ci_low": (0.1197, 4), "tau2_ci_high": (1.1115, 4)}  # Q-profile
BCG_REML = {"tau2": (0.3132, 4), "i2": (0.9222, 4),  # I2 = 92.22 %
            "h2": (12.86, 2), "estimate": (-0.7145, 4), "se": (0.1798, 4),
            "ci_low": (-1.0669, 4), "ci_high": (-0.3622, 4),
            # REML with Hartung-Knapp
            "hksj_se": (0.1808, 4), "hksj_ci_low": (-1.1084, 4), "hksj_ci_high": (-0.3206, 4),
            # Q-profile interval (does not depend on the tau2 estimator)
            "tau2_ci_low": (0.1197, 4), "tau2_ci_high": (1.1115, 4)}


@pytest.mark.parametrize("method, published", [
    ("fixed", BCG_FIXED), ("dl", BCG_DL), ("reml", BCG_REML)])
def test_bcg_published_values(method, published):
    y, v = bcg_log_rr()
    res = combine(y, v, method)
    assert res.n_sites == 13 and res.q_df == 12 and res.converged
    for name, (val, dec) in published.items():
        assert within_half_unit(getattr(res, name), val, dec), (name, getattr(res, name), val)
    # Q = 152.2330 on 12 df (same source) -> chi-square p from scipy
    assert rel_close(res.q_pvalue, stats.chi2.sf(152.2330, 12), 1e-4)


def test_bcg_reml_hartung_knapp_t_and_prediction_intervals():
    y, v = bcg_log_rr()
    hk = combine(y, v, "reml", pi_method="hksj")
    # Viechtbauer (2010) / metafor docs [D]: Hartung-Knapp t = -3.9522 (df 12)
    assert within_half_unit(hk.estimate / hk.hksj_se, -3.9522, 4)
    # prediction interval (t with 12 df, sqrt(tau2 + SE_HK^2)) [-1.9960, 0.5670]:
    # recomputed value listed in the project's reference sheet [C]
    assert within_half_unit(hk.pi_low, -1.9960, 4)
    assert within_half_unit(hk.pi_high, 0.5670, 4)
    # z-based REML prediction interval [-1.8667, 0.4376] (same sheet, [C])
    z = combine(y, v, "reml", pi_method="z")
    assert within_half_unit(z.pi_low, -1.8667, 4)
    assert within_half_unit(z.pi_high, 0.4376, 4)
    # default: t with k - 2 = 11 df and the z-based SE (Higgins, Thompson &
    # Spiegelhalter 2009, JRSS A 172), quantile from scipy
    d = combine(y, v, "reml")
    half = stats.t.ppf(0.975, 11) * math.sqrt(d.tau2 + d.se**2)
    assert rel_close(d.pi_high - d.estimate, half, 1e-12)
    assert rel_close(d.estimate - d.pi_low, half, 1e-12)


# ---------------------------------------------------------------------------
# defining equations of REML, PM and the Q-profile interval
# ---------------------------------------------------------------------------

@pytest.mark.parametrize("seed", SEEDS)
def test_reml_solves_score_equation(seed):
    y, v = random_sites(seed, k_min=2)
    res = combine(y, v, "reml")
    t = res.tau2
    assert res.converged and t >= 0.0
    h = 1e-5 * (t + v.mean())
    if t > 0.0:
        # central difference of the independently coded restricted likelihood;
        # normalised by the curvature scale, a first-order-accurate zero of the
        # derivative is ~h^2-small (1e-6 leaves room for the O(h^2) error and
        # round-off of the log-likelihood, ~1e-13 / h)
        d1 = (restricted_loglik(y, v, t + h) - restricted_loglik(y, v, t - h)) / (2 * h)
        d2 = (restricted_loglik(y, v, t + h) - 2 * restricted_loglik(y, v, t)
              + restricted_loglik(y, v, t - h)) / h**2
        assert abs(d1 / d2) <= 1e-6 * (t + v.mean())
    else:
        # boundary: the forward derivative at 0 is not positive (1e-8 slack
        # for the forward-difference error)
        d1 = (restricted_loglik(y, v, h) - restricted_loglik(y, v, 0.0)) / h
        assert d1 <= 1e-8 * abs(restricted_loglik(y, v, 0.0))
    # and it is the maximiser over tau2 >= 0 found by scipy's bounded optimiser
    upper = 10.0 * np.var(y) + v.max()
    opt = optimize.minimize_scalar(lambda s: -restricted_loglik(y, v, s), bounds=(0.0, upper),
                                   method="bounded", options={"xatol": 1e-10})
    # bounded Brent locates the argmax to ~sqrt(eps) relative accuracy in
    # the flat top of the likelihood: allow 1e-5 of the variance scale
    assert abs(opt.x - t) <= 1e-5 * (t + v.mean())


@pytest.mark.parametrize("seed", SEEDS)
def test_paule_mandel_solves_generalised_q(seed):
    y, v = random_sites(seed)
    k = len(y)
    res = combine(y, v, "pm")
    assert res.converged
    if gen_q(y, v, 0.0) < k - 1:
        assert res.tau2 == 0.0
    else:
        # root found to machine precision; 1e-10 relative covers round-off in Q
        assert rel_close(gen_q(y, v, res.tau2), k - 1, 1e-10)


@pytest.mark.parametrize("seed", SEEDS)
def test_q_profile_interval_solves_its_equations(seed):
    # Viechtbauer (2007): Q_gen(tau2_lo) = chi2_{k-1, 0.975}, Q_gen(tau2_hi) = chi2_{k-1, 0.025}
    y, v = random_sites(seed)
    k = len(y)
    res = combine(y, v, "reml")
    upper_q, lower_q = stats.chi2.ppf([0.975, 0.025], k - 1)
    for bound, target in ((res.tau2_ci_low, upper_q), (res.tau2_ci_high, lower_q)):
        assert bound >= 0.0
        if bound == 0.0:
            assert gen_q(y, v, 0.0) <= target
        else:
            assert rel_close(gen_q(y, v, bound), target, 1e-10)  # round-off only
    assert res.tau2_ci_low <= res.tau2_ci_high


@pytest.mark.parametrize("seed", range(10))
def test_i2_from_tau2_reml(seed):
    # I2 = tau2 / (tau2 + s2), s2 = (k-1) sum w / ((sum w)^2 - sum w^2)
    # (Higgins & Thompson 2002; definition used by Viechtbauer 2010)
    y, v = random_sites(seed)
    res = combine(y, v, "reml")
    w = 1 / v
    s2 = (len(y) - 1) * w.sum() / (w.sum() ** 2 - (w**2).sum())
    assert rel_close(res.i2, res.tau2 / (res.tau2 + s2), 1e-12)
    assert rel_close(res.h2, (res.tau2 + s2) / s2, 1e-12)


# ---------------------------------------------------------------------------
# edge cases: defined output, note, no warnings, no inf
# ---------------------------------------------------------------------------

def run_quiet(*args, **kwargs) -> MetaResult:
    with warnings.catch_warnings():
        warnings.simplefilter("error")
        res = combine(*args, **kwargs)
    for name, val in float_fields(res).items():
        assert not math.isinf(val), name
    return res


@pytest.mark.parametrize("method", METHODS)
def test_no_sites(method):
    res = run_quiet([], [], method)
    assert res.n_sites == 0 and not res.converged
    assert all(math.isnan(x) for name, x in float_fields(res).items() if name != "level")
    assert "no usable sites" in res.note


@pytest.mark.parametrize("method", METHODS)
def test_one_site(method):
    res = run_quiet([0.4], [0.09], method)
    assert res.estimate == 0.4 and rel_close(res.se, 0.3, 1e-15)
    assert math.isnan(res.q) and math.isnan(res.i2) and math.isnan(res.hksj_se)
    assert math.isnan(res.pi_low)
    if method == "fixed":
        assert res.tau2 == 0.0
    else:
        assert math.isnan(res.tau2) and "tau2 not estimable" in res.note


@pytest.mark.parametrize("method", METHODS)
def test_two_sites(method):
    y, v = np.array([0.1, 0.9]), np.array([0.04, 0.05])
    res = run_quiet(y, v, method)
    if method == "fixed":  # inverse-variance mean by hand
        assert rel_close(res.estimate, (0.1 / 0.04 + 0.9 / 0.05) / (1 / 0.04 + 1 / 0.05), 1e-14)
    assert res.n_sites == 2 and math.isfinite(res.estimate) and res.q_df == 1
    assert math.isfinite(res.tau2) and res.tau2 >= 0
    assert math.isfinite(res.hksj_ci_low)
    assert math.isnan(res.pi_low) and "at least 3 sites" in res.note


@pytest.mark.parametrize("method", METHODS)
def test_identical_estimates(method):
    res = run_quiet([0.25] * 6, [0.1, 0.2, 0.05, 0.3, 0.1, 0.4], method)
    assert res.tau2 == 0.0 and res.q == 0.0 and res.i2 == 0.0 and res.h2 == 1.0
    assert res.estimate == pytest.approx(0.25, abs=1e-15)
    assert res.q_pvalue == 1.0


@pytest.mark.parametrize("method", METHODS)
def test_zero_variance_and_nan_sites_are_dropped(method):
    y = np.array([0.1, 0.5, np.nan, 0.3, 0.7, 0.2])
    v = np.array([0.1, 0.0, 0.1, np.nan, 0.2, -0.1])
    y0, v0 = y.copy(), v.copy()
    res = run_quiet(y, v, method)
    ref = run_quiet([0.1, 0.7], [0.1, 0.2], method)
    assert res.n_sites == 2
    assert res.estimate == ref.estimate and res.se == ref.se
    assert "2 site(s) dropped: missing" in res.note
    assert "2 site(s) dropped: zero or negative variance" in res.note
    np.testing.assert_array_equal(y, y0)  # inputs not mutated
    np.testing.assert_array_equal(v, v0)


def test_unknown_method_names_nearest():
    with pytest.raises(ValueError, match=r"'remel'.*Did you mean 'reml'.*'fixed', 'dl', 'reml', 'pm'"):
        combine([0.1, 0.2], [0.1, 0.1], "remel")
    with pytest.raises(ValueError, match="Did you mean 'dl'"):
        combine([0.1, 0.2], [0.1, 0.1], "DerSimonian-Laird")
    with pytest.raises(ValueError, match="Did you mean 't'"):
        combine([0.1, 0.2], [0.1, 0.1], pi_method="tt")
    with pytest.raises(ValueError, match="level"):
        combine([0.1, 0.2], [0.1, 0.1], level=1.5)
    assert combine([0.1, 0.2], [0.1, 0.1], " REML ").method == "reml"


def test_result_is_read_only():
    res = combine([0.1, 0.2, 0.4], [0.1, 0.1, 0.2])
    with pytest.raises(dataclasses.FrozenInstanceError):
        res.estimate = 0.0


def test_location_scale_equivariance():
    # a meta-analysis is equivariant under y -> a + b y, v -> b^2 v; effects in
    # tiny units must not change anything but the scale
    y, v = random_sites(3)
    a, b = 5.0, 1e-6
    for method in METHODS:
        r1 = combine(y, v, method)
        r2 = combine(a + b * y, b**2 * v, method)
        assert rel_close(r2.estimate, a + b * r1.estimate, 1e-12)
        assert rel_close(r2.se, b * r1.se, 1e-9)
        assert rel_close(r2.tau2, b**2 * r1.tau2, 1e-8, atol=1e-30)
        assert rel_close(r2.q, r1.q, 1e-9)


# ---------------------------------------------------------------------------
# subgroup test
# ---------------------------------------------------------------------------

def test_subgroup_single_group():
    y, v = random_sites(1)
    res = between_group_test(y, v, ["a"] * len(y))
    assert res.df == 0 and res.q_between == 0.0 and math.isnan(res.pvalue)
    assert "only one group" in res.note
    assert res.results[0].estimate == combine(y, v).estimate


@pytest.mark.parametrize("method", METHODS)
def test_subgroup_hand_computation_bcg(method):
    y, v = bcg_log_rr()
    res = between_group_test(y, v, BCG_ALLOC, method=method)
    assert res.labels == ("random", "alternate", "systematic")
    alloc = np.array(BCG_ALLOC)
    est, se = [], []
    for lab, r in zip(res.labels, res.results):
        ref = combine(y[alloc == lab], v[alloc == lab], method)
        assert r.estimate == ref.estimate and r.se == ref.se
        est.append(ref.estimate)
        se.append(ref.se)
    est, w = np.array(est), 1 / np.array(se) ** 2
    mu = np.sum(w * est) / np.sum(w)
    q_b = np.sum(w * (est - mu) ** 2)
    assert res.df == 2
    assert rel_close(res.q_between, q_b, 1e-12)
    assert rel_close(res.pvalue, stats.chi2.sf(q_b, 2), 1e-12)


def test_subgroup_fixed_effect_partition_of_q():
    # Q_total = Q_within + Q_between (Hedges & Olkin 1985; Borenstein et al.
    # 2009, ch. 19) for the fixed-effect model
    for seed in range(5):
        y, v = random_sites(seed, k_min=12)
        rng = np.random.default_rng(100 + seed)
        g = rng.integers(0, 3, len(y))
        res = between_group_test(y, v, g, method="fixed")
        q_within = sum(r.q for r in res.results if r.n_sites > 1)
        assert rel_close(res.q_between + q_within, combine(y, v, "fixed").q, 1e-10)


@pytest.mark.parametrize("seed", range(5))
def test_subgroup_matches_statsmodels_wls_wald(seed):
    # With each site weighted 1 / (v + tau2_g) (its group's tau2) and scale
    # fixed at 1, the WLS Wald test of equal group means is Q_between
    # (statsmodels WLS, cov_type="fixed scale").
    y, v = random_sites(seed, k_min=15)
    g = np.random.default_rng(200 + seed).choice(["x", "y", "z", "w"], len(y))
    res = between_group_test(y, v, g, method="reml")
    labels = list(res.labels)
    tau2_site = np.array([res.result_for(lab).tau2 for lab in g])
    tau2_site = np.where(np.isnan(tau2_site), 0.0, tau2_site)  # 1-site group: tau2 = 0
    X = np.column_stack([(g == lab).astype(float) for lab in labels])
    fit = WLS(y, X, weights=1 / (v + tau2_site)).fit(cov_type="fixed scale")
    G = len(labels)
    R = np.hstack([np.eye(G - 1), -np.ones((G - 1, 1))])  # mu_g - mu_G = 0
    wald = fit.wald_test(R, use_f=False, scalar=True)
    assert res.df == G - 1
    assert rel_close(res.q_between, float(wald.statistic), 1e-9)  # round-off in the solve
    assert rel_close(res.pvalue, float(wald.pvalue), 1e-7)


def test_subgroup_missing_labels_and_unknown_method():
    y = [0.1, 0.3, 0.5, np.nan, 0.9]
    v = [0.1, 0.1, 0.1, 0.1, 0.1]
    with warnings.catch_warnings():
        warnings.simplefilter("error")
        res = between_group_test(y, v, ["a", "a", None, "b", "b"], method="dl")
    assert res.labels == ("a", "b")
    assert "missing group label" in res.note and "missing or non-finite" in res.note
    assert res.result_for("b").n_sites == 1 and "one site" in res.note
    with pytest.raises(ValueError, match="Did you mean 'pm'"):
        between_group_test(y, v, ["a"] * 5, method="p-m")
