"""Uptake trends per site x arm x period, and drift detection by Bernoulli CUSUM.

:func:`compute_trends` turns the run's period counts into rows of
``uptake_trends`` on two time bases and runs one drift chart per site x arm.

Trend rows
----------
* ``cohort`` basis: participants grouped by the period in which they were
  assigned; ``n_taken_up`` counts those who took up by the cutoff.
* ``calendar`` basis: the status at the end of each period among everyone
  assigned by then (the counts are already stocks, so
  ``cumulative_uptake_share`` equals ``uptake_share`` there).

``uptake_share = n_taken_up / n_observed``, where ``n_observed`` counts the
participants with at least one uptake report: a participant without a report
yet has not "not taken up", so they are left out of the denominator.  When no
participant of the row has a report yet the share is null.  On the cohort
basis ``cumulative_uptake_share`` pools all cohorts up to the row's period
(sum of ``n_taken_up`` over sum of ``n_observed``).

Rows are written for both arms of every site x period that has any row in
the input (an arm without participants in that period gets ``n_assigned = 0``
and a null share), so each site's series is on a regular grid.

``first_stage = uptake_T - uptake_C`` in the period, with the unpooled
binomial standard error ``sqrt(pT(1-pT)/nT + pC(1-pC)/nC)`` (``n`` = uptake
reports); it is the same on both arm rows and null when either arm has no
uptake report in the period.

Drift charts
------------
On the cohort basis each site x arm gets a one-sided Bernoulli CUSUM
([1]_, :mod:`takeup.pipeline.stats.drift.chart`):

* control arm, **upward** chart (controls getting the programme:
  contamination), out-of-control odds ``alerts.drift_odds_ratio`` times the
  in-control odds;
* treatment arm, **downward** chart (offers not delivered), odds divided by
  ``alerts.drift_odds_ratio``.

The charts use only cohorts whose uptake window has closed by the cutoff
(``trends.uptake_window_days`` after the period's last day,
:func:`closed_cohort_counts`): a cohort still being reported would look like
low uptake.  The in-control rate ``p0`` is the pooled uptake of the first
``alerts.drift_baseline_periods`` periods of that site x arm that have uptake
reports (:func:`~takeup.pipeline.stats.drift.baseline.baseline_rate`, with its
continuity floor/ceiling ``[0.5/N, 1 - 0.5/N]``).  The chart runs over the
later periods only, with participants = uptake reports, and its threshold
``h`` is chosen by :func:`~takeup.pipeline.stats.drift.design.design_cusum` for an
in-control average run length of ``alerts.drift_arl0`` participants.  The
statistic after each monitored period is written into ``cusum`` (and ``h``
into ``cusum_limit``) of the cohort rows; rows before the first monitored
period have both null.

Under cluster randomisation (``randomisation_unit = "cluster"``) the charts run
on cluster-level cohort summaries instead (:func:`detect_cluster_drift`): every
cluster is one observation at the cohort of its first reported participant,
with its counts divided by its design effect ``1 + (n - 1) rho`` (Rao & Scott
1992 [3]_; :mod:`takeup.pipeline.stats.drift.clustering`), and everything above
(baseline, shrinkage, design, calibration, ARL) is counted in these effective
participants.

References
----------
.. [1] Reynolds, M. R. Jr. and Stoumbos, Z. G. (1999). A CUSUM chart for
   monitoring a proportion when inspecting continuously. *Journal of
   Quality Technology* 31(1), 87-108.
.. [2] Page, E. S. (1954). Continuous inspection schemes. *Biometrika*
   41(1/2), 100-115.
.. [3] Rao, J. N. K. and Scott, A. J. (1992). A simple method for the analysis
   of clustered binary data. *Biometrics* 48(2), 577-585.
"""

from __future__ import annotations

from dataclasses import dataclass, field, replace
from datetime import date

import numpy as np
import pandas as pd

from takeup.pipeline.stats.drift.baseline import baseline_rate
from takeup.pipeline.stats.drift.chart import bernoulli_cusum, shifted_rate
from takeup.pipeline.stats.drift.clustering import design_effects, icc_anova
from takeup.pipeline.stats.drift.run_length import arl_bernoulli
from takeup.pipeline.stats.drift.shrinkage import shrink_rates
from takeup.pipeline.run.drift_limits import DESIGN_REL_TOL, LimitBook, design_limit
from takeup.pipeline.run.inputs import RunContext, RunInputs
from takeup.pipeline.stats.readonly import readonly_array as _readonly
from takeup.schemas.results import UptakeTrendRow

__all__ = ["DriftResult", "compute_trends", "trend_rows", "detect_drift", "closed_cohort_counts", "ARMS_BY_Z",
           "DESIGN_REL_TOL", "trend_records", "ClusterDriftCounts", "cluster_drift_counts", "detect_cluster_drift",
           "closed_cohort_clusters"]

#: arm label by assignment indicator z (0 control, 1 treatment)
ARMS_BY_Z: tuple[str, str] = ("control", "treatment")

