"""Tests for takeup.pipeline.stats.significance against scipy, statsmodels and
published values."""

from __future__ import annotations

import numpy as np
import pytest
import statsmodels.api as sm
from scipy import stats
from statsmodels.stats.multitest import multipletests
from statsmodels.stats.proportion import proportions_ztest

from takeup.pipeline.stats.significance import (
    benjamini_hochberg,
    sample_ratio_test,
    two_proportion_difference_test,
    two_proportion_z,
)

# --------------------------------------------------------------------------
# Sample-ratio test
# --------------------------------------------------------------------------


def test_sample_ratio_equals_scipy_chisquare():
    rng = np.random.default_rng(101)
    n_sites, n_arms = 40, 3
    shares = rng.dirichlet(np.full(n_arms, 5.0), size=n_sites)
    counts = rng.multinomial(500, shares * 0.97 + 0.01).astype(float)
    counts_before = counts.copy()
    chi2, df, p = sample_ratio_test(counts, shares)
    assert np.array_equal(counts, counts_before)
    for i in range(n_sites):
        ref = stats.chisquare(counts[i], f_exp=counts[i].sum() * shares[i])
        # same formula, float rounding only
        assert chi2[i] == pytest.approx(ref.statistic, rel=1e-12)
        assert p[i] == pytest.approx(ref.pvalue, rel=1e-10)
        assert df[i] == n_arms - 1


def test_sample_ratio_one_design_for_all_sites_and_weights():
    counts = np.array([[120.0, 80.0], [70.0, 30.0]])
    res = sample_ratio_test(counts, [2, 1])  # 2:1 allocation as weights
    for i in range(2):
        ref = stats.chisquare(counts[i], f_exp=counts[i].sum() * np.array([2 / 3, 1 / 3]))
        assert res.chi2[i] == pytest.approx(ref.statistic, rel=1e-12)
        assert res.p_value[i] == pytest.approx(ref.pvalue, rel=1e-10)


def test_sample_ratio_worked_values():
    # Recomputed by hand from the Pearson formula (not a published table):
    # 600/400 at 50/50: 2 * 100^2 / 500 = 40, p = P(chi2_1 > 40) = 2.54e-10;
    # 44,000/45,000: 2 * 500^2 / 44,500 = 11.236, p = 0.000802;
    # 10,100/9,990: 2 * 55^2 / 10,045 = 0.6023, p = 0.4377.
    chi2, df, p = sample_ratio_test([[600, 400], [44_000, 45_000], [10_100, 9_990]], [0.5, 0.5])
    assert chi2[0] == pytest.approx(40.0, rel=1e-12)
    assert p[0] == pytest.approx(2.54e-10, rel=2e-3)  # 3 significant figures
    assert chi2[1] == pytest.approx(11.236, abs=5e-4)  # 3 decimals
    assert p[1] == pytest.approx(0.000802, rel=1e-3)  # 3 significant figures
    assert p[2] == pytest.approx(0.4377, abs=5e-5)  # 4 decimals
    assert df.tolist() == [1, 1, 1]


def test_sample_ratio_undefined_sites():
    res = sample_ratio_test([[0, 0], [np.nan, 5], [10, 12]], [0.5, 0.5])
    assert np.isnan(res.chi2[:2]).all() and np.isnan(res.p_value[:2]).all()
    assert "no participants" in res.notes[0] and "missing" in res.notes[1]
    assert res.notes[2] == "" and np.isfinite(res.p_value[2])
    with pytest.raises(ValueError):
        sample_ratio_test([[1, 2]], [0.0, 1.0])
    with pytest.raises(ValueError):
        sample_ratio_test([[-1, 2]], [0.5, 0.5])


# --------------------------------------------------------------------------
# Two-proportion z test
# --------------------------------------------------------------------------


