"""Stratified ITT, complier share and CACE per site, from moments per site x stratum x arm.

When a site randomises within strata whose odds differ (a weekly lottery whose
odds rise when places open, groups drawn at different rates), the pooled
difference in means mixes strata and is biased as soon as uptake or outcomes
differ between strata.  The stratified estimator compares arms within each
stratum and averages with the strata's shares of the site's sample:

    ITT = sum_s w_s ITT_s,   pi = sum_s w_s pi_s,   CACE = ITT / pi,   w_s = n_s / n.

Everything is computed for all sites at once from the per-cell sums in
:class:`StratifiedMoments` (cells = site x stratum), never from participant rows.

* :func:`stratified_wald` - the estimates, HC / CR variances, first-stage F, in a
  :class:`~takeup.pipeline.stats.estimators.wald.WaldEstimates` (so the weak-IV sets and
  the row builder work unchanged), plus which strata were left out;
* :func:`weighted_site_moments` - per-site pseudo moments whose arm means are the
  stratum-weighted means (complier outcome means use them);
* :func:`stratified_kappa_means` - Abadie's kappa complier covariate means with each
  stratum's own treated share.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from takeup.pipeline.stats.estimators.moments import ArmMoments, SiteMoments
from takeup.pipeline.stats.estimators.wald import (WaldEstimates, _centred, _finish_variances,
                                                   status_and_note)
from takeup.pipeline.stats.readonly import readonly_array as _ro

__all__ = ["StratifiedMoments", "StratumClusterMoments", "StratifiedEstimates", "stratified_wald",
           "weighted_site_moments", "stratified_kappa_means", "stratified_moments_from_arrays",
           "MIN_PER_ARM"]

#: a stratum enters a site's estimate only with at least this many participants in each arm
MIN_PER_ARM = 2


@dataclass(frozen=True)
class StratifiedMoments:
    """Arm moments per site x stratum cell.

    Attributes
    ----------
    cells : SiteMoments
        One entry per cell (the "sites" of this container are the cells).
    site_index : ndarray of int
        Site position of each cell (``0 .. n_sites - 1``).
    stratum : tuple of str
        Stratum label of each cell.
    n_sites : int
        Number of sites (sites without a cell get undefined estimates).
    """

    cells: SiteMoments
    site_index: np.ndarray
    stratum: tuple[str, ...]
    n_sites: int

    def __post_init__(self) -> None:
        idx = _ro(self.site_index, np.int64)
        object.__setattr__(self, "site_index", idx)
        if idx.shape[0] != self.cells.n_sites or len(self.stratum) != idx.shape[0]:
            raise ValueError("site_index, stratum and cells must have one entry per cell")
        if idx.size and (idx.min() < 0 or idx.max() >= self.n_sites):
            raise ValueError("site_index out of range")


@dataclass(frozen=True)
class StratumClusterMoments:
    """Sums per site x stratum x cluster x arm, for cluster-robust variances.

    ``cell_index`` points into :attr:`StratifiedMoments.cells`; ``cluster_index`` numbers
    clusters over the whole data (a cluster spanning arms or strata shares its number).
    """

    cell_index: np.ndarray
    cluster_index: np.ndarray
    z: np.ndarray
    n: np.ndarray
    sum_d: np.ndarray
    sum_y: np.ndarray

    def __post_init__(self) -> None:
        for name in ("cell_index", "cluster_index"):
            object.__setattr__(self, name, _ro(getattr(self, name), np.int64))
        for name in ("z", "n", "sum_d", "sum_y"):
            object.__setattr__(self, name, _ro(getattr(self, name)))
        shape = self.cell_index.shape
        for name in ("cluster_index", "z", "n", "sum_d", "sum_y"):
            if getattr(self, name).shape != shape:
                raise ValueError(f"StratumClusterMoments.{name} has a different length from cell_index")


@dataclass(frozen=True)
class StratifiedEstimates:
    """Stratified estimates (``estimates``) and the bookkeeping of the strata.

    Attributes
    ----------
    estimates : WaldEstimates
        Per-site estimates; ``status``/``note`` also say why a site has none.
    n_strata : ndarray of int
        Strata used per site.
    n_strata_dropped : ndarray of int
        Strata left out (one arm only, or fewer than :data:`MIN_PER_ARM` in an arm).
    n_dropped : ndarray of int
        Participants in the strata left out.
    kept : ndarray of bool
        Per cell: used in its site's estimate.
    weight : ndarray
        Per cell: ``w_s = n_s / n`` (0 for cells left out).
    """

    estimates: WaldEstimates
    n_strata: np.ndarray
    n_strata_dropped: np.ndarray
    n_dropped: np.ndarray
    kept: np.ndarray
    weight: np.ndarray


def _bincount(idx, w, k):
    return np.bincount(idx, weights=w, minlength=k)


def stratified_wald(sm: StratifiedMoments, clusters: StratumClusterMoments | None = None, level: float = 0.95,
                    min_clusters_per_arm: int = 2) -> StratifiedEstimates:
    r"""Stratified ITT, complier share and CACE per site with robust (HC) or cluster-robust (CR) SEs.

    Parameters
    ----------
    sm : StratifiedMoments
        Analysis-sample moments per site x stratum x arm.
    clusters : StratumClusterMoments, optional
        Cell sums per site x stratum x cluster x arm: cluster-robust variances.
    level : float
        Confidence level of the conventional intervals.
    min_clusters_per_arm : int
        Under CR, fewer clusters than this in an arm of the site: SEs, intervals and F undefined.

    Returns
    -------
    StratifiedEstimates

    Notes
    -----
    Strata with one arm only, or fewer than :data:`MIN_PER_ARM` participants in an arm,
    are left out.  For the kept strata (``n_s = n_{1s} + n_{0s}``, ``n = \sum n_s``,
    ``w_s = n_s / n``) the point estimates are

    .. math:: \hat\gamma = \sum_s w_s(\bar y_{1s} - \bar y_{0s}),\quad
              \hat\pi = \sum_s w_s(\bar d_{1s} - \bar d_{0s}),\quad
              \hat\beta = \hat\gamma / \hat\pi .

    They are exactly the coefficients of the weighted regressions with stratum dummies
    (Imbens & Rubin 2015, ch. 9; Angrist & Pischke 2009, sec. 3.3.1): weights
    ``1/p_s`` for the treated and ``1/(1-p_s)`` for controls (``p_s = n_{1s}/n_s``, the
    stratum's realised treated share) make every stratum's weighted arms equal in size,
    so ``Z`` minus its weighted stratum mean is :math:`\pm 1/2` and the 2SLS slope of
    ``Y`` on ``D`` with instrument ``Z`` and the dummies as exogenous regressors is the
    ratio above.

    The robust variance of any of these coefficients ``theta_V`` (``V = Y`` for the ITT,
    ``D`` for the first stage) is that fit's sandwich (HC0), evaluated from the moments:

    .. math:: V_V = \sum_s w_s^2\Big[\frac{S^{VV}_{1s}}{n_{1s}^2} + \frac{S^{VV}_{0s}}{n_{0s}^2}
              + \frac{(\Delta^V_s - \hat\theta_V)^2}{4}\Big(\frac1{n_{1s}} + \frac1{n_{0s}}\Big)\Big]

    with :math:`S^{VV}_{zs}` the within-cell centred sum of squares and
    :math:`\Delta^V_s` the stratum's difference in means: the weighted residual of a
    participant is their deviation from the cell mean plus or minus half the gap
    between the stratum's contrast and the site's.  The covariance ``C`` of the ITT and
    the first stage uses the cross-products likewise, and
    :math:`V_\beta = (V_\gamma - 2\hat\beta C + \hat\beta^2 V_\pi)/\hat\pi^2` (the 2SLS
    residual is the ITT residual minus :math:`\hat\beta` times the first-stage one).

    **Small-sample factor.**  HC multiplies by :math:`n/(n - S - 1)`, with ``S`` the
    number of strata used (regressors: ``D`` and ``S`` dummies); this is linearmodels'
    ``fit(cov_type="robust", debiased=True)`` (``nobs/(nobs - nvar)``).  CR sums each
    participant's score within clusters before squaring and multiplies by
    :math:`G/(G-1)\cdot(n-1)/(n-S-1)`, linearmodels' ``cov_type="clustered"`` with
    ``debiased=True``.  With one stratum both reduce to the unstratified HC1 / CR1.

    ``first_stage_f`` is :math:`\hat\pi^2/V_\pi`.  The Anderson-Rubin set follows from the
    stratified contrast :math:`\sum_s w_s(\mathrm{ITT}_s - \beta_0\pi_s) = \hat\gamma -
    \beta_0\hat\pi`, whose variance (the robust variance of the coefficient of ``Z`` in
    the weighted regression of ``Y - beta_0 D`` on ``Z`` and the dummies) is exactly
    :math:`V_\gamma - 2\beta_0 C + \beta_0^2 V_\pi`: the same closed-form quadratic as
    the unstratified set.

    References
    ----------
    .. [1] Imbens, G. W. and Rubin, D. B. (2015). Causal Inference for Statistics,
       Social, and Biomedical Sciences. Cambridge University Press, ch. 9 (stratified
       randomised experiments) and ch. 23-24 (instrumental variables).
    .. [2] Angrist, J. D. and Pischke, J.-S. (2009). Mostly Harmless Econometrics.
       Princeton University Press, sec. 3.3.1 and 4.5.
    .. [3] White, H. (1980). A heteroskedasticity-consistent covariance matrix estimator
       and a direct test for heteroskedasticity. Econometrica, 48(4), 817-838.
    .. [4] Liang, K.-Y. and Zeger, S. L. (1986). Longitudinal data analysis using
       generalized linear models. Biometrika, 73(1), 13-22.
    .. [5] Anderson, T. W. and Rubin, H. (1949). Estimation of the parameters of a single
       equation in a complete system of stochastic equations. Annals of Mathematical
       Statistics, 20(1), 46-63.
    """
    if not (0.0 < level < 1.0):
        raise ValueError(f"level must be strictly between 0 and 1, got {level!r}")
    if int(min_clusters_per_arm) < 2:
        raise ValueError(f"min_clusters_per_arm must be at least 2, got {min_clusters_per_arm!r}")
    k = sm.n_sites
    t, c = sm.cells.treated, sm.cells.control
    si = sm.site_index
    nan = np.nan
    finite = np.ones(si.shape[0], dtype=bool)
    for arm in (t, c):
        for name in ("n", "sum_d", "sum_y", "sum_dd", "sum_yy", "sum_dy"):
            finite &= np.isfinite(getattr(arm, name))
    invalid_site = _bincount(si, (~finite).astype(float), k) > 0
    n1, n0 = t.n, c.n
    kept = finite & (n1 >= MIN_PER_ARM) & (n0 >= MIN_PER_ARM)
    kf = kept.astype(float)
    n_strata = _bincount(si, kf, k).astype(np.int64)
    present = finite & (n1 + n0 > 0)
    n_dropped_strata = _bincount(si, (present & ~kept).astype(float), k).astype(np.int64)
    n_dropped = _bincount(si, np.where(present & ~kept, n1 + n0, 0.0), k).astype(np.int64)

    with np.errstate(all="ignore"):
        s1 = np.where(kept, n1, 1.0)
        s0 = np.where(kept, n0, 1.0)
        ns = np.where(kept, n1 + n0, 0.0)
        n = _bincount(si, ns, k)
        has = ~invalid_site & (n_strata > 0)
        w = np.where(kept, ns / np.where(n[si] > 0, n[si], 1.0), 0.0)
        d1, d0 = t.sum_d / s1, c.sum_d / s0
        y1, y0 = t.sum_y / s1, c.sum_y / s0
        itt_s = np.where(kept, y1 - y0, 0.0)
        pi_s = np.where(kept, d1 - d0, 0.0)
        up1 = np.where(has, _bincount(si, w * np.where(kept, d1, 0.0), k), nan)
        up0 = np.where(has, _bincount(si, w * np.where(kept, d0, 0.0), k), nan)
        gamma = np.where(has, _bincount(si, w * itt_s, k), nan)
        pi = np.where(has, _bincount(si, w * pi_s, k), nan)
        zero_fs = has & (np.abs(pi) <= 8 * np.finfo(float).eps * np.maximum(np.abs(up1), np.abs(up0)))
        pi = np.where(zero_fs, 0.0, pi)
        neg_fs = has & ~zero_fs & (pi < 0)
        beta = np.where(has & ~zero_fs, gamma / np.where(zero_fs | ~has, 1.0, pi), nan)

        def centred(arm, sn, a, b, ab, aa, bb):
            scale = np.sqrt(np.abs(getattr(arm, aa)) * np.abs(getattr(arm, bb)))
            return np.where(kept, _centred(getattr(arm, ab), getattr(arm, a), getattr(arm, b), sn, scale), 0.0)

        syy = [np.maximum(centred(a, sn, "sum_y", "sum_y", "sum_yy", "sum_yy", "sum_yy"), 0.0)
               for a, sn in ((c, s0), (t, s1))]
        sdd = [np.maximum(centred(a, sn, "sum_d", "sum_d", "sum_dd", "sum_dd", "sum_dd"), 0.0)
               for a, sn in ((c, s0), (t, s1))]
        sdy = [centred(a, sn, "sum_d", "sum_y", "sum_dy", "sum_dd", "sum_yy") for a, sn in ((c, s0), (t, s1))]
        a_s = np.where(kept, itt_s - np.nan_to_num(gamma)[si], 0.0)      # stratum contrast minus the site's
        b_s = np.where(kept, pi_s - np.nan_to_num(pi)[si], 0.0)
        inv = np.where(kept, 1.0 / s1 + 1.0 / s0, 0.0)
        w2 = w * w
        scale_g = _bincount(si, w2 * np.where(kept, t.sum_yy / s1**2 + c.sum_yy / s0**2, 0.0), k)
        scale_p = _bincount(si, w2 * np.where(kept, t.sum_dd / s1**2 + c.sum_dd / s0**2, 0.0), k)
        bb = np.where(np.isfinite(beta), beta, 0.0)
        scale_b = scale_g + bb**2 * scale_p
        S = n_strata.astype(float)

        if clusters is None:
            se_type = "HC1"
            factor = n / (n - S - 1.0)
            v_g = _bincount(si, w2 * (syy[1] / s1**2 + syy[0] / s0**2 + a_s**2 / 4 * inv), k)
            v_p = _bincount(si, w2 * (sdd[1] / s1**2 + sdd[0] / s0**2 + b_s**2 / 4 * inv), k)
            cov = _bincount(si, w2 * (sdy[1] / s1**2 + sdy[0] / s0**2 + a_s * b_s / 4 * inv), k)
            v_u = np.maximum(v_g - 2 * bb * cov + bb**2 * v_p, 0.0)
            n_clusters = np.full(k, nan)
            few_clusters = np.zeros(k, dtype=bool)
        else:
            se_type = "CR1"
            v_g, v_p, cov, g, min_per_arm = _cluster_sums(sm, clusters, kept, w, (y0, y1), (d0, d1), a_s, b_s)
            factor = g / (g - 1.0) * (n - 1.0) / (n - S - 1.0)
            v_u = np.maximum(v_g - 2 * bb * cov + bb**2 * v_p, 0.0)
            n_clusters = np.where(has, g, nan)
            few_clusters = has & (min_per_arm < int(min_clusters_per_arm))

        no_se = ~has | few_clusters | ~(n - S - 1.0 > 0)
        fin = _finish_variances(v_g, v_p, cov, v_u, factor=factor, pi=pi, defined=has, no_se=no_se,
                                zero_fs=zero_fs, scales=(scale_g, scale_p, scale_b), n_clusters=n_clusters,
                                clustered=clusters is not None, level=level)
        v_g, v_p, cov, itt_se, fs_se, cace_se = fin.v_g, fin.v_p, fin.cov, fin.itt_se, fin.fs_se, fin.cace_se
        const_y, fixed_d, zero_vb, ci_df, crit, f = fin.const_y, fin.fixed_d, fin.zero_vb, fin.ci_df, fin.crit, fin.f

    no_strata = ~invalid_site & (n_strata == 0)
    flags = [
        (invalid_site, "invalid_moments", "moments are not finite: nothing can be estimated"),
        (no_strata, "no_usable_strata", f"no stratum has at least {MIN_PER_ARM} participants in each arm: "
                                        "the stratified estimate is not available"),
        (few_clusters, "too_few_clusters", f"fewer than {int(min_clusters_per_arm)} clusters in an arm: "
                                           "cluster-robust standard errors, intervals and F not available"),
        (zero_fs, "zero_first_stage", "first stage is zero (equal stratum-weighted uptake in both arms): "
                                      "CACE undefined"),
        (neg_fs, "negative_first_stage", "uptake is lower in the treatment arm than in control: evidence "
                                         "against monotonicity or of an assignment mix-up; CACE estimated but suspect"),
        (const_y, "constant_outcome", "ITT variance is zero (outcome does not vary within arms): ITT standard "
                                      "error reported as null"),
        (fixed_d, "deterministic_uptake", "uptake does not vary within arms: complier-share standard error is "
                                          "zero and the first-stage F is infinite, both reported as null"),
        (zero_vb, "zero_cace_variance", "CACE residuals vanish: CACE standard error is zero, reported as null"),
    ]
    status, note = status_and_note(flags, k)
    est = WaldEstimates(
        uptake_treatment=_ro(up1), uptake_control=_ro(up0),
        complier_share=_ro(pi), complier_share_se=_ro(fs_se),
        always_taker_share=_ro(up0), never_taker_share=_ro(1.0 - up1),
        itt=_ro(gamma), itt_se=_ro(itt_se), cov_itt_fs=_ro(cov),
        cace=_ro(beta), cace_se=_ro(cace_se),
        cace_ci_low=_ro(beta - crit * cace_se), cace_ci_high=_ro(beta + crit * cace_se),
        first_stage_f=_ro(f), n_clusters=_ro(n_clusters),
        itt_ci_low=_ro(gamma - crit * itt_se), itt_ci_high=_ro(gamma + crit * itt_se),
        complier_share_ci_low=_ro(pi - crit * fs_se), complier_share_ci_high=_ro(pi + crit * fs_se),
        ci_df=_ro(ci_df), se_type=se_type, level=float(level), status=status, note=note,
    )
    return StratifiedEstimates(estimates=est, n_strata=_ro(n_strata, np.int64),
                               n_strata_dropped=_ro(n_dropped_strata, np.int64), n_dropped=_ro(n_dropped, np.int64),
                               kept=_ro(kept, bool), weight=_ro(w))


def _cluster_sums(sm, cl: StratumClusterMoments, kept, w, ybar, dbar, a_s, b_s):
    """Per-site sums over clusters of products of the ITT and first-stage cluster scores.

    A participant's ITT score is ``(w_s / n_zs) * sign_z * u_i`` with the weighted-regression
    residual ``u_i = (y_i - ybar_zs) + sign_z (ITT_s - ITT) / 2``; summed over a cell
    (stratum x cluster x arm) that is ``(w_s / n_zs) sign_z (sum_y - n_cell ybar_zs) +
    (w_s / n_zs) n_cell (ITT_s - ITT) / 2``.  Likewise for uptake.
    """
    k = sm.n_sites
    j = cl.cell_index
    use = kept[j] & (cl.n > 0)
    j, cidx, z, ncell, sd, sy = (a[use] for a in (j, cl.cluster_index, cl.z, cl.n, cl.sum_d, cl.sum_y))
    site = sm.site_index[j]
    n1, n0 = sm.cells.treated.n[j], sm.cells.control.n[j]
    treated = z == 1.0
    nz = np.where(treated, n1, n0)
    sign = np.where(treated, 1.0, -1.0)
    yb = np.where(treated, ybar[1][j], ybar[0][j])
    db = np.where(treated, dbar[1][j], dbar[0][j])
    coef = w[j] / nz
    e_y = coef * (sign * (sy - ncell * yb) + ncell * a_s[j] / 2.0)
    e_d = coef * (sign * (sd - ncell * db) + ncell * b_s[j] / 2.0)
    pairs = np.stack([site, cidx], axis=1)
    if len(pairs) == 0:
        zero = np.zeros(k)
        return zero, zero, zero, zero, np.zeros(k)
    uniq, inv = np.unique(pairs, axis=0, return_inverse=True)
    inv = inv.reshape(-1)
    g_site = uniq[:, 0]
    g_y = np.bincount(inv, weights=e_y, minlength=len(uniq))
    g_d = np.bincount(inv, weights=e_d, minlength=len(uniq))
    s_yy = np.bincount(g_site, weights=g_y * g_y, minlength=k)
    s_dd = np.bincount(g_site, weights=g_d * g_d, minlength=k)
    s_yd = np.bincount(g_site, weights=g_y * g_d, minlength=k)
    n_groups = np.bincount(g_site, minlength=k).astype(float)
    per_arm = []
    for zval in (True, False):
        sel = treated == zval
        u = np.unique(pairs[sel], axis=0) if sel.any() else np.zeros((0, 2), dtype=np.int64)
        per_arm.append(np.bincount(u[:, 0], minlength=k) if len(u) else np.zeros(k, int))
    return s_yy, s_dd, s_yd, n_groups, np.minimum(per_arm[0], per_arm[1])


def weighted_site_moments(sm: StratifiedMoments, kept: np.ndarray) -> SiteMoments:
    """Per-site pseudo moments whose arm means are the stratum-weighted means.

    Each kept cell's arm sums are multiplied by ``n_s / n_{zs}`` (the inverse of the
    stratum's realised arm share), so both pseudo arms count ``n`` participants and
    ``sum_v / n = sum_s w_s vbar_{zs}``.  Functions of arm means only (complier outcome
    means) then give their stratum-weighted versions; variances from these pseudo sums
    are not meaningful.
    """
    k = sm.n_sites
    si = sm.site_index
    t, c = sm.cells.treated, sm.cells.control
    ns = np.where(kept, t.n + c.n, 0.0)

    def arm(a: ArmMoments) -> ArmMoments:
        with np.errstate(all="ignore"):
            f = np.where(kept, ns / np.where(kept, a.n, 1.0), 0.0)
        return ArmMoments(**{name: _bincount(si, f * np.where(kept, getattr(a, name), 0.0), k)
                             for name in ("n", "sum_d", "sum_y", "sum_dd", "sum_yy", "sum_dy")})

    return SiteMoments(treated=arm(t), control=arm(c))


def stratified_kappa_means(site_index, n_sites: int, n_cells, sum_x_cells):
    r"""Abadie (2003) kappa-weighted complier means of covariates with stratum-specific shares.

    Parameters
    ----------
    site_index : array_like of int, shape (cells,)
        Site of each site x stratum cell.
    n_sites : int
    n_cells : array_like, shape (cells, 2, 2)
        Participant counts per cell and ``[z, d]``.
    sum_x_cells : array_like, shape (cells, 2, 2)
        Sums of one covariate per cell and ``[z, d]``.

    Returns
    -------
    complier_mean, overall_mean, always_taker_mean, never_taker_mean : ndarray, shape (n_sites,)
    note : list of str or None

    Notes
    -----
    :math:`\kappa = 1 - D(1-Z)/(1-p_s) - (1-D)Z/p_s` with :math:`p_s` the stratum's
    treated share (Abadie's theorem 3.1 with the instrument's propensity given the
    stratum).  Within a stratum it is constant in each (z, d) cell, so
    :math:`\sum\kappa X = \sum_s\sum_{zd}\kappa_{s,zd}S^x_{s,zd}` and
    :math:`\sum\kappa = \sum_s n_s\hat\pi_s`; the complier mean is their ratio.
    Strata with an empty arm are left out (their kappa is undefined).

    References
    ----------
    .. [1] Abadie, A. (2003). Semiparametric instrumental variable estimation of treatment
       response models. Journal of Econometrics, 113(2), 231-263.
    """
    si = np.asarray(site_index, dtype=np.int64)
    nc = np.asarray(n_cells, dtype=float)
    sx = np.asarray(sum_x_cells, dtype=float)
    k = int(n_sites)
    nz = nc.sum(axis=2)                 # (cells, 2)
    ns = nz.sum(axis=1)
    ok = (nz[:, 0] > 0) & (nz[:, 1] > 0)
    nan = np.nan
    with np.errstate(all="ignore"):
        kappa = np.ones_like(nc)
        kappa[:, 0, 1] = 1.0 - ns / np.where(ok, nz[:, 0], 1.0)
        kappa[:, 1, 0] = 1.0 - ns / np.where(ok, nz[:, 1], 1.0)
        kx = np.where(ok, (kappa * sx).sum(axis=(1, 2)), 0.0)
        kn = np.where(ok, (kappa * nc).sum(axis=(1, 2)), 0.0)
        e_kx = _bincount(si, kx, k)
        e_k = _bincount(si, kn, k)
        n_ok = _bincount(si, np.where(ok, ns, 0.0), k)
        good = (n_ok > 0) & (np.abs(e_k) > 1e-12 * np.maximum(n_ok, 1.0))
        comp = np.where(good, e_kx / np.where(good, e_k, 1.0), nan)
        n_all = _bincount(si, ns, k)
        overall = np.where(n_all > 0, _bincount(si, sx.sum(axis=(1, 2)), k) / np.where(n_all > 0, n_all, 1.0), nan)
        n01 = _bincount(si, nc[:, 0, 1], k)
        n10 = _bincount(si, nc[:, 1, 0], k)
        at = np.where(n01 > 0, _bincount(si, sx[:, 0, 1], k) / np.where(n01 > 0, n01, 1.0), nan)
        nt = np.where(n10 > 0, _bincount(si, sx[:, 1, 0], k) / np.where(n10 > 0, n10, 1.0), nan)
    note = []
    for i in range(k):
        if n_ok[i] <= 0:
            note.append("no stratum has both arms: complier means undefined")
        elif not good[i]:
            note.append("first stage is zero (kappa weights sum to zero): complier means undefined")
        else:
            note.append("kappa weights use each stratum's own treated share")
    return comp, overall, at, nt, note


def stratified_moments_from_arrays(site, stratum, z, d, y, sites=None) -> StratifiedMoments:
    """Numpy twin of the SQL aggregation per site x stratum x arm (tests, simulations)."""
    site = np.asarray(site).astype(str)
    stratum = np.asarray(stratum).astype(str)
    if sites is None:
        sites = np.unique(site)
    pos = {s: i for i, s in enumerate(list(sites))}
    keys = np.char.add(np.char.add(site, "\x1f"), stratum)
    uniq, cell = np.unique(keys, return_inverse=True)
    cell_site = np.array([pos[u.split("\x1f", 1)[0]] for u in uniq], dtype=np.int64)
    cell_stratum = tuple(u.split("\x1f", 1)[1] for u in uniq)
    from takeup.pipeline.stats.estimators.moments import arm_moments_from_arrays
    cells = arm_moments_from_arrays(cell, z, d, y, sites=np.arange(len(uniq)))
    return StratifiedMoments(cells=cells, site_index=cell_site, stratum=cell_stratum, n_sites=len(pos))
