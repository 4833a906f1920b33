"""Empirical-Bayes shrinkage of site baseline rates toward the study-wide rate.

A drift chart's in-control level estimated from a few weeks at one site is
noisy: with 50 controls and a true uptake of 8%, a baseline of 2% (one
taker) is not rare, and an upward chart tuned to that level then alarms at
the normal 8%.  Shrinking each site's baseline toward the study-wide
baseline of the same arm, by the amount the between-site spread warrants,
removes these false alarms while keeping genuinely different sites apart.

The between-site variance of the true rates is the method-of-moments
estimator of extra-binomial variation (Kleinman 1973); the shrinkage weight
of a site is ``tau2 / (tau2 + p(1-p)/n_i)`` (Efron & Morris 1975).

References
----------
.. [1] Kleinman, J. C. (1973). Proportions with extraneous variance: single
   and independent samples. *Journal of the American Statistical
   Association* 68(341), 46-54.
.. [2] Efron, B. and Morris, C. (1975). Data analysis using Stein's
   estimator and its generalizations. *Journal of the American Statistical
   Association* 70(350), 311-319.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

__all__ = ["ShrunkRates", "shrink_rates"]


@dataclass(frozen=True)
class ShrunkRates:
    """Per-series shrunken rates (NaN where a series has no observations)."""

    rate: np.ndarray          # shrunken rate per series
    raw_rate: np.ndarray      # x / n per series
    prior_mean: np.ndarray    # study-wide rate of the series' group
    tau2: np.ndarray          # between-site variance of the series' group
    weight: np.ndarray        # weight on the site's own rate (0 = fully pooled)


def shrink_rates(x, n, groups) -> ShrunkRates:
    """Shrink ``x / n`` toward the pooled rate of each group.

    Parameters
    ----------
    x, n : array_like, shape (k,)
        Successes and trials per series (site x arm baseline counts).
    groups : array_like, shape (k,)
        Group label per series (e.g. the arm); rates are pooled within a group.
    """
    x = np.asarray(x, dtype=float)
    n = np.asarray(n, dtype=float)
    groups = np.asarray(groups)
    k = x.shape[0]
    rate = np.full(k, np.nan)
    raw = np.full(k, np.nan)
    prior = np.full(k, np.nan)
    tau2 = np.full(k, np.nan)
    weight = np.full(k, np.nan)
    has = n > 0
    with np.errstate(invalid="ignore", divide="ignore"):
        raw[has] = x[has] / n[has]
    for g in np.unique(groups):        # a handful of groups (arms), not sites
        m = (groups == g) & has
        if not m.any():
            continue
        ni, ri = n[m], raw[m]
        big_n = ni.sum()
        p = x[m].sum() / big_n
        j = int(m.sum())
        if j >= 2 and 0.0 < p < 1.0:
            # Kleinman (1973): E[sum n_i (r_i - p)^2] = (j - 1) p(1-p) + tau2 (N - sum n_i^2 / N)
            s = float(np.sum(ni * (ri - p) ** 2))
            denom = big_n - float(np.sum(ni ** 2)) / big_n
            t2 = max(0.0, (s - (j - 1) * p * (1 - p)) / denom) if denom > 0 else 0.0
        else:
            t2 = 0.0 if j >= 2 else np.nan     # a single site cannot borrow strength: keep its own rate
        with np.errstate(invalid="ignore", divide="ignore"):
            if j >= 2 and 0.0 < p < 1.0:
                w = t2 / (t2 + p * (1 - p) / ni)
            else:
                w = np.ones_like(ni) if j < 2 else np.zeros_like(ni)
        rate[m] = p + w * (ri - p)
        prior[m] = p
        tau2[m] = t2
        weight[m] = w
    for a in (rate, raw, prior, tau2, weight):
        a.setflags(write=False)
    return ShrunkRates(rate=rate, raw_rate=raw, prior_mean=prior, tau2=tau2, weight=weight)
