r"""Covariate-adjusted IV estimate of the complier effect, for all sites at once, from moments.

When baseline covariates are declared, adjusting for them in both stages
usually tightens the interval.  Per site the model is

.. math::

    D = \pi_0 + X'\pi_x + \pi_z Z + v \qquad
    Y = a + X'b + \beta D + u \quad (D \text{ instrumented by } Z),

just identified, with regressors :math:`w = (1, D, X)` and instruments
:math:`q = (1, Z, X)`; :math:`k = p + 2` parameters for :math:`p` covariates.
Everything comes from sums that DuckDB aggregates per site
(:mod:`takeup.pipeline.run.adjusted_sql`); no participant row reaches Python:

* **first pass** — the cross-product matrix :math:`\sum v v'` of
  :math:`v = (1, Z, D, Y, X)` per site, with every variable centred at its
  site mean (centring only moves the intercepts; it keeps the sums well
  conditioned when covariates have large means).  Then
  :math:`\hat\beta = (Q'W)^{-1} Q'y` and the first stage
  :math:`\hat\gamma = (Q'Q)^{-1} Q'd`, batched over sites;
* **second pass** — the robust "meat" with each site's coefficients joined
  in: :math:`\sum_i \hat u_i^2 q_i q_i'` (HC) or
  :math:`\sum_g (\sum_{i \in g} \hat u_i q_i)(\sum_{i \in g} \hat u_i q_i)'`
  (one-way cluster-robust), and the same for the first-stage residuals.

With declared randomisation strata the variables are centred within site x stratum
instead (stratum fixed effects, "within strata"): by Frisch-Waugh-Lovell the slope and
its sandwich are those of the fit with one intercept per stratum, and the small-sample
factor counts them (:math:`k = p + 1 + S`).

Variances are the sandwich :math:`c\,(Q'W)^{-1} M (W'Q)^{-1}` (first stage:
:math:`c\,(Q'Q)^{-1} M_v (Q'Q)^{-1}`) with the small-sample factor
:math:`c = n/(n-k)` (HC1) or :math:`c = \frac{G}{G-1}\frac{n-1}{n-k}` (CR1):
the same numbers as ``linearmodels`` ``IV2SLS(...).fit(cov_type="robust" |
"clustered", debiased=True)`` (checked in the tests to 1e-9 / 1e-6), whose
interval uses :math:`t_{n-k}`.

References
----------
.. [1] Card, D. (1995). Using geographic variation in college proximity to
   estimate the return to schooling. In L. N. Christofides, E. K. Grant and
   R. Swidinsky (eds.), *Aspects of Labour Market Behaviour*, 201-222.
   University of Toronto Press.  (Wooldridge, *Introductory Econometrics*,
   Example 15.4, is the specification used in the tests.)
.. [2] MacKinnon, J. G. and White, H. (1985). Some heteroskedasticity-consistent
   covariance matrix estimators with improved finite sample properties.
   *Journal of Econometrics*, 29(3), 305-325.
.. [3] Cameron, A. C. and Miller, D. L. (2015). A practitioner's guide to
   cluster-robust inference. *Journal of Human Resources*, 50(2), 317-372.
.. [4] Montiel Olea, J. L. and Pflueger, C. (2013). A robust test for weak
   instruments. *Journal of Business & Economic Statistics*, 31(3), 358-369.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
from scipy import stats

from takeup.pipeline.stats.readonly import readonly_array as _ro

__all__ = ["CrossMoments", "ScoreMoments", "AdjustedEstimates", "adjusted_coefficients", "adjusted_estimates",
           "cross_moments_from_arrays", "score_moments_from_arrays", "V_NAMES", "q_index", "w_index"]

#: order of the variables in the cross-product matrix (covariates follow, in declared order)
V_NAMES = ("one", "z", "d", "y")


def q_index(p: int) -> list[int]:
    """Positions of the instruments (1, Z, X) in the cross-product matrix."""
    return [0, 1, *range(4, 4 + p)]


def w_index(p: int) -> list[int]:
    """Positions of the regressors (1, D, X)."""
    return [0, 2, *range(4, 4 + p)]


@dataclass(frozen=True)
class CrossMoments:
    """First-pass sums per site: ``n`` and :math:`\\sum v v'` of the site-centred ``v = (1, Z, D, Y, X)``.

    ``cross[:, 0, 0] = n`` and the centred variables' sums ``cross[:, 0, j]`` are 0 up to rounding.
    """

    n: np.ndarray            # (S,)
    cross: np.ndarray        # (S, m, m), m = p + 4
    n_covariates: int
    #: randomisation strata absorbed per site (variables centred within site x stratum: stratum
    #: fixed effects, k = p + 1 + strata parameters); None = one (centred within site)
    n_strata: np.ndarray | None = None


@dataclass(frozen=True)
class ScoreMoments:
    """Second-pass sums per site: the meat of the 2SLS and of the first-stage sandwich."""

    meat_iv: np.ndarray      # (S, k, k)
    meat_fs: np.ndarray      # (S, k, k)
    n_clusters: np.ndarray | None   # (S,) for cluster-robust meats, else None


def _solve(a: np.ndarray, b: np.ndarray, ok: np.ndarray) -> np.ndarray:
    out = np.full(b.shape, np.nan)
    if ok.any():
        out[ok] = np.linalg.solve(a[ok], b[ok][..., None])[..., 0]
    return out


def _ranks(a: np.ndarray) -> np.ndarray:
    finite = np.isfinite(a).all(axis=(1, 2))
    r = np.zeros(a.shape[0], dtype=int)
    if finite.any():
        r[finite] = np.linalg.matrix_rank(a[finite])
    return r


def adjusted_coefficients(cm: CrossMoments) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """2SLS coefficients ``beta`` (on w), first-stage coefficients ``gamma`` (on q), and a status per site.

    Status ``ok``, ``too_few_rows``, ``constant_instrument``, ``singular_design`` or
    ``zero_first_stage``; coefficients are NaN where the status is not ``ok``.
    """
    p = cm.n_covariates
    k = p + 2
    qi, wi = q_index(p), w_index(p)
    c = cm.cross
    qq = c[:, qi][:, :, qi]
    qw = c[:, qi][:, :, wi]
    qy = c[:, qi, 3]
    qd = c[:, qi, 2]
    n = cm.n.astype(float)
    status = np.full(n.shape[0], "ok", dtype=object)
    with np.errstate(all="ignore"):
        z_var = c[:, 1, 1] / np.where(n > 0, n, 1.0)
    status[_ranks(qw) < k] = "zero_first_stage"
    status[_ranks(qq) < k] = "singular_design"
    status[~(z_var > 1e-12)] = "constant_instrument"
    absorbed = 0.0 if cm.n_strata is None else np.maximum(np.asarray(cm.n_strata, float), 1.0) - 1.0
    status[n <= k + absorbed] = "too_few_rows"
    ok = status == "ok"
    beta = _solve(qw, qy, ok)
    gamma = _solve(qq, qd, ok)
    return beta, gamma, status


_NOTES = {
    "too_few_rows": "{n} complete rows for {k} parameters: CACE undefined",
    "constant_instrument": "instrument does not vary: first stage and CACE undefined",
    "singular_design": "constant, covariates and instrument are collinear: first stage and CACE undefined",
    "zero_first_stage": "instrument does not move the treatment given the covariates (first stage is zero): "
                        "CACE undefined",
    "too_few_clusters": "fewer than two clusters: cluster-robust SE undefined",
}


@dataclass(frozen=True)
class AdjustedEstimates:
    """Covariate-adjusted estimates, one entry per site (read-only arrays).

    Attributes
    ----------
    cace, cace_se : ndarray
        2SLS coefficient on D and its HC1 or CR1 standard error.
    ci_low, ci_high : ndarray
        ``cace -/+ t_{n-k}(1 - (1 - level)/2) * cace_se``.
    first_stage_coef, first_stage_se, first_stage_f : ndarray
        Coefficient on Z in the regression of D on (1, Z, X), its SE (same
        covariance type) and the robust first-stage F = t^2 (one instrument:
        also the effective F of Montiel Olea & Pflueger 2013).
    n : ndarray
        Complete rows used.
    se_type : str
        ``"HC1-adjusted"`` or ``"CR1-adjusted"``.
    status, note : ndarray of object
    """

    cace: np.ndarray
    cace_se: np.ndarray
    ci_low: np.ndarray
    ci_high: np.ndarray
    first_stage_coef: np.ndarray
    first_stage_se: np.ndarray
    first_stage_f: np.ndarray
    n: np.ndarray
    se_type: str
    status: np.ndarray
    note: np.ndarray


def adjusted_estimates(cm: CrossMoments, sm: ScoreMoments, level: float = 0.95) -> AdjustedEstimates:
    """Estimates and robust (HC1) or cluster-robust (CR1) standard errors from the two passes' sums."""
    if not (0.0 < level < 1.0):
        raise ValueError(f"level must be strictly between 0 and 1, got {level!r}")
    p = cm.n_covariates
    strata = np.ones(cm.n.shape[0]) if cm.n_strata is None else np.maximum(np.asarray(cm.n_strata, float), 1.0)
    k = p + 1 + strata            # slope, covariates and one intercept per stratum (p + 2 without strata)
    qi, wi = q_index(p), w_index(p)
    beta, gamma, status = adjusted_coefficients(cm)
    n = cm.n.astype(float)
    clustered = sm.n_clusters is not None
    g = sm.n_clusters.astype(float) if clustered else None
    if clustered:
        status = np.where((status == "ok") & ~(g >= 2), "too_few_clusters", status).astype(object)
    ok = status == "ok"
    c = cm.cross
    qq = c[:, qi][:, :, qi]
    qw = c[:, qi][:, :, wi]
    with np.errstate(all="ignore"):
        if clustered:
            scale = np.where(ok, g / (g - 1) * (n - 1) / (n - k), np.nan)
        else:
            scale = np.where(ok, n / (n - k), np.nan)
    v_iv = np.full(n.shape[0], np.nan)
    v_fs = np.full(n.shape[0], np.nan)
    if ok.any():
        a_inv = np.linalg.inv(qw[ok])
        v = a_inv @ sm.meat_iv[ok] @ np.swapaxes(a_inv, 1, 2)
        v_iv[ok] = scale[ok] * v[:, 1, 1]
        b_inv = np.linalg.inv(qq[ok])
        vf = b_inv @ sm.meat_fs[ok] @ b_inv
        v_fs[ok] = scale[ok] * vf[:, 1, 1]
    with np.errstate(all="ignore"):
        cace = np.where(ok, beta[:, 1], np.nan)
        se = np.where(ok & (v_iv >= 0), np.sqrt(v_iv), np.nan)
        fs = np.where(ok, gamma[:, 1], np.nan)
        fs_se = np.where(ok & (v_fs >= 0), np.sqrt(v_fs), np.nan)
        f_stat = np.where(fs_se > 0, (fs / np.where(fs_se > 0, fs_se, 1.0)) ** 2, np.nan)
        tq = stats.t.ppf(1 - (1 - level) / 2, np.where(n - k > 0, n - k, np.nan))
        lo, hi = cace - tq * se, cace + tq * se
    notes = np.full(n.shape[0], "", dtype=object)
    for i in np.flatnonzero(~ok):
        notes[i] = _NOTES[str(status[i])].format(n=int(n[i]), k=int(k[i]))
    for i in np.flatnonzero(ok & ~(fs_se > 0)):
        notes[i] = "first-stage standard error is zero: F undefined"
    if clustered:
        for i in np.flatnonzero(ok & (g < k)):
            notes[i] = "; ".join(x for x in (notes[i], f"{int(g[i])} clusters for {int(k[i])} parameters: "
                                                       "cluster-robust covariance is rank deficient") if x)
    notes.setflags(write=False)
    status = np.asarray(status, dtype=object)
    status.setflags(write=False)
    return AdjustedEstimates(cace=_ro(cace), cace_se=_ro(se), ci_low=_ro(lo), ci_high=_ro(hi),
                             first_stage_coef=_ro(fs), first_stage_se=_ro(fs_se), first_stage_f=_ro(f_stat),
                             n=_ro(n, dtype=np.int64), se_type="CR1-adjusted" if clustered else "HC1-adjusted",
                             status=status, note=notes)


