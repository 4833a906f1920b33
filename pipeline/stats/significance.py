"""Significance tests behind the monitoring alerts, vectorised over sites.

* :func:`sample_ratio_test` -- are the arm counts of each site compatible
  with the designed allocation (sample-ratio mismatch)?
* :func:`two_proportion_z` -- pooled-variance z test of two uptake rates.
* :func:`two_proportion_difference_test` -- has the first stage
  (uptake_T - uptake_C) declined between earlier and recent cohorts?
* :func:`clustered_two_proportion_test`, :func:`clustered_first_stage_change`
  -- the same comparisons under cluster randomisation, on cluster totals with
  cluster-robust variances and a t(G - 2) reference.
* :func:`benjamini_hochberg` -- false-discovery-rate control across the
  many sites (and alerts) tested at once.

Every function takes arrays with one entry per site and returns a frozen
result whose leading fields unpack like a tuple, e.g.
``chi2, df, p = sample_ratio_test(counts, shares)``.  A statistic that is
undefined for a site is NaN there, with a reason in ``notes``.  The alarm
threshold applied to the p-values is left to the caller (for sample-ratio
checks, thresholds such as ``p < 0.0005`` or ``p < 0.001`` are used in
practice -- common practice, not a derived value).
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
from scipy import stats

from takeup.pipeline.stats.readonly import readonly_array

__all__ = [
    "SampleRatioResult",
    "TwoProportionResult",
    "FirstStageChangeResult",
    "BenjaminiHochbergResult",
    "ClusteredComparisonResult",
    "clustered_two_proportion_test",
    "clustered_first_stage_change",
    "sample_ratio_test",
    "two_proportion_z",
    "two_proportion_difference_test",
    "benjamini_hochberg",
]

_ALTERNATIVES = ("two-sided", "larger", "smaller")


def _readonly(arr) -> np.ndarray:
    return readonly_array(arr, dtype=None)


def _site_array(value, name: str) -> np.ndarray:
    arr = np.atleast_1d(np.asarray(value, dtype=float))
    if arr.ndim != 1:
        raise ValueError(f"{name} must be a scalar or 1-D (one entry per site)")
    return arr


def _check_counts(x: np.ndarray, n: np.ndarray, label: str) -> None:
    ok = np.isfinite(x) & np.isfinite(n)
    if np.any(n[ok] < 0) or np.any(x[ok] < 0) or np.any(x[ok] > n[ok]):
        raise ValueError(f"{label}: counts must satisfy 0 <= x <= n")


def _p_value(z: np.ndarray, alternative: str) -> np.ndarray:
    if alternative == "two-sided":
        return 2.0 * stats.norm.sf(np.abs(z))
    if alternative == "larger":
        return stats.norm.sf(z)
    return stats.norm.cdf(z)


# ----------------------------------------------------------------------------
# Sample-ratio mismatch
# ----------------------------------------------------------------------------


@dataclass(frozen=True)
class SampleRatioResult:
    """Pearson chi-square goodness of fit of arm counts, one entry per site.

    Unpacks as ``(chi2, df, p_value)``.

    Attributes
    ----------
    chi2 : ndarray
        Pearson statistic (NaN where undefined).
    df : ndarray of int
        Degrees of freedom, arms - 1.
    p_value : ndarray
        Upper-tail chi-square probability.
    expected : ndarray, shape (sites, arms)
        Expected counts under the design.
    notes : tuple of str
        ``""`` or why the site's test is undefined.
    """

    chi2: np.ndarray
    df: np.ndarray
    p_value: np.ndarray
    expected: np.ndarray
    notes: tuple[str, ...]

    def __iter__(self):
        return iter((self.chi2, self.df, self.p_value))


def sample_ratio_test(counts, design_shares) -> SampleRatioResult:
    """Test each site's arm counts against the designed allocation.

    Parameters
    ----------
    counts : array_like, shape (sites, arms)
        Participants assigned to each arm (a 1-D array is one site).
    design_shares : array_like, shape (arms,) or (sites, arms)
        Designed allocation; positive weights, normalised to sum to one per
        site (``[2, 1]`` means 2:1).

    Returns
    -------
    SampleRatioResult
        ``chi2 = sum((O - E)^2 / E)`` with ``E = N * share``, ``df = arms -
        1``, ``p = P(chi2_df >= chi2)``.  Sites with no participants or a
        missing count get NaN and a note.

    Raises
    ------
    ValueError
        For negative counts, non-positive shares, fewer than two arms or
        mismatched shapes.

    Notes
    -----
    The Pearson goodness-of-fit test on assignment counts is the standard
    sample-ratio-mismatch check of online experiments [1]_ [2]_; a mismatch
    points to broken randomisation, lost records or arm-dependent
    enrolment, all of which bias ITT.  The chi-square approximation needs
    expected counts that are not tiny (all ``E >= 5`` is the usual rule --
    common practice).

    References
    ----------
    .. [1] Fabijan, A., Gupchup, J., Gupta, S., Omhover, J., Qin, W.,
       Vermeer, L. and Dmitriev, P. (2019). Diagnosing sample ratio mismatch
       in online controlled experiments: a taxonomy and rules of thumb for
       practitioners. *KDD '19*, 2156-2164.
    .. [2] Pearson, K. (1900). On the criterion that a given system of
       deviations from the probable in the case of a correlated system of
       variables is such that it can be reasonably supposed to have arisen
       from random sampling. *Philosophical Magazine* 50(302), 157-175.
    """
    obs = np.asarray(counts, dtype=float)
    if obs.ndim == 1:
        obs = obs.reshape(1, -1)
    if obs.ndim != 2 or obs.shape[1] < 2:
        raise ValueError("counts must be 2-D (sites x arms) with at least two arms")
    if np.any(obs[np.isfinite(obs)] < 0):
        raise ValueError("counts must be non-negative")
    shares = np.asarray(design_shares, dtype=float)
    if shares.ndim == 1:
        shares = np.broadcast_to(shares, obs.shape)
    if shares.shape != obs.shape:
        raise ValueError(f"design_shares has shape {shares.shape}, counts {obs.shape}")
    if not np.all(np.isfinite(shares) & (shares > 0)):
        raise ValueError("design shares must be positive and finite")
    shares = shares / shares.sum(axis=1, keepdims=True)

    missing = ~np.all(np.isfinite(obs), axis=1)
    total = np.where(missing, 0.0, obs.sum(axis=1))
    ok = ~missing & (total > 0)
    expected = total[:, None] * shares
    with np.errstate(invalid="ignore", divide="ignore"):
        chi2 = np.where(ok, ((obs - expected) ** 2 / expected).sum(axis=1), np.nan)
    df = np.full(obs.shape[0], obs.shape[1] - 1, dtype=np.int64)
    p_value = np.where(ok, stats.chi2.sf(np.where(ok, chi2, 0.0), df), np.nan)
    notes = tuple(
        "" if good else ("a count is missing: sample-ratio test undefined" if miss
                         else "no participants: sample-ratio test undefined")
        for good, miss in zip(ok, missing)
    )
    return SampleRatioResult(
        chi2=_readonly(chi2),
        df=_readonly(df),
        p_value=_readonly(p_value),
        expected=_readonly(np.where(ok[:, None], expected, np.nan)),
        notes=notes,
    )


# ----------------------------------------------------------------------------
# Two proportions
# ----------------------------------------------------------------------------


@dataclass(frozen=True)
class TwoProportionResult:
    """Pooled two-proportion z test, one entry per site.

    Unpacks as ``(z, p_value)``.

    Attributes
    ----------
    z : ndarray
        ``(x1/n1 - x2/n2) / sqrt(p(1-p)(1/n1 + 1/n2))``, ``p`` pooled.
    p_value : ndarray
    difference : ndarray
        ``x1/n1 - x2/n2``.
    notes : tuple of str
    """

    z: np.ndarray
    p_value: np.ndarray
    difference: np.ndarray
    notes: tuple[str, ...]

    def __iter__(self):
        return iter((self.z, self.p_value))


def two_proportion_z(x1, n1, x2, n2, alternative: str = "two-sided") -> TwoProportionResult:
    """Pooled-variance z test of two independent proportions, per site.

    Parameters
    ----------
    x1, n1 : array_like
        Successes and trials of the first group (one entry per site).
    x2, n2 : array_like
        Same for the second group.
    alternative : {"two-sided", "larger", "smaller"}
        ``"larger"``: H1 ``p1 > p2``; ``"smaller"``: H1 ``p1 < p2``.

    Returns
    -------
    TwoProportionResult
        NaN with a note where a group has no trials or the pooled rate is 0
        or 1 (no variation, so the variance estimate is zero).

    Notes
    -----
    The variance uses the pooled rate ``p = (x1 + x2) / (n1 + n2)``, i.e. it
    is estimated under H0 ``p1 = p2``; this is the classical score-type
    test [1]_ and equals ``statsmodels.stats.proportion.proportions_ztest``
    with two samples.

    References
    ----------
    .. [1] Fleiss, J. L., Levin, B. and Paik, M. C. (2003). *Statistical
       Methods for Rates and Proportions*, 3rd ed. Wiley.
    """
    if alternative not in _ALTERNATIVES:
        raise ValueError(f"alternative must be one of {_ALTERNATIVES}")
    x1, n1, x2, n2 = np.broadcast_arrays(*(_site_array(v, name) for v, name in
                                           ((x1, "x1"), (n1, "n1"), (x2, "x2"), (n2, "n2"))))
    _check_counts(x1, n1, "group 1")
    _check_counts(x2, n2, "group 2")
    finite = np.isfinite(x1) & np.isfinite(n1) & np.isfinite(x2) & np.isfinite(n2)
    has_n = finite & (n1 > 0) & (n2 > 0)
    with np.errstate(invalid="ignore", divide="ignore"):
        pooled = (x1 + x2) / (n1 + n2)
        varies = has_n & (pooled > 0) & (pooled < 1)
        diff = np.where(has_n, x1 / n1 - x2 / n2, np.nan)
        se = np.sqrt(pooled * (1.0 - pooled) * (1.0 / n1 + 1.0 / n2))
        z = np.where(varies, diff / se, np.nan)
    p_value = np.where(varies, _p_value(np.where(varies, z, 0.0), alternative), np.nan)
    notes = tuple(
        "" if v else ("a count is missing: z test undefined" if not f
                      else "a group has no participants: z test undefined" if not h
                      else "pooled rate is 0 or 1 (no variation): z test undefined")
        for v, f, h in zip(varies, finite, has_n)
    )
    return TwoProportionResult(z=_readonly(z), p_value=_readonly(p_value),
                               difference=_readonly(diff), notes=notes)


@dataclass(frozen=True)
class FirstStageChangeResult:
    """Change of the first stage between earlier and recent cohorts, per site.

    Unpacks as ``(z, p_value)``.

    Attributes
    ----------
    z : ndarray
        ``(pi_early - pi_recent) / sqrt(V_early + V_recent)``; positive when
        the first stage has declined.
    p_value : ndarray
    first_stage_early, first_stage_recent : ndarray
        ``uptake_T - uptake_C`` in the earlier and the recent cohorts.
    se : ndarray
        ``sqrt(V_early + V_recent)``.
    notes : tuple of str
    """

    z: np.ndarray
    p_value: np.ndarray
    first_stage_early: np.ndarray
    first_stage_recent: np.ndarray
    se: np.ndarray
    notes: tuple[str, ...]

    def __iter__(self):
        return iter((self.z, self.p_value))


def two_proportion_difference_test(
    x_t_early, n_t_early, x_c_early, n_c_early,
    x_t_recent, n_t_recent, x_c_recent, n_c_recent,
    alternative: str = "decline", variance: str = "unpooled",
) -> FirstStageChangeResult:
    """Test whether the first stage declined from earlier to recent cohorts.

    Parameters
    ----------
    x_t_early, n_t_early, x_c_early, n_c_early : array_like
        Uptake counts and participants in the treatment (``t``) and control
        (``c``) arms of the earlier cohorts, one entry per site.
    x_t_recent, n_t_recent, x_c_recent, n_c_recent : array_like
        Same for the recent cohorts (disjoint participants).
    alternative : {"decline", "increase", "two-sided"}
        ``"decline"`` (default) tests H1 ``pi_recent < pi_early``.
    variance : {"unpooled", "pooled_by_arm"}
        ``"unpooled"`` (default): the Wald variance below.  ``"pooled_by_arm"``:
        each arm's rate pooled over the two cohort groups, as in the pooled
        two-proportion z test, i.e. the variance under "no change in either
        arm": ``V = p_T (1 - p_T) (1/n_T,early + 1/n_T,recent) + (same for C)``.
        It cannot collapse to zero when a small early cell is all 0 or all 1,
        which makes the Wald form reject far too often at small sites.

    Returns
    -------
    FirstStageChangeResult
        NaN with a note where a cohort-arm cell has no participants or the
        estimated variance is zero (every uptake rate 0 or 1).

    Notes
    -----
    With ``pi = uptake_T - uptake_C`` estimated in each cohort group, and
    the four cells independent,

        z = (pi_early - pi_recent) / sqrt(V_early + V_recent),
        V = p_T (1 - p_T) / n_T + p_C (1 - p_C) / n_C,

    a Wald test of the difference of two independent estimates [1]_ with
    unpooled (Wald) variances, since the null here (equal first stages)
    does not make the four rates equal.  It equals minus the t statistic of
    the assignment x recent interaction in a saturated linear probability
    model with HC0 standard errors.  One-sided p = ``P(N(0,1) >= z)``.

    References
    ----------
    .. [1] Altman, D. G. and Bland, J. M. (2003). Interaction revisited: the
       difference between two estimates. *BMJ* 326(7382), 219.
    """
    options = ("decline", "increase", "two-sided")
    if alternative not in options:
        raise ValueError(f"alternative must be one of {options}")
    if variance not in ("unpooled", "pooled_by_arm"):
        raise ValueError(f"variance must be 'unpooled' or 'pooled_by_arm', got {variance!r}")
    names = ("x_t_early", "n_t_early", "x_c_early", "n_c_early",
             "x_t_recent", "n_t_recent", "x_c_recent", "n_c_recent")
    arrays = np.broadcast_arrays(*(_site_array(v, nm) for v, nm in zip(
        (x_t_early, n_t_early, x_c_early, n_c_early,
         x_t_recent, n_t_recent, x_c_recent, n_c_recent), names)))
    xs, ns = arrays[0::2], arrays[1::2]
    for x, n, nm in zip(xs, ns, names[0::2]):
        _check_counts(x, n, nm)
    finite = np.all([np.isfinite(a) for a in arrays], axis=0)
    has_n = finite & np.all([n > 0 for n in ns], axis=0)
    with np.errstate(invalid="ignore", divide="ignore"):
        rates = [x / n for x, n in zip(xs, ns)]
        var = [r * (1.0 - r) / n for r, n in zip(rates, ns)]
        pi_early = np.where(has_n, rates[0] - rates[1], np.nan)
        pi_recent = np.where(has_n, rates[2] - rates[3], np.nan)
        total_var = np.where(has_n, var[0] + var[1] + var[2] + var[3], np.nan)
        if variance == "pooled_by_arm":
            p_t = (xs[0] + xs[2]) / (ns[0] + ns[2])
            p_c = (xs[1] + xs[3]) / (ns[1] + ns[3])
            total_var = np.where(has_n, p_t * (1.0 - p_t) * (1.0 / ns[0] + 1.0 / ns[2])
                                 + p_c * (1.0 - p_c) * (1.0 / ns[1] + 1.0 / ns[3]), np.nan)
        ok = has_n & (total_var > 0)
        se = np.where(ok, np.sqrt(total_var), np.nan)
        z = np.where(ok, (pi_early - pi_recent) / se, np.nan)
    zz = np.where(ok, z, 0.0)
    if alternative == "decline":
        p = stats.norm.sf(zz)
    elif alternative == "increase":
        p = stats.norm.cdf(zz)
    else:
        p = 2.0 * stats.norm.sf(np.abs(zz))
    p_value = np.where(ok, p, np.nan)
    notes = tuple(
        "" if good else ("a count is missing: first-stage change undefined" if not f
                         else "a cohort-arm cell has no participants: first-stage change undefined"
                         if not h else
                         "every uptake rate is 0 or 1 (zero variance): first-stage change undefined")
        for good, f, h in zip(ok, finite, has_n)
    )
    return FirstStageChangeResult(
        z=_readonly(z), p_value=_readonly(p_value),
        first_stage_early=_readonly(pi_early), first_stage_recent=_readonly(pi_recent),
        se=_readonly(se), notes=notes,
    )


# ----------------------------------------------------------------------------
# Cluster randomisation: tests on cluster-level totals
# ----------------------------------------------------------------------------


@dataclass(frozen=True)
class ClusteredComparisonResult:
    """Arm comparison with cluster-robust variances, one entry per site.

    Unpacks as ``(t, p_value)``.

    Attributes
    ----------
    t : ndarray
        Estimate over its cluster-robust standard error.
    p_value : ndarray
        From the t distribution with ``df`` degrees of freedom.
    estimate, se : ndarray
        The contrast and its standard error.
    df : ndarray
        Clusters of the site minus 2 (two arm means estimated).
    n_clusters : ndarray
        Clusters with participants in the comparison.
    notes : tuple of str
    """

    t: np.ndarray
    p_value: np.ndarray
    estimate: np.ndarray
    se: np.ndarray
    df: np.ndarray
    n_clusters: np.ndarray
    notes: tuple[str, ...]

    def __iter__(self):
        return iter((self.t, self.p_value))


def _cells(site_index, cluster_index, n_sites: int, *arrays):
    si = np.asarray(site_index, dtype=np.int64)
    ci = np.asarray(cluster_index, dtype=np.int64)
    arrs = [np.asarray(a, dtype=float) for a in arrays]
    if any(a.shape != si.shape for a in arrs) or ci.shape != si.shape:
        raise ValueError("cell arrays must have the same length")
    if si.size and (si.min() < 0 or si.max() >= n_sites):
        raise ValueError("site_index refers to a site outside 0 .. n_sites - 1")
    return si, ci, arrs


def _finish(est, var, g, ok, alternative, why_not) -> ClusteredComparisonResult:
    df = g - 2.0
    ok = ok & (df >= 1) & np.isfinite(var) & (var > 0)
    with np.errstate(invalid="ignore", divide="ignore"):
        se = np.where(ok, np.sqrt(np.where(ok, var, 1.0)), np.nan)
        t = np.where(ok, est / np.where(ok, se, 1.0), np.nan)
    dfa = np.where(ok, df, 1.0)
    tt = np.where(ok, t, 0.0)
    if alternative == "two-sided":
        p = 2.0 * stats.t.sf(np.abs(tt), dfa)
    elif alternative == "larger":
        p = stats.t.sf(tt, dfa)
    else:
        p = stats.t.cdf(tt, dfa)
    notes = tuple("" if good else why_not for good in ok)
    return ClusteredComparisonResult(t=_readonly(t), p_value=_readonly(np.where(ok, p, np.nan)),
                                     estimate=_readonly(np.where(ok, est, np.nan)), se=_readonly(se),
                                     df=_readonly(np.where(ok, df, np.nan)), n_clusters=_readonly(g),
                                     notes=notes)


def clustered_two_proportion_test(site_index, cluster_index, z, x, n, n_sites: int,
                                  alternative: str = "two-sided") -> ClusteredComparisonResult:
    """Difference of a proportion between arms under cluster randomisation, per site.

    Parameters
    ----------
    site_index, cluster_index : array_like of int
        Site (0 .. ``n_sites`` - 1) and cluster of each cell (one cell per
        site x cluster x arm).
    z : array_like
        Arm of the cell (1 treatment, 0 control).
    x, n : array_like
        Events and participants of the cell.
    n_sites : int
    alternative : {"two-sided", "larger", "smaller"}
        ``"larger"``: H1 treatment share above control.

    Returns
    -------
    ClusteredComparisonResult
        ``estimate = p_1 - p_0`` (ratio estimators ``sum x / sum n`` per arm).

    Notes
    -----
    With clusters randomised, participants of one cluster are not independent, so
    the binomial variance understates the uncertainty.  Each arm's share is a ratio
    of cluster totals; the contrast's score per cluster is
    ``s_g = sign_z (x_g - p_z n_g) / N_z`` (the linearisation of a ratio estimator),
    and its CR1 variance ``V = G/(G-1) (N-1)/(N-2) sum_g s_g^2`` is exactly that of
    the slope of the event indicator on (1, Z) with cluster-robust standard errors
    (statsmodels ``OLS(...).fit(cov_type="cluster")``, [1]_).
    ``t = (p_1 - p_0) / sqrt(V)`` is referred to t with ``G - 2`` degrees of
    freedom (``G`` clusters in the site, two arm means estimated), the small-sample
    reference of cluster-level analyses [2]_.  A cluster spanning both arms
    contributes a cell to each.

    References
    ----------
    .. [1] Cameron, A. C. and Miller, D. L. (2015). A practitioner's guide to
       cluster-robust inference. *Journal of Human Resources* 50(2), 317-372.
    .. [2] Hayes, R. J. and Moulton, L. H. (2017). *Cluster Randomised Trials*,
       2nd ed. CRC Press (cited from memory).
    """
    if alternative not in _ALTERNATIVES:
        raise ValueError(f"alternative must be one of {_ALTERNATIVES}")
    si, ci, (zz, xx, nn) = _cells(site_index, cluster_index, n_sites, z, x, n)
    if np.any(nn < 0) or np.any(xx < 0) or np.any(xx > nn):
        raise ValueError("cells: counts must satisfy 0 <= x <= n")
    keep = nn > 0
    si, ci, zz, xx, nn = si[keep], ci[keep], zz[keep], xx[keep], nn[keep]
    est = np.zeros(n_sites)
    score = np.zeros(si.shape)
    total = np.zeros(n_sites)
    ok = np.ones(n_sites, dtype=bool)
    for arm, sign in ((1.0, 1.0), (0.0, -1.0)):
        sel = zz == arm
        tot_x = np.bincount(si[sel], weights=xx[sel], minlength=n_sites)
        tot_n = np.bincount(si[sel], weights=nn[sel], minlength=n_sites)
        g_arm = np.bincount(si[sel], minlength=n_sites)
        with np.errstate(invalid="ignore", divide="ignore"):
            p = np.where(tot_n > 0, tot_x / np.where(tot_n > 0, tot_n, 1.0), np.nan)
            score[sel] = sign * (xx[sel] - np.nan_to_num(p)[si[sel]] * nn[sel]) / np.where(tot_n > 0, tot_n, 1.0)[si[sel]]
        est += sign * p
        total += tot_n
        ok &= g_arm >= 2
    g, ss = _cluster_sum_of_squares(si, ci, score, n_sites)
    with np.errstate(invalid="ignore", divide="ignore"):
        var = np.where((g >= 2) & (total > 2), g / np.maximum(g - 1.0, 1.0) * (total - 1.0)
                       / np.maximum(total - 2.0, 1.0) * ss, np.nan)
    return _finish(est, var, g, ok, alternative,
                   "fewer than 2 clusters in an arm, fewer than 3 in all, or no variation: test undefined")


def _cluster_sum_of_squares(si, ci, score, n_sites):
    """Clusters per site and the per-site sum over clusters of the squared cluster score."""
    if not si.size:
        return np.zeros(n_sites), np.zeros(n_sites)
    u, inv = np.unique(np.stack([si, ci], axis=1), axis=0, return_inverse=True)
    inv = inv.reshape(-1)
    s_g = np.bincount(inv, weights=score, minlength=len(u))
    g = np.bincount(u[:, 0], minlength=n_sites).astype(float)
    ss = np.bincount(u[:, 0], weights=s_g ** 2, minlength=n_sites)
    return g, ss


def clustered_first_stage_change(site_index, cluster_index, z, recent, x, n, n_sites: int
                                 ) -> ClusteredComparisonResult:
    """Decline of the first stage from earlier to recent cohorts under cluster randomisation.

    Parameters
    ----------
    site_index, cluster_index, z : array_like
        Site, cluster and arm of each cell (one cell per site x cluster x arm x window).
    recent : array_like of bool
        Whether the cell belongs to the recent cohorts.
    x, n : array_like
        Participants reported as taken up, and participants with a report.
    n_sites : int

    Returns
    -------
    ClusteredComparisonResult
        ``estimate = pi_early - pi_recent`` (positive: decline), one-sided
        p-value for a decline.

    Notes
    -----
    The contrast is a combination of four ratio estimators (uptake in each arm and
    window) that share clusters across windows: a cluster assigned once contributes
    to both its arm's early and recent cohorts.  Its linearised score per cluster,

        s_g = sign_z [ (x_ge - p_ze n_ge) / N_ze - (x_gr - p_zr n_gr) / N_zr ],

    (``sign`` +1 treated, -1 control) is summed within the cluster before squaring,
    so the within-cluster correlation between windows is kept; ``V = G/(G-1)
    (N-1)/(N-4) sum s_g^2``, the CR1 variance of the arm x window interaction in the
    saturated linear probability model of uptake on (1, Z, R, Z R), and the
    reference is t with ``G - 2`` degrees of freedom, as in
    :func:`clustered_two_proportion_test`.

    References
    ----------
    .. [1] Cameron, A. C. and Miller, D. L. (2015). A practitioner's guide to
       cluster-robust inference. *Journal of Human Resources* 50(2), 317-372.
    """
    si, ci, (zz, rr, xx, nn) = _cells(site_index, cluster_index, n_sites, z, recent, x, n)
    if np.any(nn < 0) or np.any(xx < 0) or np.any(xx > nn):
        raise ValueError("cells: counts must satisfy 0 <= x <= n")
    keep = nn > 0
    si, ci, zz, rr, xx, nn = si[keep], ci[keep], zz[keep], rr[keep] > 0, xx[keep], nn[keep]
    est = np.zeros(n_sites)
    score = np.zeros(si.shape)
    ok = np.ones(n_sites, dtype=bool)
    for arm, sign in ((1.0, 1.0), (0.0, -1.0)):
        for win, wsign in ((False, 1.0), (True, -1.0)):
            sel = (zz == arm) & (rr == win)
            tot_x = np.bincount(si[sel], weights=xx[sel], minlength=n_sites)
            tot_n = np.bincount(si[sel], weights=nn[sel], minlength=n_sites)
            with np.errstate(invalid="ignore", divide="ignore"):
                p = np.where(tot_n > 0, tot_x / np.where(tot_n > 0, tot_n, 1.0), np.nan)
                score[sel] = sign * wsign * (xx[sel] - np.nan_to_num(p)[si[sel]] * nn[sel]) / \
                    np.where(tot_n > 0, tot_n, 1.0)[si[sel]]
            est += sign * wsign * p
            ok &= tot_n > 0
    g, ss = _cluster_sum_of_squares(si, ci, score, n_sites)
    total = np.bincount(si, weights=nn, minlength=n_sites)
    with np.errstate(invalid="ignore", divide="ignore"):
        var = np.where((g >= 2) & (total > 4), g / np.maximum(g - 1.0, 1.0) * (total - 1.0)
                       / np.maximum(total - 4.0, 1.0) * ss, np.nan)
    return _finish(est, var, g, ok, "larger",
                   "a cohort-arm cell has no reports, fewer than 3 clusters, or no variation: test undefined")


# ----------------------------------------------------------------------------
# Multiplicity
# ----------------------------------------------------------------------------


@dataclass(frozen=True)
class BenjaminiHochbergResult:
    """Benjamini-Hochberg step-up procedure.

    Unpacks as ``(reject, p_adjusted)``.

    Attributes
    ----------
    reject : ndarray of bool
        Same shape as the input; ``False`` for NaN p-values.
    p_adjusted : ndarray
        BH-adjusted p-values (NaN for NaN inputs).
    n_tests : int
        ``m``, the number of non-NaN p-values.
    q : float
        FDR level used.
    """

    reject: np.ndarray
    p_adjusted: np.ndarray
    n_tests: int
    q: float

    def __iter__(self):
        return iter((self.reject, self.p_adjusted))


def benjamini_hochberg(p, q: float = 0.05) -> BenjaminiHochbergResult:
    """Benjamini-Hochberg false-discovery-rate control.

    Parameters
    ----------
    p : array_like
        p-values of any shape, treated as one family.  NaN entries (tests
        that could not be done) are ignored: they do not count in ``m`` and
        come back not rejected with NaN adjusted value.
    q : float, default 0.05
        FDR level in (0, 1).

    Returns
    -------
    BenjaminiHochbergResult

    Notes
    -----
    With the ``m`` p-values sorted, ``p_(1) <= ... <= p_(m)``, reject the
    hypotheses of ``p_(1) .. p_(k)`` for the largest ``k`` with
    ``p_(k) <= k q / m`` [1]_.  Adjusted values are
    ``min(1, min_{j >= i} m p_(j) / j)``, so that ``p_adj <= q`` reproduces
    the rejections.  FDR control holds for independent or positively
    dependent tests.

    References
    ----------
    .. [1] Benjamini, Y. and Hochberg, Y. (1995). Controlling the false
       discovery rate: a practical and powerful approach to multiple
       testing. *Journal of the Royal Statistical Society B* 57(1),
       289-300.
    """
    q = float(q)
    if not (np.isfinite(q) and 0.0 < q < 1.0):
        raise ValueError("q must be in (0, 1)")
    arr = np.asarray(p, dtype=float)
    flat = arr.reshape(-1)
    valid = ~np.isnan(flat)
    pv = flat[valid]
    if np.any((pv < 0) | (pv > 1)):
        raise ValueError("p-values must lie in [0, 1]")
    m = pv.size
    reject = np.zeros(flat.shape, dtype=bool)
    adjusted = np.full(flat.shape, np.nan)
    if m:
        order = np.argsort(pv, kind="stable")
        ranked = pv[order]
        rank = np.arange(1, m + 1)
        below = ranked <= rank * q / m
        k = int(rank[below].max()) if below.any() else 0
        rej_valid = np.zeros(m, dtype=bool)
        rej_valid[order[:k]] = True
        adj_sorted = np.minimum(np.minimum.accumulate((ranked * m / rank)[::-1])[::-1], 1.0)
        adj_valid = np.empty(m)
        adj_valid[order] = adj_sorted
        idx = np.flatnonzero(valid)
        reject[idx] = rej_valid
        adjusted[idx] = adj_valid
    return BenjaminiHochbergResult(
        reject=_readonly(reject.reshape(arr.shape)),
        p_adjusted=_readonly(adjusted.reshape(arr.shape)),
        n_tests=int(m),
        q=q,
    )
