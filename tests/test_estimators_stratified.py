"""Stratified ITT / complier share / CACE against linearmodels, a known-truth simulation,
the per-stratum sample-ratio check against scipy, and degenerate strata.

Reference: linearmodels ``IV2SLS`` of Y on D instrumented by Z, with weights 1/p_s (treated)
and 1/(1 - p_s) (controls), p_s the stratum's realised treated share, and the stratum dummies
as exogenous regressors; ``fit(cov_type="robust" | "clustered", debiased=True)``.  Tolerances:
1e-9 relative for point estimates (the same closed-form arithmetic in another order, a few
ulps), 1e-6 relative for standard errors and statistics (sums of squares of up to 10^4 terms
accumulated in another order).
"""

from __future__ import annotations

import numpy as np
import pandas as pd
import pytest
from linearmodels.iv import IV2SLS
from scipy import stats

from takeup.pipeline.stats.estimators.stratified import (StratumClusterMoments, stratified_kappa_means,
                                                         stratified_moments_from_arrays, stratified_wald,
                                                         weighted_site_moments)
from takeup.pipeline.stats.estimators.complier_means import complier_outcome_means
from takeup.pipeline.stats.estimators.weak_iv import anderson_rubin_set
from takeup.pipeline.stats.stratified_ratio import stratified_sample_ratio_test


def _data(rng, n, odds, clusters=None):
    s = rng.integers(0, len(odds), n)
    p = np.asarray(odds)[s]
    z = (rng.random(n) < p).astype(float)
    always = rng.random(n) < 0.05 + 0.05 * s
    complier = rng.random(n) < 0.6
    d = np.where(always, 1.0, np.where(complier, z, 0.0))
    y = 1.0 + 2.0 * s + d * (3.0 + s) + rng.normal(size=n) * (1 + 0.3 * s)
    cl = rng.integers(0, clusters, n) if clusters else None
    return s, z, d, y, cl


def _weights(s, z):
    ph = pd.Series(z).groupby(s).transform("mean").to_numpy()
    return np.where(z == 1, 1.0 / ph, 1.0 / (1.0 - ph))


def _cluster_cells(s, cl, z, d, y, sm, site=None):
    site = np.zeros(len(s), int) if site is None else site
    f = pd.DataFrame({"site": site, "s": s.astype(str), "cl": cl, "z": z, "d": d, "y": y})
    g = f.groupby(["site", "s", "cl", "z"]).agg(n=("d", "size"), sd=("d", "sum"), sy=("y", "sum")).reset_index()
    pos = {(a, b): j for j, (a, b) in enumerate(zip(sm.site_index.tolist(), sm.stratum))}
    cell = np.array([pos[(a, b)] for a, b in zip(g.site, g.s)])
    return StratumClusterMoments(cell, g.site * 10_000 + g.cl, g.z, g.n, g.sd, g.sy)


@pytest.mark.parametrize("odds", [(0.2, 0.5, 0.8, 0.35), (0.5, 0.5), (0.3, 0.6, 0.45)], ids=["four", "equal", "three"])
@pytest.mark.parametrize("seed", [1, 2])
def test_equals_weighted_iv2sls_with_stratum_dummies(odds, seed):
    rng = np.random.default_rng(seed)
    s, z, d, y, _ = _data(rng, 2500, odds)
    sm = stratified_moments_from_arrays(np.zeros(len(s), int), s, z, d, y)
    est = stratified_wald(sm).estimates
    w = _weights(s, z)
    dum = pd.get_dummies(s).astype(float).to_numpy()
    iv = IV2SLS(y, dum, d[:, None], z[:, None], weights=w).fit(cov_type="robust", debiased=True)
    assert est.cace[0] == pytest.approx(iv.params.iloc[-1], rel=1e-9)
    # small-sample factor n / (n - S - 1): linearmodels debiased=True (nobs / (nobs - nvar))
    assert est.cace_se[0] == pytest.approx(iv.std_errors.iloc[-1], rel=1e-6)
    assert est.first_stage_f[0] == pytest.approx(iv.first_stage.diagnostics["f.stat"].iloc[0], rel=1e-6)
    itt = IV2SLS(y, np.column_stack([dum, z]), None, None, weights=w).fit(cov_type="robust", debiased=True)
    assert est.itt[0] == pytest.approx(itt.params.iloc[-1], rel=1e-9)
    assert est.itt_se[0] == pytest.approx(itt.std_errors.iloc[-1], rel=1e-6)
    fs = IV2SLS(d, np.column_stack([dum, z]), None, None, weights=w).fit(cov_type="robust", debiased=True)
    assert est.complier_share[0] == pytest.approx(fs.params.iloc[-1], rel=1e-9)
    assert est.complier_share_se[0] == pytest.approx(fs.std_errors.iloc[-1], rel=1e-6)
    # the estimand: strata weighted by their share of the sample
    ns = np.bincount(s)
    itt_s = [y[(s == k) & (z == 1)].mean() - y[(s == k) & (z == 0)].mean() for k in range(len(ns))]
    assert est.itt[0] == pytest.approx(np.dot(ns / ns.sum(), itt_s), rel=1e-9)


