"""Per-site influence diagnostics for a random-effects meta-analysis.

:func:`site_influence` refits the pooled model without each site in turn
(leave-one-out), forms externally standardised residuals from those fits,
and computes empirical-Bayes (BLUP) site effects shrunk toward the pooled
estimate.  :func:`empirical_bayes` does the shrinkage alone, for callers that
already hold a :class:`~takeup.pipeline.stats.meta_analysis.meta.MetaResult`.
:func:`outlier_test` turns the leave-one-out quantities into a two-sided p-value
and a reference range per site (the ``outlier_site`` alert).
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from takeup.pipeline.stats.meta_analysis.leave_one_out import leave_one_out_fits
from takeup.pipeline.stats.meta_analysis.meta import MetaResult, clean_inputs, combine
from takeup.pipeline.stats.readonly import readonly_array as _readonly

__all__ = ["InfluenceResult", "site_influence", "empirical_bayes", "OutlierTest", "outlier_test"]


@dataclass(frozen=True)
class InfluenceResult:
    """Per-site influence diagnostics (read-only arrays, one entry per input site).

    Sites dropped from the analysis (invalid effect or variance) are NaN in
    every array.

    Attributes
    ----------
    method : str
        tau2 estimator used for the full and the leave-one-out fits.
    pooled : MetaResult
        Fit on all usable sites.
    loo_estimate, loo_se, loo_tau2 : ndarray
        Pooled estimate, its (z-based) SE and tau2 with the site left out.
    std_residual : ndarray
        Externally standardised (studentised deleted) residual
        ``(y_i - mu_(-i)) / sqrt(v_i + tau2_(-i) + se_(-i)²)``.
    eb_estimate, eb_se : ndarray
        Empirical-Bayes (BLUP) estimate of each site's true effect and its
        SE, which includes the uncertainty of the pooled estimate.
    note : str
        Reasons for NaN entries; ``""`` when there is nothing to report.
    """

    method: str
    pooled: MetaResult
    loo_estimate: np.ndarray
    loo_se: np.ndarray
    loo_tau2: np.ndarray
    std_residual: np.ndarray
    eb_estimate: np.ndarray
    eb_se: np.ndarray
    note: str


def empirical_bayes(effects, variances, pooled: MetaResult) -> tuple[np.ndarray, np.ndarray]:
    """Empirical-Bayes (BLUP) site effects given a pooled fit.

    Parameters
    ----------
    effects, variances : array_like
        Per-site effects and sampling variances (any invalid entries give NaN).
    pooled : MetaResult
        Result of :func:`~takeup.pipeline.stats.meta_analysis.meta.combine` on the same sites.

    Returns
    -------
    eb_estimate, eb_se : ndarray
        ``mu + B_i (y_i - mu)`` with ``B_i = tau2 / (tau2 + v_i)``, and
        ``sqrt(B_i v_i + (1 - B_i)² se(mu)²)``: the conditional posterior
        variance ``B_i v_i`` plus the contribution of estimating ``mu`` (the
        cross term vanishes for the GLS ``mu``).  The uncertainty in ``tau2``
        itself is not propagated.  Entries are NaN where ``tau2`` or ``mu``
        is undefined or the input is invalid.

    References
    ----------
    Raudenbush, S. W. and Bryk, A. S. (2002). Hierarchical Linear Models,
    2nd ed., Sage, ch. 3 (empirical Bayes estimates and their variance).
    Robinson, G. K. (1991). That BLUP is a good thing: the estimation of
    random effects. Statistical Science, 6, 15-32.
    """
    y = np.atleast_1d(np.asarray(effects, dtype=float))
    v = np.atleast_1d(np.asarray(variances, dtype=float))
    with np.errstate(all="ignore"):
        ok = np.isfinite(y) & np.isfinite(v) & (v > 0)
        tau2, mu, se = pooled.tau2, pooled.estimate, pooled.se
        b = np.where(ok, tau2 / (tau2 + np.where(ok, v, 1.0)), np.nan)
        est = mu + b * (y - mu)
        var = b * v + (1.0 - b) ** 2 * se**2
        est = np.where(ok, est, np.nan)
        eb_se = np.where(ok, np.sqrt(var), np.nan)
    return _readonly(est), _readonly(eb_se)


def site_influence(effects, variances, method: str = "reml") -> InfluenceResult:
    """Leave-one-out fits, standardised residuals and empirical-Bayes estimates.

    Parameters
    ----------
    effects, variances : array_like
        One effect and its sampling variance per site.
    method : {"reml", "dl", "pm", "fixed"}
        tau2 estimator, as in :func:`~takeup.pipeline.stats.meta_analysis.meta.combine`.

    Returns
    -------
    InfluenceResult

    Notes
    -----
    The residual is the *externally* standardised one, the "studentized
    deleted residual" of Viechtbauer & Cheung (2010): site ``i`` is compared
    with the fit that excludes it, so an outlier cannot mask itself by
    inflating tau2 and pulling mu toward it.  Under the model it is
    approximately standard normal.

    The leave-one-out fits run side by side
    (:func:`~takeup.pipeline.stats.meta_analysis.leave_one_out.leave_one_out_fits`: sums minus
    the left-out term for ``fixed`` and ``dl``, one vectorised Newton iteration over all subsets
    for ``reml``, a loop for ``pm``).  With two
    usable sites the leave-one-out fits contain one site, so for
    random-effects methods ``loo_tau2`` and ``std_residual`` are NaN.

    References
    ----------
    Viechtbauer, W. and Cheung, M. W.-L. (2010). Outlier and influence
    diagnostics for meta-analysis. Research Synthesis Methods, 1, 112-125.
    Raudenbush, S. W. and Bryk, A. S. (2002). Hierarchical Linear Models,
    2nd ed., Sage, ch. 3.
    """
    pooled = combine(effects, variances, method=method)
    method = pooled.method
    y_ok, v_ok, keep, _ = clean_inputs(effects, variances)
    notes: list[str] = []
    n_all = keep.size
    k = int(y_ok.size)
    idx = np.flatnonzero(keep)

    loo_est = np.full(n_all, np.nan)
    loo_se = np.full(n_all, np.nan)
    loo_tau2 = np.full(n_all, np.nan)
    loo_converged = True
    if k >= 2:
        est, se, tau2, loo_converged = leave_one_out_fits(y_ok, v_ok, method)
        loo_est[idx], loo_se[idx], loo_tau2[idx] = est, se, tau2
        if not loo_converged:
            notes.append("some leave-one-out tau2 fits did not converge")
        if k == 2 and method != "fixed":
            notes.append("two sites: leave-one-out fits have one site, tau2 and "
                         "standardised residuals undefined")
    else:
        notes.append(f"{k} usable site(s): leave-one-out diagnostics need at least 2")

    y_all = np.atleast_1d(np.asarray(effects, dtype=float))
    v_all = np.atleast_1d(np.asarray(variances, dtype=float))
    with np.errstate(all="ignore"):
        denom = np.where(keep, v_all, np.nan) + loo_tau2 + loo_se**2
        std_res = np.where(denom > 0, (y_all - loo_est) / np.sqrt(denom), np.nan)

    eb_est, eb_se = empirical_bayes(effects, variances, pooled)
    if np.isnan(pooled.tau2):
        notes.append("empirical-Bayes estimates undefined: tau2 not estimable")
    if pooled.note:
        notes.append(f"pooled fit: {pooled.note}")
    return InfluenceResult(
        method=method, pooled=pooled,
        loo_estimate=_readonly(loo_est), loo_se=_readonly(loo_se), loo_tau2=_readonly(loo_tau2),
        std_residual=_readonly(std_res), eb_estimate=eb_est, eb_se=eb_se,
        note="; ".join(notes),
    )


@dataclass(frozen=True)
class OutlierTest:
    """Per-site test of "this site's estimate is consistent with the other sites".

    Attributes
    ----------
    std_residual : ndarray
        Externally standardised residual (as in :class:`InfluenceResult`).
    p_value : ndarray
        Two-sided p-value ``2 * (1 - Phi(|r|))`` of the residual (NaN where
        the residual is undefined).
    ref_low, ref_high : ndarray
        Range in which the site's *estimate* is expected at ``level`` given
        the other sites: ``mu_(-i) -/+ z * sqrt(v_i + tau2_(-i) + se_(-i)²)``.
        It contains the estimate exactly when the raw p-value is above
        ``1 - level``.
    level : float
        Coverage of the reference range.
    """

    std_residual: np.ndarray
    p_value: np.ndarray
    ref_low: np.ndarray
    ref_high: np.ndarray
    level: float


def outlier_test(effects, variances, loo_estimate, loo_se, loo_tau2, level: float = 0.95) -> OutlierTest:
    """Two-sided test of each site against the fit without it (vectorised over sites).

    Parameters
    ----------
    effects, variances : array_like
        Site estimates ``y_i`` and their sampling variances ``v_i``.
    loo_estimate, loo_se, loo_tau2 : array_like
        Leave-one-out pooled estimate, its SE and tau2 (from
        :func:`site_influence` or the ``site_influence`` table).
    level : float
        Coverage of the reference range (the p-values do not depend on it).

    Returns
    -------
    OutlierTest

    Notes
    -----
    Under the random-effects model, the estimate of a new site is
    ``y_i ~ N(mu, tau2 + v_i)``; with ``mu`` and ``tau2`` estimated from the
    other ``k - 1`` sites, ``y_i - mu_(-i)`` has variance
    ``v_i + tau2 + Var(mu_(-i))``, so the externally standardised residual
    ``r_i = (y_i - mu_(-i)) / sqrt(v_i + tau2_(-i) + se_(-i)²)`` is
    approximately standard normal (Viechtbauer & Cheung 2010, section 3.2).
    The site's own sampling error ``v_i`` is part of the denominator: this is
    what separates an outlying *estimate* from a prediction interval, which
    describes the spread of true effects only.  The normal reference
    ignores the uncertainty of ``tau2_(-i)``; with few sites it is slightly
    liberal, with REML's truncation at zero it is slightly conservative.

    References
    ----------
    Viechtbauer, W. and Cheung, M. W.-L. (2010). Outlier and influence
    diagnostics for meta-analysis. Research Synthesis Methods, 1(2), 112-125.
    """
    from scipy import stats

    y = np.atleast_1d(np.asarray(effects, dtype=float))
    v = np.atleast_1d(np.asarray(variances, dtype=float))
    mu = np.atleast_1d(np.asarray(loo_estimate, dtype=float))
    se = np.atleast_1d(np.asarray(loo_se, dtype=float))
    t2 = np.atleast_1d(np.asarray(loo_tau2, dtype=float))
    with np.errstate(all="ignore"):
        denom = v + t2 + se**2
        ok = np.isfinite(y) & np.isfinite(denom) & (denom > 0) & np.isfinite(mu)
        sd = np.where(ok, np.sqrt(np.where(ok, denom, 1.0)), np.nan)
        r = np.where(ok, (y - mu) / sd, np.nan)
        p = np.where(ok, 2.0 * stats.norm.sf(np.abs(r)), np.nan)
        z = float(stats.norm.ppf(0.5 + level / 2.0))
        lo = np.where(ok, mu - z * sd, np.nan)
        hi = np.where(ok, mu + z * sd, np.nan)
    return OutlierTest(std_residual=_readonly(r), p_value=_readonly(p), ref_low=_readonly(lo),
                       ref_high=_readonly(hi), level=float(level))
