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

Default design for uptake monitoring
------------------------------------
Both charts aim at a doubling (contamination) or halving (non-delivery) of
the *odds* of uptake -- ``odds_ratio = 2`` and ``0.5``
(:data:`DEFAULT_ODDS_RATIO_RISE`, :data:`DEFAULT_ODDS_RATIO_FALL`) -- with
``h`` chosen by :func:`design_cusum` so that the *per-participant* chart
has an in-control ARL of at least ``DEFAULT_TARGET_ARL0 = 1000``
participants.  The odds scale makes one shift size meaningful at any
baseline rate (a 5 % control uptake becoming 9.5 %, a 70 % treatment uptake
becoming 54 %).  Designing the per-participant chart is deliberate: the
chart run on weekly cohorts resets at zero only between periods, so at
every period end its statistic is at most the per-participant one
(``max(0, .)`` is monotone and applied less often) and it cannot signal
earlier.  Its in-control ARL is therefore at least the designed 1000 *for
any cohort sizes*, and in practice several times more.  The floor of 1000
is a starting point: with a near-geometric run length (an approximation,
common practice) a chart followed over ``N`` in-control participants
false-alarms with probability about ``1 - exp(-N / ARL0)``, so raise
``target_arl0`` for large site-arms or many charts -- the delay grows only
with ``log(ARL0)``.

Thresholds chosen by :func:`design_cusum` for this default, and the ARLs
they give, computed with :func:`arl_bernoulli` (Markov chain, in
participants; ARL0 in control, ARL1 = zero-state detection delay with the
planted shift ``p1`` present from the start), for the per-participant chart
(g = 1) and for the grouped chart with periods of exactly g participants:

==========  ====  ======  =======  ==============  ==============  ===============
chart       p0    p1      h        g = 1           g = 10          g = 25
                                   ARL0 / ARL1     ARL0 / ARL1     ARL0 / ARL1
==========  ====  ======  =======  ==============  ==============  ===============
rise, OR 2  0.05  0.0952  2.64653  1006.5 / 114.0  1554.0 / 137.9  2511.6 / 165.0
rise, OR 2  0.10  0.1818  3.15373  1000.7 /  80.1  1973.2 / 101.9  3045.6 / 117.6
rise, OR 2  0.20  0.3333  3.61371  1011.4 /  60.0  2354.8 /  77.6  4347.2 /  91.7
fall, OR ½  0.70  0.5385  3.78327  1000.7 /  54.0  2554.9 /  70.3  4822.2 /  82.9
fall, OR ½  0.90  0.8182  3.15373  1000.7 /  80.1  1973.2 / 101.9  3045.6 / 117.6
==========  ====  ======  =======  ==============  ==============  ===============

(The last row mirrors the second: a falling chart at ``p0`` is the rising
chart at ``1 - p0``.)  So a doubling of the control-arm odds from 10 % is
flagged after about 80-120 participants (3-5 weeks at 25 a week), and the
in-control ARL floor of 1000 becomes about 3000 with weekly cohorts of 25.
Where cohorts are stable, ``design_cusum(..., group_size=g)`` trades that
surplus for speed (p0 = 0.10, g = 25: h = 2.16606, ARL0 1243, ARL1 91.0).