def test_dummies_matter_for_the_se():
    """Without the dummies the weighted fit gives the same point and a different (larger) SE."""
    rng = np.random.default_rng(5)
    s, z, d, y, _ = _data(rng, 3000, (0.2, 0.5, 0.8, 0.35))
    sm = stratified_moments_from_arrays(np.zeros(len(s), int), s, z, d, y)
    est = stratified_wald(sm).estimates
    w = _weights(s, z)
    no_dummies = IV2SLS(y, np.ones((len(y), 1)), d[:, None], z[:, None], weights=w).fit(cov_type="robust",
                                                                                         debiased=True)
    assert est.cace[0] == pytest.approx(no_dummies.params.iloc[-1], rel=1e-9)
    assert no_dummies.std_errors.iloc[-1] > 1.5 * est.cace_se[0]


@pytest.mark.parametrize("seed", [3, 4])
def test_cluster_robust_equals_linearmodels_clustered(seed):
    rng = np.random.default_rng(seed)
    s, z, d, y, cl = _data(rng, 3000, (0.25, 0.5, 0.75), clusters=80)
    sm = stratified_moments_from_arrays(np.zeros(len(s), int), s, z, d, y)
    est = stratified_wald(sm, _cluster_cells(s, cl, z, d, y, sm)).estimates
    w = _weights(s, z)
    dum = pd.get_dummies(s).astype(float).to_numpy()
    iv = IV2SLS(y, dum, d[:, None], z[:, None], weights=w).fit(cov_type="clustered", clusters=cl, debiased=True)
    assert est.cace[0] == pytest.approx(iv.params.iloc[-1], rel=1e-9)
    # G/(G-1) (n-1)/(n-S-1): linearmodels ClusteredCovariance with debiased=True
    assert est.cace_se[0] == pytest.approx(iv.std_errors.iloc[-1], rel=1e-6)
    assert est.se_type == "CR1" and est.n_clusters[0] == 80
    itt = IV2SLS(y, np.column_stack([dum, z]), None, None, weights=w).fit(cov_type="clustered", clusters=cl,
                                                                          debiased=True)
    assert est.itt_se[0] == pytest.approx(itt.std_errors.iloc[-1], rel=1e-6)


def test_many_sites_at_once_equal_one_fit_each():
    rng = np.random.default_rng(11)
    parts = [_data(rng, 600 + 200 * k, odds) for k, odds in enumerate([(0.3, 0.7), (0.5, 0.2, 0.6), (0.4,) * 2])]
    site = np.concatenate([np.full(len(p[0]), k) for k, p in enumerate(parts)])
    s, z, d, y = (np.concatenate([p[i] for p in parts]) for i in range(4))
    est = stratified_wald(stratified_moments_from_arrays(site, s, z, d, y)).estimates
    for k, (sk, zk, dk, yk, _) in enumerate(parts):
        dum = pd.get_dummies(sk).astype(float).to_numpy()
        iv = IV2SLS(yk, dum, dk[:, None], zk[:, None], weights=_weights(sk, zk)).fit(cov_type="robust",
                                                                                     debiased=True)
        assert est.cace[k] == pytest.approx(iv.params.iloc[-1], rel=1e-9)
        assert est.cace_se[k] == pytest.approx(iv.std_errors.iloc[-1], rel=1e-6)