_COUNT_COLUMNS = ("n_assigned", "n_observed", "n_taken_up")


@dataclass(frozen=True)
class DriftResult:
    """Drift charts of one run, one entry per site x arm (read-only arrays).

    Attributes
    ----------
    site_id, arm : tuple of str
        Series labels (``arm`` is ``control`` or ``treatment``).
    direction : tuple of str
        ``up`` (control: contamination) or ``down`` (treatment: non-delivery).
    periods : tuple of date
        Cohort periods of the study (columns of ``path``).
    p0, p1, h : ndarray
        In-control rate, out-of-control rate and decision limit (NaN when the
        chart is undefined, see ``notes``).
    signalled : ndarray of bool
        Whether the statistic reached ``h`` in any monitored period.
    first_signal_period : tuple of (date or None)
        Period of the first signal.
    change_period : tuple of (date or None)
        Start of the "recent" window used in messages: for a signalled chart,
        the period after the statistic was last at zero before the first
        signal (Page's change-point estimate [2]_); otherwise the first
        monitored period.
    statistic : ndarray
        Statistic after the latest period (NaN when the chart is undefined).
    peak_statistic : ndarray
        Largest statistic over the monitored periods.
    recent_uptake, earlier_uptake : ndarray
        Pooled uptake from ``change_period`` on, and before it.
    n_recent_periods : ndarray of int
        Periods with uptake reports from ``change_period`` on.
    n_monitored_periods : ndarray of int
        Periods the chart ran over (after the baseline).
    path : ndarray, shape (series, periods)
        Statistic after each period; NaN before the first monitored period.
    notes : tuple of str
        ``""`` or why the chart is undefined / not running yet.
    n_monitored : ndarray
        Participants the chart has run over (after the baseline); under cluster
        randomisation *effective* participants (uptake reports divided by the cluster's
        design effect, :mod:`takeup.pipeline.stats.drift.clustering`).
    unit : str
        ``participant`` (cohorts of participants) or ``cluster`` (cluster-level cohort
        summaries with the Rao & Scott adjustment, under cluster randomisation).
    icc : ndarray
        Intra-cluster correlation of the series' arm used for the design effects (NaN on
        the participant unit).
    computed_limits : tuple of dict
        Decision limits this run had to compute (not found among the stored ones), as rows for
        ``drift_limits`` (:func:`takeup.pipeline.run.drift_limits.store_limits`).

    References
    ----------
    .. [1] Reynolds, M. R. Jr. and Stoumbos, Z. G. (1999). A CUSUM chart for
       monitoring a proportion when inspecting continuously. *Journal of
       Quality Technology* 31(1), 87-108.
    .. [2] Page, E. S. (1954). Continuous inspection schemes. *Biometrika*
       41(1/2), 100-115.
    """

    site_id: tuple[str, ...]
    arm: tuple[str, ...]
    direction: tuple[str, ...]
    periods: tuple[date, ...]
    p0: np.ndarray
    p1: np.ndarray
    h: np.ndarray
    signalled: np.ndarray
    first_signal_period: tuple
    change_period: tuple
    statistic: np.ndarray
    peak_statistic: np.ndarray
    recent_uptake: np.ndarray
    earlier_uptake: np.ndarray
    n_recent_periods: np.ndarray
    n_monitored_periods: np.ndarray
    path: np.ndarray
    notes: tuple[str, ...]
    n_monitored: np.ndarray = field(default_factory=lambda: _readonly([]))
    unit: str = "participant"
    icc: np.ndarray = field(default_factory=lambda: _readonly([]))
    computed_limits: tuple[dict, ...] = ()

    def index(self, site_id: str, arm: str) -> int | None:
        """Position of the series ``(site_id, arm)``, or None when absent."""
        for i, (s, a) in enumerate(zip(self.site_id, self.arm)):
            if s == site_id and a == arm:
                return i
        return None


def _as_dates(col: pd.Series) -> pd.Series:
    """Period starts as ``datetime.date`` whatever DuckDB/pandas handed over."""
    if len(col) == 0:
        return col.astype(object)
    return pd.to_datetime(col).dt.date


def _normalise(frame: pd.DataFrame | None, counts: str = "int64") -> pd.DataFrame:
    """A copy with typed columns (never mutate the input); ``counts="float64"`` keeps effective counts."""
    cols = ["site_id", "z", "period_start", *_COUNT_COLUMNS]
    if frame is None or len(frame) == 0:
        return pd.DataFrame({c: pd.Series(dtype=object if c in ("site_id", "period_start") else counts)
                             for c in cols})
    f = frame.loc[:, cols].copy()
    f["site_id"] = f["site_id"].astype(str)
    f["z"] = f["z"].astype(int)
    f["period_start"] = _as_dates(f["period_start"])
    for c in _COUNT_COLUMNS:
        f[c] = pd.to_numeric(f[c], errors="coerce").fillna(0).astype(counts)
    # one row per site x arm x period (sum duplicates defensively)
    return f.groupby(["site_id", "z", "period_start"], as_index=False)[list(_COUNT_COLUMNS)].sum()


