"""The in-control uptake level of a drift chart, pooled over a series' baseline periods."""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from takeup.pipeline.stats.drift.chart import _readonly

__all__ = ["BaselineRate", "baseline_rate"]


@dataclass(frozen=True)
class BaselineRate:
    """Pooled uptake rate over the baseline periods, one per series.

    Attributes
    ----------
    rate : ndarray
        Pooled rate kept inside ``[c/N, 1 - c/N]`` (NaN if ``N = 0``).
    x, n : ndarray
        Successes and participants in the baseline periods.
    clipped : ndarray of bool
        Whether the floor or ceiling was applied.
    notes : tuple of str
    """

    rate: np.ndarray
    x: np.ndarray
    n: np.ndarray
    clipped: np.ndarray
    notes: tuple[str, ...]


def baseline_rate(x, n, n_baseline_periods: int, *, continuity: float = 0.5) -> BaselineRate:
    """In-control uptake rate: pooled rate over the first periods.

    Parameters
    ----------
    x, n : array_like, shape (series, periods)
        Uptake counts and participants per period (NaN or ``n = 0`` for
        periods without participants).  A 1-D array is one series.
    n_baseline_periods : int
        Number of leading periods that define the in-control level.  Run
        the chart on the periods after them.
    continuity : float, default 0.5
        Floor/ceiling in participants: the rate is kept inside
        ``[continuity/N, 1 - continuity/N]`` with ``N`` the baseline sample
        size, i.e. a baseline with no (or only) uptake is treated as if half
        a participant had (not) taken up -- the usual continuity correction.
        This keeps ``0 < p0 < 1``, so the chart's log-ratios are finite, and
        it ties the floor to what the baseline can resolve instead of an
        arbitrary constant.

    Returns
    -------
    BaselineRate
        NaN rate and a note for series with no baseline participants.
    """
    x = np.asarray(x, dtype=float)
    n = np.asarray(n, dtype=float)
    if x.shape != n.shape:
        raise ValueError(f"x has shape {x.shape} but n has shape {n.shape}")
    if x.ndim == 1:
        x = x.reshape(1, -1)
        n = n.reshape(1, -1)
    k = int(n_baseline_periods)
    if not 1 <= k <= x.shape[1]:
        raise ValueError(f"n_baseline_periods must be between 1 and {x.shape[1]}")
    if not (np.isfinite(continuity) and 0.0 < continuity <= 0.5):
        raise ValueError("continuity must be in (0, 0.5]")
    xb, nb = x[:, :k], n[:, :k]
    present = np.isfinite(nb) & (nb > 0) & np.isfinite(xb)
    xs = np.where(present, xb, 0.0).sum(axis=1)
    ns = np.where(present, nb, 0.0).sum(axis=1)
    if np.any(xs < 0) or np.any(xs > ns):
        raise ValueError("counts must satisfy 0 <= x <= n")
    has = ns > 0
    with np.errstate(invalid="ignore", divide="ignore"):
        raw = np.where(has, xs / ns, np.nan)
        floor = np.where(has, continuity / ns, np.nan)
    rate = np.clip(raw, floor, 1.0 - floor)
    clipped = has & (rate != raw)
    notes = tuple(
        "no participants in the baseline periods: in-control rate undefined" if not ok
        else (f"baseline uptake {int(xi)} of {int(ni)}: rate kept at {r:.4g} by the "
              f"continuity floor/ceiling" if c else "")
        for ok, c, xi, ni, r in zip(has, clipped, xs, ns, rate)
    )
    return BaselineRate(
        rate=_readonly(rate),
        x=_readonly(xs),
        n=_readonly(ns),
        clipped=_readonly(clipped),
        notes=notes,
    )
