"""Test for differences in the pooled effect between groups of sites."""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
from scipy import stats

from takeup.pipeline.stats.meta_analysis.meta import MetaResult, clean_inputs, combine, resolve_method

__all__ = ["SubgroupResult", "between_group_test"]


@dataclass(frozen=True)
class SubgroupResult:
    """Per-group pooled results and the between-group heterogeneity test (read-only).

    Attributes
    ----------
    method : str
        tau2 estimator used within each group.
    labels : tuple
        Group labels, in order of first appearance.
    results : tuple of MetaResult
        Pooled result of each group, same order as ``labels``.
    q_between : float
        ``sum_g w_g (mu_g - mu_bar)²`` with ``w_g = 1 / se_g²`` over the
        groups with a defined estimate.
    df : int
        Number of such groups minus one.
    pvalue : float
        Chi-square(df) upper tail probability of ``q_between``.
    estimate, se : float
        Fixed-effect (inverse-variance) combination ``mu_bar`` of the group
        estimates and its SE ``1 / sqrt(sum w_g)``.
    note : str
        Reasons for NaN or excluded groups; ``""`` when there is nothing to
        report.
    """

    method: str
    labels: tuple
    results: tuple[MetaResult, ...]
    q_between: float
    df: int
    pvalue: float
    estimate: float
    se: float
    note: str

    def result_for(self, label) -> MetaResult:
        """Pooled result of the group called ``label`` (KeyError if absent)."""
        for lab, res in zip(self.labels, self.results):
            if lab == label:
                return res
        raise KeyError(label)


def _is_missing(g) -> bool:
    return g is None or (isinstance(g, (float, np.floating)) and np.isnan(g))


def between_group_test(effects, variances, groups, method: str = "reml") -> SubgroupResult:
    """Compare pooled effects across groups of sites.

    Parameters
    ----------
    effects, variances : array_like
        One effect and its sampling variance per site.
    groups : array_like
        One hashable group label per site; ``None`` / NaN labels drop the site.
    method : {"reml", "dl", "pm", "fixed"}
        tau2 estimator, applied *separately within each group*.

    Returns
    -------
    SubgroupResult

    Notes
    -----
    Construction: each group is pooled on its own with
    :func:`~takeup.pipeline.stats.meta_analysis.meta.combine` (its own tau2 — the random-effects
    subgroup analysis "with separate estimates of tau²" of Borenstein et al.
    2009, ch. 19).  The group estimates ``mu_g`` with their z-based SEs are
    then treated as known-variance observations and compared with the
    fixed-effect homogeneity statistic ``Q_between = sum w_g (mu_g -
    mu_bar)²``, ``w_g = 1 / se_g²``, referred to chi-square with ``G - 1``
    df.  With ``method="fixed"`` this is the fixed-effect partition
    ``Q_total = Q_within + Q_between`` (Hedges & Olkin 1985).

    A group with a single site contributes that site's estimate and SE
    (tau2 assumed 0 inside that group; noted).  Groups whose estimate is
    undefined are left out of the test (noted).  With fewer than two usable
    groups ``q_between`` is 0 (one group) or NaN (none), ``df`` is 0 and the
    p-value is NaN.

    References
    ----------
    Borenstein, M., Hedges, L. V., Higgins, J. P. T. and Rothstein, H. R.
    (2009). Introduction to Meta-Analysis. Wiley, ch. 19.
    Hedges, L. V. and Olkin, I. (1985). Statistical Methods for
    Meta-Analysis. Academic Press.
    """
    method = resolve_method(method)
    y_all = np.atleast_1d(np.asarray(effects, dtype=float))
    g_all = np.empty(len(groups), dtype=object)
    g_all[:] = [x.item() if isinstance(x, np.generic) else x for x in groups]
    if g_all.shape != y_all.shape:
        raise ValueError(f"groups has {g_all.size} entries but effects has {y_all.size}")
    y, v, keep, notes = clean_inputs(effects, variances)
    g = g_all[keep]
    missing = np.fromiter((_is_missing(x) for x in g), dtype=bool, count=g.size)
    if missing.any():
        notes.append(f"{int(missing.sum())} site(s) dropped: missing group label")
        y, v, g = y[~missing], v[~missing], g[~missing]

    labels = tuple(dict.fromkeys(g.tolist()))
    results = []
    for lab in labels:  # one pooled fit per group (groups, not sites)
        mask = np.fromiter((x == lab for x in g), dtype=bool, count=g.size)
        res = combine(y[mask], v[mask], method=method)
        results.append(res)
        if res.n_sites == 1:
            notes.append(f"group {lab!r} has one site: its own estimate and SE are used")

    est = np.array([r.estimate for r in results], dtype=float)
    se = np.array([r.se for r in results], dtype=float)
    usable = np.isfinite(est) & np.isfinite(se) & (se > 0)
    for lab in np.asarray(labels, dtype=object)[~usable]:
        notes.append(f"group {lab!r} left out of the test: pooled estimate undefined")
    n_groups = int(usable.sum())

    nan = float("nan")
    if n_groups == 0:
        notes.append("no group with a defined estimate: no between-group test")
        q_b, df, p, mu_bar, se_bar = nan, 0, nan, nan, nan
    else:
        w = 1.0 / se[usable] ** 2
        sw = float(w.sum())
        mu_bar = float(np.dot(w, est[usable]) / sw)
        se_bar = float(np.sqrt(1.0 / sw))
        q_b = float(np.dot(w, (est[usable] - mu_bar) ** 2))
        df = n_groups - 1
        if df == 0:
            q_b, p = 0.0, nan
            notes.append("only one group: no between-group comparison (Q_between = 0, p undefined)")
        else:
            p = float(stats.chi2.sf(q_b, df))

    return SubgroupResult(
        method=method, labels=labels, results=tuple(results), q_between=q_b, df=df,
        pvalue=p, estimate=mu_bar, se=se_bar, note="; ".join(notes),
    )
