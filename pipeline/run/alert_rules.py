"""Alert rules of one run and their lifecycle across runs.

:func:`compute_alerts` evaluates every rule on the run's results and returns
rows of ``alerts`` (the :class:`~takeup.schemas.results.AlertRow` columns).  Rules
that concern an outcome use the study's primary outcome (``unadjusted``
rows).  Thresholds come from ``config.alerts``.

Rules
-----
==============================  ========  ==================================================
rule                            severity  raised when
==============================  ========  ==================================================
``negative_first_stage``        critical  one-sided test of complier share < 0 (share/SE, normal;
                                          t(G-1) under CR1), BH-adjusted across the tested sites,
                                          at ``fdr_q``; ``negative_first_stage_min_f`` (default 0)
                                          only restricts which sites are tested
``sample_ratio_mismatch``       critical  Pearson chi-square of the arm counts (everyone
                                          assigned; clusters under cluster randomisation)
                                          against the site's designed allocation has
                                          p < ``srm_p_value``; for a site with strata, the
                                          statistics of its strata (each against its own
                                          designed probability) are summed, df = strata
                                          with a design
``weak_first_stage``            warning   first-stage F < ``weak_first_stage_f``
``first_stage_decline``         warning   first stage of the latest ``first_stage_decline_periods``
                                          closed cohorts below that of earlier cohorts (one-sided
                                          test, cluster totals under cluster randomisation,
                                          BH-adjusted across sites) at ``fdr_q``
``control_uptake_drift``        warning   upward Bernoulli CUSUM of control uptake signalled
``treatment_uptake_drift``      warning   downward Bernoulli CUSUM of treated uptake signalled
``differential_missing_outcomes`` warning missing-outcome shares among participants due an
                                          outcome differ between arms (two-sided two-proportion
                                          z test; cluster totals under cluster randomisation;
                                          BH-adjusted across sites) at ``fdr_q``
``missing_uptake_reports``      warning   among participants due an uptake report, the share
                                          without one exceeds ``missing_uptake_share`` in an arm,
                                          or the shares differ between arms (two-sided test, BH)
``stale_site``                  warning   latest record more than ``stale_days`` before the
                                          cutoff, or a registry site with no record at all
``outlier_site``                info      pooled site's CACE far from the other sites given
                                          its own SE: two-sided test of the externally
                                          standardised residual (Viechtbauer & Cheung 2010),
                                          BH-adjusted across pooled sites, at ``fdr_q``
==============================  ========  ==================================================

Severity: ``critical`` when the randomisation or the instrument itself looks
broken (the CACE of the site is not interpretable); ``warning`` when
estimates are fragile or the data flow needs attention; ``info`` for a site
that is simply different (worth a look, not an error).

Multiple testing: Benjamini-Hochberg control of the false discovery rate at
``fdr_q`` is applied across sites within each test-based rule that runs one
test per site at the conventional level -- ``negative_first_stage``,
``first_stage_decline``, ``differential_missing_outcomes``,
``missing_uptake_reports`` and ``outlier_site``.  Their ``p_value`` column holds the
BH-adjusted p-value, and it is the value compared with the threshold (no rule raises a
test-based alert by another route).  Arm-comparison tests run only where each
arm has at least ``min_arm_size`` participants.  Under cluster randomisation
every arm comparison is made on the randomised unit: cluster counts for the
sample-ratio check, cluster totals with CR1 variances for the proportion tests
(:mod:`takeup.pipeline.stats.significance`).  The sample-ratio check
uses no BH: its threshold (default 0.001) is already strict, chosen as in
practice (common practice) for a check that is run on every site at every
run.  Other rules compare a statistic with a threshold and have no p-value.

Weekly looks: by default (``[sequential] alert_tests = "anytime_valid"``) the p-values of
``negative_first_stage``, ``first_stage_decline``, ``differential_missing_outcomes``,
``missing_uptake_reports`` (its test) and ``sample_ratio_mismatch`` are anytime-valid
(:mod:`takeup.pipeline.run.alert_p_values`): a clean site raises such a rule in *any* of
the weekly runs at most with the rule's level, and BH applies to these p-values unchanged.
``outlier_site`` compares sites with each other at one look and keeps its per-run test.

Columns: for threshold rules ``value`` and ``threshold`` are on the same
scale (F and ``weak_first_stage_f``; CUSUM and its limit ``h``; days since
the latest record and ``stale_days``).  For test rules ``value`` is the
estimated quantity (complier share, decline in first stage, treated share of
assignments or clusters, difference in missing shares; for ``outlier_site`` the
externally standardised residual) and ``threshold`` the level its
(adjusted) p-value is compared with.  ``missing_uptake_reports``
raised by its share threshold carries the larger missing share and
``missing_uptake_share`` (and the BH-adjusted p-value of the difference
test); raised by the test only, the difference in shares and ``fdr_q``.

Lifecycle
---------
``alert_key = "{rule}:{site or '-'}:{outcome or '-'}"``.  Against the
previous finished run's alerts:

* ``new`` -- not active (new/ongoing) in the previous run; first seen now;
* ``ongoing`` -- active in the previous run; keeps its ``first_seen_run_id``;
* ``resolved`` -- active in the previous run but not now: one row with the
  previous run's value, threshold and p-value, ``last_seen_run_id`` = the
  previous row's, message ``"resolved: ..."``.

Alerts resolved in the previous run and not active now are not repeated; an
alert that fires again after being resolved is ``new`` with a new first
run.  The table is append-only: history is never rewritten.

References
----------
.. [1] Staiger, D. and Stock, J. H. (1997). Instrumental variables regression
   with weak instruments. *Econometrica* 65(3), 557-586.
.. [2] Lee, D. S., McCrary, J., Moreira, M. J. and Porter, J. (2022). Valid
   t-ratio inference for IV. *American Economic Review* 112(10), 3260-3290.
.. [3] Benjamini, Y. and Hochberg, Y. (1995). Controlling the false discovery
   rate: a practical and powerful approach to multiple testing. *Journal of
   the Royal Statistical Society B* 57(1), 289-300.
.. [4] Fabijan, A., Gupchup, J., Gupta, S., Omhover, J., Qin, W., Vermeer, L.
   and Dmitriev, P. (2019). Diagnosing sample ratio mismatch in online
   controlled experiments. *KDD '19*, 2156-2164.
.. [5] Reynolds, M. R. Jr. and Stoumbos, Z. G. (1999). A CUSUM chart for
   monitoring a proportion when inspecting continuously. *Journal of
   Quality Technology* 31(1), 87-108.
"""

