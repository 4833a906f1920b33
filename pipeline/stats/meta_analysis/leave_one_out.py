"""Leave-one-out refits of the random-effects model, all subsets at once.

:func:`leave_one_out_fits` returns, for every site ``j``, the pooled estimate, its (z-based) SE
and ``tau2`` of the fit without site ``j`` -- what ``combine(y[-j], v[-j], method,
summaries=False)`` returns, without a Python loop over sites:

* ``fixed`` and ``dl``: every sum the fit needs is the full-sample sum minus site ``j``'s term
  (O(k));
* ``reml``: the safeguarded Newton iteration of :func:`~takeup.pipeline.stats.meta_analysis.meta.
  _tau2_reml` runs for all subsets side by side on a subsets x sites weight matrix (blocks of
  subsets, so memory stays bounded), with each subset's own bracket, step rule and stopping
  rule, so each subset follows exactly the scalar iteration;
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

from takeup.pipeline.stats.meta_analysis.meta import _REML_MAXITER, _REML_RTOL, combine

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
    """Restricted score, Fisher and observed information of the subsets ``rows`` at ``tau2``."""
    w = 1.0 / (v[None, :] + tau2[:, None])
    w[np.arange(rows.size), rows] = 0.0           # leave site j out of subset j
    sw = w.sum(axis=1)
    mu = (w @ y) / sw
    r = y[None, :] - mu[:, None]
    w2 = w * w
    w3 = w2 * w
    s2 = w2.sum(axis=1)
    rr = r * r
    tr_p = sw - s2 / sw
    fisher = 0.5 * (s2 - 2.0 * w3.sum(axis=1) / sw + (s2 / sw) ** 2)
    score = 0.5 * ((w2 * rr).sum(axis=1) - tr_p)
    observed = (w3 * rr).sum(axis=1) - (w2 * r).sum(axis=1) ** 2 / sw - fisher
    return score, fisher, observed


def _reml_tau2(y: np.ndarray, v: np.ndarray) -> tuple[np.ndarray, bool]:
    """REML tau2 of every leave-one-out subset: the safeguarded Newton iteration, vectorised."""
    k = y.size
    scale = (v.sum() - v) / (k - 1)                 # mean within variance of each subset
    start = _dl_tau2(y, v)
    out = np.zeros(k)
    converged = True
    block = max(1, _BLOCK_CELLS // k)
    for b0 in range(0, k, block):
        rows = np.arange(b0, min(k, b0 + block))
        score0, _, _ = _reml_scores(y, v, np.zeros(rows.size), rows)
        active = score0 > 0.0                        # score <= 0 at 0: the maximum is on the boundary
        tau2 = np.where(active, np.maximum(0.0, start[rows]), 0.0)
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
    median and scaled by the root median variance (as ``combine`` does per fit), then map back.
    """
    y = np.asarray(y, dtype=float)
    v = np.asarray(v, dtype=float)
    k = y.size
    if k <= 2 or method == "pm":
        return _loop(y, v, method)
    shift = float(np.median(y))
    unit = float(np.sqrt(np.median(v)))
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