def _share(x: np.ndarray, n: np.ndarray) -> np.ndarray:
    with np.errstate(invalid="ignore", divide="ignore"):
        return np.where(n > 0, x / np.where(n > 0, n, 1), np.nan)


def _grid(frame: pd.DataFrame) -> pd.DataFrame:
    """Both arms for every site x period present, zero-filled, sorted."""
    keys = frame[["site_id", "period_start"]].drop_duplicates()
    full = keys.merge(pd.DataFrame({"z": [0, 1]}), how="cross")
    out = full.merge(frame, on=["site_id", "period_start", "z"], how="left")
    for c in _COUNT_COLUMNS:
        out[c] = out[c].fillna(0).astype("int64")
    return out.sort_values(["site_id", "z", "period_start"], kind="stable").reset_index(drop=True)


def trend_rows(frame: pd.DataFrame, basis: str, run_id: str,
               cusum_values: np.ndarray | None = None, cusum_limits: np.ndarray | None = None
               ) -> tuple[pd.DataFrame, pd.DataFrame]:
    """``uptake_trends`` rows of one basis (see the module docstring).

    Parameters
    ----------
    frame : DataFrame
        Counts with columns site_id, z, period_start, n_assigned, n_observed,
        n_taken_up (not modified).
    basis : {"cohort", "calendar"}
    run_id : str
    cusum_values, cusum_limits : ndarray, optional
        One entry per row of the returned grid (NaN: null).

    Returns
    -------
    grid : DataFrame
        The zero-filled site x arm x period grid the rows are built from
        (same order as the rows).
    rows : DataFrame
        Rows with exactly the ``UptakeTrendRow`` columns, one per grid row; NaN is null
        (:func:`trend_records` turns them into dicts).  A frame, not dicts: a run of a thousand
        sites writes about a hundred thousand trend rows.
    """
    g = _grid(_normalise(frame))
    if g.empty:
        return g, pd.DataFrame(columns=list(UptakeTrendRow.model_fields))
    x = g["n_taken_up"].to_numpy(float)
    n = g["n_observed"].to_numpy(float)
    share = _share(x, n)
    if basis == "cohort":
        grp = g.groupby(["site_id", "z"], sort=False)
        cum = _share(grp["n_taken_up"].cumsum().to_numpy(float), grp["n_observed"].cumsum().to_numpy(float))
    else:
        cum = share.copy()
    # first stage per site x period: arms side by side (the grid holds exactly one row per site x
    # period x arm, so each arm's value is scattered to its site x period cell and gathered back)
    site_code = pd.factorize(g["site_id"])[0]
    period_code, periods = pd.factorize(g["period_start"])
    cell = site_code.astype(np.int64) * max(len(periods), 1) + period_code
    is_t = g["z"].to_numpy() == 1

    def by_cell(values: np.ndarray, arm: np.ndarray, fill: float) -> np.ndarray:
        out = np.full(int(cell.max()) + 1, fill)
        out[cell[arm]] = values[arm]
        return out[cell]

    t_share, c_share = by_cell(share, is_t, np.nan), by_cell(share, ~is_t, np.nan)
    t_n, c_n = by_cell(n, is_t, 0.0), by_cell(n, ~is_t, 0.0)
    both = np.isfinite(t_share) & np.isfinite(c_share)
    fs = np.where(both, t_share - c_share, np.nan)
    with np.errstate(invalid="ignore", divide="ignore"):
        var = (t_share * (1 - t_share) / np.where(t_n > 0, t_n, 1)
               + c_share * (1 - c_share) / np.where(c_n > 0, c_n, 1))
    fs_se = np.where(both, np.sqrt(np.maximum(var, 0.0)), np.nan)
    cv = np.full(len(g), np.nan) if cusum_values is None else np.asarray(cusum_values, float)
    cl = np.full(len(g), np.nan) if cusum_limits is None else np.asarray(cusum_limits, float)
    rows = pd.DataFrame({
        "run_id": run_id, "site_id": g["site_id"].to_numpy(object),
        "arm": np.asarray(ARMS_BY_Z, dtype=object)[g["z"].to_numpy(int)], "basis": basis,
        "period_start": g["period_start"].to_numpy(object),
        "n_assigned": g["n_assigned"].to_numpy("int64"), "n_taken_up": g["n_taken_up"].to_numpy("int64"),
        "uptake_share": _finite(share), "cumulative_uptake_share": _finite(cum), "first_stage": _finite(fs),
        "first_stage_se": _finite(fs_se), "cusum": _finite(cv), "cusum_limit": _finite(cl)})
    return g, rows


def _finite(a: np.ndarray) -> np.ndarray:
    """Floats with NaN for anything not finite (NaN is the frame's null: never inf in a table)."""
    a = np.asarray(a, dtype=float)
    return np.where(np.isfinite(a), a, np.nan)


def trend_records(rows: pd.DataFrame) -> list[dict]:
    """``uptake_trends`` rows as dicts, nulls as None (for readers that want records, e.g. tests)."""
    return rows.astype(object).where(rows.notna(), None).to_dict("records")