from __future__ import annotations

import math

import numpy as np
import pandas as pd
from scipy import stats

from takeup.pipeline.stats import significance
from takeup.pipeline.run import alert_p_values
from takeup.pipeline.stats.stratified_ratio import stratified_sample_ratio_test
from takeup.pipeline.stats.meta_analysis.influence import outlier_test
from takeup.pipeline.run.pooled_rows import INFLUENCE_METHOD
from takeup.pipeline.run.inputs import RunContext, RunInputs
from takeup.pipeline.run.site_rows import clean, is_primary
from takeup.pipeline.run.trend_rows import DriftResult

__all__ = ["RULES", "SEVERITY", "BH_RULES", "alert_key", "compute_alerts", "evaluate_rules", "apply_lifecycle",
           "decline_windows"]

SEVERITY: dict[str, str] = {
    "negative_first_stage": "critical",
    "sample_ratio_mismatch": "critical",
    "weak_first_stage": "warning",
    "first_stage_decline": "warning",
    "control_uptake_drift": "warning",
    "treatment_uptake_drift": "warning",
    "differential_missing_outcomes": "warning",
    "missing_uptake_reports": "warning",
    "stale_site": "warning",
    "outlier_site": "info",
}
RULES: tuple[str, ...] = tuple(SEVERITY)
#: rules whose p-values are Benjamini-Hochberg adjusted across sites
BH_RULES: tuple[str, ...] = ("negative_first_stage", "first_stage_decline", "differential_missing_outcomes",
                             "missing_uptake_reports", "outlier_site")
_SEVERITY_ORDER = {"critical": 0, "warning": 1, "info": 2}
_ACTIVE = ("new", "ongoing")


def alert_key(rule: str, site_id: str | None, outcome: str | None) -> str:
    """Stable, readable key of (rule, site, outcome)."""
    return f"{rule}:{site_id or '-'}:{outcome or '-'}"


def _pct(x: float) -> str:
    return f"{100 * x:.0f}%"


def _num(x: float | None, digits: int = 2) -> str:
    return "n/a" if x is None or not math.isfinite(x) else f"{x:.{digits}f}"


def _p(x: float) -> str:
    return f"{x:.2g}" if x >= 1e-4 else f"{x:.1e}"


def _alert(rule: str, site: str | None, outcome: str | None, value, threshold, p_value, message: str) -> dict:
    return {"rule": rule, "site_id": site, "outcome": outcome, "value": clean(value),
            "threshold": clean(threshold), "p_value": clean(p_value), "message": message}


# ----------------------------------------------------------------------------- helpers
def _bh(p: np.ndarray) -> np.ndarray:
    """BH-adjusted p-values across sites (NaN entries stay NaN and do not count as tests)."""
    p = np.asarray(p, dtype=float)
    if p.size == 0:
        return p.copy()
    return _bh_adjusted(p)


def _primary(inputs: RunInputs, ctx: RunContext) -> str | None:
    primary = ctx.config.primary_outcome
    if primary is None and inputs.outcomes:
        primary = inputs.outcomes[0]
    return primary


def _primary_rows(site_rows: list[dict], outcome: str | None) -> pd.DataFrame:
    rows = [r for r in site_rows if r.get("outcome") == outcome and is_primary(r)]
    cols = ["site_id", "first_stage_f", "complier_share", "complier_share_se", "n_treatment", "n_control",
            "n_treatment_assigned", "n_control_assigned", "due_treatment", "due_control",
            "missing_outcome_treatment", "missing_outcome_control", "cace", "cace_se", "included_in_pool",
            "status", "ci_df", "information", "look"]
    frame = pd.DataFrame(rows)
    for c in cols:
        if c not in frame.columns:
            frame[c] = pd.Series(dtype=object)
    return frame[cols].reset_index(drop=True)


def _float(col: pd.Series) -> np.ndarray:
    return pd.to_numeric(col, errors="coerce").to_numpy(dtype=float)


def _counts(frame: pd.DataFrame | None) -> pd.DataFrame:
    cols = ["site_id", "z", "period_start", "n_assigned", "n_observed", "n_taken_up"]
    if frame is None or len(frame) == 0:
        return pd.DataFrame({c: pd.Series(dtype=object) for c in cols})
    f = frame.loc[:, cols].copy()
    f["site_id"] = f["site_id"].astype(str)
    f["z"] = f["z"].astype(int)
    f["period_start"] = pd.to_datetime(f["period_start"]).dt.date
    for c in cols[3:]:
        f[c] = pd.to_numeric(f[c], errors="coerce").fillna(0).astype(float)
    return f


# ----------------------------------------------------------------------------- rules
def _weak_first_stage(rows: pd.DataFrame, outcome: str, a) -> list[dict]:
    f = _float(rows["first_stage_f"])
    hit = np.isfinite(f) & (f < a.weak_first_stage_f)
    out = []
    for i in np.flatnonzero(hit):  # one message per raised alert (strings)
        site = rows.at[i, "site_id"]
        no_outcomes = rows.at[i, "status"] == "no_outcomes"
        basis = (" (all assigned participants: no outcome measurements yet)" if no_outcomes else "")
        out.append(_alert(
            "weak_first_stage", site, outcome, f[i], a.weak_first_stage_f, None,
            f"First-stage F is {f[i]:.1f}{basis}, below {a.weak_first_stage_f:g} (Staiger & Stock rule of "
            f"thumb): the instrument is weak at this site. Below F = {a.tf_valid_f:g} conventional t-ratio "
            f"intervals are not valid (Lee et al. 2022); use the tF and Anderson-Rubin columns for the CACE."))
    return out


