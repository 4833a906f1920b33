"""Complier outcome means (Imbens & Rubin 1997) and kappa-weighted covariate
means (Abadie 2003).

References: Imbens & Rubin (1997), REStud 64(4), eq. (7): the complier means'
difference is the Wald estimate; Abadie (2003), J. Econometrics 113,
Theorem 3.1: E[g | complier] = E[kappa g] / E[kappa], E[kappa] = complier
share.  Checks: the identities, a brute-force row-level computation of
E[kappa X] / E[kappa], and simulations with known compliance types (fixed
seeds).
"""

from __future__ import annotations

import warnings

import numpy as np
import pytest

from takeup.pipeline.stats.estimators.complier_means import (
    complier_cells_from_arrays,
    complier_outcome_means,
    kappa_complier_means,
)
from takeup.pipeline.stats.estimators.moments import ArmMoments, SiteMoments, arm_moments_from_arrays
from takeup.pipeline.stats.estimators.wald import wald_estimates

# Population means by type: complier / always-taker / never-taker.
MU_X = np.array([[0.0, 5.0], [2.0, 1.0], [-1.0, 3.0]])     # two covariates
Y0_BY_TYPE = np.array([1.0, 2.5, -0.5])                      # E[Y(0) | type]
EFFECT_BY_TYPE = np.array([1.2, 0.4, 2.0])                   # E[Y(1) - Y(0) | type]


def simulate(seed, n_sites, n, p_c=0.5, p_a=0.2, p_z=None):
    rng = np.random.default_rng(seed)
    site = np.repeat(np.arange(n_sites), n)
    pz = np.full(n_sites, 0.5) if p_z is None else np.asarray(p_z)
    z = (rng.random(site.size) < pz[site]).astype(int)
    u = rng.random(site.size)
    typ = np.where(u < p_c, 0, np.where(u < p_c + p_a, 1, 2))
    d = np.where(typ == 0, z, (typ == 1).astype(int)).astype(float)
    x = MU_X[typ] + rng.normal(size=(site.size, 2)) * np.array([1.0, 2.0])
    y = Y0_BY_TYPE[typ] + EFFECT_BY_TYPE[typ] * d + rng.normal(size=site.size) * (1 + d)
    return site, z, d, y, x, typ


def test_imbens_rubin_difference_is_wald():
    site, z, d, y, x, typ = simulate(1, 6, 400, p_z=[0.3, 0.4, 0.5, 0.5, 0.6, 0.7])
    m = arm_moments_from_arrays(site, z, d, y)
    cm = complier_outcome_means(m)
    w = wald_estimates(m)
    # Algebraic identity (Imbens & Rubin 1997, eq. 7): exact up to rounding.
    np.testing.assert_allclose(cm.difference, w.cace, rtol=1e-12)
    # Cell means by direct computation on rows: always-takers' Y(1) is the
    # mean Y of control-arm takers; never-takers' Y(0) of treated non-takers.
    for s in range(6):
        k = site == s
        assert cm.always_taker_treated[s] == pytest.approx(y[k & (z == 0) & (d == 1)].mean(), rel=1e-12)
        assert cm.never_taker_control[s] == pytest.approx(y[k & (z == 1) & (d == 0)].mean(), rel=1e-12)
    assert all(s == "ok" for s in cm.status)


def test_complier_outcome_means_recover_known_truth():
    # 400 replicate sites of 1500; E[Y(1)|C] = 2.2, E[Y(0)|C] = 1.0 by design.
    site, z, d, y, x, typ = simulate(2, 400, 1500)
    cm = complier_outcome_means(arm_moments_from_arrays(site, z, d, y))
    for est, truth in ((cm.complier_treated, Y0_BY_TYPE[0] + EFFECT_BY_TYPE[0]),
                       (cm.complier_control, Y0_BY_TYPE[0]),
                       (cm.always_taker_treated, Y0_BY_TYPE[1] + EFFECT_BY_TYPE[1]),
                       (cm.never_taker_control, Y0_BY_TYPE[2])):
        # Mean of 400 replicates within 4 Monte Carlo SEs of the truth
        # (SE estimated from the replicate spread).
        mc_se = est.std(ddof=1) / np.sqrt(est.size)
        assert abs(est.mean() - truth) < 4 * mc_se
        assert mc_se < 0.02                                  # precise enough to bite