def _empty_drift() -> DriftResult:
    e = _readonly([])
    return DriftResult(site_id=(), arm=(), direction=(), periods=(), p0=e, p1=e, h=e,
                       signalled=_readonly([], bool), first_signal_period=(), change_period=(), statistic=e,
                       peak_statistic=e, recent_uptake=e, earlier_uptake=e,
                       n_recent_periods=_readonly([], np.int64), n_monitored_periods=_readonly([], np.int64),
                       path=_readonly(np.zeros((0, 0))), notes=(), n_monitored=e, icc=e)


#: in-control levels are rounded to this step on the logit scale (odds within +/-5%) before a
#: chart is designed: the chart is then exactly designed for its rounded level, the rounding is
#: far below the sampling error of a baseline estimate, and a run designs a few dozen charts at
#: most whatever the number of sites (each design is cached per level within the process)
LOGIT_STEP = 0.1


def round_level(p):
    """In-control level rounded to :data:`LOGIT_STEP` on the logit scale (NaN stays NaN)."""
    p = np.asarray(p, dtype=float)
    with np.errstate(invalid="ignore", divide="ignore"):
        logit = np.log(p) - np.log1p(-p)
        return np.where(np.isfinite(logit), 1.0 / (1.0 + np.exp(-np.round(logit / LOGIT_STEP) * LOGIT_STEP)), np.nan)


#: the estimation error of an in-control level is rounded to this step (logit scale) before the
#: limit is calibrated, so that a run calibrates a few dozen distinct charts at most (each limit is
#: computed once and kept in the warehouse, see :mod:`takeup.pipeline.run.drift_limits`)
LOGIT_SD_STEP = 0.02


def level_logit_sd(p0, n_baseline, weight=None, prior_mean=None, n_arm=None) -> np.ndarray:
    """Standard deviation (logit scale) of the estimation error of an in-control level.

    Own baseline (``weight`` None): binomial, ``sqrt(p(1-p)/n)``.  Shrunk baseline: the
    normal-normal posterior variance ``w p(1-p)/n`` plus ``(1-w)^2`` times the variance of the
    arm's pooled level ``m(1-m)/N`` (Efron & Morris 1975).  Divided by ``p(1-p)`` (delta method).
    """
    p0 = np.asarray(p0, dtype=float)
    n = np.asarray(n_baseline, dtype=float)
    with np.errstate(invalid="ignore", divide="ignore"):
        v_own = p0 * (1 - p0) / n
        if weight is None:
            var = v_own
        else:
            w = np.clip(np.asarray(weight, dtype=float), 0.0, 1.0)
            m = np.asarray(prior_mean, dtype=float)
            var = w * v_own + (1 - w) ** 2 * m * (1 - m) / np.asarray(n_arm, dtype=float)
        sd = np.sqrt(var) / (p0 * (1 - p0))
    return np.where(np.isfinite(sd), sd, np.nan)


