"""Per-site Wald / 2SLS estimates from moments vs. linearmodels and statsmodels.

Reference libraries: linearmodels 7.1 ``IV2SLS(y, const, d, z)`` fitted site by
site on participant rows with ``cov_type="robust"`` or ``"clustered"`` and
``debiased=True`` (CACE, its SE, ``first_stage.diagnostics["f.stat"]``), the
same class without endogenous variables for the OLS of Y / D on (const, Z),
and statsmodels ``OLS`` (``cov_type="HC1"`` / ``"cluster"``).  Simulated data
with fixed seeds; truth is used only in the known-truth simulations.
"""

from __future__ import annotations

import warnings

import numpy as np
import pytest
import statsmodels.api as sm
from linearmodels.iv import IV2SLS
from scipy import stats

from takeup.pipeline.stats.estimators.moments import ArmMoments, ClusterMoments, SiteMoments, arm_moments_from_arrays
from takeup.pipeline.stats.estimators.wald import wald_estimates

SIZES = [60, 150, 400, 800, 90, 250, 500, 120]
NEG_SITE = 7  # uptake generated with the arm labels swapped


def simulate(seed, nested):
    """Participant rows of 8 sites.

    Even sites: one-sided noncompliance (no always-takers); odd sites:
    two-sided.  Noise is heteroskedastic (depends on Z and D) with a cluster
    random effect.  ``nested=True``: clusters are randomised (Z constant within
    cluster); ``nested=False``: individuals are randomised and clusters span
    both arms.
    """
    rng = np.random.default_rng(seed)
    site, z, d, y, cl = [], [], [], [], []
    offset = 0
    for s, n in enumerate(SIZES):
        n_cl = max(6, n // 20)
        c = rng.integers(0, n_cl, n)
        if nested:
            zc = rng.permutation(n_cl) < n_cl // 2
            zz = zc[c].astype(int)
        else:
            zz = (rng.random(n) < 0.3 + 0.05 * s).astype(int)
        p_c = 0.35 + 0.06 * s
        typ = rng.choice(3, n, p=[p_c, (1 - p_c) / 2, (1 - p_c) / 2])   # complier, AT, NT
        if s % 2 == 0:
            typ = np.where(typ == 1, 2, typ)                           # one-sided
        zz_d = 1 - zz if s == NEG_SITE else zz
        dd = np.where(typ == 0, zz_d, (typ == 1).astype(int))
        u = rng.normal(0, 0.7, n_cl)[c]
        yy = (1.0 + 0.5 * s + (0.5 + 0.3 * s) * dd + 0.8 * typ + u
              + rng.normal(size=n) * (0.5 + zz + 0.7 * dd))
        site.append(np.full(n, s)); z.append(zz); d.append(dd); y.append(yy)
        cl.append(c + offset)
        offset += n_cl
    return tuple(np.concatenate(a) for a in (site, z, d, y, cl))


def cluster_cells(site, z, d, y, cl):
    key = np.stack([site, cl, z], axis=1)
    u, inv = np.unique(key, axis=0, return_inverse=True)
    inv = inv.reshape(-1)
    return ClusterMoments(site_index=u[:, 0], cluster_index=u[:, 1], z=u[:, 2],
                          n=np.bincount(inv), sum_d=np.bincount(inv, weights=d),
                          sum_y=np.bincount(inv, weights=y))


def reference(site, z, d, y, cl, clustered):
    """linearmodels / statsmodels results site by site (participant rows).

    In one-sided sites the control-arm uptake is identically 0, so the
    *intercept* variance of D on (1, Z) is 0 up to rounding and the libraries'
    ``sqrt(diag(cov))`` may warn on a -1e-20 entry; only slopes are used, so
    that numpy warning is silenced here (and only here).
    """
    with np.errstate(invalid="ignore"):
        return _reference(site, z, d, y, cl, clustered)


def _reference(site, z, d, y, cl, clustered):
    out = []
    for s in range(len(SIZES)):
        k = site == s
        const = np.ones((k.sum(), 1))
        zx = np.column_stack([const, z[k]])
        if clustered:
            lm_kw = dict(cov_type="clustered", clusters=cl[k], debiased=True)
            sm_kw = dict(cov_type="cluster", cov_kwds={"groups": cl[k]})
        else:
            lm_kw = dict(cov_type="robust", debiased=True)
            sm_kw = dict(cov_type="HC1")
        iv = IV2SLS(y[k], const, d[k], z[k]).fit(**lm_kw)
        itt = IV2SLS(y[k], zx, None, None).fit(**lm_kw)
        fs = IV2SLS(d[k], zx, None, None).fit(**lm_kw)
        # Regression of Y - b0 D on (1, Z): its slope variance is
        # V_gamma - 2 b0 C + b0^2 V_pi, which identifies C = cov_itt_fs.
        b0 = 1.7
        sm_itt = sm.OLS(y[k], zx).fit(**sm_kw)
        sm_fs = sm.OLS(d[k], zx).fit(**sm_kw)
        # use_t=True: t reference, with G - 1 df for cluster-robust covariances (statsmodels
        # sets df_resid_inference = n_groups - 1), n - 2 for HC1
        sm_itt_t = sm.OLS(y[k], zx).fit(use_t=True, **sm_kw)
        sm_fs_t = sm.OLS(d[k], zx).fit(use_t=True, **sm_kw)
        sm_b0 = sm.OLS(y[k] - b0 * d[k], zx).fit(**sm_kw)
        v_g, v_p, v_b0 = sm_itt.bse[1] ** 2, sm_fs.bse[1] ** 2, sm_b0.bse[1] ** 2
        out.append(dict(
            cace=iv.params.iloc[1], cace_se=iv.std_errors.iloc[1],
            f=iv.first_stage.diagnostics["f.stat"].iloc[0],
            itt=itt.params.iloc[1], itt_se=itt.std_errors.iloc[1],
            fs=fs.params.iloc[1], fs_se=fs.std_errors.iloc[1],
            sm_itt_se=sm_itt.bse[1], sm_fs_se=sm_fs.bse[1],
            cov=(v_g + b0**2 * v_p - v_b0) / (2 * b0),
            n_clusters=len(np.unique(cl[k])),
            itt_ci_t=sm_itt_t.conf_int(0.05)[1], fs_ci_t=sm_fs_t.conf_int(0.05)[1],
        ))
    return out


CASES = {
    "hc1": (101, True, False),
    "cr1_nested": (102, True, True),
    "cr1_not_nested": (103, False, True),
}


@pytest.fixture(scope="module", params=list(CASES))
def case(request):
    seed, nested, clustered = CASES[request.param]
    site, z, d, y, cl = simulate(seed, nested)
    m = arm_moments_from_arrays(site, z, d, y)
    cm = cluster_cells(site, z, d, y, cl) if clustered else None
    with warnings.catch_warnings():
        warnings.simplefilter("error")
        est = wald_estimates(m, cm)
    return est, reference(site, z, d, y, cl, clustered), clustered


def test_matches_linearmodels_site_by_site(case):
    est, ref, clustered = case
    assert est.se_type == ("CR1" if clustered else "HC1")
    for s, r in enumerate(ref):
        # Same algebra by a different route (sums vs. rows): only rounding
        # differs (observed ~1e-14), so the brief's 1e-9 relative on point
        # estimates and 1e-6 relative on SEs / F leave a wide margin.
        assert est.cace[s] == pytest.approx(r["cace"], rel=1e-9)
        assert est.itt[s] == pytest.approx(r["itt"], rel=1e-9)
        assert est.complier_share[s] == pytest.approx(r["fs"], rel=1e-9)
        assert est.cace_se[s] == pytest.approx(r["cace_se"], rel=1e-6)
        assert est.itt_se[s] == pytest.approx(r["itt_se"], rel=1e-6)
        assert est.complier_share_se[s] == pytest.approx(r["fs_se"], rel=1e-6)
        assert est.first_stage_f[s] == pytest.approx(r["f"], rel=1e-6)
        # statsmodels applies the same small-sample factor (HC1: n/(n-k);
        # cluster: G/(G-1)(n-1)/(n-k)), so it is a second, independent check.
        assert est.itt_se[s] == pytest.approx(r["sm_itt_se"], rel=1e-6)
        assert est.complier_share_se[s] == pytest.approx(r["sm_fs_se"], rel=1e-6)
        # C recovered from three statsmodels variances: differences of
        # squared SEs lose a few digits, hence 1e-6 relative is still ample.
        assert est.cov_itt_fs[s] == pytest.approx(r["cov"], rel=1e-6)
        if clustered:
            assert est.n_clusters[s] == r["n_clusters"]
        else:
            assert np.isnan(est.n_clusters[s])


def test_shares_statuses_and_interval(case):
    est, _, _ = case
    assert est.status[NEG_SITE] == "negative_first_stage"
    assert est.complier_share[NEG_SITE] < 0 and np.isfinite(est.cace[NEG_SITE])
    assert "monotonicity" in est.note[NEG_SITE]
    others = [s for s in range(len(SIZES)) if s != NEG_SITE]
    assert all(est.status[s] == "ok" and est.note[s] is None for s in others)
    np.testing.assert_array_equal(est.always_taker_share, est.uptake_control)
    np.testing.assert_allclose(est.never_taker_share, 1 - est.uptake_treatment, rtol=0, atol=1e-15)
    # one-sided sites (even, except the swapped one) have no always-takers
    assert np.all(est.always_taker_share[[0, 2, 4, 6]] == 0)
    # conventional interval: normal critical value (scipy) under HC1; under CR1 t with G - 1
    # df (Cameron & Miller 2015), checked against statsmodels use_t=True in test_cr1_t_intervals
    if est.se_type == "HC1":
        zc = stats.norm.ppf(0.975)
        assert np.all(np.isnan(est.ci_df))
    else:
        zc = stats.t.ppf(0.975, est.n_clusters - 1)
        np.testing.assert_array_equal(est.ci_df, est.n_clusters - 1)
    np.testing.assert_allclose(est.cace_ci_low, est.cace - zc * est.cace_se, rtol=1e-12)
    np.testing.assert_allclose(est.cace_ci_high, est.cace + zc * est.cace_se, rtol=1e-12)


def test_cr1_t_intervals_equal_statsmodels(case):
    """ITT and complier-share intervals under CR1 = statsmodels OLS cluster, use_t=True (t with G-1 df)."""
    est, refs, clustered = case
    if not clustered:
        pytest.skip("HC1: normal reference (statsmodels' use_t would use n - 2 df)")
    for s, r in enumerate(refs):
        np.testing.assert_allclose([est.itt_ci_low[s], est.itt_ci_high[s]], r["itt_ci_t"], rtol=1e-6)
        np.testing.assert_allclose([est.complier_share_ci_low[s], est.complier_share_ci_high[s]], r["fs_ci_t"],
                                   rtol=1e-6)


def test_level_changes_interval_only():
    site, z, d, y, cl = simulate(7, False)
    m = arm_moments_from_arrays(site, z, d, y)
    a, b = wald_estimates(m, level=0.95), wald_estimates(m, level=0.90)
    np.testing.assert_array_equal(a.cace_se, b.cace_se)
    # 90% interval half-width uses the 95% normal quantile (scipy)
    np.testing.assert_allclose(b.cace_ci_high - b.cace, stats.norm.ppf(0.95) * b.cace_se, rtol=1e-12)
    with pytest.raises(ValueError):
        wald_estimates(m, level=1.5)


def test_results_read_only_and_inputs_untouched():
    site, z, d, y, cl = simulate(8, True)
    m = arm_moments_from_arrays(site, z, d, y)
    cm = cluster_cells(site, z, d, y, cl)
    before = [a.copy() for a in (cm.n, cm.sum_d, cm.sum_y, m.treated.sum_y, m.control.sum_dy)]
    est = wald_estimates(m, cm)
    after = [cm.n, cm.sum_d, cm.sum_y, m.treated.sum_y, m.control.sum_dy]
    for x, y_ in zip(before, after):
        np.testing.assert_array_equal(x, y_)
    with pytest.raises(ValueError):
        est.cace[0] = 0.0
    with pytest.raises(AttributeError):
        est.cace = est.itt  # frozen dataclass


def test_cluster_cells_must_add_up():
    site, z, d, y, cl = simulate(9, True)
    m = arm_moments_from_arrays(site, z, d, y)
    cm = cluster_cells(site, z, d, y, cl)
    bad = ClusterMoments(site_index=cm.site_index, cluster_index=cm.cluster_index, z=cm.z,
                         n=cm.n, sum_d=cm.sum_d, sum_y=cm.sum_y * 1.01)
    with pytest.raises(ValueError, match="sum_y"):
        wald_estimates(m, bad)


def _known_truth(seed, n_sites, n, p_c, p_a, tau, rng_sd=1.0):
    """Rows of replicate sites with known complier effect ``tau`` per site."""
    rng = np.random.default_rng(seed)
    site = np.repeat(np.arange(n_sites), n)
    z = (rng.random(site.size) < 0.5).astype(int)
    u = rng.random(site.size)
    typ = np.where(u < p_c, 0, np.where(u < p_c + p_a, 1, 2))
    d = np.where(typ == 0, z, (typ == 1).astype(int)).astype(float)
    effect = np.where(typ == 0, np.asarray(tau)[site], 3.0)     # compliers: tau; others: 3
    y0 = 1.0 + 1.5 * (typ == 1) - 1.0 * (typ == 2) + rng.normal(size=site.size) * rng_sd * (1 + z)
    y = y0 + effect * d
    return site, z, d, y


def test_known_cace_recovered():
    tau = np.array([-1.0, 0.0, 0.5, 1.0, 2.0, 3.0, -2.5, 0.25])
    site, z, d, y = _known_truth(2024, 8, 20000, 0.5, 0.2, tau)
    est = wald_estimates(arm_moments_from_arrays(site, z, d, y))
    # Large-sample normal approximation: |error| <= 4 SE fails with
    # probability ~6e-5 per site if the estimator and its SE are right.
    assert np.all(np.abs(est.cace - tau) <= 4 * est.cace_se)
    # ... and the SE is small enough for the check to bite (n = 20000).
    assert np.all(est.cace_se < 0.15)


def test_wald_interval_coverage_strong_first_stage():
    tau = np.full(2000, 1.0)
    site, z, d, y = _known_truth(77, 2000, 300, 0.7, 0.15, tau)
    est = wald_estimates(arm_moments_from_arrays(site, z, d, y))
    cover = np.mean((est.cace_ci_low <= 1.0) & (1.0 <= est.cace_ci_high))
    # 2000 replications: Monte Carlo SD sqrt(.95*.05/2000) = 0.0049; allow
    # 4 SD (0.02) around the nominal 95% (strong first stage, n = 300).
    assert abs(cover - 0.95) < 0.02


def _arm(n, sd=0.0, sy=0.0, sdd=None, syy=0.0, sdy=0.0):
    return dict(n=n, sum_d=sd, sum_y=sy, sum_dd=sd if sdd is None else sdd, sum_yy=syy, sum_dy=sdy)


def _moments(rows):
    t = {k: [r[0][k] for r in rows] for k in rows[0][0]}
    c = {k: [r[1][k] for r in rows] for k in rows[0][1]}
    return SiteMoments(treated=ArmMoments(**t), control=ArmMoments(**c))


def _arm_from(d, y):
    d, y = np.asarray(d, float), np.asarray(y, float)
    return _arm(len(d), d.sum(), y.sum(), (d * d).sum(), (y * y).sum(), (d * y).sum())


def test_degenerate_sites_nan_with_notes_and_no_warnings():
    good_t = _arm_from([1, 1, 0, 1, 0], [3.0, 4.0, 1.0, 5.0, 0.5])
    good_c = _arm_from([0, 0, 1, 0], [1.0, 2.0, 3.5, 0.0])
    rows = [
        (good_t, _arm(0)),                                                   # 0 no controls
        (_arm(0), good_c),                                                   # 1 no treated
        (_arm(0), _arm(0)),                                                  # 2 empty
        (_arm_from([1], [2.0]), good_c),                                     # 3 n = 1 in an arm
        (_arm_from([1, 0, 0, 0], [1, 2, 3, 4.0]), _arm_from([0, 1, 0, 0], [2, 2, 5, 1.0])),  # 4 zero FS
        (_arm_from([1, 1, 0], [2.5] * 3), _arm_from([0, 0, 0, 1], [2.5] * 4)),  # 5 constant Y
        (_arm_from([1, 1, 1], [2, 3, 5.0]), _arm_from([0, 0, 0], [1, 2, 2.0])),  # 6 D = Z
        (good_t, good_c),                                                    # 7 fine
        (_arm(float("nan")), good_c),                                        # 8 invalid
    ]
    with warnings.catch_warnings():
        warnings.simplefilter("error")
        est = wald_estimates(_moments(rows))
    expected = ["no_controls", "no_treated", "empty_site", "arm_too_small", "zero_first_stage",
                "constant_outcome", "deterministic_uptake", "ok", "invalid_moments"]
    assert list(est.status) == expected
    numeric = [f for f in est.__dataclass_fields__ if isinstance(getattr(est, f), np.ndarray)
               and getattr(est, f).dtype == float]
    for f in numeric:
        assert not np.isinf(getattr(est, f)).any(), f
    for s in range(9):
        assert (est.note[s] is None) == (s == 7)
    # empty arm(s): contrasts and SEs NaN
    for s in (0, 1, 2, 8):
        for f in ("itt", "complier_share", "cace", "itt_se", "cace_se", "first_stage_f"):
            assert np.isnan(getattr(est, f)[s]), (s, f)
    assert est.uptake_control[0] != est.uptake_control[0]        # NaN: no controls
    assert est.uptake_treatment[0] == pytest.approx(0.6)           # still reported
    # n = 1: point estimates, no SEs
    assert np.isfinite(est.cace[3]) and np.isnan(est.cace_se[3]) and np.isnan(est.itt_se[3])
    # zero first stage: ITT fine, CACE undefined, F = 0
    assert est.complier_share[4] == 0 and np.isnan(est.cace[4]) and np.isnan(est.cace_ci_low[4])
    assert np.isfinite(est.itt_se[4]) and est.first_stage_f[4] == 0
    assert "CACE undefined" in est.note[4]
    # constant outcome: ITT = CACE = 0, their SEs null (zero)
    assert est.itt[5] == 0 and est.cace[5] == 0
    assert np.isnan(est.itt_se[5]) and np.isnan(est.cace_se[5]) and np.isnan(est.cov_itt_fs[5])
    assert np.isfinite(est.complier_share_se[5])
    # D = Z: first-stage SE zero, F would be infinite -> null; CACE SE fine
    assert est.complier_share[6] == 1 and np.isnan(est.first_stage_f[6])
    assert np.isnan(est.complier_share_se[6]) and np.isfinite(est.cace_se[6])
    assert "infinite" in est.note[6]


def test_too_few_clusters():
    rng = np.random.default_rng(5)
    n = 200
    site = np.zeros(n, int)
    cl = np.where(np.arange(n) < 100, 0, rng.integers(1, 5, n))   # treated arm = cluster 0 only
    z = (cl == 0).astype(int)
    d = np.where(z == 1, rng.random(n) < 0.7, rng.random(n) < 0.1).astype(float)
    y = d + rng.normal(size=n)
    m = arm_moments_from_arrays(site, z, d, y)
    with warnings.catch_warnings():
        warnings.simplefilter("error")
        est = wald_estimates(m, cluster_cells(site, z, d, y, cl))
    assert est.status[0] == "too_few_clusters"
    assert np.isfinite(est.cace[0])
    for f in ("itt_se", "complier_share_se", "cov_itt_fs", "cace_se", "cace_ci_low", "first_stage_f"):
        assert np.isnan(getattr(est, f)[0]), f
    assert "clusters" in est.note[0]
