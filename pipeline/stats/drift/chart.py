"""One-sided Bernoulli CUSUM charts for uptake drift, with exact ARLs.

Each site reports weekly assignment cohorts; for every site x arm x period
we know ``n`` (participants assigned in the period) and ``x`` (of them, how
many took up).  Two drifts matter:

* control-arm uptake **rising** (contamination): an *upward* chart,
  ``p1 > p0``;
* treatment-arm uptake **falling** (offers not delivered): a *downward*
  chart, ``p1 < p0``.

The chart (Reynolds & Stoumbos 1999) adds, for every participant, the log
likelihood ratio of the out-of-control rate ``p1`` against the in-control
rate ``p0``: ``log(p1/p0)`` for a participant who took up and
``log((1-p1)/(1-p0))`` for one who did not.  With grouped (binomial) data a
period with ``x`` successes out of ``n`` adds their sum, and the chart is

    S_t = max(0, S_{t-1} + x_t log(p1/p0) + (n_t - x_t) log((1-p1)/(1-p0))),

with ``S_0 = 0``; it signals when ``S_t >= h``.

Run lengths are counted in participants (Bernoulli observations), so a
design does not depend on how many participants a site enrols per week.

The chart's run-length distribution (exact ARL by a Markov chain, and by
simulation) is in :mod:`takeup.pipeline.stats.drift.run_length`; choosing ``h``
for a target in-control ARL, and the default design, in
:mod:`takeup.pipeline.stats.drift.design`; the in-control level from baseline
periods in :mod:`takeup.pipeline.stats.drift.baseline`.

References
----------
.. [1] Reynolds, M. R. Jr. and Stoumbos, Z. G. (1999). A CUSUM chart for
   monitoring a proportion when inspecting continuously. *Journal of
   Quality Technology* 31(1), 87-108.
.. [2] Page, E. S. (1954). Continuous inspection schemes. *Biometrika*
   41(1/2), 100-115.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from takeup.pipeline.stats.readonly import readonly_array

__all__ = ["CusumResult", "bernoulli_cusum", "shifted_rate"]


def _readonly(arr) -> np.ndarray:
    return readonly_array(arr, dtype=None)


def _param_note(p0: float, p1: float, h: float | None = None) -> str:
    """Reason a chart with these parameters is undefined ('' when it is fine)."""
    if not (np.isfinite(p0) and 0.0 < p0 < 1.0):
        return f"in-control rate p0={p0} is not strictly between 0 and 1: chart undefined"
    if not (np.isfinite(p1) and 0.0 < p1 < 1.0):
        return f"out-of-control rate p1={p1} is not strictly between 0 and 1: chart undefined"
    if p1 == p0:
        return "p1 equals p0: there is no shift to detect, chart undefined"
    if h is not None and not (np.isfinite(h) and h > 0.0):
        return f"threshold h={h} is not a positive number: chart undefined"
    return ""


def shifted_rate(p0, odds_ratio):
    """Rate whose odds are ``odds_ratio`` times the odds of ``p0``.

    Parameters
    ----------
    p0 : array_like
        Baseline rate(s) in (0, 1).
    odds_ratio : array_like
        Positive odds ratio(s); broadcast against ``p0``.

    Returns
    -------
    ndarray
        ``odds_ratio * p0 / (1 - p0 + odds_ratio * p0)`` (NaN where ``p0`` is
        outside (0, 1) or the odds ratio is not positive).
    """
    p0 = np.asarray(p0, dtype=float)
    odds_ratio = np.asarray(odds_ratio, dtype=float)
    ok = (p0 > 0) & (p0 < 1) & (odds_ratio > 0) & np.isfinite(odds_ratio)
    with np.errstate(invalid="ignore", divide="ignore"):
        out = odds_ratio * p0 / (1.0 - p0 + odds_ratio * p0)
    return np.where(ok, out, np.nan)


@dataclass(frozen=True)
class CusumResult:
    """Bernoulli CUSUM paths of many series (one row per series).

    Attributes
    ----------
    statistic : ndarray, shape (series, periods)
        ``S_t`` after each period (NaN for a series whose chart is undefined).
    first_signal : ndarray of int, shape (series,)
        Index of the first period with ``S_t >= h``; ``-1`` if none.
    final_statistic : ndarray, shape (series,)
        ``S_t`` after the last period.
    signalled : ndarray of bool, shape (series,)
        Whether the chart signalled in any period.
    p0, p1, h : ndarray, shape (series,)
        Chart parameters per series.
    notes : tuple of str
        One entry per series: ``""`` or why the chart is undefined.
    """

    statistic: np.ndarray
    first_signal: np.ndarray
    final_statistic: np.ndarray
    signalled: np.ndarray
    p0: np.ndarray
    p1: np.ndarray
    h: np.ndarray
    notes: tuple[str, ...]


def _per_series(value, n_series: int, name: str) -> np.ndarray:
    arr = np.asarray(value, dtype=float)
    if arr.ndim > 1:
        arr = arr.reshape(-1)
    try:
        return np.broadcast_to(arr, (n_series,)).astype(float)
    except ValueError:
        raise ValueError(f"{name} must be a scalar or have one entry per series ({n_series})") from None


def bernoulli_cusum(x, n, p0, p1, h) -> CusumResult:
    """Run one-sided Bernoulli CUSUM charts on grouped uptake counts.

    Parameters
    ----------
    x : array_like, shape (series, periods)
        Participants who took up, per series (e.g. site x arm) and period.
        A 1-D array is read as a single series.
    n : array_like, same shape as ``x``
        Participants assigned in each period.  Periods with ``n`` equal to
        0 or NaN (or ``x`` NaN) had no participants and add nothing.
    p0 : array_like
        In-control uptake rate, scalar or one per series.
    p1 : array_like
        Out-of-control rate the chart is tuned to, scalar or one per
        series: ``p1 > p0`` makes an upward chart, ``p1 < p0`` a downward
        one.
    h : array_like
        Decision threshold (``> 0``), scalar or one per series.

    Returns
    -------
    CusumResult
        Paths, first signal period, final value and signal flag.  A series
        with ``p0`` or ``p1`` outside (0, 1), ``p1 == p0`` or ``h <= 0`` gets a
        NaN path, ``first_signal = -1`` and a note.

    Raises
    ------
    ValueError
        If shapes differ, or a count is negative or ``x > n``.

    Notes
    -----
    The recursion ``S_t = max(0, S_{t-1} + z_t)`` with ``S_0 = 0`` equals
    ``C_t - min(0, C_1, ..., C_t)`` with ``C_t = z_1 + ... + z_t`` (Lindley's
    identity), which is evaluated with cumulative sums over all series at
    once.  The chart is not reset after a signal: the path records what
    happened after it too.  The increment is the log-likelihood ratio of the
    period's ``x`` successes out of ``n`` [1]_, so each period is one step
    (see the module docstring for how this relates to the per-participant
    ARL).

    References
    ----------
    .. [1] Reynolds, M. R. Jr. and Stoumbos, Z. G. (1999). A CUSUM chart for
       monitoring a proportion when inspecting continuously. *Journal of
       Quality Technology* 31(1), 87-108.
    """
    x = np.asarray(x, dtype=float)
    n = np.asarray(n, dtype=float)
    if x.shape != n.shape:
        raise ValueError(f"x has shape {x.shape} but n has shape {n.shape}")
    if x.ndim == 1:
        x = x.reshape(1, -1)
        n = n.reshape(1, -1)
    if x.ndim != 2:
        raise ValueError("x and n must be 2-D arrays (series x periods)")
    n_series, _ = x.shape

    if np.any(n[np.isfinite(n)] < 0):
        raise ValueError("participant counts n must be non-negative")
    present = np.isfinite(n) & (n > 0) & np.isfinite(x)
    xv = np.where(present, x, 0.0)
    nv = np.where(present, n, 0.0)
    if np.any(xv < 0) or np.any(xv > nv):
        raise ValueError("counts must satisfy 0 <= x <= n")

    p0a = _per_series(p0, n_series, "p0")
    p1a = _per_series(p1, n_series, "p1")
    ha = _per_series(h, n_series, "h")
    notes = tuple(_param_note(a, b, c) for a, b, c in zip(p0a, p1a, ha))
    valid = np.array([note == "" for note in notes], dtype=bool)

    safe_p0 = np.where(valid, p0a, 0.5)
    safe_p1 = np.where(valid, p1a, 0.25)
    score_success = np.log(safe_p1 / safe_p0)[:, None]
    score_failure = np.log((1.0 - safe_p1) / (1.0 - safe_p0))[:, None]
    increments = xv * score_success + (nv - xv) * score_failure

    cumulative = np.cumsum(increments, axis=1)
    running_min = np.minimum(np.minimum.accumulate(cumulative, axis=1), 0.0)
    statistic = np.maximum(cumulative - running_min, 0.0)
    statistic[~valid] = np.nan

    above = statistic >= np.where(valid, ha, np.inf)[:, None]
    signalled = above.any(axis=1) & valid
    first_index = np.argmax(above, axis=1) if above.shape[1] else np.zeros(n_series, np.int64)
    first_signal = np.where(signalled, first_index, -1).astype(np.int64)
    if statistic.shape[1]:
        final = statistic[:, -1].copy()
    else:
        final = np.where(valid, 0.0, np.nan)

    return CusumResult(
        statistic=_readonly(statistic),
        first_signal=_readonly(first_signal),
        final_statistic=_readonly(final),
        signalled=_readonly(signalled),
        p0=_readonly(p0a),
        p1=_readonly(p1a),
        h=_readonly(ha),
        notes=notes,
    )