def test_kappa_means_match_row_level_brute_force():
    site, z, d, y, x, typ = simulate(3, 5, 700, p_z=[0.25, 0.4, 0.5, 0.6, 0.8])
    n_cells, sx = complier_cells_from_arrays(site, z, d, x)
    res = kappa_complier_means(n_cells, sx)
    # Row-level E[kappa X] / E[kappa] with P(Z=1) = the site's treated share
    # (Abadie 2003, Theorem 3.1).
    p1 = np.bincount(site, weights=z) / np.bincount(site)
    kappa = 1 - d * (1 - z) / (1 - p1[site]) - (1 - d) * z / p1[site]
    e_k = np.bincount(site, weights=kappa) / np.bincount(site)
    for j in range(2):
        e_kx = np.bincount(site, weights=kappa * x[:, j]) / np.bincount(site)
        np.testing.assert_allclose(res.complier_mean[:, j], e_kx / e_k, rtol=1e-12)
        np.testing.assert_allclose(res.overall_mean[:, j],
                                   np.bincount(site, weights=x[:, j]) / np.bincount(site), rtol=1e-12)
    # E[kappa] = complier share = Wald first stage
    w = wald_estimates(arm_moments_from_arrays(site, z, d, y))
    np.testing.assert_allclose(res.complier_share, w.complier_share, rtol=1e-12)
    np.testing.assert_allclose(res.complier_share, e_k, rtol=1e-12)
    # one covariate as a 1-d array gives 1-d results
    n1, sx1 = complier_cells_from_arrays(site, z, d, x[:, 1])
    np.testing.assert_allclose(kappa_complier_means(n1, sx1).complier_mean,
                               res.complier_mean[:, 1], rtol=1e-14)


def test_kappa_means_recover_known_complier_profile():
    site, z, d, y, x, typ = simulate(4, 300, 2000)
    res = kappa_complier_means(*complier_cells_from_arrays(site, z, d, x))
    for j in range(2):
        for est, truth in ((res.complier_mean[:, j], MU_X[0, j]),
                           (res.always_taker_mean[:, j], MU_X[1, j]),
                           (res.never_taker_mean[:, j], MU_X[2, j])):
            mc_se = est.std(ddof=1) / np.sqrt(est.size)
            # within 4 Monte Carlo SEs of the population mean of the type
            assert abs(est.mean() - truth) < 4 * mc_se
            assert mc_se < 0.02
    # overall mean mixes the types: 0.5 C + 0.2 AT + 0.3 NT
    mix = 0.5 * MU_X[0] + 0.2 * MU_X[1] + 0.3 * MU_X[2]
    mc_se = res.overall_mean.std(axis=0, ddof=1) / np.sqrt(300)
    assert np.all(np.abs(res.overall_mean.mean(axis=0) - mix) < 4 * mc_se)


def test_degenerate_sites():
    n_cells = np.array([
        [[10, 0], [0, 0]],          # no treated
        [[5, 5], [5, 5]],           # zero first stage
        [[8, 2], [6, 4]],           # fine
        [[2, 8], [6, 4]],           # negative first stage
    ], dtype=float)
    sx = np.ones((4, 2, 2, 1)) * n_cells[..., None]            # X = 1 for everyone
    with warnings.catch_warnings():
        warnings.simplefilter("error")
        res = kappa_complier_means(n_cells, sx)
    assert list(res.status) == ["no_treated", "zero_first_stage", "ok", "negative_first_stage"]
    assert np.isnan(res.complier_mean[0, 0]) and np.isnan(res.complier_mean[1, 0])
    assert res.complier_mean[2, 0] == pytest.approx(1.0, rel=1e-12)   # mean of a constant
    assert np.isfinite(res.complier_mean[3, 0]) and "monotonicity" in res.note[3]
    assert res.note[2] is None and "undefined" in res.note[1]
    with pytest.raises(ValueError):
        kappa_complier_means(n_cells[:, :1], sx)

    def arm(n, sd, sy, sdd, sdy):
        return dict(n=n, sum_d=sd, sum_y=sy, sum_dd=sdd, sum_yy=0.0, sum_dy=sdy)
    rows = [
        (arm(4, 2, 4.0, 2, 3.0), arm(0, 0, 0, 0, 0)),    # no controls
        (arm(4, 2, 4.0, 2, 3.0), arm(4, 2, 4.0, 2, 1.0)),  # zero first stage
        (arm(4, 2, 4.0, 3, 3.0), arm(4, 1, 4.0, 1, 1.0)),  # sum D^2 != sum D: not binary
        (arm(4, 3, 4.0, 3, 3.0), arm(4, 1, 4.0, 1, 1.0)),  # fine
    ]
    t = {k: [r[0][k] for r in rows] for k in rows[0][0]}
    c = {k: [r[1][k] for r in rows] for k in rows[0][1]}
    with warnings.catch_warnings():
        warnings.simplefilter("error")
        om = complier_outcome_means(SiteMoments(ArmMoments(**t), ArmMoments(**c)))
    assert list(om.status) == ["no_controls", "zero_first_stage", "non_binary_uptake", "ok"]
    assert np.isnan(om.complier_treated[:3]).all() and np.isnan(om.difference[:3]).all()
    # site 3 by hand (Imbens & Rubin eq. 7): pi = 0.5,
    # Yc1 = (3/4 - 1/4)/0.5 = 1, Yc0 = ((4-1)/4 - (4-3)/4)/0.5 = 1
    assert om.complier_treated[3] == pytest.approx(1.0) and om.complier_control[3] == pytest.approx(1.0)