Markov chain and its discretisation
-----------------------------------
Per participant the chart moves up by ``u > 0`` (a success on an upward
chart, a failure on a downward one) or down by ``d > 0``, floored at zero.
:func:`arl_bernoulli` puts the chart on a grid of step ``delta`` chosen so
that the smaller of ``u`` and ``d`` is an exact multiple of ``delta`` and
the larger one is the nearest multiple: the ratio of the two steps is
replaced by its best rational approximation (continued fractions, via
:meth:`fractions.Fraction.limit_denominator`) with relative error below
``rel_tol`` (default ``1e-6``).  On that grid the chart is a finite Markov
chain on states ``0 .. H-1`` (``H = ceil(h/delta)``; states ``>= H`` are
the absorbing signal), and the ARL from zero solves the sparse linear system
``(I - Q) L = 1`` exactly.  (A threshold that equals a reachable value up
to the rounding below, e.g. ``h = log(p1/p0)``, is treated as equal, so
that ``S >= h`` signals there as in the chart.)  The only approximation is the rounded larger
step: after ``k`` large steps the chain's value is off by at most
``k * rel_tol * max(u, d)`` (of order ``1e-5`` over an excursion of the
designs above, against grid steps of ``2e-4`` to ``3.5e-4``).  Because the
ARL of the exact chart is a step function of ``h`` (it jumps, by up to
about 1 %, when ``h`` crosses a reachable value ``i*u - j*d``), that error
matters only when ``h`` lies within that distance of a reachable value;
otherwise the chain value *is* the exact ARL up to linear-algebra rounding.
:func:`design_cusum` places ``h`` half a grid step inside the chosen grid
cell, away from any reachable value; the jumps are why designed ARL0s
overshoot their target by up to about 1 %.  The grouped chart (periods of
exactly ``g`` participants) is the same chain with ``g + 1`` transitions per
state, ``k ~ Binomial(g, .)`` up-steps and ``g - k`` down-steps.  In the
tests the chain agrees with simulation of the exact (unrounded) chart
within Monte Carlo error.

References
----------
.. [1] Reynolds, M. R. Jr. and Stoumbos, Z. G. (1999). A CUSUM chart for
   monitoring a proportion when inspecting continuously. *Journal of
   Quality Technology* 31(1), 87-108.
.. [2] Page, E. S. (1954). Continuous inspection schemes. *Biometrika*
   41(1/2), 100-115.
.. [3] Brook, D. and Evans, D. A. (1972). An approach to the probability
   distribution of CUSUM run length. *Biometrika* 59(3), 539-549.
