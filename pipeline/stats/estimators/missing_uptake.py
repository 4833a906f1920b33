"""Worst-case bounds on the complier share when uptake reports are missing.

A participant without an uptake report by the cutoff may or may not have
taken up.  Without assumptions about why reports are missing, the uptake
share of an arm lies between the share obtained by counting every missing
report as "not taken up" and the share obtained by counting it as "taken
up"; the complier share (treated uptake minus control uptake) lies between
the two extreme differences.  These are the worst-case (no-assumption)
bounds of Manski (1990) applied to the first stage.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from takeup.pipeline.stats.readonly import readonly_array as _ro

__all__ = ["ComplierShareBounds", "complier_share_bounds"]


@dataclass(frozen=True)
class ComplierShareBounds:
    """Worst-case bounds per site (read-only arrays, NaN where an arm is empty).

    Attributes
    ----------
    low, high : ndarray
        Bounds on the complier share over all assigned participants.
    missing_share_treatment, missing_share_control : ndarray
        Share of assigned participants without an uptake report, per arm.
    """

    low: np.ndarray
    high: np.ndarray
    missing_share_treatment: np.ndarray
    missing_share_control: np.ndarray


def complier_share_bounds(taken_t, missing_t, assigned_t, taken_c, missing_c, assigned_c) -> ComplierShareBounds:
    """Bounds on ``uptake_T - uptake_C`` with every missing report set to 0 or to 1.

    Parameters
    ----------
    taken_t, missing_t, assigned_t : array_like
        Treatment arm: participants reported as taken up, participants with no
        uptake report, and participants assigned (one entry per site).
    taken_c, missing_c, assigned_c : array_like
        The same for the control arm.

    Returns
    -------
    ComplierShareBounds
        ``low = taken_t / N_t - (taken_c + missing_c) / N_c`` (missing treated
        did not take up, missing controls did) and ``high = (taken_t +
        missing_t) / N_t - taken_c / N_c``.  The width is the sum of the two
        arms' missing shares; with no missing report both equal the complier
        share over all assigned participants.

    Notes
    -----
    The bounds assume nothing about the missing reports (not even that they
    are missing at random), so they are wide; the complete-case estimate in
    ``site_estimates`` is the point inside them that is right when reports are
    missing at random within arms.  Monotonicity is not imposed, so ``low``
    may be negative.

    References
    ----------
    .. [1] Manski, C. F. (1990). Nonparametric bounds on treatment effects.
       *American Economic Review, Papers and Proceedings* 80(2), 319-323.
       (Cited from memory.)
    """
    arrs = [np.atleast_1d(np.asarray(v, dtype=float)) for v in
            (taken_t, missing_t, assigned_t, taken_c, missing_c, assigned_c)]
    xt, mt, nt, xc, mc, nc = np.broadcast_arrays(*arrs)
    for x, m, n, arm in ((xt, mt, nt, "treatment"), (xc, mc, nc, "control")):
        ok = np.isfinite(x) & np.isfinite(m) & np.isfinite(n)
        if np.any((x[ok] < 0) | (m[ok] < 0) | (x[ok] + m[ok] > n[ok] + 1e-9)):
            raise ValueError(f"{arm} arm: counts must satisfy 0 <= taken + missing <= assigned")
    with np.errstate(invalid="ignore", divide="ignore"):
        ok = (nt > 0) & (nc > 0)
        st = np.where(nt > 0, mt / np.where(nt > 0, nt, 1.0), np.nan)
        sc = np.where(nc > 0, mc / np.where(nc > 0, nc, 1.0), np.nan)
        low = np.where(ok, xt / nt - (xc + mc) / nc, np.nan)
        high = np.where(ok, (xt + mt) / nt - xc / nc, np.nan)
    return ComplierShareBounds(low=_ro(low), high=_ro(high), missing_share_treatment=_ro(st),
                               missing_share_control=_ro(sc))