@pytest.mark.parametrize("alternative", ["two-sided", "larger", "smaller"])
def test_two_proportion_z_equals_statsmodels(alternative):
    rng = np.random.default_rng(202)
    n_sites = 200
    n1 = rng.integers(5, 400, n_sites)
    n2 = rng.integers(5, 400, n_sites)
    x1 = rng.binomial(n1, rng.uniform(0.05, 0.95, n_sites))
    x2 = rng.binomial(n2, rng.uniform(0.05, 0.95, n_sites))
    z, p = two_proportion_z(x1, n1, x2, n2, alternative=alternative)
    for i in range(n_sites):
        zr, pr = proportions_ztest([x1[i], x2[i]], [n1[i], n2[i]], alternative=alternative)
        # identical formula: agreement to float rounding, 1e-10 as specified
        assert z[i] == pytest.approx(zr, rel=1e-10, abs=1e-10)
        assert p[i] == pytest.approx(pr, rel=1e-10, abs=1e-12)


def test_two_proportion_z_documented_example():
    # statsmodels docstring of proportions_ztest: counts 5/83 vs 12/99 give
    # p = 0.159 (printed to 3 decimals).
    _, p = two_proportion_z(5, 83, 12, 99)
    assert p[0] == pytest.approx(0.159, abs=5e-4)


def test_two_proportion_z_degenerate():
    res = two_proportion_z([0, 10, 0, 3], [10, 10, 0, np.nan], [0, 10, 2, 2], [10, 10, 5, 5])
    assert np.isnan(res.z).all() and np.isnan(res.p_value).all()
    assert not np.isinf(res.z).any()
    assert "pooled rate" in res.notes[0] and "pooled rate" in res.notes[1]
    assert "no participants" in res.notes[2] and "missing" in res.notes[3]
    with pytest.raises(ValueError):
        two_proportion_z(11, 10, 1, 10)


# --------------------------------------------------------------------------
# First-stage change (difference of two differences of proportions)
# --------------------------------------------------------------------------


def test_first_stage_change_equals_hc0_interaction_t():
    # Saturated linear probability model D ~ Z + R + Z:R on individual data:
    # the interaction estimates pi_recent - pi_early and its HC0 variance is
    # sum p(1-p)/n over the four cells, so z = -t(HC0) (statsmodels OLS).
    rng = np.random.default_rng(303)
    sizes = {(1, 0): 230, (0, 0): 210, (1, 1): 140, (0, 1): 160}  # (Z, recent)
    rates = {(1, 0): 0.72, (0, 0): 0.08, (1, 1): 0.58, (0, 1): 0.11}
    z_l, r_l, d_l = [], [], []
    counts = {}
    for (zz, rr), n in sizes.items():
        d = (rng.random(n) < rates[(zz, rr)]).astype(float)
        counts[(zz, rr)] = d.sum()
        z_l.append(np.full(n, zz))
        r_l.append(np.full(n, rr))
        d_l.append(d)
    z_arr, r_arr, d_arr = (np.concatenate(v).astype(float) for v in (z_l, r_l, d_l))
    design = sm.add_constant(np.column_stack([z_arr, r_arr, z_arr * r_arr]))
    fit = sm.OLS(d_arr, design).fit(cov_type="HC0")

    res = two_proportion_difference_test(
        counts[(1, 0)], sizes[(1, 0)], counts[(0, 0)], sizes[(0, 0)],
        counts[(1, 1)], sizes[(1, 1)], counts[(0, 1)], sizes[(0, 1)],
    )
    # exact algebraic identity; 1e-8 allows for least-squares rounding
    assert res.z[0] == pytest.approx(-fit.tvalues[3], rel=1e-8)
    assert res.se[0] == pytest.approx(fit.bse[3], rel=1e-8)
    assert res.first_stage_recent[0] - res.first_stage_early[0] == pytest.approx(
        fit.params[3], abs=1e-10)
    assert res.p_value[0] == pytest.approx(stats.norm.sf(-fit.tvalues[3]), rel=1e-8)
    two = two_proportion_difference_test(
        counts[(1, 0)], sizes[(1, 0)], counts[(0, 0)], sizes[(0, 0)],
        counts[(1, 1)], sizes[(1, 1)], counts[(0, 1)], sizes[(0, 1)], alternative="two-sided")
    assert two.p_value[0] == pytest.approx(fit.pvalues[3], rel=1e-8)