def test_anderson_rubin_set_inverts_the_weighted_reduced_form_test():
    """AR(beta0) = squared robust t of Z in the weighted regression of Y - beta0 D on Z and the dummies."""
    rng = np.random.default_rng(7)
    s, z, d, y, _ = _data(rng, 1500, (0.3, 0.6, 0.8))
    est = stratified_wald(stratified_moments_from_arrays(np.zeros(len(s), int), s, z, d, y)).estimates
    ar = anderson_rubin_set(est.itt, est.complier_share, est.itt_se ** 2, est.complier_share_se ** 2,
                            est.cov_itt_fs)
    assert ar.kind[0] == "interval"
    w = _weights(s, z)
    dum = pd.get_dummies(s).astype(float).to_numpy()
    crit = stats.norm.ppf(0.975) ** 2
    for b0 in (ar.low[0], ar.high[0]):
        r = IV2SLS(y - b0 * d, np.column_stack([dum, z]), None, None, weights=w).fit(cov_type="robust",
                                                                                     debiased=True)
        assert (r.params.iloc[-1] / r.std_errors.iloc[-1]) ** 2 == pytest.approx(crit, rel=1e-6)


def test_complier_means_use_stratum_weights():
    """Stratum-weighted Imbens-Rubin complier means differ by exactly the stratified CACE."""
    rng = np.random.default_rng(8)
    s, z, d, y, _ = _data(rng, 2000, (0.2, 0.7))
    sm = stratified_moments_from_arrays(np.zeros(len(s), int), s, z, d, y)
    res = stratified_wald(sm)
    cm = complier_outcome_means(weighted_site_moments(sm, res.kept))
    assert cm.complier_treated[0] - cm.complier_control[0] == pytest.approx(res.estimates.cace[0], rel=1e-9)
    # E[Y(1) | complier] by hand: sum_s w_s (E[YD | Z=1, s] - E[YD | Z=0, s]) / pi
    ns = np.bincount(s) / len(s)
    num = sum(ns[k] * ((y * d)[(s == k) & (z == 1)].mean() - (y * d)[(s == k) & (z == 0)].mean()) for k in (0, 1))
    assert cm.complier_treated[0] == pytest.approx(num / res.estimates.complier_share[0], rel=1e-9)


def test_kappa_profile_with_stratum_shares():
    """Abadie kappa with P(Z = 1 | stratum): computed participant by participant with numpy."""
    rng = np.random.default_rng(9)
    s, z, d, _, _ = _data(rng, 3000, (0.2, 0.5, 0.8))
    x = rng.normal(40, 10, len(s)) + 5 * d
    ph = pd.Series(z).groupby(s).transform("mean").to_numpy()
    kappa = 1 - d * (1 - z) / (1 - ph) - (1 - d) * z / ph
    want = (kappa * x).sum() / kappa.sum()
    nc = np.zeros((3, 2, 2))
    sx = np.zeros((3, 2, 2))
    np.add.at(nc, (s, z.astype(int), d.astype(int)), 1.0)
    np.add.at(sx, (s, z.astype(int), d.astype(int)), x)
    comp, overall, _, _, note = stratified_kappa_means(np.zeros(3, int), 1, nc, sx)
    assert comp[0] == pytest.approx(want, rel=1e-9)
    assert overall[0] == pytest.approx(x.mean(), rel=1e-12)
    assert "own treated share" in note[0]