def _negative_first_stage(rows: pd.DataFrame, outcome: str, a, ctx: RunContext) -> list[dict]:
    share = _float(rows["complier_share"])
    se = _float(rows["complier_share_se"])
    f = _float(rows["first_stage_f"])
    df = _float(rows["ci_df"])
    big_enough = ((_float(rows["n_treatment_assigned"]) >= a.min_arm_size)
                  & (_float(rows["n_control_assigned"]) >= a.min_arm_size))
    # the F floor (default 0) only gates which sites form the tested family; every alert needs the BH test
    gate = np.isfinite(f) & (f >= a.negative_first_stage_min_f) if a.negative_first_stage_min_f > 0 else True
    ok = np.isfinite(share) & np.isfinite(se) & (se > 0) & big_enough & gate
    with np.errstate(invalid="ignore", divide="ignore"):
        z = np.where(ok, share / np.where(ok, se, 1.0), np.nan)
    # H1: complier share < 0; t(G - 1) under cluster-robust SEs (ci_df), normal otherwise
    has_df = np.isfinite(df) & (df >= 1)
    p_raw = np.where(ok, np.where(has_df, stats.t.cdf(z, np.where(has_df, df, 1.0)), stats.norm.cdf(z)), np.nan)
    info = _float(rows["information"])
    info = np.where(np.isfinite(info), info, _float(rows["n_treatment_assigned"]) + _float(rows["n_control_assigned"]))
    p_raw, anytime = alert_p_values.negative_first_stage_p(p_raw, info, ctx)
    p_adj = _bh(p_raw)
    hit = np.isfinite(p_adj) & (p_adj <= a.fdr_q)
    out = []
    for i in np.flatnonzero(hit):
        site = rows.at[i, "site_id"]
        ref = f"t({int(df[i])})" if has_df[i] else "normal"
        out.append(_alert(
            "negative_first_stage", site, outcome, share[i], a.fdr_q, p_adj[i],
            f"Uptake is lower among those offered the programme than among controls: complier share "
            f"{share[i]:.3f} (SE {_num(se[i], 3)}; one-sided {ref} test of a negative first stage"
            f"{', ' + anytime if anytime else ''}, BH-adjusted "
            f"p = {_p(p_adj[i])} <= q = {a.fdr_q:g}). The CACE of this site is not interpretable; "
            f"check how assignments were recorded and delivered."))
    return out


def closed_cohorts(cohort: pd.DataFrame, as_of, period_days: int, uptake_window_days: int) -> pd.DataFrame:
    """The cohort rows whose uptake window has closed by the cutoff.

    A cohort period starting on ``p`` is closed when its last assignment day plus
    ``uptake_window_days`` is on or before ``as_of``: everyone in it is due an
    uptake report.  Younger cohorts are still being reported and would look like
    low uptake.
    """
    f = _counts(cohort) if "cluster_id" not in getattr(cohort, "columns", ()) else cohort.copy()
    if len(f) == 0:
        return f
    starts = pd.to_datetime(f["period_start"])
    last_due = starts + pd.Timedelta(days=period_days - 1 + uptake_window_days)
    return f[(last_due <= pd.Timestamp(as_of)).to_numpy()].reset_index(drop=True)


def decline_windows(cohort: pd.DataFrame, n_recent: int) -> pd.DataFrame:
    """Per site: uptake counts by arm in the latest ``n_recent`` cohorts and before them.

    The windows use the cohort periods in which the site has uptake reports
    (either arm); participants are those with an uptake report.

    Returns
    -------
    DataFrame
        site_id, x_t_recent, n_t_recent, x_c_recent, n_c_recent, x_t_early, n_t_early,
        x_c_early, n_c_early, recent_from (first period of the recent window),
        n_periods (periods with reports).
    """
    f = _counts(cohort)
    f = f[f["n_observed"] > 0]
    cols = ["site_id", "x_t_recent", "n_t_recent", "x_c_recent", "n_c_recent", "x_t_early", "n_t_early",
            "x_c_early", "n_c_early", "recent_from", "n_periods"]
    if f.empty:
        return pd.DataFrame({c: pd.Series(dtype=object) for c in cols})
    per = f[["site_id", "period_start"]].drop_duplicates().sort_values(["site_id", "period_start"])
    per["from_end"] = per.groupby("site_id").cumcount(ascending=False)
    per["n_periods"] = per.groupby("site_id")["period_start"].transform("size")
    f = f.merge(per, on=["site_id", "period_start"])
    f["recent"] = f["from_end"] < n_recent
    agg = f.groupby(["site_id", "recent", "z"])[["n_taken_up", "n_observed"]].sum().unstack(["recent", "z"],
                                                                                             fill_value=0.0)
    out = pd.DataFrame({"site_id": agg.index})
    for name, recent in (("recent", True), ("early", False)):
        for arm, z in (("t", 1), ("c", 0)):
            for col, src in (("x", "n_taken_up"), ("n", "n_observed")):
                key = (src, recent, z)
                out[f"{col}_{arm}_{name}"] = agg[key].to_numpy() if key in agg.columns else 0.0
    first_recent = per[per["from_end"] < n_recent].groupby("site_id")["period_start"].min()
    out["recent_from"] = out["site_id"].map(first_recent)
    out["n_periods"] = out["site_id"].map(per.groupby("site_id")["n_periods"].first()).astype(int)
    return out[cols]


def _first_stage_decline(inputs: RunInputs, ctx: RunContext, a, looks: dict | None = None) -> list[dict]:
    t = ctx.config.trends
    cohort = closed_cohorts(inputs.cohort_counts, ctx.as_of, t.period_days, t.uptake_window_days)
    w = decline_windows(cohort, a.first_stage_decline_periods)
    if w.empty:
        return []
    n = {k: _float(w[k]) for k in w.columns if k.startswith(("x_", "n_")) and k != "n_periods"}
    eligible = ((w["n_periods"].to_numpy() > a.first_stage_decline_periods)
                & (n["n_t_recent"] > 0) & (n["n_c_recent"] > 0) & (n["n_t_early"] > 0) & (n["n_c_early"] > 0)
                & (n["n_t_recent"] + n["n_t_early"] >= a.min_arm_size)
                & (n["n_c_recent"] + n["n_c_early"] >= a.min_arm_size))
    test = _difference_test(n["x_t_recent"], n["n_t_recent"], n["x_c_recent"], n["n_c_recent"],
                            n["x_t_early"], n["n_t_early"], n["x_c_early"], n["n_c_early"],
                            variance=alert_p_values.decline_variance(ctx))
    p_one = test["p_less"]
    how = "one-sided test"
    if ctx.config.randomisation_unit == "cluster" and inputs.cluster_cohort_counts is not None:
        p_one = _clustered_decline_p(inputs, ctx, w, a)
        how = "one-sided test on cluster totals, t(G-2)"
    p_raw = np.where(eligible, p_one, np.nan)
    # the site's look number (runs with its estimates so far, this one included); at least this run
    look = np.array([max(1.0, float((looks or {}).get(s) or 1)) for s in w["site_id"]])
    p_raw, anytime = alert_p_values.decline_p(p_raw, look, ctx)
    if anytime:
        how = f"{how}, {anytime}"
    p_adj = _bh(p_raw)
    hit = np.isfinite(p_adj) & (p_adj <= a.fdr_q)
    out = []
    for i in np.flatnonzero(hit):
        fs_r, fs_e = test["fs_recent"][i], test["fs_early"][i]
        site = w.at[i, "site_id"]
        out.append(_alert(
            "first_stage_decline", site, None, fs_r - fs_e, a.fdr_q, p_adj[i],
            f"The first stage (treated minus control uptake) fell to {_pct(fs_r)} in the last "
            f"{a.first_stage_decline_periods} cohorts (from the cohort of {w.at[i, 'recent_from']}) from "
            f"{_pct(fs_e)} in earlier cohorts ({how}, BH-adjusted p = {_p(p_adj[i])} at "
            f"q = {a.fdr_q:g}; cohorts whose uptake window has closed)."))
    return out


