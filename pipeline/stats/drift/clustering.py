"""Drift charts under cluster randomisation: intra-cluster correlation and design effects.

When clusters (classrooms, villages) are randomised, uptake is correlated within a cluster,
so a cohort of participants carries less information than as many independent ones and a
Bernoulli chart run on participants false-alarms far more often than designed.  The charts
then run on **cluster-level cohort summaries**: every cluster is one observation, dated at
the period in which its first participant was assigned, with its uptake count ``x`` and
uptake reports ``n`` divided by its design effect ``d = 1 + (n - 1) rho`` -- the Rao & Scott
(1992) adjustment, which gives ``(x/d, n/d)`` the binomial variance of a sample of ``n/d``
independent participants (the "effective" participants).  The Bernoulli CUSUM, its design
for a target in-control ARL and its calibration for an estimated level are then applied to
the effective counts unchanged, with the ARL counted in effective participants.

The intra-cluster correlation ``rho`` of each arm is the one-way analysis-of-variance
estimator for binary data (Ridout, Demetrio & Firth 1999 compare it with others), pooled
over the groups (site x arm) the clusters belong to, so that differences *between* sites do
not count as clustering.

References
----------
.. [1] Rao, J. N. K. and Scott, A. J. (1992). A simple method for the analysis of clustered
   binary data. *Biometrics* 48(2), 577-585.
.. [2] Kish, L. (1965). *Survey Sampling*. New York: Wiley (the design effect
   ``1 + (m - 1) rho`` of a cluster of ``m``).
.. [3] Ridout, M. S., Demetrio, C. G. B. and Firth, D. (1999). Estimating intraclass
   correlation for binary data. *Biometrics* 55(1), 137-148 (cited from memory).
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

__all__ = ["IccEstimate", "icc_anova", "design_effects"]


@dataclass(frozen=True)
class IccEstimate:
    """Pooled one-way ANOVA estimate of the intra-cluster correlation.

    Attributes
    ----------
    rho : float
        Estimate kept in ``[0, 1)`` (NaN when not estimable, see ``note``).
    raw : float
        Estimate before truncation at 0 (it can be negative by chance).
    n_clusters, n_groups : int
        Clusters used and groups (site x arm) they were pooled over.
    df_between : int
        ``sum over groups of (clusters - 1)``.
    note : str
        ``""`` or why ``rho`` is not available.
    """

    rho: float
    raw: float
    n_clusters: int
    n_groups: int
    df_between: int
    note: str


def icc_anova(x, n, group) -> IccEstimate:
    r"""Intra-cluster correlation of binary outcomes by one-way ANOVA, pooled within groups.

    Parameters
    ----------
    x, n : array_like, shape (clusters,)
        Successes and participants per cluster (clusters with ``n = 0`` are ignored).
    group : array_like, shape (clusters,)
        Group of each cluster (e.g. its site); cluster means are compared with their
        group's mean, never with other groups'.

    Returns
    -------
    IccEstimate

    Notes
    -----
    With ``p_j = x_j / n_j`` and ``p_g`` the pooled rate of group ``g``:

    .. math:: \mathrm{MSB} = \frac{\sum_j n_j (p_j - p_{g(j)})^2}{\sum_g (k_g - 1)},\quad
              \mathrm{MSW} = \frac{\sum_j x_j (1 - p_j)}{N - K},\quad
              n_0 = \frac{N - \sum_g \sum_{j \in g} n_j^2 / N_g}{\sum_g (k_g - 1)},

    :math:`\hat\rho = (\mathrm{MSB} - \mathrm{MSW}) / (\mathrm{MSB} + (n_0 - 1)\mathrm{MSW})`,
    truncated at 0 (the usual practice).  ``K`` clusters, ``N`` participants, ``k_g`` clusters
    in group ``g`` (Ridout, Demetrio & Firth 1999, the ANOVA estimator, from memory; with one
    group it is the textbook unbalanced one-way estimator).

    References
    ----------
    .. [1] Ridout, M. S., Demetrio, C. G. B. and Firth, D. (1999). Estimating intraclass
       correlation for binary data. *Biometrics* 55(1), 137-148 (cited from memory).
    """
    x = np.asarray(x, dtype=float).reshape(-1)
    n = np.asarray(n, dtype=float).reshape(-1)
    group = np.asarray(group).reshape(-1)
    if not (x.shape == n.shape == group.shape):
        raise ValueError("x, n and group must have one entry per cluster")
    keep = np.isfinite(n) & (n > 0) & np.isfinite(x)
    x, n, group = x[keep], n[keep], group[keep]
    if np.any(x < 0) or np.any(x > n):
        raise ValueError("counts must satisfy 0 <= x <= n")
    k = int(x.size)
    _, gi = np.unique(group, return_inverse=True) if k else (np.array([]), np.array([], dtype=int))
    n_groups = int(gi.max()) + 1 if k else 0
    ng = np.bincount(gi, weights=n, minlength=n_groups)
    xg = np.bincount(gi, weights=x, minlength=n_groups)
    kg = np.bincount(gi, minlength=n_groups)
    df_b = int(np.sum(np.maximum(kg - 1, 0)))
    big_n = float(n.sum())
    df_w = big_n - k
    if df_b < 1 or df_w < 1:
        return IccEstimate(float("nan"), float("nan"), k, n_groups, df_b,
                           "intra-cluster correlation not estimable: fewer than two clusters with uptake "
                           "reports in every group, or only one participant per cluster")
    pj = x / n
    pg = xg[gi] / ng[gi]
    msb = float(np.sum(n * (pj - pg) ** 2)) / df_b
    msw = float(np.sum(x * (1.0 - pj))) / df_w
    n0 = (big_n - float(np.sum(n ** 2 / ng[gi]))) / df_b
    denom = msb + (n0 - 1.0) * msw
    if not denom > 0:
        return IccEstimate(float("nan"), float("nan"), k, n_groups, df_b,
                           "intra-cluster correlation not estimable: no variation in uptake")
    raw = (msb - msw) / denom
    return IccEstimate(float(min(max(raw, 0.0), 1.0 - 1e-9)), float(raw), k, n_groups, df_b, "")


def design_effects(n, rho) -> np.ndarray:
    """Design effect ``1 + (n - 1) rho`` of clusters of ``n`` participants (Kish 1965).

    Parameters
    ----------
    n : array_like
        Participants (uptake reports) per cluster.
    rho : float or array_like
        Intra-cluster correlation, broadcast against ``n``.

    Returns
    -------
    ndarray
        At least 1 (NaN where ``rho`` is NaN).
    """
    n = np.asarray(n, dtype=float)
    rho = np.asarray(rho, dtype=float)
    return np.maximum(1.0 + np.maximum(n - 1.0, 0.0) * rho, 1.0)
