"""Anderson-Rubin sets and tF critical values.

External references: statsmodels ``OLS`` (HC1 / cluster) of ``Y - b D`` on
``(1, Z)``, whose squared t-ratio is the AR statistic at ``b``; scipy's
chi-square quantile; Lee, McCrary, Moreira & Porter (2022, AER 112(10),
3260-3290) Table 3 and worked example.  Simulated data with fixed seeds.
"""

from __future__ import annotations

import warnings

import numpy as np
import pytest
import statsmodels.api as sm
from scipy import stats

from takeup.pipeline.stats.estimators.moments import ClusterMoments, arm_moments_from_arrays
from takeup.pipeline.stats.estimators.wald import wald_estimates
from takeup.pipeline.stats.estimators.weak_iv import (
    anderson_rubin_set,
    anderson_rubin_statistic,
    tf_critical_value,
    tf_interval,
)

Q95 = stats.chi2.ppf(0.95, 1)  # scipy: 3.8415


def simulate(seed, pis, n=300, n_cl=20):
    """One site per first stage in ``pis`` (cluster-randomised, clusters of ~n/n_cl)."""
    rng = np.random.default_rng(seed)
    k = len(pis)
    site = np.repeat(np.arange(k), n)
    cl = rng.integers(0, n_cl, site.size) + n_cl * site
    zc = rng.permutation(n_cl * k) % 2          # clusters alternate arms
    z = zc[cl]
    u = rng.random(site.size)
    p = np.asarray(pis)[site]
    typ = np.where(u < p, 0, np.where(u < p + (1 - p) / 2, 1, 2))   # complier / AT / NT
    d = np.where(typ == 0, z, (typ == 1).astype(int)).astype(float)
    y = 1.0 * d + 1.5 * (typ == 1) - 1.5 * (typ == 2) + rng.normal(size=site.size) * (1 + d)
    return site, z, d, y, cl


def cells(site, z, d, y, cl):
    key = np.stack([site, cl, z], axis=1)
    u, inv = np.unique(key, axis=0, return_inverse=True)
    inv = inv.reshape(-1)
    return ClusterMoments(site_index=u[:, 0], cluster_index=u[:, 1], z=u[:, 2], n=np.bincount(inv),
                          sum_d=np.bincount(inv, weights=d), sum_y=np.bincount(inv, weights=y))


@pytest.mark.parametrize("clustered", [False, True])
def test_ar_ends_match_statsmodels_t_squared(clustered):
    site, z, d, y, cl = simulate(31, [0.6, 0.3, 0.15, 0.08, 0.04, 0.5])
    w = wald_estimates(arm_moments_from_arrays(site, z, d, y),
                       cells(site, z, d, y, cl) if clustered else None)
    ar = anderson_rubin_set(w.itt, w.complier_share, w.itt_se**2, w.complier_share_se**2,
                            w.cov_itt_fs)
    kinds = set(ar.kind)
    assert {"interval", "two_rays"} <= kinds          # design covers both shapes
    sm_kw = dict(cov_type="cluster", cov_kwds={"groups": None}) if clustered else dict(cov_type="HC1")

    def t2(s, b):
        k = site == s
        if clustered:
            sm_kw["cov_kwds"] = {"groups": cl[k]}
        r = sm.OLS(y[k] - b * d[k], sm.add_constant(z[k].astype(float))).fit(**sm_kw)
        return r.tvalues[1] ** 2

    for s, kind in enumerate(ar.kind):
        if kind in ("interval", "two_rays"):
            # At each finite end, statsmodels' robust t^2 for H0: beta = end
            # equals the chi-square quantile: 1e-6 relative (SE-level
            # agreement, as for the Wald SEs).
            for end in (ar.low[s], ar.high[s]):
                assert t2(s, end) == pytest.approx(Q95, rel=1e-6)
            mid = 0.5 * (ar.low[s] + ar.high[s])
            inside_mid = t2(s, mid) <= Q95
            assert inside_mid == (kind == "interval")
        # Wald estimate always accepted (AR = 0 there)
        assert t2(s, w.cace[s]) == pytest.approx(0.0, abs=1e-18)
        # bounded exactly when first-stage t^2 (= robust F) exceeds q
        assert (kind == "interval") == (w.first_stage_f[s] > Q95)