def _clustered_decline_p(inputs: RunInputs, ctx: RunContext, w: pd.DataFrame, a) -> np.ndarray:
    """One-sided p-values of the decline per row of ``w`` from cluster-level cohort counts."""
    t = ctx.config.trends
    cc = closed_cohorts(inputs.cluster_cohort_counts, ctx.as_of, t.period_days, t.uptake_window_days)
    cc = cc[pd.to_numeric(cc["n_observed"]) > 0]
    pos = {s: i for i, s in enumerate(w["site_id"])}
    cc = cc[cc["site_id"].astype(str).isin(pos)]
    if cc.empty:
        return np.full(len(w), np.nan)
    start = pd.to_datetime(cc["period_start"]).dt.date
    recent_from = cc["site_id"].astype(str).map(dict(zip(w["site_id"], w["recent_from"])))
    recent = (start.to_numpy() >= pd.to_datetime(recent_from).dt.date.to_numpy())
    si = cc["site_id"].astype(str).map(pos).to_numpy()
    ci = pd.factorize(cc["site_id"].astype(str) + "\x1f" + cc["cluster_id"].astype(str))[0]
    key = pd.DataFrame({"si": si, "ci": ci, "z": cc["z"].astype(int).to_numpy(), "r": recent.astype(int),
                        "x": pd.to_numeric(cc["n_taken_up"]).to_numpy(float),
                        "n": pd.to_numeric(cc["n_observed"]).to_numpy(float)})
    g = key.groupby(["si", "ci", "z", "r"], as_index=False)[["x", "n"]].sum()
    res = significance.clustered_first_stage_change(g.si, g.ci, g.z, g.r, g.x, g.n, len(w))
    return np.asarray(res.p_value, float)


def _drift(drift: DriftResult) -> list[dict]:
    out = []
    for i in np.flatnonzero(np.asarray(drift.signalled, dtype=bool)):
        arm = drift.arm[i]
        rule = "control_uptake_drift" if arm == "control" else "treatment_uptake_drift"
        what = "contamination: controls are taking up the programme" if arm == "control" else \
            "offers may not be reaching people"
        peak, h, now = float(drift.peak_statistic[i]), float(drift.h[i]), float(drift.statistic[i])
        now_txt = "" if abs(now - peak) < 0.05 else f", {now:.1f} after the latest cohort"
        n_rec = int(drift.n_recent_periods[i])
        out.append(_alert(
            rule, drift.site_id[i], None, peak, h, None,
            f"{arm.capitalize()} uptake {_pct(drift.recent_uptake[i])} in the {n_rec} cohort"
            f"{'s' if n_rec != 1 else ''} from {drift.change_period[i]} on vs {_pct(drift.earlier_uptake[i])} "
            f"before (CUSUM {peak:.1f} >= h {h:.1f} since the cohort of {drift.first_signal_period[i]}"
            f"{now_txt}; in-control level {_pct(drift.p0[i])}): {what}."))
    return out


def _assigned_by_site(inputs: RunInputs) -> pd.DataFrame:
    f = _counts(inputs.cohort_counts)
    if f.empty:
        return pd.DataFrame({"site_id": pd.Series(dtype=object), "n_t": pd.Series(dtype=float),
                             "n_c": pd.Series(dtype=float)})
    g = f.groupby(["site_id", "z"])["n_assigned"].sum().unstack("z", fill_value=0.0)
    return pd.DataFrame({"site_id": g.index.astype(str),
                         "n_t": g[1].to_numpy(float) if 1 in g.columns else np.zeros(len(g)),
                         "n_c": g[0].to_numpy(float) if 0 in g.columns else np.zeros(len(g))})


def _clusters_by_site(inputs: RunInputs) -> pd.DataFrame:
    """Distinct clusters per site and arm (cluster randomisation)."""
    cc = inputs.cluster_cohort_counts
    if cc is None or len(cc) == 0:
        return pd.DataFrame({"site_id": pd.Series(dtype=object), "g_t": pd.Series(dtype=float),
                             "g_c": pd.Series(dtype=float)})
    f = cc[pd.to_numeric(cc["n_assigned"]) > 0]
    g = f.groupby(["site_id", "z"])["cluster_id"].nunique().unstack("z", fill_value=0)
    return pd.DataFrame({"site_id": g.index.astype(str),
                         "g_t": g[1].to_numpy(float) if 1 in g.columns else np.zeros(len(g)),
                         "g_c": g[0].to_numpy(float) if 0 in g.columns else np.zeros(len(g))})


