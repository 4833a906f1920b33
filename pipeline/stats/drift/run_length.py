"""Run lengths of the Bernoulli CUSUM (:mod:`takeup.pipeline.stats.drift.chart`):
exact average run lengths by a Markov chain, and run lengths by simulation.

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
.. [3] Brook, D. and Evans, D. A. (1972). An approach to the probability
   distribution of CUSUM run length. *Biometrika* 59(3), 539-549.
"""

from __future__ import annotations

import math
import warnings
from dataclasses import dataclass
from fractions import Fraction

import numpy as np
import scipy.sparse as sparse
from scipy.sparse.linalg import MatrixRankWarning, spsolve
from scipy.stats import binom

from takeup.pipeline.stats.drift.chart import _param_note, _readonly

__all__ = ["ArlResult", "SimulatedArl", "arl_bernoulli", "arl_bernoulli_simulated"]

_DEFAULT_REL_TOL = 1e-6
_DEFAULT_MAX_STATES = 400_000


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
    if group_size == 1:
        return _two_point_chain_arl(grid, n_states, q_up)
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
    with np.errstate(all="ignore"), warnings.catch_warnings():
        warnings.simplefilter("ignore", MatrixRankWarning)
        sol = spsolve(matrix, np.ones(n_states))
    return float(np.atleast_1d(sol)[0]) * group_size


def _two_point_chain_arl(grid: _Grid, n_states: int, q_up: float) -> float:
    """:func:`_chain_arl` for one participant per step, with ``I - Q`` built directly in CSR form.

    Row ``s`` holds at most three entries in column order: the down-move ``max(0, s - D)``, the
    diagonal and the up-move ``s + U`` (dropped when it signals); for ``s < D`` and ``s = 0`` the
    down-move lands on state 0, which is the diagonal itself when ``s = 0``.  The same matrix as
    the general construction, without its coordinate-format detour (a calibration solves it
    hundreds of times).
    """
    n, up, down = n_states, grid.up_units, grid.down_units
    s = np.arange(n)
    down_col = np.maximum(s - down, 0)
    has_up = s + up < n
    # per row: [down (absent on row 0, where it is the diagonal), diagonal, up (if inside)]
    counts = 1 + (s > 0) + has_up
    indptr = np.zeros(n + 1, dtype=np.int64)
    np.cumsum(counts, out=indptr[1:])
    cols = np.full((n, 3), -1, dtype=np.int64)
    vals = np.zeros((n, 3))
    cols[1:, 0] = down_col[1:]
    vals[1:, 0] = -(1.0 - q_up)
    cols[:, 1] = s
    vals[:, 1] = 1.0
    vals[0, 1] = q_up                        # state 0 stays at 0 on a down-move
    cols[has_up, 2] = s[has_up] + up
    vals[has_up, 2] = -q_up
    keep = cols >= 0
    matrix = sparse.csr_matrix((vals[keep], cols[keep], indptr), shape=(n, n))
    with np.errstate(all="ignore"), warnings.catch_warnings():
        warnings.simplefilter("ignore", MatrixRankWarning)   # singular: the chart never signals (caller's NaN)
        sol = spsolve(matrix, np.ones(n))
    return float(np.atleast_1d(sol)[0])


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