# ----------------------------------------------------------------------------- numpy twins (tests, benchmarks)
def _stack(site, z, d, y, x):
    site = np.asarray(site)
    x = np.zeros((len(site), 0)) if x is None else np.asarray(x, dtype=float).reshape(len(site), -1)
    v = np.column_stack([np.ones(len(site)), np.asarray(z, float), np.asarray(d, float), np.asarray(y, float), x])
    keep = np.isfinite(v).all(axis=1)
    return site, v, keep


def cross_moments_from_arrays(site, z, d, y, x=None) -> tuple[list, CrossMoments]:
    """The first pass computed in numpy from participant arrays (complete rows only), for tests.

    Returns ``(sites, CrossMoments)`` with sites in sorted order.
    """
    site, v, keep = _stack(site, z, d, y, x)
    sites = sorted(set(site[keep].tolist()))
    m = v.shape[1]
    cross = np.zeros((len(sites), m, m))
    n = np.zeros(len(sites))
    for j, s in enumerate(sites):
        rows = v[keep & (site == s)]
        c = rows.copy()
        c[:, 1:] -= rows[:, 1:].mean(axis=0)
        cross[j] = c.T @ c
        n[j] = len(rows)
    return sites, CrossMoments(n=n, cross=cross, n_covariates=m - 4)