def _stratified_sample_ratio(inputs: RunInputs, ctx: RunContext, a) -> list[dict]:
    """Sample-ratio check of the sites with strata: Pearson chi-square summed over the strata with a design."""
    sc = inputs.stratum_counts
    if sc is None or sc.empty:
        return []
    by_cluster = ctx.config.randomisation_unit == "cluster"
    col = "n_clusters" if by_cluster else "n_assigned"
    sc = sc.assign(site_id=sc.site_id.astype(str), stratum=sc.stratum.astype(str), z=sc.z.astype(int))
    index = pd.MultiIndex.from_frame(sc[["site_id", "stratum"]].drop_duplicates().sort_values(["site_id", "stratum"]))
    declared = sc.groupby(["site_id", "stratum"])["declared_probability"].max().reindex(index)
    cells = index.to_frame(index=False)
    sites = sorted(cells.site_id.unique())
    pos = {s: i for i, s in enumerate(sites)}

    def get(c, z):
        arm = sc[sc.z == z].groupby(["site_id", "stratum"])[c].sum()
        return arm.reindex(index).fillna(0).to_numpy(float)

    u_t, u_c = get(col, 1), get(col, 0)
    n_t, n_c = get("n_assigned", 1), get("n_assigned", 0)
    design = np.array([float(d) if pd.notna(d) else
                       (ctx.config.stratum_design(s, st) if ctx.config.stratum_design(s, st) is not None else np.nan)
                       for s, st, d in zip(cells.site_id, cells.stratum, declared.to_numpy())], dtype=float)
    si = cells.site_id.map(pos).to_numpy(dtype=np.int64)
    res = stratified_sample_ratio_test(si, u_t, u_c, design, len(sites))
    p_site, anytime = alert_p_values.stratified_sample_ratio_p(si, u_t, u_c, design, res.p_value, ctx)
    unit = "clusters" if by_cluster else "participants"
    out = []
    for i in np.flatnonzero(np.isfinite(p_site) & (p_site < a.srm_p_value)):
        j = int(res.top_cell[i])
        st = str(cells.stratum.iloc[j]) or "(no stratum)"
        tot_t, tot_c = int(u_t[si == i].sum()), int(u_c[si == i].sum())
        out.append(_alert(
            "sample_ratio_mismatch", sites[i], None, tot_t / max(tot_t + tot_c, 1), a.srm_p_value, p_site[i],
            f"Arm counts per randomisation stratum do not fit the design: chi-square {res.chi2[i]:.1f} summed over "
            f"{int(res.df[i])} strata, {f'p ({anytime})' if anytime else 'p'} = {_p(p_site[i])} < {a.srm_p_value:g}.  Stratum {st} contributes most "
            f"({res.contribution[j]:.1f}): {int(u_t[j])} treated and {int(u_c[j])} control {unit} "
            f"({_pct(u_t[j] / max(u_t[j] + u_c[j], 1))} treated) against the designed {_pct(design[j])}"
            + (f" ({int(n_t[j])} and {int(n_c[j])} participants)" if by_cluster else "")
            + ". Check the randomisation and how assignments are recorded."))
    return out


def _sample_ratio(inputs: RunInputs, ctx: RunContext, a) -> list[dict]:
    """Sample-ratio check: per stratum for sites with strata, else the site's arm counts against its allocation."""
    out = _stratified_sample_ratio(inputs, ctx, a)
    arms = _assigned_by_site(inputs)
    arms = arms[((arms.n_t + arms.n_c) > 0) & ~arms.site_id.isin(set(inputs.stratified_sites))].reset_index(drop=True)
    if arms.empty:
        return out
    share = np.array([ctx.config.treatment_share(s) for s in arms.site_id], dtype=float)
    by_cluster = ctx.config.randomisation_unit == "cluster" and inputs.cluster_cohort_counts is not None
    if by_cluster:
        # the randomised unit is the cluster: compare cluster counts with the design; participant
        # counts vary with cluster sizes and are shown beside it only
        g = _clusters_by_site(inputs).set_index("site_id").reindex(arms.site_id).fillna(0.0)
        units_t, units_c = g["g_t"].to_numpy(float), g["g_c"].to_numpy(float)
    else:
        units_t, units_c = arms.n_t.to_numpy(float), arms.n_c.to_numpy(float)
    res = _srm_test(units_t, units_c, share)
    res["p"], anytime = alert_p_values.sample_ratio_p(units_t, units_c, share, res["p"], ctx)
    hit = np.isfinite(res["p"]) & (res["p"] < a.srm_p_value)
    for i in np.flatnonzero(hit):
        n_t, n_c = int(arms.at[i, "n_t"]), int(arms.at[i, "n_c"])
        u_t, u_c = int(units_t[i]), int(units_c[i])
        obs = u_t / (u_t + u_c)
        counted = (f"{u_t} treated and {u_c} control clusters ({_pct(obs)} treated; {n_t} and {n_c} participants)"
                   if by_cluster else f"{n_t} treated and {n_c} controls assigned ({_pct(obs)} treated)")
        out.append(_alert(
            "sample_ratio_mismatch", arms.at[i, "site_id"], None, obs, a.srm_p_value, res["p"][i],
            f"{counted} against the designed "
            f"{_pct(share[i])}: chi-square {res['stat'][i]:.1f}, "
            f"{f'p ({anytime})' if anytime else 'p'} = {_p(res['p'][i])} < {a.srm_p_value:g}. "
            f"Check the randomisation and how assignments are recorded."))
    return out


def _cluster_cells(frame: pd.DataFrame, sites: list, x_col: str, n_col: str) -> dict:
    """Cells (site index, cluster index, z, x, n) of a cluster-level frame for the sites in ``sites``."""
    pos = {s: i for i, s in enumerate(sites)}
    f = frame[frame["site_id"].astype(str).isin(pos)]
    ci = pd.factorize(f["site_id"].astype(str) + "\x1f" + f["cluster_id"].astype(str))[0]
    g = pd.DataFrame({"si": f["site_id"].astype(str).map(pos).to_numpy(), "ci": ci,
                      "z": f["z"].astype(int).to_numpy(), "x": pd.to_numeric(f[x_col]).to_numpy(float),
                      "n": pd.to_numeric(f[n_col]).to_numpy(float)})
    g = g.groupby(["si", "ci", "z"], as_index=False)[["x", "n"]].sum()
    return {"site_index": g.si.to_numpy(), "cluster_index": g.ci.to_numpy(), "z": g.z.to_numpy(),
            "x": g.x.to_numpy(), "n": g.n.to_numpy(), "n_sites": len(sites)}