def detect_drift(cohort_counts: pd.DataFrame, baseline_periods: int, odds_ratio: float,
                 target_arl0: float, baseline: str = "shrunk", calibration: str = "estimated_level",
                 limits: LimitBook | None = None) -> DriftResult:
    """One-sided Bernoulli CUSUM per site x arm on cohort counts.

    Parameters
    ----------
    cohort_counts : DataFrame
        site_id, z, period_start, n_assigned, n_observed, n_taken_up (not
        modified).  Participants of a period are its uptake reports
        (``n_observed``), successes ``n_taken_up``.
    baseline_periods : int
        Leading periods (with uptake reports) of each series that set ``p0``.
    odds_ratio : float
        Shift (> 1) in the odds of uptake to detect: up for control, down
        (``1/odds_ratio``) for treatment.
    target_arl0 : float
        In-control average run length in participants.
    baseline : {"shrunk", "site"}
        In-control level: the site's baseline shrunk toward the arm's study-wide baseline, or its own.
    calibration : {"estimated_level", "known_level"}
        ``estimated_level`` (default): ``h`` raised by :func:`calibrate_for_estimated_level` so
        that the expected per-participant false-alarm rate, over the estimation error of the
        level (:func:`level_logit_sd`), is ``1 / target_arl0``; ``known_level``: ``h`` designed as
        if the level were known.
    limits : LimitBook, optional
        Limits already known (a run passes those stored in the warehouse); the ones computed
        here are added to it and listed in the result's ``computed_limits``.  Default: a fresh
        book (limits are still memoised within the process).

    Returns
    -------
    DriftResult

    Notes
    -----
    All series run in one :func:`bernoulli_cusum` call on a series x period
    matrix in which baseline periods carry no participants (they add
    nothing), and one :func:`design_cusum` call designs the distinct
    ``(p0, odds ratio)`` pairs (the threshold search itself loops over charts
    inside the cusum module).

    References
    ----------
    .. [1] Reynolds, M. R. Jr. and Stoumbos, Z. G. (1999). A CUSUM chart for
       monitoring a proportion when inspecting continuously. *Journal of
       Quality Technology* 31(1), 87-108.
    .. [2] Page, E. S. (1954). Continuous inspection schemes. *Biometrika*
       41(1/2), 100-115.
    """
    if calibration not in ("estimated_level", "known_level"):
        raise ValueError(f"calibration must be 'estimated_level' or 'known_level', got {calibration!r}")
    f = _normalise(cohort_counts, counts="float64")
    if f.empty:
        return _empty_drift()
    sites = sorted(f["site_id"].unique())
    periods = sorted(f["period_start"].unique())
    s_pos = {s: i for i, s in enumerate(sites)}
    p_pos = {p: j for j, p in enumerate(periods)}
    n_series, n_per = 2 * len(sites), len(periods)
    si = f["site_id"].map(s_pos).to_numpy() * 2 + f["z"].to_numpy()
    pj = f["period_start"].map(p_pos).to_numpy()
    x = np.zeros((n_series, n_per))
    n = np.zeros((n_series, n_per))
    np.add.at(x, (si, pj), f["n_taken_up"].to_numpy(float))
    np.add.at(n, (si, pj), f["n_observed"].to_numpy(float))

    k = int(baseline_periods)
    present = n > 0
    rank = np.cumsum(present, axis=1)
    in_base = present & (rank <= k)
    monitored = present & (rank > k)
    xb = np.where(in_base, x, 0.0)
    nb = np.where(in_base, n, 0.0)
    base = baseline_rate(xb, nb, n_per)
    p0 = np.array(base.rate, dtype=float)
    n_base = nb.sum(axis=1)
    if baseline == "shrunk":
        # empirical-Bayes shrinkage of each site's baseline toward the arm's study-wide baseline
        shrunk = shrink_rates(xb.sum(axis=1), n_base, np.arange(n_series) % 2)
        with np.errstate(invalid="ignore", divide="ignore"):
            lo = 0.5 / n_base
        keep = np.isfinite(shrunk.rate) & np.isfinite(p0)
        p0 = np.where(keep, np.clip(shrunk.rate, lo, 1.0 - lo), p0)
        arm_n = np.array([n_base[np.arange(n_series) % 2 == g].sum() for g in (0, 1)])[np.arange(n_series) % 2]
        sd = np.where(keep, level_logit_sd(p0, n_base, shrunk.weight, shrunk.prior_mean, arm_n),
                      level_logit_sd(p0, n_base))
    else:
        sd = level_logit_sd(p0, n_base)
    ok = np.isfinite(p0)
    p0 = np.where(ok, round_level(p0), np.nan)
    is_up = (np.arange(n_series) % 2) == 0          # control rows: upward chart
    ors = np.where(is_up, float(odds_ratio), 1.0 / float(odds_ratio))
    p1 = shifted_rate(p0, ors)

    h = np.full(n_series, np.nan)
    design_notes = [""] * n_series
    book = limits if limits is not None else LimitBook()
    for pos in np.flatnonzero(ok):     # one limit per distinct design: read, or computed once (see drift_limits)
        key = (round(float(p0[pos]), 6), float(ors[pos]), float(target_arl0))
        h[pos], design_notes[pos] = book.design(*key)
        if calibration == "estimated_level" and np.isfinite(sd[pos]) and np.isfinite(h[pos]):
            s_r = round(round(float(sd[pos]) / LOGIT_SD_STEP) * LOGIT_SD_STEP, 6)
            h[pos] = book.calibrated(*key, s_r)

    chart = bernoulli_cusum(np.where(monitored, x, 0.0), np.where(monitored, n, 0.0), p0, p1, h)
    stat = np.array(chart.statistic, dtype=float)
    started = rank > k                                   # from the first monitored period on
    started &= np.cumsum(monitored, axis=1) > 0
    path = np.where(started, stat, np.nan)
    n_monitored = monitored.sum(axis=1)
    signalled = np.asarray(chart.signalled) & (n_monitored > 0)
    first = np.asarray(chart.first_signal)

    cols = np.arange(n_per)[None, :]
    first_mon = np.where(n_monitored > 0, np.argmax(monitored, axis=1), n_per)
    # change point: period after the last zero of the statistic before the first signal
    zero_before = (np.nan_to_num(stat, nan=1.0) == 0.0) & (cols < first[:, None])
    last_zero = np.where(zero_before, cols, -1).max(axis=1)
    change = np.where(signalled, np.maximum(last_zero + 1, first_mon), first_mon)
    recent_mask = present & (cols >= change[:, None])
    earlier_mask = present & (cols < change[:, None])
    recent = _share(np.where(recent_mask, x, 0).sum(1), np.where(recent_mask, n, 0).sum(1))
    earlier = _share(np.where(earlier_mask, x, 0).sum(1), np.where(earlier_mask, n, 0).sum(1))
    n_recent = recent_mask.sum(axis=1)
    with np.errstate(invalid="ignore"):
        peak = np.where(n_monitored > 0, np.nanmax(np.where(started, stat, -np.inf), axis=1), np.nan)
    peak = np.where(np.isfinite(peak), peak, np.nan)
    final = np.where(n_monitored > 0, np.asarray(chart.final_statistic), np.nan)

    notes = []
    for i in range(n_series):  # assemble one reason string per series (strings, not numbers)
        parts = [p for p in (base.notes[i], design_notes[i], chart.notes[i]) if p]
        if not parts and n_monitored[i] == 0:
            parts.append(f"{int(rank[i, -1])} period(s) with uptake reports: the chart starts after the first "
                         f"{k} (baseline) periods")
        notes.append("; ".join(dict.fromkeys(parts)))
    return DriftResult(
        site_id=tuple(s for s in sites for _ in (0, 1)),
        arm=tuple(ARMS_BY_Z[i % 2] for i in range(n_series)),
        direction=tuple("up" if u else "down" for u in is_up),
        periods=tuple(periods),
        p0=_readonly(p0), p1=_readonly(p1), h=_readonly(h),
        signalled=_readonly(signalled, bool),
        first_signal_period=tuple(periods[j] if sg else None for j, sg in zip(first, signalled)),
        change_period=tuple(periods[c] if c < n_per else None for c in change),
        statistic=_readonly(final), peak_statistic=_readonly(peak),
        recent_uptake=_readonly(recent), earlier_uptake=_readonly(earlier),
        n_recent_periods=_readonly(n_recent, np.int64), n_monitored_periods=_readonly(n_monitored, np.int64),
        path=_readonly(path), notes=tuple(notes),
        n_monitored=_readonly(np.where(monitored, n, 0.0).sum(axis=1)),
        icc=_readonly(np.full(n_series, np.nan)),
        computed_limits=book.computed_rows(),
    )