"""

from __future__ import annotations

import math
from dataclasses import dataclass
from fractions import Fraction

import numpy as np
import scipy.sparse as sparse
from scipy.sparse.linalg import spsolve
from scipy.stats import binom

__all__ = [
    "DEFAULT_ODDS_RATIO_RISE",
    "DEFAULT_ODDS_RATIO_FALL",
    "DEFAULT_TARGET_ARL0",
    "CusumResult",
    "ArlResult",
    "SimulatedArl",
    "CusumDesign",
    "BaselineRate",
    "bernoulli_cusum",
    "arl_bernoulli",
    "arl_bernoulli_simulated",
    "design_cusum",
    "baseline_rate",
    "shifted_rate",
]

#: Odds ratio the contamination (control-arm, upward) chart is tuned to detect.
DEFAULT_ODDS_RATIO_RISE = 2.0
#: Odds ratio the non-delivery (treatment-arm, downward) chart is tuned to detect.
DEFAULT_ODDS_RATIO_FALL = 0.5
#: Default minimum in-control ARL, in participants (see the module docstring).
DEFAULT_TARGET_ARL0 = 1000.0

_DEFAULT_REL_TOL = 1e-6
_DEFAULT_MAX_STATES = 400_000


def _readonly(arr: np.ndarray) -> np.ndarray:
    arr = np.array(arr, copy=True)
    arr.setflags(write=False)
    return arr


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


# ----------------------------------------------------------------------------
# The chart on observed data
# ----------------------------------------------------------------------------


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


# ----------------------------------------------------------------------------
# Exact ARL by a Markov chain
# ----------------------------------------------------------------------------


def _steps(p0: float, p1: float) -> tuple[float, float, bool]:
    """(up step u, down step d, whether the up step is a success)."""
    a = math.log(p1 / p0)
    b = math.log((1.0 - p1) / (1.0 - p0))
    if p1 > p0:
        return a, -b, True
    return b, -a, False


@dataclass(frozen=True)
class _Grid:
    up_units: int
    down_units: int
    delta: float
    rel_error: float


def _grid(u: float, d: float, rel_tol: float, max_units: int) -> _Grid:
    """Grid on which both steps are (nearly) integer multiples of ``delta``."""
    small, large = min(u, d), max(u, d)
    ratio = small / large
    best = None
    bound = 8
    while True:
        frac = Fraction(ratio).limit_denominator(bound)
        n_small, n_large = frac.numerator, frac.denominator
        if n_small >= 1:
            err = abs(ratio * n_large / n_small - 1.0)
            best = (n_small, n_large, err)
            if err <= rel_tol:
                break
        if bound >= max_units:
            break
        bound = min(2 * bound, max_units)
    if best is None:  # ratio below 1/(2*max_units): use one unit for the small step
        best = (1, max(1, round(1.0 / ratio)), abs(ratio * max(1, round(1.0 / ratio)) - 1.0))
    n_small, n_large, err = best
    delta = small / n_small
    if u <= d:
        return _Grid(n_small, n_large, delta, err)
    return _Grid(n_large, n_small, delta, err)


def _chain_arl(grid: _Grid, n_states: int, q_up: float, group_size: int = 1) -> float:
    """ARL (participants) from state 0 of the grid chain with ``n_states`` states.

    One step of the chain is one period of ``group_size`` participants, of
    whom ``k ~ Binomial(group_size, q_up)`` move the chart up; the state
    moves to ``max(0, s + k*U - (group_size - k)*D)`` and is absorbed
    (signal) at ``>= n_states``.
    """
    k = np.arange(group_size + 1)
    weight = binom.pmf(k, group_size, q_up)
    k, weight = k[weight > 0], weight[weight > 0]
    s = np.arange(n_states)
    dest = np.maximum(
        s[:, None] + k[None, :] * grid.up_units - (group_size - k[None, :]) * grid.down_units, 0
    )
    inside = dest < n_states
    rows = np.concatenate([s, np.broadcast_to(s[:, None], dest.shape)[inside]])
    cols = np.concatenate([s, dest[inside]])
    vals = np.concatenate([np.ones(n_states), -np.broadcast_to(weight, dest.shape)[inside]])
    matrix = sparse.csc_matrix((vals, (rows, cols)), shape=(n_states, n_states))
    with np.errstate(all="ignore"):
        sol = spsolve(matrix, np.ones(n_states))
    return float(np.atleast_1d(sol)[0]) * group_size


def _n_states(h: float, delta: float, slack: float = 1e-9) -> int:
    """Transient states for threshold ``h``: grid values ``v >= h/delta - slack`` signal."""
    return max(1, int(math.ceil(h / delta - slack)))


def _tie_slack(grid: _Grid, h: float) -> float:
    """Grid units within which ``h`` counts as equal to a grid value.

    A reachable value lies off its grid point by the rounding of the larger
    step times the number of larger steps taken.  A threshold meant to sit
    on a reachable value (``h = k * u``, say) is reached with about
    ``h / large`` larger steps, so that many roundings (plus one) are
    allowed for.  Capped at a quarter step, so thresholds placed half a step
    inside a cell (as :func:`design_cusum` does) are unaffected.
    """
    n_large = max(grid.up_units, grid.down_units)
    large = n_large * grid.delta
    per_step = grid.rel_error * n_large
    return min(0.25, per_step * (h / large + 1.0) + 1e-9)


@dataclass(frozen=True)
class ArlResult:
    """Average run length (participants) of a Bernoulli CUSUM, by Markov chain.

    Attributes
    ----------
    arl : ndarray
        Zero-state ARL for each entry of ``p_true`` (NaN where undefined).
    p_true : ndarray
        True uptake rates the ARL refers to.
    p0, p1, h : float
        Chart parameters.
    grid_step : float
        ``delta``, the grid on which the chart was represented.
    n_states : int
        Number of transient states ``H = ceil(h / delta)``.
    step_rel_error : float
        Relative error of the rounded larger step (see module docstring).
    group_size : int
        Participants per chart update (1 = per-participant chart).
    notes : tuple of str
        One per entry of ``p_true``: ``""`` or why the ARL is undefined.
    """

    arl: np.ndarray
    p_true: np.ndarray
    p0: float
    p1: float
    h: float
    grid_step: float
    n_states: int
    step_rel_error: float
    group_size: int
    notes: tuple[str, ...]


def arl_bernoulli(
    p0: float,
    p1: float,
    h: float,
    p_true=None,
    *,
    group_size: int = 1,
    rel_tol: float = _DEFAULT_REL_TOL,
    max_states: int = _DEFAULT_MAX_STATES,
) -> ArlResult:
    """Zero-state ARL of the Bernoulli CUSUM, by Markov chain.

    Parameters
    ----------
    p0, p1 : float
        In-control and out-of-control rates of the chart (``p1 > p0``:
        upward chart; ``p1 < p0``: downward chart).
    h : float
        Threshold (``> 0``).
    p_true : float or 1-D array_like, optional
        True uptake rate(s) at which to evaluate the ARL; default ``p0``
        (the in-control ARL).  Each rate needs its own linear solve, hence a
        loop over the entries.
    group_size : int, default 1
        1 evaluates the per-participant chart of [1]_.  ``g > 1`` evaluates
        the grouped chart run by :func:`bernoulli_cusum` on periods of
        exactly ``g`` participants (signal checked at period ends); the
        ARL is still counted in participants (``g`` x periods).  The chain
        then has ``g + 1`` transitions per state.
    rel_tol : float, default 1e-6
        Target relative error of the rounded larger step.
    max_states : int, default 400 000
        Cap on the chain size; if the tolerance would need more states the
        finest grid within the cap is used (see ``step_rel_error``).

    Returns
    -------
    ArlResult
        ARL in participants (Bernoulli observations) starting from
        ``S_0 = 0``.  NaN with a note when the chart is undefined, when
        ``p_true`` is not strictly between 0 and 1, or when the solve fails.

    Notes
    -----
    The discretisation and its error are described in the module
    docstring.  The chain is the Markov-chain approach of Brook & Evans [2]_
    applied to the chart of [1]_; with a two-point step distribution the grid
    can be made (nearly) exact, so no interval-midpoint approximation is
    involved.

    References
    ----------
    .. [1] Reynolds, M. R. Jr. and Stoumbos, Z. G. (1999). A CUSUM chart for
       monitoring a proportion when inspecting continuously. *Journal of
       Quality Technology* 31(1), 87-108.
    .. [2] Brook, D. and Evans, D. A. (1972). An approach to the probability
       distribution of CUSUM run length. *Biometrika* 59(3), 539-549.
    """
    p0 = float(p0)
    p1 = float(p1)
    h = float(h)
    group_size = int(group_size)
    if group_size < 1:
        raise ValueError("group_size must be >= 1")
    pt = np.atleast_1d(np.asarray(p0 if p_true is None else p_true, dtype=float)).reshape(-1)
    note = _param_note(p0, p1, h)
    if note:
        return ArlResult(
            arl=_readonly(np.full(pt.shape, np.nan)),
            p_true=_readonly(pt),
            p0=p0, p1=p1, h=h,
            grid_step=float("nan"), n_states=0, step_rel_error=float("nan"),
            group_size=group_size, notes=tuple(note for _ in pt),
        )
    u, d, up_is_success = _steps(p0, p1)
    max_units = max(8, int(max_states * max(u, d) / h))
    grid = _grid(u, d, rel_tol, max_units)
    n_states = _n_states(h, grid.delta, _tie_slack(grid, h))
    arls = np.full(pt.shape, np.nan)
    notes = []
    for i, p in enumerate(pt):  # one sparse solve per true rate
        if not (np.isfinite(p) and 0.0 < p < 1.0):
            notes.append(f"true rate {p} is not strictly between 0 and 1: ARL not computed")
            continue
        q_up = p if up_is_success else 1.0 - p
        value = _chain_arl(grid, n_states, q_up, group_size)
        if not (np.isfinite(value) and value >= 1.0):
            notes.append("Markov-chain solve failed (ARL too large to compute)")
            continue
        arls[i] = value
        notes.append("")
    return ArlResult(
        arl=_readonly(arls),
        p_true=_readonly(pt),
        p0=p0, p1=p1, h=h,
        grid_step=grid.delta,
        n_states=n_states,
        step_rel_error=grid.rel_error,
        group_size=group_size,
        notes=tuple(notes),
    )


# ----------------------------------------------------------------------------
# ARL by simulation
# ----------------------------------------------------------------------------


@dataclass(frozen=True)
class SimulatedArl:
    """Simulated run lengths of a Bernoulli CUSUM.

    Attributes
    ----------
    arl : float
        Mean run length in participants (NaN if any run was censored).
    se : float
        Monte Carlo standard error, ``sd(run_lengths) / sqrt(n_reps)``.
    run_lengths : ndarray of int
        Participants until the signal, one per replication (censored runs
        hold the length at which they were stopped).
    n_reps : int
    n_censored : int
        Runs that had not signalled after ``max_run_length`` participants.
    group_size : int
        Participants per period (1 = per-participant chart).
    note : str
        ``""`` or why the estimate is undefined.
    """

    arl: float
    se: float
    run_lengths: np.ndarray
    n_reps: int
    n_censored: int
    group_size: int
    note: str


def arl_bernoulli_simulated(
    p0: float,
    p1: float,
    h: float,
    p_true: float | None,
    rng: np.random.Generator,
    *,
    n_reps: int = 2000,
    group_size: int = 1,
    max_run_length: int = 10_000_000,
) -> SimulatedArl:
    """Zero-state ARL of the Bernoulli CUSUM by Monte Carlo simulation.

    Parameters
    ----------
    p0, p1, h : float
        Chart parameters (as in :func:`bernoulli_cusum`).
    p_true : float or None
        True uptake rate of the simulated participants; ``None`` means
        ``p0``.
    rng : numpy.random.Generator
        Source of randomness.
    n_reps : int, default 2000
        Number of independent runs.
    group_size : int, default 1
        1 simulates the per-participant chart (the one :func:`arl_bernoulli`
        evaluates).  ``g > 1`` simulates the grouped chart used on data,
        with cohorts of ``g`` participants per period and the signal checked
        at period ends; run lengths are then multiples of ``g``.
    max_run_length : int, default 10 000 000
        Runs are stopped (censored) after this many participants.

    Returns
    -------
    SimulatedArl

    Notes
    -----
    Runs are simulated side by side; the loop is over chart updates, which
    are sequential by nature.  For ``group_size == 1`` the loop jumps from
    one up-step to the next: the number of down-steps in between is
    geometric and ``k`` consecutive down-steps from ``s`` end at
    ``max(0, s - k*d)``, so the simulated chart is the exact per-participant
    chart of [1]_ (signals can only occur on an up-step).

    References
    ----------
    .. [1] Reynolds, M. R. Jr. and Stoumbos, Z. G. (1999). A CUSUM chart for
       monitoring a proportion when inspecting continuously. *Journal of
       Quality Technology* 31(1), 87-108.
    """
    p0 = float(p0)
    p1 = float(p1)
    h = float(h)
    p = p0 if p_true is None else float(p_true)
    n_reps = int(n_reps)
    group_size = int(group_size)
    if n_reps < 2 or group_size < 1:
        raise ValueError("n_reps must be >= 2 and group_size >= 1")
    note = _param_note(p0, p1, h)
    if not note and not (np.isfinite(p) and 0.0 < p < 1.0):
        note = f"true rate {p} is not strictly between 0 and 1: ARL not simulated"
    if note:
        return SimulatedArl(float("nan"), float("nan"), _readonly(np.zeros(0, dtype=np.int64)),
                            n_reps, 0, group_size, note)

    u, d, up_is_success = _steps(p0, p1)
    stat = np.zeros(n_reps)
    length = np.zeros(n_reps, dtype=np.int64)
    active = np.arange(n_reps)
    censored = np.zeros(n_reps, dtype=bool)
    if group_size == 1:
        q_up = p if up_is_success else 1.0 - p
        while active.size:
            downs = rng.geometric(q_up, size=active.size) - 1
            s = np.maximum(stat[active] - downs * d, 0.0) + u
            stat[active] = s
            length[active] += downs + 1
            done = s >= h
            over = ~done & (length[active] >= max_run_length)
            censored[active[over]] = True
            active = active[~done & ~over]
    else:
        a = math.log(p1 / p0)
        b = math.log((1.0 - p1) / (1.0 - p0))
        while active.size:
            k = rng.binomial(group_size, p, size=active.size)
            s = np.maximum(stat[active] + k * a + (group_size - k) * b, 0.0)
            stat[active] = s
            length[active] += group_size
            done = s >= h
            over = ~done & (length[active] >= max_run_length)
            censored[active[over]] = True
            active = active[~done & ~over]
    n_cens = int(censored.sum())
    if n_cens:
        return SimulatedArl(float("nan"), float("nan"), _readonly(length), n_reps, n_cens, group_size,
                            f"{n_cens} of {n_reps} runs had not signalled after {max_run_length} "
                            "participants: ARL not estimated")
    arl = float(length.mean())
    se = float(length.std(ddof=1) / math.sqrt(n_reps))
    return SimulatedArl(arl, se, _readonly(length), n_reps, 0, group_size, "")


# ----------------------------------------------------------------------------
# Design
# ----------------------------------------------------------------------------


@dataclass(frozen=True)
class CusumDesign:
    """Thresholds chosen for a target in-control ARL (one entry per chart).

    Attributes
    ----------
    p0, p1 : ndarray
        In-control and out-of-control rates.
    odds_ratio : ndarray
        Odds ratio of ``p1`` against ``p0``.
    h : ndarray
        Chosen threshold.
    arl0 : ndarray
        In-control ARL (participants) at ``h``, by Markov chain;
        ``>= target_arl0``.
    arl1 : ndarray
        Zero-state ARL at ``p_true = p1`` (detection delay).
    target_arl0 : float
    group_size : int
        Participants per chart update the design assumes.
    notes : tuple of str
    """

    p0: np.ndarray
    p1: np.ndarray
    odds_ratio: np.ndarray
    h: np.ndarray
    arl0: np.ndarray
    arl1: np.ndarray
    target_arl0: float
    group_size: int
    notes: tuple[str, ...]


def _design_one(p0: float, p1: float, target: float, group_size: int, rel_tol: float,
                max_states: int):
    u, d, up_is_success = _steps(p0, p1)
    q0 = p0 if up_is_success else 1.0 - p0
    q1 = p1 if up_is_success else 1.0 - p1
    # Grid chosen for thresholds up to h = 40 (ARL0 far above any practical target).
    h_cap = 40.0
    grid = _grid(u, d, rel_tol, max(8, int(max_states * max(u, d) / h_cap)))
    cap = _n_states(h_cap, grid.delta)

    cache: dict[int, float] = {}

    def arl0(n_states: int) -> float:
        if n_states not in cache:
            cache[n_states] = _chain_arl(grid, n_states, q0, group_size)
        return cache[n_states]

    def reaches(n_states: int) -> bool:
        value = arl0(n_states)
        return bool(np.isfinite(value) and value >= target)

    # Bracket [lo, hi] with ARL0(lo) < target <= ARL0(hi); ARL0 is
    # non-decreasing in the threshold and is 0 with no transient state.
    lo = 0
    hi = max(1, _n_states(1.0, grid.delta))
    while not reaches(hi):
        if hi >= cap:
            return None, "target ARL0 not reached below h = 40: design not computed"
        lo, hi = hi, min(2 * hi, cap)
    # Bisection on the grid.  (Interpolating log ARL0, which is close to
    # linear in h, saves few solves: ARL0 is a step function of the
    # threshold with flat stretches and jumps of about 1 %.)
    while hi - lo > 1:
        mid = (lo + hi) // 2
        if reaches(mid):
            hi = mid
        else:
            lo = mid
    h = (hi - 0.5) * grid.delta
    return (h, arl0(hi), _chain_arl(grid, hi, q1, group_size)), ""


def design_cusum(
    p0,
    p1=None,
    *,
    shift_odds_ratio=None,
    target_arl0: float = DEFAULT_TARGET_ARL0,
    group_size: int = 1,
    rel_tol: float = _DEFAULT_REL_TOL,
    max_states: int = _DEFAULT_MAX_STATES,
) -> CusumDesign:
    """Choose the CUSUM threshold ``h`` for a target in-control ARL.

    Parameters
    ----------
    p0 : float or 1-D array_like
        In-control rate(s), e.g. from :func:`baseline_rate`.
    p1 : float or 1-D array_like, optional
        Out-of-control rate(s) to tune the chart to.
    shift_odds_ratio : float or 1-D array_like, optional
        Alternatively, the shift as an odds ratio (``> 1``: rise, ``< 1``:
        fall); ``p1 = shifted_rate(p0, shift_odds_ratio)``.  Give exactly one
        of ``p1`` and ``shift_odds_ratio``.
    target_arl0 : float, default :data:`DEFAULT_TARGET_ARL0`
        Minimum in-control ARL in participants.
    group_size : int, default 1
        1 (recommended) designs the per-participant chart; its ARL0 is a
        lower bound for the grouped chart under *any* cohort sizes (module
        docstring).  ``g > 1`` designs for periods of exactly ``g``
        participants: a smaller ``h`` and a shorter delay, but the ARL0
        guarantee is lost when periods hold fewer than ``g`` participants;
        use it only when cohort sizes are stable.
    rel_tol, max_states
        Discretisation controls, as in :func:`arl_bernoulli`.

    Returns
    -------
    CusumDesign
        The smallest threshold on the chain grid whose in-control ARL is at
        least ``target_arl0``, placed half a grid step inside its grid cell,
        with its ARL0 and its zero-state ARL at ``p1``.  NaN with a note for
        ``p0`` or ``p1`` outside (0, 1) or ``p1 == p0``.

    Notes
    -----
    ARL0 is non-decreasing in ``h``, so the threshold is found by doubling
    then bisection on the grid.  ARL0 is a step function of ``h``, so the
    design overshoots the target: by about 1 % for the default designs, but
    a lot when only a handful of uptakes are expected in ``target_arl0``
    participants (``p0 = 0.002``, odds ratio 2, target 1000: ``h = 0.6912``
    and ARL0 = 1500, because the next lower threshold lets a single uptake
    signal, ARL0 = 1/p0 = 500).  Each chart needs its own search, hence a
    loop over the entries of ``p0``; a design takes a few dozen sparse solves
    (well under a second).  Charts sharing a rate can reuse one design.

    References
    ----------
    .. [1] Reynolds, M. R. Jr. and Stoumbos, Z. G. (1999). A CUSUM chart for
       monitoring a proportion when inspecting continuously. *Journal of
       Quality Technology* 31(1), 87-108.
    """
    if (p1 is None) == (shift_odds_ratio is None):
        raise ValueError("give exactly one of p1 and shift_odds_ratio")
    group_size = int(group_size)
    if group_size < 1:
        raise ValueError("group_size must be >= 1")
    target = float(target_arl0)
    if not (np.isfinite(target) and target > 1.0):
        raise ValueError("target_arl0 must be a finite number above 1")
    p0a = np.atleast_1d(np.asarray(p0, dtype=float)).reshape(-1)
    if p1 is None:
        ora = np.atleast_1d(np.asarray(shift_odds_ratio, dtype=float)).reshape(-1)
        p0a, ora = np.broadcast_arrays(p0a, ora)
        p1a = shifted_rate(p0a, ora)
    else:
        p0a, p1a = np.broadcast_arrays(p0a, np.atleast_1d(np.asarray(p1, dtype=float)).reshape(-1))
        p1a = p1a.astype(float)
    p0a = p0a.astype(float)
    with np.errstate(all="ignore"):
        ora = (p1a / (1.0 - p1a)) / (p0a / (1.0 - p0a))
    h = np.full(p0a.shape, np.nan)
    arl0 = np.full(p0a.shape, np.nan)
    arl1 = np.full(p0a.shape, np.nan)
    notes = []
    for i in range(p0a.size):  # one threshold search per chart
        note = _param_note(p0a[i], p1a[i])
        if not note:
            found, note = _design_one(float(p0a[i]), float(p1a[i]), target, group_size, rel_tol,
                                      max_states)
            if found is not None:
                h[i], arl0[i], arl1[i] = found
        notes.append(note)
    ora = np.where(np.isfinite(ora), ora, np.nan)
    return CusumDesign(
        p0=_readonly(p0a),
        p1=_readonly(p1a),
        odds_ratio=_readonly(ora),
        h=_readonly(h),
        arl0=_readonly(arl0),
        arl1=_readonly(arl1),
        target_arl0=target,
        group_size=group_size,
        notes=tuple(notes),
    )


# ----------------------------------------------------------------------------
# In-control level
# ----------------------------------------------------------------------------


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