def test_ar_kinds_on_random_inputs():
    rng = np.random.default_rng(7)
    n = 5000
    g = rng.normal(size=n)
    p = rng.normal(size=n)
    vg = rng.uniform(0.05, 1, n)
    vp = rng.uniform(0.05, 1, n)
    rho = rng.uniform(-0.95, 0.95, n)
    c = rho * np.sqrt(vg * vp)
    ar = anderson_rubin_set(g, p, vg, vp, c)
    bounded = p**2 / vp > Q95
    np.testing.assert_array_equal(ar.kind == "interval", bounded)
    assert set(ar.kind) == {"interval", "two_rays", "real_line"}
    beta = g / p
    inside = np.where(ar.kind == "interval", (ar.low <= beta) & (beta <= ar.high),
                      np.where(ar.kind == "two_rays", (beta <= ar.low) | (beta >= ar.high),
                               ar.kind == "real_line"))
    assert inside.all()
    # Brute force on a grid: membership from the AR statistic itself
    grid = np.linspace(-20, 20, 401)
    stat = anderson_rubin_statistic(grid[None, :], g[:, None], p[:, None], vg[:, None],
                                    vp[:, None], c[:, None])
    acc = stat <= Q95
    lo, hi = ar.low[:, None], ar.high[:, None]
    kind = ar.kind[:, None]
    pred = np.where(kind == "interval", (grid >= lo) & (grid <= hi),
                    np.where(kind == "two_rays", (grid <= lo) | (grid >= hi), True))
    # disagreements only within 1e-9 of an end (grid point exactly on a root)
    near = np.minimum(np.abs(grid - np.nan_to_num(lo)), np.abs(grid - np.nan_to_num(hi))) < 1e-9
    assert np.all((acc == pred) | near)
    assert not np.isinf(ar.low).any() and not np.isinf(ar.high).any()


def test_ar_boundary_and_missing_inputs():
    with warnings.catch_warnings():
        warnings.simplefilter("error")
        ar = anderson_rubin_set([1.0, np.nan, 1.0, 1.0], [1.0, 1.0, 1.0, 1.0],
                                [0.1, 0.1, -0.1, 0.1], [1.0 / Q95, 0.1, 0.1, 0.1],
                                [0.0, 0.0, 0.0, 0.0])
    # a = pi^2 - q V_pi = 0 up to rounding: reported as the whole line, with
    # the exact half-line in the note
    assert ar.kind[0] == "real_line" and "half-line" in ar.note[0]
    assert np.isnan(ar.low[0]) and np.isnan(ar.high[0])
    assert ar.kind[1] == "undefined" and ar.kind[2] == "undefined"    # NaN / negative variance
    assert ar.kind[3] == "interval" and ar.note[3] is None