#: the demo's typical in-control levels, by arm, at which the README documents the drift design
DOCUMENTED_LEVELS: tuple[tuple[str, float], ...] = (("control", 0.08), ("treatment", 0.70))


def drift_design_rows(odds_ratio: float, target_arl0: float, levels=DOCUMENTED_LEVELS,
                      cohort_size: int = 25) -> list[dict]:
    """The drift design exactly as a run builds it, at the given in-control levels.

    Each level is rounded as in :func:`detect_drift` (:func:`round_level`) and designed through the
    same cached call (``DESIGN_REL_TOL``), so the README's design table, which is generated from
    these rows, is the pipeline's own computation.

    Returns
    -------
    list of dict
        arm, p0 (level given), p0_design (rounded level the chart is designed at), p1, h, and the
        exact (Markov chain) ARLs in participants: arl0, arl0_cohort (periods of ``cohort_size``),
        arl1, arl1_cohort (the shift present from the start).
    """
    out = []
    for arm, p0 in levels:
        orr = float(odds_ratio) if arm == "control" else 1.0 / float(odds_ratio)
        p0d = float(round_level(np.array([p0]))[0])
        h, _ = design_limit(round(p0d, 6), orr, float(target_arl0))
        p1 = float(shifted_rate(np.array([p0d]), np.array([orr]))[0])
        arls = {}
        for key, truth in (("arl0", p0d), ("arl1", p1)):
            for suffix, g in (("", 1), ("_cohort", cohort_size)):
                arls[key + suffix] = float(np.asarray(arl_bernoulli(p0d, p1, h, p_true=truth, group_size=g).arl)[0])
        out.append({"arm": arm, "p0": p0, "p0_design": p0d, "p1": p1, "h": h, **arls})
    return out


def drift_design_markdown(odds_ratio: float, target_arl0: float, cohort_size: int = 25) -> str:
    """The README's drift design table (markdown lines), from :func:`drift_design_rows`."""
    lines = [f"| arm | p0 (designed at) → p1 | h | in-control ARL (per participant / cohorts of {cohort_size}) "
             f"| ARL after the shift (per participant / cohorts of {cohort_size}) |", "|---|---|---|---|---|"]
    for r in drift_design_rows(odds_ratio, target_arl0, cohort_size=cohort_size):
        lines.append(f"| {r['arm']} | {r['p0']:.2f} ({r['p0_design']:.4f}) → {r['p1']:.4f} | {r['h']:.3f} | "
                     f"{r['arl0']:,.0f} / {r['arl0_cohort']:,.0f} | {r['arl1']:.1f} / {r['arl1_cohort']:.1f} |")
    return "\n".join(lines)


def closed_cohort_counts(cohort: pd.DataFrame, as_of: date, period_days: int, uptake_window_days: int
                         ) -> pd.DataFrame:
    """Cohort rows whose uptake window has closed by ``as_of`` (last assignment day + window <= as_of).

    The drift charts run on these only: a cohort still being reported looks like low uptake.
    """
    f = _normalise(cohort)
    if f.empty:
        return f
    last_due = pd.to_datetime(f["period_start"]) + pd.Timedelta(days=period_days - 1 + uptake_window_days)
    return f[(last_due <= pd.Timestamp(as_of)).to_numpy()].reset_index(drop=True)


