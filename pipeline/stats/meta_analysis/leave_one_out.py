"""Leave-one-out refits of the random-effects model, all subsets at once.

:func:`leave_one_out_fits` returns, for every site ``j``, the pooled estimate, its (z-based) SE
and ``tau2`` of the fit without site ``j`` -- what ``combine(y[-j], v[-j], method,
summaries=False)`` returns, without a Python loop over sites:

* ``fixed`` and ``dl``: every sum the fit needs is the full-sample sum minus site ``j``'s term
  (O(k));
* ``reml``: the safeguarded Newton iteration of :func:`~takeup.pipeline.stats.meta_analysis.meta.
  _tau2_reml` runs for all subsets side by side on a subsets x sites weight matrix (blocks of
  subsets, so memory stays bounded), with each subset's own bracket, step rule and stopping
  rule, started at the REML tau2 of all sites;
* ``pm`` (a root search per subset) falls back to the loop.

The results equal the loop's up to floating-point summation order and the stopping tolerance of
the REML iteration (``1e-12`` of the total variance's scale); the tests compare them.

References
----------
Viechtbauer, W. and Cheung, M. W.-L. (2010). Outlier and influence diagnostics for
meta-analysis. Research Synthesis Methods, 1, 112-125.
DerSimonian, R. and Laird, N. (1986). Meta-analysis in clinical trials. Controlled Clinical
Trials, 7, 177-188.
Harville, D. A. (1977). Maximum likelihood approaches to variance component estimation and to
related problems. JASA, 72, 320-338.
"""

from __future__ import annotations

import numpy as np

from takeup.pipeline.stats.meta_analysis.meta import _REML_MAXITER, _REML_RTOL, _tau2_dl, _tau2_reml, combine

__all__ = ["leave_one_out_fits"]

#: subsets per block of the REML iteration (block x sites doubles per temporary array)
_BLOCK_CELLS = 1_000_000


def _loop(y: np.ndarray, v: np.ndarray, method: str):
    k = y.size
    est, se, tau2 = np.full(k, np.nan), np.full(k, np.nan), np.full(k, np.nan)
    converged = True
    for j in range(k):  # one fit per left-out site (methods without a vectorised form)
        sub = np.arange(k) != j
        r = combine(y[sub], v[sub], method=method, summaries=False)
        est[j], se[j], tau2[j] = r.estimate, r.se, r.tau2
        converged &= r.converged
    return est, se, tau2, bool(converged)


def _dl_tau2(y: np.ndarray, v: np.ndarray) -> np.ndarray:
    """DerSimonian-Laird tau2 of every leave-one-out subset (sums minus the left-out term)."""
    w = 1.0 / v
    sw = w.sum() - w
    swy = np.dot(w, y) - w * y
    swyy = np.dot(w, y * y) - w * y * y
    sww = np.dot(w, w) - w * w
    q = swyy - swy * swy / sw                       # sum w (y - mu_fe)^2 of the subset
    c = sw - sww / sw
    return np.maximum(0.0, (q - (y.size - 2)) / c)


def _reml_scores(y, v, tau2, rows):
    """Restricted score, Fisher and observed information of the subsets ``rows`` at ``tau2``.

    Every sum over a subset is a power sum ``sum_i w_ij^p y_i^q`` (p = 1..3, q = 0..2), taken as
    matrix products of the weight powers with ``[1, y, y^2]``; the residual sums follow by
    expanding ``r = y - mu_j``.  The effects arrive centred near the pooled mean (see
    :func:`leave_one_out_fits`), so ``mu_j`` is small and the expansion loses no accuracy.
    """
    w = 1.0 / (v[None, :] + tau2[:, None])
    w[np.arange(rows.size), rows] = 0.0           # leave site j out of subset j
    powers = np.column_stack([np.ones_like(y), y, y * y])
    s1 = w @ powers
    w2 = w * w
    s2 = w2 @ powers
    w2 *= w                                       # now w^3
    s3 = w2 @ powers
    sw = s1[:, 0]
    mu = s1[:, 1] / sw
    w2_r2 = s2[:, 2] - 2.0 * mu * s2[:, 1] + mu * mu * s2[:, 0]
    w3_r2 = s3[:, 2] - 2.0 * mu * s3[:, 1] + mu * mu * s3[:, 0]
    w2_r = s2[:, 1] - mu * s2[:, 0]
    tr_p = sw - s2[:, 0] / sw
    fisher = 0.5 * (s2[:, 0] - 2.0 * s3[:, 0] / sw + (s2[:, 0] / sw) ** 2)
    score = 0.5 * (w2_r2 - tr_p)
    observed = w3_r2 - w2_r ** 2 / sw - fisher
    return score, fisher, observed


def _score_at_zero(y: np.ndarray, v: np.ndarray) -> np.ndarray:
    """Restricted score at tau2 = 0 of every subset: fixed weights, so full sums minus the own term."""
    w = 1.0 / v

    def loo(p: int, q: int) -> np.ndarray:
        term = w**p * y**q
        return term.sum() - term

    sw = loo(1, 0)
    mu = loo(1, 1) / sw
    w2_r2 = loo(2, 2) - 2.0 * mu * loo(2, 1) + mu * mu * loo(2, 0)
    return 0.5 * (w2_r2 - (sw - loo(2, 0) / sw))