def test_ar_covers_under_weak_first_stage_and_wald_does_not():
    # 2000 replications of a weak design, each a "site" of one vectorised call.
    rng = np.random.default_rng(20240601)
    reps, n, beta = 2000, 200, 1.0
    site = np.repeat(np.arange(reps), n)
    z = np.tile(np.r_[np.ones(n // 2), np.zeros(n // 2)], reps).astype(int)
    u = rng.random(reps * n)
    typ = np.where(u < 0.08, 0, np.where(u < 0.54, 1, 2))   # 8% compliers
    d = np.where(typ == 0, z, (typ == 1).astype(int)).astype(float)
    y = 2.0 * (typ == 1) - 2.0 * (typ == 2) + beta * d + rng.normal(size=reps * n)
    w = wald_estimates(arm_moments_from_arrays(site, z, d, y))
    ar = anderson_rubin_set(w.itt, w.complier_share, w.itt_se**2, w.complier_share_se**2,
                            w.cov_itt_fs)
    k = ar.kind
    ar_cover = np.where(k == "interval", (ar.low <= beta) & (beta <= ar.high),
                        np.where(k == "two_rays", (beta <= ar.low) | (beta >= ar.high),
                                 k == "real_line")).mean()
    wald_cover = np.mean((w.cace_ci_low <= beta) & (beta <= w.cace_ci_high))
    assert np.median(w.first_stage_f) < 5            # the design is weak
    # Monte Carlo SD of a 95% coverage over 2000 reps: 0.0049; 4 SD = 0.02.
    assert abs(ar_cover - 0.95) < 0.02
    # Wald under-covers badly here (about 0.84); 0.90 is > 7 MC SDs away.
    assert wald_cover < 0.90


# --- tF: Lee, McCrary, Moreira & Porter (2022), AER 112(10), Table 3 ---------

def test_tf_table_points_and_ranges():
    f = np.array([9.0, 4.0, 3.8, 3.9, 104.7, 200.0, 104.6, 3.05**2, 9.9**2, np.nan])
    with warnings.catch_warnings():
        warnings.simplefilter("error")
        cv = tf_critical_value(f)
    assert cv.value[0] == pytest.approx(3.65, abs=1e-12)   # Table 3: sqrt(F)=3.0 -> 3.65
    assert cv.value[1] == pytest.approx(18.66, abs=1e-12)  # Table 3: sqrt(F)=2.0 -> 18.66
    # F < 1.96^2 = 3.8416: infinite critical value -> NaN + "unbounded" (paper)
    assert np.isnan(cv.value[2]) and "unbounded" in cv.note[2]
    # 3.8416 <= F < 4 not tabulated: conservative choice, unbounded
    assert np.isnan(cv.value[3]) and "not tabulated" in cv.note[3]
    # 1.96 from F = 104.7 (paper's abstract and Table 3 note)
    assert cv.value[4] == 1.96 and cv.value[5] == 1.96
    # just below 104.7: the paper's 1.97
    assert cv.value[6] == pytest.approx(1.97, abs=1e-12)
    # halfway between sqrt(F) = 3.0 (3.65) and 3.1 (3.51): linear in sqrt(F)
    assert cv.value[7] == pytest.approx(3.58, abs=1e-9)
    assert cv.value[8] == pytest.approx(1.98, abs=1e-9)    # Table 3: 9.9 -> 1.98
    assert np.isnan(cv.value[9]) and cv.note[9] is not None
    # c(F) never increases with F on the tabulated range
    grid = tf_critical_value(np.linspace(4.0, 150.0, 3000)).value
    assert np.all(np.diff(grid) <= 0)


def test_tf_threshold_ten_is_not_the_abstracts_343():
    # The abstract's 3.43 is the single-threshold rule ("keeping 10 as a
    # threshold requires replacing 1.96 with 3.43"), not c(10): interpolating
    # Table 3 between sqrt(F) = 3.1 (3.51) and 3.2 (3.39) at sqrt(10) gives
    # about 3.435 (reference note on the paper).
    c10 = tf_critical_value(10.0).value[0]
    assert c10 == pytest.approx(3.51 + (3.39 - 3.51) * (np.sqrt(10) - 3.1) / 0.1, rel=1e-12)
    assert c10 == pytest.approx(3.435, abs=1e-3)


def test_tf_worked_example():
    # Lee et al. (2022) worked example: beta = 3.2, SE = 1.5, F = 9 ->
    # c = 3.65, tF standard error about 2.79 (rounded to 2 decimals -> 0.005).
    res = tf_interval(3.2, 1.5, 9.0)
    assert res.critical_value[0] == pytest.approx(3.65, abs=1e-12)
    assert res.se[0] == pytest.approx(2.79, abs=0.005)
    assert res.low[0] == pytest.approx(3.2 - 3.65 * 1.5, abs=1e-12)
    assert res.high[0] == pytest.approx(3.2 + 3.65 * 1.5, abs=1e-12)
    res = tf_interval([3.2, 3.2, np.nan], [1.5, 1.5, 1.0], [2.0, 200.0, 50.0])
    assert np.isnan(res.low[0]) and "unbounded" in res.note[0]
    assert res.se[1] == pytest.approx(1.5, rel=1e-12)      # c = 1.96 -> usual SE
    assert np.isnan(res.low[2]) and res.note[2] is not None