@dataclass(frozen=True)
class ClusterDriftCounts:
    """Cluster-level cohort summaries for the drift charts (cluster randomisation).

    Attributes
    ----------
    counts : DataFrame
        site_id, z, period_start, n_assigned, n_observed, n_taken_up per site x arm x entry
        period, in *effective* participants: each cluster's uptake reports and uptakes divided
        by its design effect, summed over the clusters that entered in the period.
    icc : dict
        Arm (z) -> :class:`~takeup.pipeline.stats.drift.clustering.IccEstimate`.
    n_clusters : int
        Clusters with at least one uptake report in a closed cohort.
    """

    counts: pd.DataFrame
    icc: dict
    n_clusters: int


def cluster_drift_counts(cluster_counts: pd.DataFrame, baseline_periods: int) -> ClusterDriftCounts:
    """Cluster-level cohort summaries with the Rao & Scott design-effect adjustment.

    Parameters
    ----------
    cluster_counts : DataFrame
        site_id, z, period_start, cluster_id, n_observed, n_taken_up (cohorts whose uptake
        window has closed; not modified).
    baseline_periods : int
        The intra-cluster correlation of each arm is estimated from the clusters that entered
        in the first ``baseline_periods`` entry periods of their site x arm (the in-control
        data, like the chart's level); when those give no between-cluster degrees of freedom,
        from all clusters of the arm.

    Returns
    -------
    ClusterDriftCounts

    Notes
    -----
    A cluster is one observation dated at its entry period (the cohort of its first
    participant with an uptake report), so clusters are independent across periods even when
    a cluster enrols over several weeks; its uptake count ``x`` and reports ``n`` become
    ``x/d`` and ``n/d`` with ``d = 1 + (n - 1) rho`` (Kish 1965; the adjustment of Rao & Scott
    1992), ``rho`` the arm's ANOVA intra-cluster correlation pooled within sites
    (:func:`~takeup.pipeline.stats.drift.clustering.icc_anova`).

    References
    ----------
    .. [1] Rao, J. N. K. and Scott, A. J. (1992). A simple method for the analysis of
       clustered binary data. *Biometrics* 48(2), 577-585.
    .. [2] Kish, L. (1965). *Survey Sampling*. New York: Wiley.
    """
    cols = ["site_id", "z", "period_start", "cluster_id", "n_observed", "n_taken_up"]
    empty = _normalise(None, counts="float64")
    if cluster_counts is None or len(cluster_counts) == 0:
        return ClusterDriftCounts(empty, {}, 0)
    f = cluster_counts.loc[:, cols].copy()
    f["site_id"] = f["site_id"].astype(str)
    f["z"] = f["z"].astype(int)
    f["cluster_id"] = f["cluster_id"].astype(str)
    f["period_start"] = _as_dates(f["period_start"])
    for c in ("n_observed", "n_taken_up"):
        f[c] = pd.to_numeric(f[c], errors="coerce").fillna(0).astype(float)
    f = f[f["n_observed"] > 0]
    if f.empty:
        return ClusterDriftCounts(empty, {}, 0)
    cl = f.groupby(["site_id", "z", "cluster_id"], as_index=False).agg(
        period_start=("period_start", "min"), n=("n_observed", "sum"), x=("n_taken_up", "sum"))
    entry_rank = cl.groupby(["site_id", "z"])["period_start"].rank(method="dense")
    in_base = (entry_rank <= int(baseline_periods)).to_numpy()
    rho = np.full(len(cl), np.nan)
    icc = {}
    z = cl["z"].to_numpy()
    for arm in (0, 1):                         # two arms, each estimate vectorised over clusters
        m = z == arm
        if not m.any():
            continue
        est = icc_anova(cl["x"].to_numpy()[m & in_base], cl["n"].to_numpy()[m & in_base],
                        cl["site_id"].to_numpy()[m & in_base])
        if not np.isfinite(est.rho):
            est = icc_anova(cl["x"].to_numpy()[m], cl["n"].to_numpy()[m], cl["site_id"].to_numpy()[m])
        icc[arm] = est
        rho[m] = est.rho
    d = design_effects(cl["n"].to_numpy(), rho)
    eff = pd.DataFrame({"site_id": cl["site_id"], "z": cl["z"], "period_start": cl["period_start"],
                        "n_observed": cl["n"].to_numpy() / d, "n_taken_up": cl["x"].to_numpy() / d})
    eff = eff[np.isfinite(d)]
    eff["n_assigned"] = eff["n_observed"]
    counts = eff.groupby(["site_id", "z", "period_start"], as_index=False)[list(_COUNT_COLUMNS)].sum()
    return ClusterDriftCounts(counts, icc, int(len(cl)))


