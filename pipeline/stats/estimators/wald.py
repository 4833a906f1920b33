"""Per-site ITT, first stage and CACE (Wald / just-identified 2SLS) from moments.

Every quantity is computed for all sites at once from the sufficient
statistics in :class:`~takeup.pipeline.stats.estimators.moments.SiteMoments` (and, for
cluster-robust variances, :class:`~takeup.pipeline.stats.estimators.moments.ClusterMoments`).
No participant-level data are needed: the residual sums of squares and
cross-products of the three regressions involved (``Y`` on ``(1, Z)``,
``D`` on ``(1, Z)`` and the IV regression of ``Y`` on ``(1, D)`` with
instruments ``(1, Z)``) are all functions of the within-arm sums.

Undefined statistics are not errors: they are NaN in the numeric arrays, and
the per-site ``status`` / ``note`` arrays say why (see
:func:`status_and_note`).
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import NamedTuple

import numpy as np
from scipy import stats

from takeup.pipeline.stats.estimators.moments import ClusterMoments, SiteMoments
from takeup.pipeline.stats.readonly import readonly_array as _readonly

__all__ = ["WaldEstimates", "wald_estimates", "status_and_note"]

# A centred sum of squares (or a variance) smaller than this fraction of the
# matching uncentred sum is indistinguishable from zero: the raw moments carry
# relative rounding error of a few machine epsilons times log(n), so anything
# below 1e-12 of the raw scale is rounding noise, not variation in the data.
_ZERO_RTOL = 1e-12


def status_and_note(flags: list[tuple[np.ndarray, str, str]], n_sites: int
                    ) -> tuple[np.ndarray, np.ndarray]:
    """Combine per-site condition masks into ``status`` and ``note`` arrays.

    Parameters
    ----------
    flags : list of (mask, code, message)
        Boolean mask (one entry per site), a short status code and a
        human-readable message, in decreasing order of severity.
    n_sites : int
        Number of sites.

    Returns
    -------
    status : ndarray of object
        The code of the first (most severe) condition that holds, or ``"ok"``.
    note : ndarray of object
        All messages that hold, joined by ``"; "``, or ``None``.
    """
    status = np.full(n_sites, "ok", dtype=object)
    decided = np.zeros(n_sites, dtype=bool)
    parts: list[list[str]] = [[] for _ in range(n_sites)]
    for mask, code, message in flags:
        mask = np.asarray(mask, dtype=bool)
        status[mask & ~decided] = code
        decided |= mask
        # String assembly only (a handful of flagged sites), no arithmetic.
        for i in np.flatnonzero(mask):
            parts[i].append(message)
    note = np.array([("; ".join(p) if p else None) for p in parts], dtype=object)
    status.setflags(write=False)
    note.setflags(write=False)
    return status, note


@dataclass(frozen=True)
class WaldEstimates:
    """Per-site Wald / 2SLS estimates (every array has one entry per site).

    Attributes
    ----------
    uptake_treatment, uptake_control : ndarray
        Mean uptake ``D`` in the treatment and control arm.
    complier_share, complier_share_se : ndarray
        First stage ``pi = uptake_treatment - uptake_control`` and its
        (HC1 or CR1) standard error.
    always_taker_share, never_taker_share : ndarray
        ``uptake_control`` and ``1 - uptake_treatment`` (shares under
        monotonicity, binary ``D``).
    itt, itt_se : ndarray
        Intention-to-treat effect ``gamma`` (difference in mean ``Y``) and its
        standard error.
    cov_itt_fs : ndarray
        Covariance of ``gamma_hat`` and ``pi_hat`` (same estimator and
        small-sample factor as the variances), as needed by the
        Anderson-Rubin set.
    cace, cace_se, cace_ci_low, cace_ci_high : ndarray
        Wald estimate ``gamma / pi`` (= just-identified 2SLS), its standard
        error and the conventional interval ``cace -/+ c * cace_se``: ``c`` is
        the normal critical value for ``level`` under HC1 and the t(G - 1)
        critical value under CR1 (``ci_df``).
    itt_ci_low, itt_ci_high, complier_share_ci_low, complier_share_ci_high : ndarray
        The same intervals for the ITT and the complier share.
    ci_df : ndarray
        Degrees of freedom of the t reference (``G - 1`` under CR1; NaN under
        HC1, where the reference is normal).
    first_stage_f : ndarray
        ``(pi_hat / se(pi_hat))**2`` with the robust (HC1) or cluster-robust
        (CR1) standard error: the Wald statistic of the excluded instrument in
        the first stage, which with one instrument is also the effective F of
        Montiel Olea & Pflueger (2013).
    n_clusters : ndarray
        Number of clusters in the site (NaN when not clustered).
    se_type : str
        ``"HC1"`` or ``"CR1"``.
    level : float
        Confidence level of ``cace_ci_low`` / ``cace_ci_high``.
    status : ndarray of object
        ``"ok"`` or a short code (see :func:`wald_estimates`).
    note : ndarray of object
        Human-readable explanation of flagged or undefined values, or None.
    """

    uptake_treatment: np.ndarray
    uptake_control: np.ndarray
    complier_share: np.ndarray
    complier_share_se: np.ndarray
    always_taker_share: np.ndarray
    never_taker_share: np.ndarray
    itt: np.ndarray
    itt_se: np.ndarray
    cov_itt_fs: np.ndarray
    cace: np.ndarray
    cace_se: np.ndarray
    cace_ci_low: np.ndarray
    cace_ci_high: np.ndarray
    first_stage_f: np.ndarray
    n_clusters: np.ndarray
    itt_ci_low: np.ndarray
    itt_ci_high: np.ndarray
    complier_share_ci_low: np.ndarray
    complier_share_ci_high: np.ndarray
    ci_df: np.ndarray
    se_type: str
    level: float
    status: np.ndarray
    note: np.ndarray

    @property
    def n_sites(self) -> int:
        return int(self.cace.shape[0])


def _centred(sum_ab, sum_a, sum_b, n, scale):
    """Within-arm centred cross-product, zeroed below rounding noise."""
    s = sum_ab - sum_a * sum_b / n
    return np.where(np.abs(s) <= _ZERO_RTOL * scale, 0.0, s)


def _positive_or_nan(var, scale):
    """A variance that is (numerically) zero or negative is reported as NaN."""
    return np.where(var > _ZERO_RTOL * scale, var, np.nan)


class _FinishedVariances(NamedTuple):
    v_g: np.ndarray
    v_p: np.ndarray
    cov: np.ndarray
    itt_se: np.ndarray
    fs_se: np.ndarray
    cace_se: np.ndarray
    const_y: np.ndarray
    fixed_d: np.ndarray
    zero_vb: np.ndarray
    ci_df: np.ndarray
    crit: np.ndarray
    f: np.ndarray


def _finish_variances(v_g, v_p, cov, v_u, *, factor, pi, defined, no_se, zero_fs, scales, n_clusters,
                      clustered: bool, level: float) -> _FinishedVariances:
    """Scaled variances, standard errors, degenerate-case flags, critical values and F.

    Shared by the unstratified (:func:`wald_estimates`) and stratified estimators: ``v_*`` are
    the unscaled variance sums, ``factor`` the HC1 / CR1 small-sample factor, ``v_u`` the CACE
    residual variance before dividing by ``pi**2``, ``defined`` the sites with both arms,
    ``no_se`` the sites without standard errors and ``scales`` the raw-moment scales
    ``(g, p, b)`` against which a variance counts as zero.  Intervals use the normal, or under
    CR1 t with ``G - 1`` degrees of freedom.
    """
    nan = np.nan
    scale_g, scale_p, scale_b = scales
    v_g = np.where(no_se, nan, factor * v_g)
    v_p = np.where(no_se, nan, factor * v_p)
    cov = np.where(no_se, nan, factor * cov)
    v_b = np.where(no_se | zero_fs, nan, factor * v_u / np.where(zero_fs | no_se, 1.0, pi) ** 2)
    const_y = defined & ~no_se & ~(v_g > _ZERO_RTOL * scale_g)
    fixed_d = defined & ~no_se & ~(v_p > _ZERO_RTOL * scale_p)
    # v_u (before dividing by pi^2) against its raw-moment scale
    zero_vb = defined & ~no_se & ~zero_fs & ~(factor * v_u > _ZERO_RTOL * scale_b)
    v_g = _positive_or_nan(v_g, scale_g)
    v_p = _positive_or_nan(v_p, scale_p)
    v_b = np.where(zero_vb, nan, v_b)
    cov = np.where(np.isnan(v_g) | np.isnan(v_p), nan, cov)
    k = np.shape(v_g)[0]
    if not clustered:
        ci_df = np.full(k, nan)
        crit = np.full(k, stats.norm.ppf(0.5 + level / 2.0))
    else:
        ci_df = np.where(np.isfinite(n_clusters) & (n_clusters >= 2), n_clusters - 1.0, nan)
        crit = stats.t.ppf(0.5 + level / 2.0, np.where(np.isfinite(ci_df), ci_df, 1.0))
        crit = np.where(np.isfinite(ci_df), crit, nan)
    f = np.where(np.isnan(v_p), nan, pi**2 / np.where(np.isnan(v_p), 1.0, v_p))
    return _FinishedVariances(v_g, v_p, cov, np.sqrt(v_g), np.sqrt(v_p), np.sqrt(v_b), const_y, fixed_d, zero_vb,
                              ci_df, crit, f)


def _cluster_scores(m: SiteMoments, cl: ClusterMoments, ybar: tuple, dbar: tuple):
    """Per-site sums over clusters of products of (gamma, pi) cluster scores.

    The score of participant ``i`` for the ITT is ``w_i e_i`` with
    ``w_i = 1/n1`` in the treatment arm and ``-1/n0`` in control, and
    ``e_i = y_i - ybar_arm``; summed over a cell (site x cluster x arm) it is
    ``w (sum_y - n_cell * ybar_arm)``.  Same for uptake.  The CACE score is
    the ITT score minus ``beta`` times the first-stage score, over ``pi``.
    """
    k = m.n_sites
    s = cl.site_index
    z = cl.z
    if s.size and (s.min() < 0 or s.max() >= k):
        raise ValueError("ClusterMoments.site_index refers to a site outside SiteMoments")
    if not np.all((z == 0) | (z == 1)):
        raise ValueError("ClusterMoments.z must be 0 or 1")
    # The cells must add up to the arm totals of the same sites.
    for arm, zval in ((m.treated, 1.0), (m.control, 0.0)):
        sel = z == zval
        for name in ("n", "sum_d", "sum_y"):
            tot = np.bincount(s[sel], weights=getattr(cl, name)[sel], minlength=k)
            ref = getattr(arm, name)
            fin = np.isfinite(ref)
            atol = 1e-9 * (1.0 + np.abs(ref[fin]).max(initial=0.0))
            if not np.all(np.isclose(tot[fin], ref[fin], rtol=1e-9, atol=atol)):
                raise ValueError(f"ClusterMoments.{name} cells do not add up to the "
                                 f"{'treated' if zval else 'control'} arm totals")
    keep = cl.n > 0
    s, z, c = s[keep], z[keep], cl.cluster_index[keep]
    n_c, sd, sy = cl.n[keep], cl.sum_d[keep], cl.sum_y[keep]
    n1, n0 = m.treated.n, m.control.n
    is_t = z == 1
    w = np.where(is_t, 1.0 / n1[s], -1.0 / n0[s])
    e_y = sy - n_c * np.where(is_t, ybar[1][s], ybar[0][s])
    e_d = sd - n_c * np.where(is_t, dbar[1][s], dbar[0][s])
    # Group cells into (site, cluster); a cluster spanning both arms adds up
    # its treated and control cells before squaring.
    pairs = np.stack([s, c], axis=1)
    uniq, inv = np.unique(pairs, axis=0, return_inverse=True)
    inv = inv.reshape(-1)
    g_site = uniq[:, 0]
    g_y = np.bincount(inv, weights=w * e_y, minlength=len(uniq))
    g_d = np.bincount(inv, weights=w * e_d, minlength=len(uniq))
    s_yy = np.bincount(g_site, weights=g_y * g_y, minlength=k)
    s_dd = np.bincount(g_site, weights=g_d * g_d, minlength=k)
    s_yd = np.bincount(g_site, weights=g_y * g_d, minlength=k)
    n_groups = np.bincount(g_site, minlength=k).astype(float)
    # Clusters per arm: distinct (site, cluster) among the cells of each arm.
    per_arm = []
    for zval in (1.0, 0.0):
        sel = z == zval
        u = np.unique(np.stack([s[sel], c[sel]], axis=1), axis=0)
        per_arm.append(np.bincount(u[:, 0], minlength=k) if len(u) else np.zeros(k, int))
    return s_yy, s_dd, s_yd, n_groups, np.minimum(per_arm[0], per_arm[1])


def wald_estimates(m: SiteMoments, clusters: ClusterMoments | None = None,
                   level: float = 0.95, min_clusters_per_arm: int = 2) -> WaldEstimates:
    r"""ITT, complier share and CACE per site, with robust or cluster-robust SEs.

    Parameters
    ----------
    m : SiteMoments
        Per-site arm moments.
    clusters : ClusterMoments, optional
        Per site x cluster x arm cell sums.  When given, variances are
        cluster-robust (CR1); otherwise heteroskedasticity-robust (HC1).
    level : float
        Confidence level of the conventional CACE interval.
    min_clusters_per_arm : int
        Under CR1, a site with fewer clusters than this in an arm gets status
        ``too_few_clusters`` (SEs, intervals and F undefined).  At least 2: with
        one cluster in an arm the cluster-robust variance is degenerate.

    Returns
    -------
    WaldEstimates

    Notes
    -----
    With arm sizes :math:`n_1, n_0` (:math:`n = n_1 + n_0`), arm means
    :math:`\bar y_z, \bar d_z` and within-arm centred sums
    :math:`S^{yy}_z, S^{dd}_z, S^{dy}_z`:

    * ITT :math:`\hat\gamma = \bar y_1 - \bar y_0`, first stage
      :math:`\hat\pi = \bar d_1 - \bar d_0`, CACE :math:`\hat\beta =
      \hat\gamma / \hat\pi`.  The last is exactly the just-identified 2SLS
      slope of ``Y`` on ``(1, D)`` with instruments ``(1, Z)``, whose
      influence function is :math:`(z_i - \bar z) u_i / \sum_j (z_j - \bar z)
      d_j` with :math:`u = Y - \hat\alpha - \hat\beta D`.  Because the
      instruments include the constant and ``Z``, the 2SLS residuals sum to
      zero within each arm, so :math:`u_i = (y_i - \bar y_z) - \hat\beta
      (d_i - \bar d_z)` and :math:`\sum_{Z=z} u_i^2 = S^{yy}_z -
      2\hat\beta S^{dy}_z + \hat\beta^2 S^{dd}_z`.
    * HC0 variances: :math:`V_\gamma = S^{yy}_1/n_1^2 + S^{yy}_0/n_0^2`,
      :math:`V_\pi` and :math:`C_{\gamma\pi}` likewise with :math:`S^{dd}`
      and :math:`S^{dy}`, and :math:`V_\beta = (\sum_{Z=1}u^2/n_1^2 +
      \sum_{Z=0}u^2/n_0^2)/\hat\pi^2` (the delta-method variance of
      :math:`\hat\gamma - \hat\beta\hat\pi` over :math:`\hat\pi^2`).
    * **HC1** multiplies HC0 by :math:`n/(n-k)` with :math:`k = 2`
      regressors.  This is the factor of statsmodels ``OLS(...).fit(
      cov_type="HC1")`` and of linearmodels ``fit(cov_type="robust",
      debiased=True)``, whose ``HeteroskedasticCovariance`` scales the score
      covariance by ``nobs / (nobs - nvar)``.
    * **CR1** sums the scores within each cluster of the site before squaring
      (a cell contributes :math:`w (\mathrm{sum\_y} - n_{cell}\bar y_z)` to
      the ITT score, :math:`w = 1/n_1` or :math:`-1/n_0`; the CACE score is
      the ITT score minus :math:`\hat\beta` times the first-stage score, over
      :math:`\hat\pi`) and multiplies by
      :math:`G/(G-1)\cdot(n-1)/(n-k)`, with :math:`G` the number of clusters
      in the site.  This is the factor of linearmodels ``fit(
      cov_type="clustered", clusters=..., debiased=True)``
      (``ClusteredCovariance.s`` scales by ``nobs/(nobs-nvar) * nc/(nc-1) *
      (nobs-1)/nobs``), and of statsmodels ``cov_type="cluster"`` with its
      default correction.  Clusters need not be nested in arms.
    * ``first_stage_f`` is :math:`\hat\pi^2 / V_\pi` under the same
      covariance: linearmodels ``res.first_stage.diagnostics["f.stat"]``,
      which for robust and clustered covariances is the (chi-square) Wald
      statistic of the excluded instrument, not divided by anything (one
      instrument).

    Status codes (most severe first; the note lists every condition met):

    ``invalid_moments``
        non-finite sums or negative counts: everything NaN.
    ``empty_site`` / ``no_treated`` / ``no_controls``
        an arm is empty: contrasts, SEs and CACE NaN.
    ``arm_too_small``
        an arm has a single participant: point estimates only, SEs NaN.
    ``too_few_clusters``
        fewer than ``min_clusters_per_arm`` clusters in an arm (CR1 only):
        SEs, intervals and F NaN.
    ``zero_first_stage``
        equal uptake in both arms: CACE, its SE and interval NaN.
    ``negative_first_stage``
        estimated as usual, but flagged: evidence against monotonicity or of
        swapped arm labels.
    ``constant_outcome``
        no outcome variation within arms, so the ITT variance is zero: ITT
        SE (and the covariance with the first stage) NaN, and the CACE SE
        too when the CACE residuals vanish as well.
    ``deterministic_uptake``
        no uptake variation within arms (e.g. everyone offered took up and
        nobody else did): complier-share SE and F NaN (F would be infinite).

    Zero standard errors are reported as NaN because they give zero-width
    intervals, infinite test statistics and infinite inverse-variance
    weights; no array ever holds an infinity.

    References
    ----------
    .. [1] Wald, A. (1940). The fitting of straight lines if both variables are
       subject to error. Annals of Mathematical Statistics, 11(3), 284-300.
    .. [2] Angrist, J. D., Imbens, G. W. and Rubin, D. B. (1996).
       Identification of causal effects using instrumental variables. Journal
       of the American Statistical Association, 91(434), 444-455.
    .. [3] White, H. (1980). A heteroskedasticity-consistent covariance matrix
       estimator and a direct test for heteroskedasticity. Econometrica,
       48(4), 817-838.
    .. [4] MacKinnon, J. G. and White, H. (1985). Some heteroskedasticity-
       consistent covariance matrix estimators with improved finite sample
       properties. Journal of Econometrics, 29(3), 305-325.
    .. [5] Liang, K.-Y. and Zeger, S. L. (1986). Longitudinal data analysis
       using generalized linear models. Biometrika, 73(1), 13-22.
    .. [6] Cameron, A. C. and Miller, D. L. (2015). A practitioner's guide to
       cluster-robust inference. Journal of Human Resources, 50(2), 317-372.
    .. [7] Montiel Olea, J. L. and Pflueger, C. (2013). A robust test for weak
       instruments. Journal of Business & Economic Statistics, 31(3), 358-369.
    """
    if not (0.0 < level < 1.0):
        raise ValueError(f"level must be strictly between 0 and 1, got {level!r}")
    if int(min_clusters_per_arm) < 2:
        raise ValueError(f"min_clusters_per_arm must be at least 2, got {min_clusters_per_arm!r}")
    t, c = m.treated, m.control
    k = m.n_sites
    n1, n0 = t.n, c.n
    n = n1 + n0
    nan = np.nan

    finite = np.ones(k, dtype=bool)
    for arm in (t, c):
        for name in ("n", "sum_d", "sum_y", "sum_dd", "sum_yy", "sum_dy"):
            finite &= np.isfinite(getattr(arm, name))
    invalid = ~finite | (n1 < 0) | (n0 < 0)
    no_t = ~invalid & (n1 == 0)
    no_c = ~invalid & (n0 == 0)
    both_arms = ~invalid & (n1 > 0) & (n0 > 0)
    small = both_arms & ((n1 < 2) | (n0 < 2))

    with np.errstate(all="ignore"):
        ok1 = ~invalid & (n1 > 0)
        ok0 = ~invalid & (n0 > 0)
        d1 = np.where(ok1, t.sum_d / n1, nan)
        d0 = np.where(ok0, c.sum_d / n0, nan)
        y1 = np.where(ok1, t.sum_y / n1, nan)
        y0 = np.where(ok0, c.sum_y / n0, nan)
        pi = d1 - d0
        gamma = y1 - y0

        zero_fs = both_arms & (np.abs(pi) <= 8 * np.finfo(float).eps
                               * np.maximum(np.abs(d1), np.abs(d0)))
        pi = np.where(zero_fs, 0.0, pi)
        neg_fs = both_arms & ~zero_fs & (pi < 0)
        beta = np.where(both_arms & ~zero_fs, gamma / np.where(zero_fs, 1.0, pi), nan)

        # Within-arm centred sums (rounding noise below 1e-12 of the raw sum is 0).
        def centred(arm, a, b, ab, aa, bb):
            scale = np.sqrt(np.abs(getattr(arm, aa)) * np.abs(getattr(arm, bb)))
            return _centred(getattr(arm, ab), getattr(arm, a), getattr(arm, b), arm.n, scale)

        syy = [centred(a, "sum_y", "sum_y", "sum_yy", "sum_yy", "sum_yy") for a in (c, t)]
        sdd = [centred(a, "sum_d", "sum_d", "sum_dd", "sum_dd", "sum_dd") for a in (c, t)]
        sdy = [centred(a, "sum_d", "sum_y", "sum_dy", "sum_dd", "sum_yy") for a in (c, t)]
        syy = [np.maximum(v, 0.0) for v in syy]
        sdd = [np.maximum(v, 0.0) for v in sdd]

        # Raw scales used to decide that a variance is numerically zero.
        scale_g = t.sum_yy / n1**2 + c.sum_yy / n0**2
        scale_p = t.sum_dd / n1**2 + c.sum_dd / n0**2
        b2 = np.where(np.isfinite(beta), beta, 0.0) ** 2
        scale_b = ((t.sum_yy + b2 * t.sum_dd) / n1**2 + (c.sum_yy + b2 * c.sum_dd) / n0**2)

        if clusters is None:
            se_type = "HC1"
            factor = n / (n - 2.0)
            v_g = syy[1] / n1**2 + syy[0] / n0**2
            v_p = sdd[1] / n1**2 + sdd[0] / n0**2
            cov = sdy[1] / n1**2 + sdy[0] / n0**2
            bb = np.where(np.isfinite(beta), beta, 0.0)
            suu1 = np.maximum(syy[1] - 2 * bb * sdy[1] + bb**2 * sdd[1], 0.0)
            suu0 = np.maximum(syy[0] - 2 * bb * sdy[0] + bb**2 * sdd[0], 0.0)
            v_u = suu1 / n1**2 + suu0 / n0**2
            n_clusters = np.full(k, nan)
            few_clusters = np.zeros(k, dtype=bool)
        else:
            se_type = "CR1"
            s_yy, s_dd, s_yd, g, min_per_arm = _cluster_scores(m, clusters, (y0, y1), (d0, d1))
            factor = g / (g - 1.0) * (n - 1.0) / (n - 2.0)
            v_g, v_p, cov = s_yy, s_dd, s_yd
            bb = np.where(np.isfinite(beta), beta, 0.0)
            v_u = np.maximum(s_yy - 2 * bb * s_yd + bb**2 * s_dd, 0.0)
            n_clusters = np.where(invalid, nan, g)
            few_clusters = both_arms & ~small & (min_per_arm < int(min_clusters_per_arm))

        no_se = ~both_arms | small | few_clusters
        fin = _finish_variances(v_g, v_p, cov, v_u, factor=factor, pi=pi, defined=both_arms, no_se=no_se,
                                zero_fs=zero_fs, scales=(scale_g, scale_p, scale_b), n_clusters=n_clusters,
                                clustered=clusters is not None, level=level)
        v_g, v_p, cov, itt_se, fs_se, cace_se = fin.v_g, fin.v_p, fin.cov, fin.itt_se, fin.fs_se, fin.cace_se
        const_y, fixed_d, zero_vb, ci_df, crit, f = fin.const_y, fin.fixed_d, fin.zero_vb, fin.ci_df, fin.crit, fin.f
        ci_lo = beta - crit * cace_se
        ci_hi = beta + crit * cace_se

    flags = [
        (invalid, "invalid_moments", "moments are not finite or counts are negative: "
                                     "nothing can be estimated"),
        (no_t & no_c, "empty_site", "no participants in either arm: nothing can be estimated"),
        (no_t & ~no_c, "no_treated", "no participants in the treatment arm: ITT, complier "
                                     "share and CACE undefined"),
        (no_c & ~no_t, "no_controls", "no participants in the control arm: ITT, complier "
                                      "share and CACE undefined"),
        (small, "arm_too_small", "an arm has a single participant: standard errors undefined"),
        (few_clusters, "too_few_clusters", f"fewer than {int(min_clusters_per_arm)} clusters in an arm: "
                                           "cluster-robust standard errors, intervals and F not available"),
        (zero_fs, "zero_first_stage", "first stage is zero (equal uptake in both arms): "
                                      "CACE undefined"),
        (neg_fs, "negative_first_stage", "uptake is lower in the treatment arm than in "
                                         "control: evidence against monotonicity or of an "
                                         "assignment mix-up; CACE estimated but suspect"),
        (const_y, "constant_outcome", "ITT variance is zero (outcome does not vary within "
                                      "arms): ITT standard error reported as null"),
        (fixed_d, "deterministic_uptake", "uptake does not vary within arms: complier-share "
                                          "standard error is zero and the first-stage F is "
                                          "infinite, both reported as null"),
        (zero_vb, "zero_cace_variance", "CACE residuals vanish: CACE standard error is zero, "
                                        "reported as null"),
    ]
    status, note = status_and_note(flags, k)

    return WaldEstimates(
        uptake_treatment=_readonly(d1),
        uptake_control=_readonly(d0),
        complier_share=_readonly(pi),
        complier_share_se=_readonly(fs_se),
        always_taker_share=_readonly(d0),
        never_taker_share=_readonly(1.0 - d1),
        itt=_readonly(gamma),
        itt_se=_readonly(itt_se),
        cov_itt_fs=_readonly(cov),
        cace=_readonly(beta),
        cace_se=_readonly(cace_se),
        cace_ci_low=_readonly(ci_lo),
        cace_ci_high=_readonly(ci_hi),
        first_stage_f=_readonly(f),
        n_clusters=_readonly(n_clusters),
        itt_ci_low=_readonly(gamma - crit * itt_se),
        itt_ci_high=_readonly(gamma + crit * itt_se),
        complier_share_ci_low=_readonly(pi - crit * fs_se),
        complier_share_ci_high=_readonly(pi + crit * fs_se),
        ci_df=_readonly(ci_df),
        se_type=se_type,
        level=float(level),
        status=status,
        note=note,
    )
