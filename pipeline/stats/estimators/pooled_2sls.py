"""Pooled 2SLS across sites, computed from per-site arm moments.

Model (participant ``i`` in site ``s``)::

    Y_i = alpha_s + beta * D_i + u_i

with site intercepts ``alpha_s`` as exogenous regressors and one common
complier effect ``beta``.  The instruments are the site dummies and the
site-interacted assignment ``Z * 1[site = s]``, so every site has its own
first stage.  These instruments span exactly the site x arm cell dummies, so
the fitted first stage of ``D`` is the cell mean of ``D`` and everything the
estimator needs -- the estimate, its heteroskedasticity-robust variance and
the overidentification test -- is a function of the per-cell sums held in
:class:`~takeup.pipeline.stats.estimators.moments.SiteMoments`.  No participant rows are
touched.

Per site, with ``n1``/``n0`` the arm sizes, ``pi_s`` the first stage
(difference in mean uptake), ``gamma_s`` the ITT (difference in mean
outcome) and ``w_s = n1 * n0 / (n1 + n0)``::

    beta = sum_s w_s pi_s gamma_s / sum_s w_s pi_s**2

i.e. a precision-type weighted average of the site Wald estimates
``gamma_s / pi_s`` with weights ``w_s pi_s**2``.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
from scipy import stats

from takeup.pipeline.stats.estimators.moments import SiteMoments

__all__ = ["Pooled2SLS", "pooled_2sls"]

# A first stage counts as zero when it is this small relative to the larger
# of the two arm means of D (exact zero in exact arithmetic; the factor only
# absorbs rounding of sums / counts).
_ZERO_FIRST_STAGE_RTOL = 1e-12
# A cell residual sum of squares counts as zero below this fraction of the
# raw sums of squares it is computed from (~4500 machine epsilons).
_RSS_RTOL = 1e-12


@dataclass(frozen=True)
class Pooled2SLS:
    """Pooled 2SLS complier effect across sites (read-only).

    Attributes
    ----------
    estimate : float
        2SLS estimate of the common complier effect ``beta``; NaN if no site
        can be used.
    se : float
        HC1 heteroskedasticity-robust standard error: the HC0 sandwich
        times the small-sample factor ``n / (n - k)`` with ``k`` = number of
        sites used + 1 (site intercepts and ``beta``).  NaN if ``n <= k``.
    ci_low, ci_high : float
        ``estimate -/+ t_{n-k, (1+level)/2} * se``.
    j_stat : float
        Hansen's J statistic of the overidentifying restrictions (equal
        complier effects in all sites used), from two-step efficient GMM with
        a heteroskedasticity-robust weight matrix (see :func:`pooled_2sls`).
        NaN when it is undefined (fewer than two sites, or a singular moment
        covariance).
    j_df : int
        Degrees of freedom of J: number of sites used - 1 (0 if fewer than
        two sites are used).
    j_pvalue : float
        Upper-tail chi-square(``j_df``) p-value of ``j_stat``; NaN with it.
    n_sites_used : int
        Sites that entered the estimate.
    n : int
        Participants in the sites used.
    note : str
        Human-readable reasons for dropped sites and undefined statistics;
        empty when there is nothing to report.
    site_used : ndarray of bool
        One entry per site of the input moments: True if the site entered
        the estimate.
    """

    estimate: float
    se: float
    ci_low: float
    ci_high: float
    j_stat: float
    j_df: int
    j_pvalue: float
    n_sites_used: int
    n: int
    note: str
    site_used: np.ndarray

    def __post_init__(self) -> None:
        used = np.asarray(self.site_used, dtype=bool).copy()
        used.setflags(write=False)
        object.__setattr__(self, "site_used", used)


def _site_usability(n1, n0, d1, d0, finite):
    """Boolean mask of usable sites, and a note for each kind of drop."""
    empty_arm = (n1 <= 0) | (n0 <= 0)
    with np.errstate(invalid="ignore"):
        scale = np.maximum(np.abs(d1), np.abs(d0))
        zero_fs = ~empty_arm & finite & (np.abs(d1 - d0) <= _ZERO_FIRST_STAGE_RTOL * scale)
    bad = ~empty_arm & ~finite
    reasons = []
    for mask, text in ((empty_arm, "one arm empty"),
                       (bad, "non-finite moments"),
                       (zero_fs, "zero first stage, CACE undefined")):
        if mask.any():
            reasons.append(f"dropped {int(mask.sum())} site(s) at positions "
                           f"{np.flatnonzero(mask).tolist()} ({text})")
    return ~(empty_arm | bad | zero_fs), reasons


def pooled_2sls(m: SiteMoments, level: float = 0.95) -> Pooled2SLS:
    r"""Pooled 2SLS with site-specific first stages, and Hansen's J test.

    Parameters
    ----------
    m : SiteMoments
        Per-site sums of both arms (not modified).
    level : float, optional
        Confidence level of the interval, in (0, 1).  Default 0.95.

    Returns
    -------
    Pooled2SLS

    Notes
    -----
    **Sites used.**  A site is dropped (and named in ``note``) when one of its
    arms is empty, its moments are not finite, or its first stage
    :math:`\pi_s = \bar D_{s1} - \bar D_{s0}` is zero: such a site carries
    no information about :math:`\beta` and its instrument would only add a
    degree of freedom to J without a testable restriction.

    **Estimate.**  With the site intercepts partialled out, the fitted
    first stage of participant :math:`i` in cell :math:`(s, z)` is
    :math:`\tilde x_{s1} = (n_{s0}/n_s)\pi_s`,
    :math:`\tilde x_{s0} = -(n_{s1}/n_s)\pi_s`, which gives
    :math:`\hat\beta = \sum_s w_s\pi_s\gamma_s / \sum_s w_s\pi_s^2`,
    :math:`w_s = n_{s1}n_{s0}/n_s`, and
    :math:`\hat\alpha_s = \bar Y_s - \hat\beta\bar D_s`.

    **Standard error.**  With :math:`R_{sz} = \sum_{i\in(s,z)} \hat u_i^2`
    the residual sum of squares of a cell (from the sums of
    :math:`Y, D, Y^2, D^2, DY`), the robust sandwich is
    :math:`\sum_{s,z}\tilde x_{sz}^2 R_{sz} / (\sum_s w_s\pi_s^2)^2`
    (HC0), multiplied by :math:`n/(n-k)`, :math:`k = S + 1` (HC1; the
    ``debiased=True`` robust covariance of ``linearmodels.IV2SLS``).  The
    interval uses the :math:`t_{n-k}` quantile, as that estimator does.

    **Overidentification test.**  ``j_stat`` is Hansen's (1982) J statistic
    of two-step efficient GMM with a heteroskedasticity-robust
    (uncentered, not small-sample-scaled) weight matrix -- the statistic
    ``IVGMM(..., weight_type="robust").fit().j_stat`` of ``linearmodels``
    with its defaults (two steps): step one is the 2SLS fit above; its
    residuals give the moment covariance :math:`\hat S = n^{-1}
    \operatorname{diag}(R_{sz})` (diagonal because the instruments are
    cell dummies); step two re-estimates with weight :math:`\hat S^{-1}`
    and J is :math:`n\bar g'\hat S^{-1}\bar g` at the step-two estimates.
    From moments this collapses to a heterogeneity statistic of the site
    Wald contrasts:

    .. math::

        h_s = \left(R_{s1}/n_{s1}^2 + R_{s0}/n_{s0}^2\right)^{-1},\quad
        \tilde\beta = \frac{\sum_s h_s\pi_s\gamma_s}{\sum_s h_s\pi_s^2},\quad
        J = \sum_s h_s(\gamma_s - \tilde\beta\pi_s)^2,

    with :math:`S - 1` degrees of freedom (:math:`S` = sites used).
    :math:`\tilde\beta` is used only inside J; ``estimate`` is the 2SLS
    :math:`\hat\beta`.  Because the cell moments are linear in the
    parameters, J equals :math:`G'A(A'VA)^{-1}A'G` with :math:`G` the 2SLS
    cell residual sums, :math:`V = \operatorname{diag}(R_{sz})` and :math:`A`
    spanning the part of the instruments orthogonal to the regressors; that
    is exactly Wooldridge's (1995) heteroskedasticity-robust score statistic
    (``IV2SLS(...).fit().wooldridge_overid`` in ``linearmodels``), so in this
    saturated design the two coincide.  It is *not* Sargan's or Basmann's
    statistic, which assume homoskedastic errors.  J is undefined (NaN, with a note) with fewer
    than two sites or when a cell has a zero residual sum of squares (the
    moment covariance is then singular).  Cell residual sums of squares are
    computed from raw sums, so one below ``1e-12`` times the raw sums of
    squares of its cell is rounding noise and is set to zero (exact fit).

    References
    ----------
    Hansen, L. P. (1982). Large sample properties of generalized method of
    moments estimators. *Econometrica*, 50(4), 1029-1054.

    White, H. (1980). A heteroskedasticity-consistent covariance matrix
    estimator and a direct test for heteroskedasticity. *Econometrica*,
    48(4), 817-838.

    Wooldridge, J. M. (1995). Score diagnostics for linear models estimated
    by two stage least squares. In G. S. Maddala, P. C. B. Phillips and
    T. N. Srinivasan (eds.), *Advances in Econometrics and Quantitative
    Economics*, 66-87. Blackwell.

    MacKinnon, J. G. and White, H. (1985). Some heteroskedasticity-consistent
    covariance matrix estimators with improved finite sample properties.
    *Journal of Econometrics*, 29(3), 305-325 (the HC1 factor).

    Angrist, J. D. and Imbens, G. W. (1995). Two-stage least squares
    estimation of average causal effects in models with variable treatment
    intensity. *JASA*, 90(430), 431-442 (2SLS with interacted instruments
    as a weighted average of Wald estimates).
    """
    if not 0.0 < level < 1.0:
        raise ValueError(f"level must be in (0, 1), got {level!r}")
    t, c = m.treated, m.control
    n1_all, n0_all = t.n, c.n
    finite = np.ones(m.n_sites, dtype=bool)
    for arr in (t.n, t.sum_d, t.sum_y, t.sum_dd, t.sum_yy, t.sum_dy,
                c.n, c.sum_d, c.sum_y, c.sum_dd, c.sum_yy, c.sum_dy):
        finite &= np.isfinite(arr)
    with np.errstate(invalid="ignore", divide="ignore"):
        d1_all = t.sum_d / n1_all
        d0_all = c.sum_d / n0_all
    used, notes = _site_usability(n1_all, n0_all, d1_all, d0_all, finite)

    n_used = int(used.sum())
    if n_used == 0:
        notes.append("no site with both arms and a non-zero first stage: "
                     "pooled CACE undefined")
        nan = float("nan")
        return Pooled2SLS(nan, nan, nan, nan, nan, 0, nan, 0, 0, "; ".join(notes), used)

    # ---- per-site quantities (used sites only) ----
    n1, n0 = n1_all[used], n0_all[used]
    ns = n1 + n0
    d1, d0 = d1_all[used], d0_all[used]
    y1, y0 = t.sum_y[used] / n1, c.sum_y[used] / n0
    pi = d1 - d0
    gamma = y1 - y0
    w = n1 * n0 / ns

    denom = np.sum(w * pi**2)
    beta = float(np.sum(w * pi * gamma) / denom)

    # Residual sum of squares per cell at the 2SLS fit:
    #   R = sum (y - ybar_c - beta (d - dbar_c))^2 + n_c e_c^2,
    # e_c = mean residual of the cell; e_1 = (n0/ns) r, e_0 = -(n1/ns) r,
    # r = gamma - beta pi (alpha_s = Ybar_s - beta Dbar_s).
    r = gamma - beta * pi

    def within_rss(arm, idx, nz, dbar, ybar):
        syy = arm.sum_yy[idx] - nz * ybar**2
        sdd = arm.sum_dd[idx] - nz * dbar**2
        sdy = arm.sum_dy[idx] - nz * dbar * ybar
        return syy - 2.0 * beta * sdy + beta**2 * sdd

    rss1 = within_rss(t, used, n1, d1, y1) + n1 * (n0 / ns * r) ** 2
    rss0 = within_rss(c, used, n0, d0, y0) + n0 * (n1 / ns * r) ** 2
    # Centring raw sums loses about eps * (sum of squares) to cancellation;
    # a cell residual sum of squares below that floor is zero (exact fit).
    floor1 = _RSS_RTOL * (t.sum_yy[used] + beta**2 * t.sum_dd[used])
    floor0 = _RSS_RTOL * (c.sum_yy[used] + beta**2 * c.sum_dd[used])
    rss1 = np.where(rss1 <= floor1, 0.0, rss1)
    rss0 = np.where(rss0 <= floor0, 0.0, rss0)

    # ---- HC1 robust variance of beta ----
    n = float(ns.sum())
    k = n_used + 1
    meat = np.sum((n0 / ns * pi) ** 2 * rss1 + (n1 / ns * pi) ** 2 * rss0)
    if n - k > 0:
        se = float(np.sqrt(meat / denom**2 * n / (n - k)))
        q = float(stats.t.ppf(0.5 + level / 2.0, n - k))
        ci_low, ci_high = beta - q * se, beta + q * se
    else:
        se = ci_low = ci_high = float("nan")
        notes.append(f"n = {int(n)} participants do not exceed the {k} parameters: "
                     "robust standard error undefined")

    # ---- Hansen's J (two-step robust GMM) ----
    j_df = n_used - 1
    j_stat = j_p = float("nan")
    if n_used < 2:
        notes.append("only one site used: overidentification test undefined")
    elif np.any(rss1 <= 0.0) or np.any(rss0 <= 0.0):
        notes.append("a site x arm cell has zero residual variation: moment "
                     "covariance singular, J statistic undefined")
    else:
        h = 1.0 / (rss1 / n1**2 + rss0 / n0**2)
        beta_gmm = np.sum(h * pi * gamma) / np.sum(h * pi**2)
        j_stat = float(np.sum(h * (gamma - beta_gmm * pi) ** 2))
        j_p = float(stats.chi2.sf(j_stat, j_df))

    return Pooled2SLS(
        estimate=beta, se=se, ci_low=ci_low, ci_high=ci_high,
        j_stat=j_stat, j_df=int(max(j_df, 0)), j_pvalue=j_p,
        n_sites_used=n_used, n=int(n), note="; ".join(notes), site_used=used,
    )
