"""Choosing the Bernoulli CUSUM's threshold ``h`` for a target in-control ARL.

Function defaults and the study's design
----------------------------------------
The keyword defaults of :func:`design_cusum` -- a doubling / halving of the
*odds* of uptake (:data:`DEFAULT_ODDS_RATIO_RISE` = 2,
:data:`DEFAULT_ODDS_RATIO_FALL` = 0.5) and an in-control ARL of at least
:data:`DEFAULT_TARGET_ARL0` = 1000 participants -- are generic defaults of
this function only.  A monitoring run does not use them: it designs every
chart with the study's ``[alerts] drift_odds_ratio`` (default **3**) and
``drift_arl0`` (default **2000**), at each site x arm's in-control level
rounded on the logit scale; the README's design table at the demo's levels
is generated from that path (``takeup.pipeline.run.trend_rows.
drift_design_markdown``) and compared with the README by the tests.

The odds scale makes one shift size meaningful at any baseline rate.
Designing the per-participant chart is deliberate: the
chart run on weekly cohorts resets at zero only between periods, so at
every period end its statistic is at most the per-participant one
(``max(0, .)`` is monotone and applied less often) and it cannot signal
earlier.  Its in-control ARL is therefore at least the designed target *for
any cohort sizes*, and in practice several times more.  With a
near-geometric run length (an approximation, common practice) a chart
followed over ``N`` in-control participants false-alarms with probability
about ``1 - exp(-N / ARL0)`` *when the in-control level is known*; an
estimated level (a few baseline weeks) raises that rate, see the README.

Thresholds chosen by :func:`design_cusum` for its function defaults (OR 2, ARL0 1000), and the ARLs
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
from dataclasses import dataclass

import numpy as np

from takeup.pipeline.stats.drift.chart import _param_note, _readonly, shifted_rate
from takeup.pipeline.stats.drift.run_length import (_DEFAULT_MAX_STATES, _DEFAULT_REL_TOL, _chain_arl, _grid,
                                                    _n_states, _steps, arl_bernoulli)

__all__ = ["DEFAULT_ODDS_RATIO_RISE", "DEFAULT_ODDS_RATIO_FALL", "DEFAULT_TARGET_ARL0", "CusumDesign",
           "design_cusum", "calibrate_for_estimated_level"]

#: Odds ratio the contamination (control-arm, upward) chart is tuned to detect.
DEFAULT_ODDS_RATIO_RISE = 2.0
#: Odds ratio the non-delivery (treatment-arm, downward) chart is tuned to detect.
DEFAULT_ODDS_RATIO_FALL = 0.5
#: Default minimum in-control ARL, in participants (see the module docstring).
DEFAULT_TARGET_ARL0 = 1000.0


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


def calibrate_for_estimated_level(p0: float, p1: float, h_known: float, target_arl0: float, logit_sd: float,
                                  *, n_nodes: int = 7, rel_tol: float = 1e-4, h_tol: float = 1e-3,
                                  max_states: int = 50_000, h_max_factor: float = 4.0) -> float:
    r"""Decision limit for a chart whose in-control level ``p0`` is itself an estimate.

    A chart designed at an estimated level signals falsely more often than its design says:
    when the estimate is below the true level, an upward chart drifts up in control (and a
    downward chart likewise when it is above).  Averaged over the estimation error, the
    per-participant false-alarm rate :math:`E[1/\mathrm{ARL}]` exceeds :math:`1/\mathrm{ARL}_0`.
    This function raises ``h`` until the *expected* false-alarm rate is the designed one:

    .. math:: \sum_k \omega_k / \mathrm{ARL}(h;\ p_0, p_1,\ p_{\mathrm{true}} =
              \mathrm{expit}(\mathrm{logit}\,p_0 + \sqrt2\,s\,x_k)) = 1/\mathrm{ARL}_0,

    with Gauss-Hermite nodes :math:`x_k` and weights :math:`\omega_k/\sqrt\pi` (``n_nodes``),
    i.e. the true in-control level is treated as uncertain around the estimate with standard
    deviation ``s = logit_sd`` on the logit scale (a parametric-bootstrap view: the plausible
    true levels given the fitted baseline, its sample size and its shrinkage).  ARLs are exact
    (Markov chain, :func:`arl_bernoulli`), in participants.

    Parameters
    ----------
    p0, p1 : float
        Design level (the estimate) and out-of-control level of the chart.
    h_known : float
        Limit designed for a known level (lower bracket: the calibrated ``h`` is at least this).
    target_arl0 : float
        Designed in-control ARL, in participants.
    logit_sd : float
        Standard deviation of the in-control level's estimation error, logit scale; 0 returns
        ``h_known``.

    max_states : int
        Cap on the Markov chain's size per ARL (coarser grid beyond it, see :func:`arl_bernoulli`).
    h_max_factor : float
        The limit is not raised beyond ``h_max_factor * h_known`` (a level estimated from a handful
        of reports cannot be rescued by the limit alone; the chart's note says so).

    Returns
    -------
    float
        The calibrated limit (``h_known`` when ``logit_sd`` is 0 or not finite).

    Notes
    -----
    Control charts with estimated parameters and their inflated false-alarm rates are a
    studied topic (for instance Jones, Champ & Rigdon 2004 on the CUSUM, and bootstrap-based
    limits in the spirit of Gandy & Kvaløy 2013 -- both cited from memory, not checked);
    this calibration is this project's own, checked by simulation in
    ``tests/test_drift_calibration.py``.
    """
    if not (np.isfinite(logit_sd) and logit_sd > 0):
        return float(h_known)
    x, w = np.polynomial.hermite.hermgauss(int(n_nodes))
    w = w / np.sqrt(np.pi)
    lp = np.log(p0) - np.log1p(-p0)
    p_true = 1.0 / (1.0 + np.exp(-(lp + np.sqrt(2.0) * logit_sd * x)))
    p_true = np.clip(p_true, 1e-6, 1 - 1e-6)

    def rate(h: float) -> float:
        arl = np.asarray(arl_bernoulli(p0, p1, h, p_true=p_true, rel_tol=rel_tol, max_states=max_states).arl,
                         dtype=float)
        # the chain's solve fails only when I - Q is numerically singular: a true level at which the
        # chart (almost) never signals (ARL beyond ~1e16), which adds nothing to the false-alarm rate
        arl = np.where(np.isnan(arl), np.inf, arl)
        return float(np.sum(w / np.maximum(arl, 1.0)))

    goal = 1.0 / float(target_arl0)

    def excess(h: float) -> float:           # log expected false-alarm rate over the goal; falls as h grows
        r = rate(h)
        if not math.isfinite(r):             # defensive: a rate that is not a number counts as too many alarms
            return math.inf
        return math.log(r / goal) if r > 0 else -math.inf

    lo = float(h_known)
    f_lo = excess(lo)
    if f_lo <= 0:
        return lo
    cap = float(h_max_factor) * lo
    # bracket: log ARL grows about linearly in h, so extrapolate the log rate linearly (with 20%
    # overshoot) from the last two limits; the first step is a quarter of the known-level limit
    hi = min(lo + 0.25 * max(lo, 1.0), cap)
    f_hi = excess(hi)
    while f_hi > 0:
        if hi >= cap:
            return cap
        slope = (f_hi - f_lo) / (hi - lo) if math.isfinite(f_hi) and math.isfinite(f_lo) else 0.0
        step = 1.2 * f_hi / -slope if slope < 0 else 0.0
        nxt = min(max(hi + max(step, 0.25 * (hi - lo)), hi + 0.05 * hi), cap)
        lo, f_lo, hi = hi, f_hi, nxt
        f_hi = excess(hi)
    # Illinois regula falsi on [lo, hi] (f_lo > 0 >= f_hi), each trial kept a little inside the
    # bracket so that it also closes from the side the interpolation approaches
    moved = 0                                # which end the last trial replaced: -1 hi, +1 lo
    while hi - lo > h_tol * hi:
        if math.isfinite(f_hi) and math.isfinite(f_lo):
            c = hi - f_hi * (hi - lo) / (f_hi - f_lo)
        else:
            c = 0.5 * (lo + hi)
        margin = 0.4 * h_tol * hi
        c = min(max(c, lo + margin), hi - margin)
        f_c = excess(c)
        if f_c <= 0:
            hi, f_hi = c, f_c
            if moved == -1:                  # lo kept twice: halve its value (the Illinois step)
                f_lo *= 0.5
            moved = -1
        else:
            lo, f_lo = c, f_c
            if moved == 1:
                f_hi *= 0.5
            moved = 1
    return float(hi)
