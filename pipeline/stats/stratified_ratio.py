"""Sample-ratio check per randomisation stratum.

A site that randomises within strata of different odds is compared stratum by
stratum with each stratum's designed probability: the Pearson statistics of the
strata are added up (:func:`stratified_sample_ratio_test`), so a problem confined to
one stratum is not diluted by the others and strata of different designs do not
raise a false alarm.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
from scipy import stats

from takeup.pipeline.stats.readonly import readonly_array as _ro

__all__ = ["StratifiedRatioResult", "stratified_sample_ratio_test"]


@dataclass(frozen=True)
class StratifiedRatioResult:
    """Per-site summed Pearson chi-square over the strata with a design.

    Attributes
    ----------
    chi2, p_value : ndarray
        Statistic and upper-tail probability (NaN when no stratum has a design and a unit).
    df : ndarray of int
        Strata with a design and at least one unit.
    contribution : ndarray
        Per stratum cell: its Pearson term (NaN for strata without a design).
    top_cell : ndarray of int
        Per site: the cell contributing most (-1 when none).
    """

    chi2: np.ndarray
    df: np.ndarray
    p_value: np.ndarray
    contribution: np.ndarray
    top_cell: np.ndarray


def stratified_sample_ratio_test(site_index, n_treated, n_control, design, n_sites: int) -> StratifiedRatioResult:
    r"""Pearson chi-square of the arm counts summed over each site's strata.

    Parameters
    ----------
    site_index : array_like of int, shape (cells,)
        Site of each site x stratum cell.
    n_treated, n_control : array_like, shape (cells,)
        Units (participants, or clusters under cluster randomisation) per arm.
    design : array_like, shape (cells,)
        Designed probability of the treatment arm in the stratum (NaN: no design; the
        stratum is left out).
    n_sites : int

    Returns
    -------
    StratifiedRatioResult

    Notes
    -----
    For stratum ``s`` with ``N_s`` units and designed probability ``p_s`` the expected
    counts are ``N_s p_s`` and ``N_s (1 - p_s)``; the site's statistic is
    :math:`\sum_s\sum_{arm}(O - E)^2/E`, chi-square with one degree of freedom per stratum
    (each stratum's total is fixed by its own count) under the design [1]_.  The statistic
    is ``scipy.stats.chisquare`` of the stacked observed cells against the stacked
    expected cells (``ddof = S - 1``, which makes its ``df = 2S - 1 - ddof = S``).  The chi-square
    approximation wants expected counts that are not tiny (all ``E >= 5`` is common
    practice).

    References
    ----------
    .. [1] Pearson, K. (1900). On the criterion that a given system of deviations from the
       probable in the case of a correlated system of variables is such that it can be
       reasonably supposed to have arisen from random sampling. Philosophical Magazine
       50(302), 157-175.
    """
    si = np.asarray(site_index, dtype=np.int64)
    o1 = np.asarray(n_treated, dtype=float)
    o0 = np.asarray(n_control, dtype=float)
    p = np.asarray(design, dtype=float)
    k = int(n_sites)
    total = o1 + o0
    used = np.isfinite(p) & (p > 0) & (p < 1) & (total > 0)
    with np.errstate(all="ignore"):
        e1 = total * p
        e0 = total * (1 - p)
        term = np.where(used, (o1 - e1) ** 2 / np.where(used, e1, 1.0) + (o0 - e0) ** 2 / np.where(used, e0, 1.0),
                        np.nan)
    chi2 = np.bincount(si, weights=np.where(used, term, 0.0), minlength=k)
    df = np.bincount(si, weights=used.astype(float), minlength=k).astype(np.int64)
    ok = df > 0
    chi2 = np.where(ok, chi2, np.nan)
    pval = np.where(ok, stats.chi2.sf(np.where(ok, chi2, 0.0), np.maximum(df, 1)), np.nan)
    top = np.full(k, -1, dtype=np.int64)
    best = np.full(k, -np.inf)
    for j in np.flatnonzero(used):          # one pass over the (few) stratum cells, no participant rows
        if term[j] > best[si[j]]:
            best[si[j]] = term[j]
            top[si[j]] = j
    return StratifiedRatioResult(chi2=_ro(chi2), df=_ro(df, np.int64), p_value=_ro(pval), contribution=_ro(term),
                                 top_cell=_ro(top, np.int64))
