r"""How precise are we, and when will we know? Minimum detectable effects and their forecast.

The minimum detectable ITT at two-sided level :math:`\alpha` and power
:math:`1-\beta` is (Bloom 1995)

.. math:: MDE_{ITT} = (z_{1-\alpha/2} + z_{1-\beta})\; SE(\widehat{ITT}),

and, since the CACE is the ITT divided by the complier share :math:`\pi`,
the minimum detectable CACE is :math:`MDE_{ITT} / \pi` (Bloom 1995; Duflo,
Glennerster & Kremer 2007, the section on imperfect compliance): a low
complier share inflates it.  It is not available when the complier share's
interval includes 0 (any effect size is then compatible with the data).

The forecast assumes the standard error falls as :math:`1/\sqrt n` at the
current complier share and missing-outcome rate: the participants needed for
a target MDE are :math:`n (MDE / target)^2`, reached after
:math:`(n_{needed} - n) / accrual` weeks at the current weekly accrual.

References
----------
.. [1] Bloom, H. S. (1995). Minimum detectable effects: a simple way to report
   the statistical power of experimental designs. *Evaluation Review* 19(5),
   547-556.
.. [2] Duflo, E., Glennerster, R. and Kremer, M. (2007). Using randomization in
   development economics research: a toolkit. In *Handbook of Development
   Economics* vol. 4, 3895-3962. Elsevier.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
from scipy import special

from takeup.pipeline.stats.readonly import readonly_array as _ro

__all__ = ["mde_multiplier", "PrecisionForecast", "precision_forecast"]


def mde_multiplier(alpha: float, power: float) -> float:
    r""":math:`z_{1-\alpha/2} + z_{1-\beta}`: the MDE in standard errors (Bloom 1995)."""
    if not (0.0 < alpha < 1.0):
        raise ValueError(f"alpha must be strictly between 0 and 1, got {alpha!r}")
    if not (0.0 < power < 1.0):
        raise ValueError(f"power must be strictly between 0 and 1, got {power!r}")
    return float(special.ndtri(1.0 - alpha / 2.0) + special.ndtri(power))


@dataclass(frozen=True)
class PrecisionForecast:
    """Minimum detectable effects now, and when a target will be reached (one row per site or pool).

    Attributes
    ----------
    mde_itt, mde_cace : ndarray
        In outcome units; NaN with a ``note`` where undefined.
    weeks_to_target : ndarray
        Weeks from now until ``mde_cace`` reaches the target at the current
        accrual; 0 when it already has, ``inf`` when accrual has stopped, NaN
        when undefined.
    n_needed : ndarray
        Participants needed for the target.
    note : ndarray of object
    """

    mde_itt: np.ndarray
    mde_cace: np.ndarray
    n_needed: np.ndarray
    weeks_to_target: np.ndarray
    note: np.ndarray


def precision_forecast(itt_se, complier_share, complier_share_low, n, accrual_per_week,
                       target_mde: float | None, alpha: float, power: float) -> PrecisionForecast:
    """Minimum detectable ITT and CACE and the time until the CACE's reaches ``target_mde``.

    Parameters
    ----------
    itt_se : array_like
        Standard error of the ITT now.
    complier_share, complier_share_low : array_like
        The complier share and the lower end of its interval (the CACE MDE is
        undefined where that interval reaches 0 or below).
    n : array_like
        Participants in the analysis now.
    accrual_per_week : array_like
        Recent weekly accrual of participants.
    target_mde : float or None
        Target minimum detectable CACE in outcome units (no forecast when None).
    alpha, power : float
        Two-sided level and power.
    """
    k = mde_multiplier(alpha, power)
    se = np.asarray(itt_se, dtype=float)
    pi = np.asarray(complier_share, dtype=float)
    pi_low = np.asarray(complier_share_low, dtype=float)
    n = np.asarray(n, dtype=float)
    acc = np.asarray(accrual_per_week, dtype=float)
    rows = se.shape[0]
    note = np.full(rows, None, dtype=object)
    mde_itt = np.where(np.isfinite(se) & (se > 0), k * se, np.nan)
    cace_ok = np.isfinite(mde_itt) & np.isfinite(pi) & (pi > 0) & np.isfinite(pi_low) & (pi_low > 0)
    with np.errstate(all="ignore"):
        mde_cace = np.where(cace_ok, mde_itt / np.where(cace_ok, pi, 1.0), np.nan)
    for i in np.flatnonzero(~np.isfinite(mde_itt)):
        note[i] = "no standard error for the ITT: minimum detectable effect not available"
    for i in np.flatnonzero(np.isfinite(mde_itt) & ~cace_ok):
        note[i] = ("the complier share's interval includes 0 (or it is missing): minimum detectable CACE "
                   "not available")
    n_needed = np.full(rows, np.nan)
    weeks = np.full(rows, np.nan)
    if target_mde is not None:
        if not (np.isfinite(target_mde) and target_mde > 0):
            raise ValueError(f"target_mde must be a positive number, got {target_mde!r}")
        ok = np.isfinite(mde_cace) & np.isfinite(n) & (n > 0)
        with np.errstate(all="ignore"):
            need = np.where(ok, n * (mde_cace / target_mde) ** 2, np.nan)
            reached = ok & (need <= n)
            moving = ok & ~reached & np.isfinite(acc) & (acc > 0)
            stopped = ok & ~reached & ~moving
            weeks = np.where(reached, 0.0, np.where(moving, (need - n) / np.where(moving, acc, 1.0),
                                                    np.where(stopped, np.inf, np.nan)))
        n_needed = np.where(ok, np.ceil(need), np.nan)
        for i in np.flatnonzero(stopped):
            note[i] = "never at the current accrual: no participants were assigned in the recent weeks"
    return PrecisionForecast(_ro(mde_itt), _ro(mde_cace), _ro(n_needed), _ro(weeks), note)