def _reml_tau2(y: np.ndarray, v: np.ndarray) -> tuple[np.ndarray, bool]:
    """REML tau2 of every leave-one-out subset: the safeguarded Newton iteration, vectorised.

    Each subset runs the iteration of :func:`~takeup.pipeline.stats.meta_analysis.meta._tau2_reml`
    (bracket, Newton or Fisher step, bisection when a step leaves the bracket, the same stopping
    rule), started at the REML tau2 of all sites rather than at the subset's DerSimonian-Laird
    value: leaving one site out moves tau2 little, so two or three steps suffice.  The root is the
    same; only the path to it differs.
    """
    k = y.size
    scale = (v.sum() - v) / (k - 1)                 # mean within variance of each subset
    w = 1.0 / v
    mu_fe = np.dot(w, y) / w.sum()
    full, _, _ = _tau2_reml(y, v, _tau2_dl(y, v, float(np.dot(w, (y - mu_fe) ** 2))))
    boundary = _score_at_zero(y, v) <= 0.0           # score <= 0 at 0: the maximum is on the boundary
    out = np.zeros(k)
    converged = True
    block = max(1, _BLOCK_CELLS // k)
    for b0 in range(0, k, block):
        rows = np.arange(b0, min(k, b0 + block))
        active = ~boundary[rows]
        tau2 = np.where(active, max(0.0, float(full)), 0.0)
        lo = np.zeros(rows.size)
        hi = np.full(rows.size, np.inf)
        result = np.zeros(rows.size)
        for _ in range(_REML_MAXITER):
            idx = np.flatnonzero(active)
            if idx.size == 0:
                break
            t = tau2[idx]
            score, fisher, observed = _reml_scores(y, v, t, rows[idx])
            exact = score == 0.0
            lo[idx] = np.where(score > 0.0, np.maximum(lo[idx], t), lo[idx])
            hi[idx] = np.where(score < 0.0, np.minimum(hi[idx], t), hi[idx])
            with np.errstate(all="ignore"):
                new = t + score / np.where(observed > 0.0, observed, fisher)
            outside = ~((lo[idx] < new) & (new < hi[idx]))
            new = np.where(outside, 0.5 * (lo[idx] + hi[idx]), new)
            sc = scale[rows[idx]]
            done = (np.abs(new - t) <= _REML_RTOL * (new + sc)) | (hi[idx] - lo[idx] <= _REML_RTOL * (lo[idx] + sc))
            result[idx] = np.where(exact, t, new)
            finished = exact | done
            active[idx[finished]] = False
            tau2[idx] = new
        if active.any():                             # the loop above ran out of iterations
            converged = False
            result[active] = tau2[active]
        out[rows] = result
    return out, converged


def leave_one_out_fits(y: np.ndarray, v: np.ndarray, method: str) -> tuple[np.ndarray, np.ndarray, np.ndarray, bool]:
    """Estimate, SE and tau2 of the fit without each site, and whether every tau2 fit converged.

    Parameters
    ----------
    y, v : ndarray
        Usable effects and (positive) variances, ``k >= 2`` (as cleaned by ``clean_inputs``).
    method : {"reml", "dl", "pm", "fixed"}
        Resolved tau2 estimator, as in :func:`~takeup.pipeline.stats.meta_analysis.meta.combine`.

    Returns
    -------
    estimate, se, tau2 : ndarray
        One entry per left-out site.
    converged : bool

    Notes
    -----
    With ``k = 2`` each subset holds one site and ``combine``'s one-site conventions apply
    (tau2 undefined): the loop is used.  The vectorised forms work on the effects centred at their
    fixed-effect mean and scaled by the root median variance (``combine`` centres each fit at its
    median; the fits are location-scale equivariant), then map back.
    """
    y = np.asarray(y, dtype=float)
    v = np.asarray(v, dtype=float)
    k = y.size
    if k <= 2 or method == "pm":
        return _loop(y, v, method)
    unit = float(np.sqrt(np.median(v)))
    shift = float(np.dot(1.0 / v, y) / np.sum(1.0 / v))   # fixed-effect mean: every subset's mean is near 0
    ys, vs = (y - shift) / unit, v / unit**2
    converged = True
    if method == "fixed":
        tau2 = np.zeros(k)
    elif method == "dl":
        tau2 = _dl_tau2(ys, vs)
    else:
        tau2, converged = _reml_tau2(ys, vs)
    # pooled estimate and SE of each subset with weights 1 / (v + tau2_j)
    est = np.empty(k)
    sw = np.empty(k)
    block = max(1, _BLOCK_CELLS // k)
    for b0 in range(0, k, block):
        rows = np.arange(b0, min(k, b0 + block))
        w = 1.0 / (vs[None, :] + tau2[rows, None])
        w[np.arange(rows.size), rows] = 0.0
        sw[rows] = w.sum(axis=1)
        est[rows] = (w @ ys) / sw[rows]
    with np.errstate(all="ignore"):
        se = np.sqrt(1.0 / sw)
        out = (shift + unit * est, unit * se, unit**2 * tau2)
    out = tuple(np.where(np.isfinite(a), a, np.nan) for a in out)
    return out[0], out[1], out[2], bool(converged)