def _differential_missing(rows: pd.DataFrame, outcome: str, inputs: RunInputs, ctx: RunContext, a) -> list[dict]:
    nt_a = _float(rows["due_treatment"])
    nc_a = _float(rows["due_control"])
    # rows from before the due counts existed: everyone assigned was due
    nt_a = np.where(np.isfinite(nt_a), nt_a, _float(rows["n_treatment_assigned"]))
    nc_a = np.where(np.isfinite(nc_a), nc_a, _float(rows["n_control_assigned"]))
    mt = _float(rows["missing_outcome_treatment"])
    mc = _float(rows["missing_outcome_control"])
    measured = (nt_a - mt) + (nc_a - mc)
    eligible = (nt_a >= a.min_arm_size) & (nc_a >= a.min_arm_size) & (nt_a > 0) & (nc_a > 0) & (measured > 0)
    res = _two_prop(np.where(eligible, mt, 0.0), np.where(eligible, nt_a, 1.0),
                    np.where(eligible, mc, 0.0), np.where(eligible, nc_a, 1.0))
    p_one = res["p"]
    how = "two-sided test"
    cl = inputs.clusters
    if ctx.config.randomisation_unit == "cluster" and cl is not None and len(cl):
        f = cl[cl["outcome"] == outcome].assign(n_missing=lambda d: d["n_due"] - d["n_measured"])
        cells = _cluster_cells(f, list(rows["site_id"].astype(str)), "n_missing", "n_due")
        p_one = np.asarray(significance.clustered_two_proportion_test(**cells).p_value, float)
        how = "two-sided test on cluster totals, t(G-2)"
    info = (_float(rows["information"]) if ctx.config.randomisation_unit == "cluster" else nt_a + nc_a)
    p_one, anytime = alert_p_values.two_sided_p(np.where(eligible, p_one, np.nan), info, ctx)
    if anytime:
        how = f"{how}, {anytime}"
    p_adj = _bh(np.where(eligible, p_one, np.nan))
    hit = np.isfinite(p_adj) & (p_adj <= a.fdr_q)
    out = []
    for i in np.flatnonzero(hit):
        st, sc = mt[i] / nt_a[i], mc[i] / nc_a[i]
        out.append(_alert(
            "differential_missing_outcomes", rows.at[i, "site_id"], outcome, st - sc, a.fdr_q, p_adj[i],
            f"Outcome missing for {_pct(st)} of treated ({int(mt[i])} of {int(nt_a[i])} due an outcome) vs "
            f"{_pct(sc)} of controls ({int(mc[i])} of {int(nc_a[i])}) ({how}, BH-adjusted p = {_p(p_adj[i])} at "
            f"q = {a.fdr_q:g}): the ITT and CACE of this site may be biased by who is measured."))
    return out


def missing_uptake_counts(cohort: pd.DataFrame, as_of, period_days: int, uptake_window_days: int) -> pd.DataFrame:
    """Per site: participants due an uptake report and those without one, by arm.

    Due = in a cohort whose uptake window has closed (:func:`closed_cohorts`).

    Returns
    -------
    DataFrame
        site_id, due_t, missing_t, due_c, missing_c.
    """
    f = closed_cohorts(cohort, as_of, period_days, uptake_window_days)
    cols = ["site_id", "due_t", "missing_t", "due_c", "missing_c"]
    if len(f) == 0:
        return pd.DataFrame({c: pd.Series(dtype=object if c == "site_id" else float) for c in cols})
    f = f.assign(n_missing=pd.to_numeric(f["n_assigned"]) - pd.to_numeric(f["n_observed"]))
    g = f.groupby(["site_id", "z"])[["n_assigned", "n_missing"]].sum().unstack("z", fill_value=0.0)
    out = pd.DataFrame({"site_id": g.index.astype(str)})
    for arm, z in (("t", 1), ("c", 0)):
        out[f"due_{arm}"] = g[("n_assigned", z)].to_numpy(float) if ("n_assigned", z) in g.columns else 0.0
        out[f"missing_{arm}"] = g[("n_missing", z)].to_numpy(float) if ("n_missing", z) in g.columns else 0.0
    return out[cols]


def _missing_uptake(inputs: RunInputs, ctx: RunContext, a) -> list[dict]:
    t = ctx.config.trends
    m = missing_uptake_counts(inputs.cohort_counts, ctx.as_of, t.period_days, t.uptake_window_days)
    if m.empty:
        return []
    due_t, due_c = _float(m["due_t"]), _float(m["due_c"])
    mis_t, mis_c = _float(m["missing_t"]), _float(m["missing_c"])
    with np.errstate(invalid="ignore", divide="ignore"):
        sh_t = np.where(due_t > 0, mis_t / np.where(due_t > 0, due_t, 1.0), np.nan)
        sh_c = np.where(due_c > 0, mis_c / np.where(due_c > 0, due_c, 1.0), np.nan)
    testable = (due_t >= a.min_arm_size) & (due_c >= a.min_arm_size)
    res = _two_prop(np.where(testable, mis_t, 0.0), np.where(testable, due_t, 1.0),
                    np.where(testable, mis_c, 0.0), np.where(testable, due_c, 1.0))
    p_one = res["p"]
    how = "two-sided two-proportion test"
    if ctx.config.randomisation_unit == "cluster" and inputs.cluster_cohort_counts is not None:
        cc = closed_cohorts(inputs.cluster_cohort_counts, ctx.as_of, t.period_days, t.uptake_window_days)
        cc = cc.assign(n_missing=pd.to_numeric(cc["n_assigned"]) - pd.to_numeric(cc["n_observed"]))
        cells = _cluster_cells(cc, list(m["site_id"]), "n_missing", "n_assigned")
        p_one = np.asarray(significance.clustered_two_proportion_test(**cells).p_value, float)
        how = "two-sided test on cluster totals, t(G-2)"
    info = due_t + due_c
    if ctx.config.randomisation_unit == "cluster" and inputs.cluster_cohort_counts is not None:
        g = _clusters_by_site(inputs).set_index("site_id").reindex(m["site_id"].astype(str)).fillna(0.0)
        info = g["g_t"].to_numpy(float) + g["g_c"].to_numpy(float)
    p_one, anytime = alert_p_values.two_sided_p(np.where(testable, p_one, np.nan), info, ctx)
    p_adj = _bh(np.where(testable, p_one, np.nan))
    worst = np.fmax(sh_t, sh_c)
    by_share = np.isfinite(worst) & (worst > a.missing_uptake_share)
    by_test = np.isfinite(p_adj) & (p_adj <= a.fdr_q)
    out = []
    for i in np.flatnonzero(by_share | by_test):
        p_txt = (f"{how} of equal shares{', ' + anytime if anytime else ''}: BH-adjusted p = {_p(p_adj[i])}"
                 if np.isfinite(p_adj[i])
                 else "no test of equal shares (an arm too small)")
        if by_share[i]:
            value, threshold = worst[i], a.missing_uptake_share
            why = f"above the {_pct(a.missing_uptake_share)} threshold in at least one arm; {p_txt}"
        else:
            value, threshold = sh_t[i] - sh_c[i], a.fdr_q
            why = f"the shares differ between arms ({p_txt} at q = {a.fdr_q:g})"
        rule_txt = ("they are left out of the uptake estimates (complete case)"
                    if ctx.config.uptake_missing == "complete_case" else "they are counted as not taken up")
        out.append(_alert(
            "missing_uptake_reports", m.at[i, "site_id"], None, value, threshold, p_adj[i],
            f"No uptake report for {_pct(sh_t[i]) if np.isfinite(sh_t[i]) else 'n/a'} of treated "
            f"({int(mis_t[i])} of {int(due_t[i])} due a report) and "
            f"{_pct(sh_c[i]) if np.isfinite(sh_c[i]) else 'n/a'} of controls ({int(mis_c[i])} of {int(due_c[i])}): "
            f"{why}. {rule_txt.capitalize()}; see the complier-share bounds in site_estimates and check how "
            f"uptake is recorded."))
    return out