def score_moments_from_arrays(site, z, d, y, x, beta, gamma, sites, cluster=None) -> ScoreMoments:
    """The second pass computed in numpy (residuals from each site's coefficients), for tests."""
    site_arr, v, keep = _stack(site, z, d, y, x)
    p = v.shape[1] - 4
    qi, wi = q_index(p), w_index(p)
    k = p + 2
    meat_iv = np.zeros((len(sites), k, k))
    meat_fs = np.zeros((len(sites), k, k))
    g = np.zeros(len(sites)) if cluster is not None else None
    cl = np.asarray(cluster) if cluster is not None else None
    for j, s in enumerate(sites):
        sel = keep & (site_arr == s)
        rows = v[sel].copy()
        rows[:, 1:] -= rows[:, 1:].mean(axis=0)
        q, w = rows[:, qi], rows[:, wi]
        u = rows[:, 3] - w @ beta[j]
        e = rows[:, 2] - q @ gamma[j]
        if cl is None:
            meat_iv[j] = (q * u[:, None] ** 2).T @ q
            meat_fs[j] = (q * e[:, None] ** 2).T @ q
        else:
            labels = cl[sel]
            for lab in np.unique(labels):
                m = labels == lab
                su, se = (q[m] * u[m, None]).sum(axis=0), (q[m] * e[m, None]).sum(axis=0)
                meat_iv[j] += np.outer(su, su)
                meat_fs[j] += np.outer(se, se)
            g[j] = len(np.unique(labels))
    return ScoreMoments(meat_iv=meat_iv, meat_fs=meat_fs, n_clusters=g)