def test_first_stage_change_vectorised_and_degenerate():
    rng = np.random.default_rng(404)
    n = rng.integers(20, 300, size=(8, 4))
    x = rng.binomial(n, [0.7, 0.1, 0.5, 0.1])
    cols = [c for j in range(4) for c in (x[:, j], n[:, j])]
    res = two_proportion_difference_test(*cols)
    for i in range(8):
        one = two_proportion_difference_test(*(c[i] for c in cols))
        assert res.z[i] == pytest.approx(one.z[0], rel=1e-14)
    bad = two_proportion_difference_test([10, 0], [10, 10], [0, 0], [10, 0],
                                         [10, 1], [10, 5], [0, 1], [10, 5])
    assert np.isnan(bad.z).all() and not np.isinf(bad.z).any()
    assert "zero variance" in bad.notes[0] and "no participants" in bad.notes[1]


# --------------------------------------------------------------------------
# Benjamini-Hochberg
# --------------------------------------------------------------------------

# Benjamini & Hochberg (1995) example as reproduced in the SciPy docs of
# scipy.stats.false_discovery_control: 15 p-values, 4 rejections at q = 0.05,
# and the BH-adjusted values (printed to 8 significant digits there).
BH_P = [0.0001, 0.0004, 0.0019, 0.0095, 0.0201, 0.0278, 0.0298, 0.0344, 0.0459,
        0.3240, 0.4262, 0.5719, 0.6528, 0.7590, 1.000]
BH_ADJUSTED = [0.0015, 0.003, 0.0095, 0.035625, 0.0603, 0.06385714, 0.06385714, 0.0645,
               0.0765, 0.486, 0.58118182, 0.714875, 0.75323077, 0.81321429, 1.0]


def test_bh_published_example():
    reject, adj = benjamini_hochberg(BH_P, q=0.05)
    assert int(reject.sum()) == 4 and reject[:4].all()
    np.testing.assert_allclose(adj, BH_ADJUSTED, rtol=0, atol=5e-9)  # rounding of the table
    np.testing.assert_allclose(adj, stats.false_discovery_control(BH_P), rtol=1e-12)


@pytest.mark.parametrize("q", [0.05, 0.1, 0.2])
def test_bh_equals_statsmodels(q):
    rng = np.random.default_rng(505)
    for _ in range(30):
        m = int(rng.integers(1, 60))
        p = np.where(rng.random(m) < 0.3, rng.beta(0.3, 6.0, m), rng.random(m))
        p[rng.random(m) < 0.1] = p[0]  # ties
        reject, adj = benjamini_hochberg(p, q=q)
        ref_reject, ref_adj, _, _ = multipletests(p, alpha=q, method="fdr_bh")
        assert np.array_equal(reject, ref_reject)
        np.testing.assert_allclose(adj, ref_adj, rtol=1e-12)


def test_bh_ignores_nan():
    rng = np.random.default_rng(606)
    p = rng.beta(0.5, 3.0, 25)
    p_nan = p.copy()
    p_nan[[3, 10, 17]] = np.nan
    before = p_nan.copy()
    res = benjamini_hochberg(p_nan, q=0.1)
    assert np.array_equal(p_nan, before, equal_nan=True)
    assert res.n_tests == 22
    keep = ~np.isnan(p_nan)
    ref_reject, ref_adj, _, _ = multipletests(p_nan[keep], alpha=0.1, method="fdr_bh")
    assert np.array_equal(res.reject[keep], ref_reject)
    np.testing.assert_allclose(res.p_adjusted[keep], ref_adj, rtol=1e-12)
    assert not res.reject[~keep].any() and np.isnan(res.p_adjusted[~keep]).all()
    # shape is kept for 2-D input (sites x alerts), treated as one family
    res2 = benjamini_hochberg(p_nan[:24].reshape(4, 6), q=0.1)
    assert res2.reject.shape == (4, 6)
    with pytest.raises(ValueError):
        benjamini_hochberg([0.5, 1.2])