def _stale(inputs: RunInputs, ctx: RunContext, a) -> list[dict]:
    act = inputs.site_activity
    if act is not None and len(act) and {"site_id", "last_record_on"} <= set(act.columns):
        last = pd.Series(pd.to_datetime(act["last_record_on"], errors="coerce").to_numpy(),
                         index=act["site_id"].astype(str)).dropna()
        last = last[~last.index.duplicated()]
    else:
        last = pd.Series(dtype="datetime64[ns]")
    sites = sorted({s.site_id for s in ctx.config.sites} | set(inputs.sites) | set(last.index))
    when = last.reindex(sites)
    days = (pd.Timestamp(ctx.as_of) - when).dt.days.to_numpy(dtype=float)
    hit = ~np.isfinite(days) | (days > a.stale_days)
    out = []
    for i in np.flatnonzero(hit):  # one message per raised alert
        s = sites[i]
        if not np.isfinite(days[i]):
            out.append(_alert("stale_site", s, None, None, a.stale_days, None,
                              f"No records received from this site by {ctx.as_of}."))
            continue
        out.append(_alert("stale_site", s, None, days[i], a.stale_days, None,
                          f"Latest record dated {when.iloc[i].date()}, {int(days[i])} days before the cutoff "
                          f"{ctx.as_of} (more than {a.stale_days} days): the site may have stopped sending data."))
    return out


def _outliers(rows: pd.DataFrame, outcome: str, influence_rows: list[dict], a) -> list[dict]:
    """Pooled sites whose CACE is far from the other sites' given its own SE (BH across sites)."""
    inf = pd.DataFrame([r for r in influence_rows if r.get("outcome") == outcome and r.get("quantity") == "cace"
                        and r.get("method") == INFLUENCE_METHOD])
    if inf.empty:
        return []
    inf = inf.drop_duplicates("site_id").set_index("site_id")
    pooled_sites = rows.loc[rows["included_in_pool"].fillna(False).astype(bool), "site_id"]
    inf = inf.reindex([s for s in pooled_sites if s in inf.index])
    if inf.empty:
        return []
    se = _float(inf["se"])
    test = outlier_test(_float(inf["estimate"]), se**2, _float(inf["loo_estimate"]), _float(inf["loo_se"]),
                        _float(inf["loo_tau2"]), level=0.95)   # the range shown in the message
    p_adj = _bh(test.p_value)
    hit = np.isfinite(p_adj) & (p_adj <= a.fdr_q)
    if a.outlier_std_residual is not None:
        hit &= np.abs(test.std_residual) > a.outlier_std_residual
    out = []
    for i in np.flatnonzero(hit):  # one message per raised alert
        y, r = float(inf["estimate"].iloc[i]), float(test.std_residual[i])
        floor = (f"; |residual| above {a.outlier_std_residual:g}" if a.outlier_std_residual is not None else "")
        out.append(_alert(
            "outlier_site", str(inf.index[i]), outcome, r, a.fdr_q, p_adj[i],
            f"Site CACE {y:.2f} (SE {se[i]:.2f}) is {'above' if r > 0 else 'below'} what the other sites lead "
            f"one to expect for this site's estimate: {100 * test.level:.0f}% reference range "
            f"[{test.ref_low[i]:.2f}, {test.ref_high[i]:.2f}] (pooled REML estimate without this site, its "
            f"tau2 and the site's own SE); externally standardised residual {r:.1f}, BH-adjusted p = "
            f"{_p(p_adj[i])} at q = {a.fdr_q:g}{floor}. The programme may work differently here; check before "
            f"pooling."))
    return out


def evaluate_rules(inputs: RunInputs, ctx: RunContext, site_rows: list[dict], pooled_rows: list[dict],
                   influence_rows: list[dict], drift: DriftResult) -> list[dict]:
    """Alerts active in this run (without lifecycle columns).

    Returns
    -------
    list of dict
        rule, site_id, outcome, value, threshold, p_value, message.
    """
    a = ctx.config.alerts
    outcome = _primary(inputs, ctx)
    rows = _primary_rows(site_rows, outcome)
    found: list[dict] = []
    if len(rows):
        found += _negative_first_stage(rows, outcome, a, ctx)
        found += _weak_first_stage(rows, outcome, a)
        found += _differential_missing(rows, outcome, inputs, ctx, a)
        found += _outliers(rows, outcome, influence_rows, a)
    found += _sample_ratio(inputs, ctx, a)
    looks = ({str(s): k for s, k in zip(rows["site_id"], _float(rows["look"])) if np.isfinite(k)}
             if len(rows) else {})
    found += _first_stage_decline(inputs, ctx, a, looks)
    found += _missing_uptake(inputs, ctx, a)
    found += _drift(drift)
    found += _stale(inputs, ctx, a)
    return found