def detect_cluster_drift(cluster_counts: pd.DataFrame, baseline_periods: int, odds_ratio: float,
                         target_arl0: float, baseline: str = "shrunk",
                         calibration: str = "estimated_level", limits: LimitBook | None = None) -> DriftResult:
    """Drift charts on cluster-level cohort summaries (cluster randomisation).

    :func:`cluster_drift_counts` turns the clusters into effective counts; :func:`detect_drift`
    then runs unchanged on them (design, calibration and ARL in effective participants).
    A series whose arm has no intra-cluster correlation estimate gets no chart and a note.

    References
    ----------
    .. [1] Rao, J. N. K. and Scott, A. J. (1992). A simple method for the analysis of
       clustered binary data. *Biometrics* 48(2), 577-585.
    """
    summary = cluster_drift_counts(cluster_counts, baseline_periods)
    drift = detect_drift(summary.counts, baseline_periods, odds_ratio, target_arl0, baseline=baseline,
                         calibration=calibration, limits=limits)
    arms = [1 if a == "treatment" else 0 for a in drift.arm]
    rho = np.array([summary.icc[a].rho if a in summary.icc else np.nan for a in arms])
    notes = []
    for note, a in zip(drift.notes, arms):       # one string per series
        est = summary.icc.get(a)
        extra = ("chart on cluster-level cohort summaries: no cluster with an uptake report in a closed cohort"
                 if est is None else est.note)
        notes.append("; ".join(p for p in (extra, note) if p))
    return replace(drift, unit="cluster", icc=_readonly(rho), notes=tuple(notes))


def closed_cohort_clusters(cluster_counts: pd.DataFrame, as_of: date, period_days: int, uptake_window_days: int
                           ) -> pd.DataFrame:
    """Rows of the site x arm x period x cluster counts whose uptake window has closed by ``as_of``."""
    if cluster_counts is None or len(cluster_counts) == 0:
        return pd.DataFrame(columns=["site_id", "z", "period_start", "cluster_id", "n_observed", "n_taken_up"])
    last_due = pd.to_datetime(cluster_counts["period_start"]) + pd.Timedelta(days=period_days - 1 + uptake_window_days)
    return cluster_counts[(last_due <= pd.Timestamp(as_of)).to_numpy()].reset_index(drop=True)


def compute_trends(inputs: RunInputs, ctx: RunContext) -> tuple[pd.DataFrame, DriftResult]:
    """``uptake_trends`` rows (cohort and calendar bases) and the drift charts.

    Parameters
    ----------
    inputs : RunInputs
        Uses ``cohort_counts`` and ``calendar_counts`` (not modified).
    ctx : RunContext
        ``ctx.config.alerts`` supplies ``drift_baseline_periods``,
        ``drift_odds_ratio`` and ``drift_arl0``.

    Returns
    -------
    rows : DataFrame
        Rows with exactly the ``UptakeTrendRow`` columns, cohort basis first (NaN is null).
    drift : DriftResult
        One chart per site x arm of the cohort basis.

    References
    ----------
    .. [1] Reynolds, M. R. Jr. and Stoumbos, Z. G. (1999). A CUSUM chart for
       monitoring a proportion when inspecting continuously. *Journal of
       Quality Technology* 31(1), 87-108.
    """
    a = ctx.config.alerts
    book = LimitBook.from_frame(inputs.drift_limits)      # limits stored by earlier runs
    closed = closed_cohort_counts(inputs.cohort_counts, ctx.as_of, ctx.config.trends.period_days,
                                  ctx.config.trends.uptake_window_days)
    if ctx.config.randomisation_unit == "cluster" and inputs.cluster_cohort_counts is not None:
        closed_clusters = closed_cohort_clusters(inputs.cluster_cohort_counts, ctx.as_of,
                                                 ctx.config.trends.period_days, ctx.config.trends.uptake_window_days)
        drift = detect_cluster_drift(closed_clusters, a.drift_baseline_periods, a.drift_odds_ratio, a.drift_arl0,
                                     baseline=a.drift_baseline, calibration=a.drift_calibration, limits=book)
    else:
        drift = detect_drift(closed, a.drift_baseline_periods, a.drift_odds_ratio, a.drift_arl0,
                             baseline=a.drift_baseline, calibration=a.drift_calibration, limits=book)
    grid = _grid(_normalise(inputs.cohort_counts))
    cv = cl = None
    if len(grid) and len(drift.site_id):
        s_pos = {s: i for i, s in enumerate(drift.site_id[::2])}
        p_pos = {p: j for j, p in enumerate(drift.periods)}
        si = grid["site_id"].map(s_pos)
        pj = grid["period_start"].map(p_pos)
        known = (si.notna() & pj.notna()).to_numpy()
        si_i = np.where(known, si.fillna(0).to_numpy(int) * 2 + grid["z"].to_numpy(), 0)
        pj_i = np.where(known, pj.fillna(0).to_numpy(int), 0)
        cv = np.where(known, np.asarray(drift.path)[si_i, pj_i], np.nan)
        cl = np.where(np.isfinite(cv), np.asarray(drift.h)[si_i], np.nan)
    _, cohort_rows = trend_rows(inputs.cohort_counts, "cohort", ctx.run_id, cv, cl)
    _, calendar_rows = trend_rows(inputs.calendar_counts, "calendar", ctx.run_id)
    parts = [f for f in (cohort_rows, calendar_rows) if len(f)]
    rows = pd.concat(parts, ignore_index=True) if parts else cohort_rows
    return rows, drift