def test_known_truth_stratified_recovers_the_effect_and_unstratified_does_not():
    """Simulation with known truth (seed 2024): four strata with odds 0.2 / 0.5 / 0.8 / 0.35 and
    stratum-specific outcome levels and effects; the site's complier effect is 6 by construction
    (every stratum's compliers gain 6 on average).  Tolerance 0.5 = about 3.5 SEs of the
    stratified CACE at this size; the unstratified Wald estimate is off by more than 1.5."""
    rng = np.random.default_rng(2024)
    n = 20000
    s = rng.integers(0, 4, n)
    p = np.array([0.2, 0.5, 0.8, 0.35])[s]
    z = (rng.random(n) < p).astype(float)
    complier = rng.random(n) < 0.6
    always = ~complier & (rng.random(n) < 0.2)
    d = np.where(always, 1.0, np.where(complier, z, 0.0))
    level = np.array([0.0, 4.0, 12.0, 2.0])[s]
    y = level + 6.0 * d + rng.normal(0, 3, n)
    sm = stratified_moments_from_arrays(np.zeros(n, int), s, z, d, y)
    est = stratified_wald(sm).estimates
    assert abs(est.cace[0] - 6.0) < 0.5
    unstrat = (y[z == 1].mean() - y[z == 0].mean()) / (d[z == 1].mean() - d[z == 0].mean())
    assert abs(unstrat - 6.0) > 1.5


def test_degenerate_strata_are_dropped_with_a_note_never_an_exception():
    rng = np.random.default_rng(12)
    s, z, d, y, _ = _data(rng, 600, (0.4, 0.6))
    # stratum 7: treated only; stratum 8: one control; stratum 9: empty arms are absent altogether
    s = np.concatenate([s, [7, 7, 7, 8, 8, 8]])
    z = np.concatenate([z, [1, 1, 1, 1, 1, 0]])
    d = np.concatenate([d, [1, 0, 1, 1, 0, 0]])
    y = np.concatenate([y, [5.0, 4.0, 3.0, 2.0, 1.0, 0.0]])
    site = np.zeros(len(s), int)
    res = stratified_wald(stratified_moments_from_arrays(site, s, z, d, y))
    assert int(res.n_strata[0]) == 2 and int(res.n_strata_dropped[0]) == 2 and int(res.n_dropped[0]) == 6
    keep = s < 7
    ref = stratified_wald(stratified_moments_from_arrays(site[keep], s[keep], z[keep], d[keep], y[keep]))
    assert res.estimates.cace[0] == pytest.approx(ref.estimates.cace[0], rel=1e-12)
    # a site where no stratum is usable: defined output, NaN estimates and a note
    only = stratified_wald(stratified_moments_from_arrays(np.zeros(4, int), ["a", "a", "b", "b"],
                                                          [1, 0, 1, 1], [1, 0, 1, 0], [1.0, 2.0, 3.0, 4.0]))
    assert only.estimates.status[0] == "no_usable_strata" and np.isnan(only.estimates.cace[0])
    assert "at least 2 participants in each arm" in only.estimates.note[0]
    # a zero first stage within kept strata: CACE null with the usual status
    zero = stratified_wald(stratified_moments_from_arrays(np.zeros(8, int), list("aaaabbbb"), [1, 1, 0, 0] * 2,
                                                          [1, 0, 1, 0] * 2, np.arange(8.0)))
    assert zero.estimates.status[0] == "zero_first_stage" and np.isnan(zero.estimates.cace[0])


def test_per_stratum_sample_ratio_equals_scipy_chisquare():
    """Summed Pearson statistic = scipy.stats.chisquare on the stacked cells, df = strata with a design."""
    n_t = np.array([30.0, 61, 80, 12])
    n_c = np.array([70.0, 39, 20, 30])
    design = np.array([0.3, 0.5, 0.8, np.nan])          # the last stratum has no design
    res = stratified_sample_ratio_test(np.zeros(4, int), n_t, n_c, design, 1)
    used = np.isfinite(design)
    obs = np.concatenate([n_t[used], n_c[used]])
    tot = (n_t + n_c)[used]
    exp = np.concatenate([tot * design[used], tot * (1 - design[used])])
    k = int(used.sum())
    ref = stats.chisquare(obs, exp, ddof=2 * k - 1 - k)
    assert res.chi2[0] == pytest.approx(ref.statistic, rel=1e-12)
    assert res.p_value[0] == pytest.approx(ref.pvalue, rel=1e-9)
    assert int(res.df[0]) == 3
    assert int(res.top_cell[0]) == 1                     # 61 / 39 against 0.5 contributes most