# ----------------------------------------------------------------------------- lifecycle
def _previous_active(prev: pd.DataFrame | None) -> dict[str, dict]:
    if prev is None or len(prev) == 0 or "alert_key" not in prev.columns or "status" not in prev.columns:
        return {}
    active = prev[prev["status"].isin(_ACTIVE)]
    out: dict[str, dict] = {}
    for rec in active.to_dict("records"):
        out.setdefault(str(rec["alert_key"]), rec)
    return out


def _none_if_missing(v):
    if v is None:
        return None
    try:
        if pd.isna(v):
            return None
    except (TypeError, ValueError):
        pass
    return v


def apply_lifecycle(found: list[dict], previous_alerts: pd.DataFrame | None, run_id: str) -> list[dict]:
    """Add key, severity, status and first/last-seen run ids; append resolved rows.

    Parameters
    ----------
    found : list of dict
        Alerts active now (from :func:`evaluate_rules`).
    previous_alerts : DataFrame
        All alert rows of the previous finished run (not modified).
    run_id : str
        This run.

    Returns
    -------
    list of dict
        AlertRow rows, sorted by status (new, ongoing, resolved), severity, rule, site.
    """
    prev = _previous_active(previous_alerts)
    out, seen = [], set()
    for f in found:
        key = alert_key(f["rule"], f["site_id"], f["outcome"])
        if key in seen:
            continue
        seen.add(key)
        before = prev.get(key)
        out.append({
            "run_id": run_id, "alert_key": key, "site_id": f["site_id"], "outcome": f["outcome"],
            "rule": f["rule"], "severity": SEVERITY[f["rule"]],
            "status": "ongoing" if before is not None else "new",
            "value": f["value"], "threshold": f["threshold"], "p_value": f["p_value"],
            "first_seen_run_id": str(before["first_seen_run_id"]) if before is not None else run_id,
            "last_seen_run_id": run_id, "message": f["message"],
        })
    for key, rec in prev.items():
        if key in seen:
            continue
        rule = str(rec.get("rule"))
        last_seen = _none_if_missing(rec.get("last_seen_run_id")) or _none_if_missing(rec.get("run_id")) or run_id
        out.append({
            "run_id": run_id, "alert_key": key, "site_id": _none_if_missing(rec.get("site_id")),
            "outcome": _none_if_missing(rec.get("outcome")), "rule": rule,
            "severity": _none_if_missing(rec.get("severity")) or SEVERITY.get(rule, "info"),
            "status": "resolved",
            "value": clean(_none_if_missing(rec.get("value"))),
            "threshold": clean(_none_if_missing(rec.get("threshold"))),
            "p_value": clean(_none_if_missing(rec.get("p_value"))),
            "first_seen_run_id": str(_none_if_missing(rec.get("first_seen_run_id")) or last_seen),
            "last_seen_run_id": str(last_seen),
            "message": f"resolved: the condition no longer holds in this run (last seen in run {last_seen}). "
                       f"Previously: {rec.get('message') or ''}".rstrip(),
        })
    status_order = {"new": 0, "ongoing": 1, "resolved": 2}
    out.sort(key=lambda r: (status_order[r["status"]], _SEVERITY_ORDER.get(r["severity"], 9), r["rule"],
                            r["site_id"] or ""))
    return out


def compute_alerts(inputs: RunInputs, ctx: RunContext, site_rows: list[dict], pooled_rows: list[dict],
                   influence_rows: list[dict], drift: DriftResult) -> list[dict]:
    """Rows of ``alerts`` for this run (see the module docstring for rules and lifecycle).

    Parameters
    ----------
    inputs : RunInputs
        Uses ``cohort_counts``, ``site_activity``, ``previous_alerts`` (not modified).
    ctx : RunContext
        Run id, cutoff date and thresholds (``ctx.config.alerts``).
    site_rows, pooled_rows, influence_rows : list of dict
        The run's ``site_estimates``, ``pooled_estimates`` and ``site_influence`` rows.
    drift : DriftResult
        Drift charts from :func:`takeup.pipeline.run.trend_rows.compute_trends`.

    Returns
    -------
    list of dict
        Rows with exactly the ``AlertRow`` columns.

    References
    ----------
    .. [1] Staiger, D. and Stock, J. H. (1997). Instrumental variables regression
       with weak instruments. *Econometrica* 65(3), 557-586.
    .. [2] Lee, D. S., McCrary, J., Moreira, M. J. and Porter, J. (2022). Valid
       t-ratio inference for IV. *American Economic Review* 112(10), 3260-3290.
    .. [3] Benjamini, Y. and Hochberg, Y. (1995). Controlling the false discovery
       rate. *Journal of the Royal Statistical Society B* 57(1), 289-300.
    .. [4] Fabijan, A. et al. (2019). Diagnosing sample ratio mismatch in online
       controlled experiments. *KDD '19*, 2156-2164.
    """
    found = evaluate_rules(inputs, ctx, site_rows, pooled_rows, influence_rows, drift)
    return apply_lifecycle(found, inputs.previous_alerts, ctx.run_id)


# ----------------------------------------------------------------------------- statistical tests
# Thin adapters over takeup.pipeline.stats.significance (the tests themselves live there).
def _bh_adjusted(p: np.ndarray) -> np.ndarray:
    return np.asarray(significance.benjamini_hochberg(p).p_adjusted, dtype=float)


def _srm_test(n_t, n_c, share) -> dict:
    counts = np.column_stack([n_t, n_c])
    res = significance.sample_ratio_test(counts, np.column_stack([share, 1.0 - share]))
    return {"stat": np.asarray(res.chi2, float), "p": np.asarray(res.p_value, float)}


def _two_prop(x1, n1, x2, n2) -> dict:
    res = significance.two_proportion_z(x1, n1, x2, n2, alternative="two-sided")
    return {"z": np.asarray(res.z, float), "p": np.asarray(res.p_value, float)}


def _difference_test(x_t_recent, n_t_recent, x_c_recent, n_c_recent,
                     x_t_early, n_t_early, x_c_early, n_c_early, variance: str = "unpooled") -> dict:
    res = significance.two_proportion_difference_test(x_t_early, n_t_early, x_c_early, n_c_early,
                                                    x_t_recent, n_t_recent, x_c_recent, n_c_recent,
                                                    alternative="decline", variance=variance)
    return {"p_less": np.asarray(res.p_value, float), "fs_recent": np.asarray(res.first_stage_recent, float),
            "fs_early": np.asarray(res.first_stage_early, float), "z": np.asarray(res.z, float)}
