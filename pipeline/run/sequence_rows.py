"""Anytime-valid columns of ``site_estimates`` and ``pooled_estimates``, and ``precision_forecasts`` rows.

Two stages of the run (see :data:`takeup.pipeline.run.stages.STAGES`):

* ``sequential`` adds to each site row (every spec) and to the fixed-effect
  pooled rows of all sites the look number, the information (participants in
  the analysis, clusters under cluster randomisation) and the confidence
  sequences of :mod:`takeup.pipeline.stats.sequential`, intersected with the
  previous finished run's sequence for the same key (so a sequence never
  widens).  The conventional columns are left as they are.
* ``precision`` computes the minimum detectable ITT and CACE for the primary
  outcome per site and pooled, and when the CACE's reaches the configured
  target (:mod:`takeup.pipeline.stats.precision`).

Both are pure functions of the run's inputs and earlier rows; they return new
rows and never modify their arguments.
"""

from __future__ import annotations

import math
from datetime import timedelta

import numpy as np
import pandas as pd

from takeup.pipeline.run.inputs import RunContext, RunInputs
from takeup.pipeline.run.pooled_rows import _values
from takeup.pipeline.run.sample_sql import cluster_moments_for_outcome, moments_for_outcome
from takeup.pipeline.run.site_rows import clean, is_primary
from takeup.pipeline.run.stratified_rows import stratified_covariances
from takeup.pipeline.stats.estimators.wald import wald_estimates
from takeup.pipeline.stats.precision import precision_forecast
from takeup.pipeline.stats.sequential import (anytime_ar_set, confidence_sequence, intersect_sets,
                                              running_intersection)

__all__ = ["add_sequences", "precision_rows", "accrual_per_week"]

_AR_KINDS = {"interval", "two_rays", "real_line", "empty"}


def _information(row: dict, cluster: bool) -> float:
    if cluster:
        return float(row["n_clusters"]) if row.get("n_clusters") else math.nan
    n = row["n_treatment"] + row["n_control"]
    if row.get("itt") is None:   # no outcomes yet: the first stage rests on everyone assigned
        n = row["n_treatment_assigned"] + row["n_control_assigned"]
    return float(n) if n > 0 else math.nan


def _previous(frame: pd.DataFrame, keys: list[str], wanted: list[tuple], columns: list[str]) -> dict[str, np.ndarray]:
    """Previous values of ``columns`` for each wanted key (NaN / None where there is none)."""
    out = {c: np.full(len(wanted), np.nan) for c in columns}
    out["cs_cace_set"] = np.full(len(wanted), None, dtype=object)
    if frame is None or frame.empty:
        return out
    index = {tuple(k): i for i, k in enumerate(frame[keys].itertuples(index=False, name=None))}
    pos = np.array([index.get(key, -1) for key in wanted], dtype=np.int64)
    found = pos >= 0
    for c in columns:
        if c == "cs_cace_set":
            values = frame[c].to_numpy(dtype=object)[pos[found]]
            out[c][found] = [v if isinstance(v, str) else None for v in values]
        else:
            values = pd.to_numeric(frame[c], errors="coerce").to_numpy(dtype=float, na_value=np.nan)
            out[c][found] = values[pos[found]]
    return out


def _site_sequences(rows: list[dict], inputs: RunInputs, ctx: RunContext) -> list[dict]:
    seq = ctx.config.sequential
    cluster = ctx.config.randomisation_unit == "cluster"
    alpha, horizon = seq.alpha, seq.horizon_participants
    n = len(rows)
    if n == 0:
        return []
    info = np.array([_information(r, cluster) for r in rows])

    def col(name):
        return np.array([np.nan if r.get(name) is None else float(r[name]) for r in rows])

    itt, itt_se = col("itt"), col("itt_se")
    pi, pi_se = col("complier_share"), col("complier_share_se")
    cs_itt = confidence_sequence(itt, itt_se, info, alpha, horizon)
    cs_pi = confidence_sequence(pi, pi_se, info, alpha, horizon)
    # the CACE set needs Cov(ITT, complier share): recomputed from the moments, as for the fixed-sample AR set
    cov = np.full(n, np.nan)
    sites = list(inputs.sites)
    for outcome in inputs.outcomes:
        idx = [i for i, r in enumerate(rows) if r["outcome"] == outcome and is_primary(r)]
        if not idx:
            continue
        table = moments_for_outcome(inputs.moments, outcome, sites)
        clusters = (cluster_moments_for_outcome(inputs.clusters, outcome, sites)
                    if inputs.clusters is not None else None)
        est = wald_estimates(table.moments, clusters=clusters, level=ctx.config.estimation.level)
        pos = {s: k for k, s in enumerate(table.sites)}
        for i in idx:
            k = pos.get(rows[i]["site_id"])
            if k is not None and rows[i].get("itt") is not None:
                cov[i] = est.cov_itt_fs[k]
        strat = stratified_covariances(inputs, outcome, ctx.config)
        for i in idx:
            if rows[i]["spec"] == "stratified":
                cov[i] = strat.get(rows[i]["site_id"], np.nan) if rows[i].get("itt") is not None else np.nan
    ar = anytime_ar_set(itt, pi, itt_se**2, pi_se**2, cov, info, alpha, horizon)
    ar_kind = np.array([str(k) if np.isfinite(cov[i]) and str(k) in _AR_KINDS else "undefined"
                        for i, k in enumerate(ar.kind)], dtype=object)

    keys = [(r["site_id"], r["outcome"], r["spec"]) for r in rows]
    prev = _previous(inputs.previous_sequences, ["site_id", "outcome", "spec"], keys,
                     ["look", "cs_itt_low", "cs_itt_high", "cs_complier_share_low", "cs_complier_share_high",
                      "cs_cace_low", "cs_cace_high"])
    if not inputs.previous_sequences.empty:
        prev_set = _previous(inputs.previous_sequences, ["site_id", "outcome", "spec"], keys, ["cs_cace_set"])
        prev["cs_cace_set"] = prev_set["cs_cace_set"]
    itt_lo, itt_hi = running_intersection(cs_itt.low, cs_itt.high, prev["cs_itt_low"], prev["cs_itt_high"])
    pi_lo, pi_hi = running_intersection(cs_pi.low, cs_pi.high, prev["cs_complier_share_low"],
                                        prev["cs_complier_share_high"])
    k_set, k_lo, k_hi, k_note = intersect_sets(ar_kind, ar.low, ar.high, prev["cs_cace_set"],
                                               prev["cs_cace_low"], prev["cs_cace_high"])
    out = []
    for i, r in enumerate(rows):
        row = dict(r)
        look = 1 if np.isnan(prev["look"][i]) else int(prev["look"][i]) + 1
        defined = k_set[i] in _AR_KINDS
        notes = []
        if itt_lo[i] > itt_hi[i] or pi_lo[i] > pi_hi[i] or k_set[i] == "empty":
            notes.append("the running intersection of the anytime-valid sequences is empty: the data contradict "
                         "a constant effect across looks (expected in at most alpha of clean studies); review")
        if k_note[i]:
            notes.append(f"anytime-valid CACE set: {k_note[i]}")
        row.update({
            "look": look, "information": clean(info[i]),
            "cs_itt_low": clean(itt_lo[i]), "cs_itt_high": clean(itt_hi[i]),
            "cs_complier_share_low": clean(pi_lo[i]), "cs_complier_share_high": clean(pi_hi[i]),
            "cs_cace_set": k_set[i] if defined else None,
            "cs_cace_low": clean(k_lo[i]) if defined else None, "cs_cace_high": clean(k_hi[i]) if defined else None,
            "cs_alpha": alpha,
        })
        if notes:
            row["note"] = "; ".join([p for p in [r.get("note")] if p] + notes)
        out.append(row)
    return out


def _pooled_sequences(pooled: list[dict], site_rows: list[dict], inputs: RunInputs, ctx: RunContext) -> list[dict]:
    seq = ctx.config.sequential
    cluster = ctx.config.randomisation_unit == "cluster"
    info_by_site = {(r["site_id"], r["outcome"]): _information(r, cluster)
                    for r in site_rows if is_primary(r)}
    targets = [i for i, r in enumerate(pooled) if r["method"] == "fixed" and r.get("group_field") is None]
    if not targets:
        return list(pooled)
    est = np.array([np.nan if pooled[i].get("estimate") is None else pooled[i]["estimate"] for i in targets])
    se = np.array([np.nan if pooled[i].get("se") is None else pooled[i]["se"] for i in targets])
    info = np.full(len(targets), np.nan)
    horizon = np.full(len(targets), np.nan)
    for j, i in enumerate(targets):
        r = pooled[i]
        rows = [s for s in site_rows if s["outcome"] == r["outcome"] and is_primary(s)]
        sites, _, _, _ = _values(rows, r["quantity"])
        vals = [info_by_site.get((s, r["outcome"]), math.nan) for s in sites]
        vals = [v for v in vals if np.isfinite(v)]
        if vals:
            info[j] = float(sum(vals))
            horizon[j] = seq.horizon_participants * len(vals)
    low, high = np.full(len(targets), np.nan), np.full(len(targets), np.nan)
    for h in np.unique(horizon[np.isfinite(horizon)]):
        sel = horizon == h
        cs = confidence_sequence(est[sel], se[sel], info[sel], seq.alpha, float(h))
        low[sel], high[sel] = cs.low, cs.high
    keys = [(pooled[i]["outcome"], pooled[i]["quantity"]) for i in targets]
    prev = _previous(inputs.previous_pooled_sequences, ["outcome", "quantity"], keys, ["look", "cs_low", "cs_high"])
    low, high = running_intersection(low, high, prev["cs_low"], prev["cs_high"])
    out = [dict(r) for r in pooled]
    for j, i in enumerate(targets):
        look = 1 if np.isnan(prev["look"][j]) else int(prev["look"][j]) + 1
        out[i].update({"look": look, "information": clean(info[j]), "cs_low": clean(low[j]),
                       "cs_high": clean(high[j]), "cs_alpha": seq.alpha})
    return out


def add_sequences(inputs: RunInputs, ctx: RunContext, site_rows: list[dict], pooled: list[dict]
                  ) -> tuple[list[dict], list[dict]]:
    """Site and pooled rows with the anytime-valid columns filled (new lists; inputs untouched)."""
    return _site_sequences(site_rows, inputs, ctx), _pooled_sequences(pooled, site_rows, inputs, ctx)


def accrual_per_week(inputs: RunInputs, ctx: RunContext) -> dict[str, float]:
    """Participants assigned per week per site, over the cohort periods of the last ``accrual_weeks`` weeks."""
    weeks = ctx.config.planning.accrual_weeks
    counts = inputs.cohort_counts
    if counts is None or counts.empty:
        return {}
    start = ctx.as_of - timedelta(days=7 * weeks)
    period = pd.to_datetime(counts["period_start"]).dt.date
    recent = counts[(period > start) & (period <= ctx.as_of)]
    totals = recent.groupby("site_id")["n_assigned"].sum()
    return {s: float(totals.get(s, 0)) / weeks for s in inputs.sites}


def precision_rows(inputs: RunInputs, ctx: RunContext, site_rows: list[dict], pooled: list[dict]) -> list[dict]:
    """``precision_forecasts`` rows for the primary outcome: each site and the fixed-effect pool."""
    outcome = ctx.config.primary_outcome or (inputs.outcomes[0] if inputs.outcomes else None)
    if outcome is None:
        return []
    plan = ctx.config.planning
    alpha = 1.0 - ctx.config.estimation.level
    rows = [r for r in site_rows if r["outcome"] == outcome and is_primary(r)]
    accrual = accrual_per_week(inputs, ctx)

    def f(x):
        return np.nan if x is None else float(x)

    def share_low(r):
        if r.get("complier_share") is None or r.get("complier_share_se") is None:
            return np.nan
        from scipy.special import ndtri
        return r["complier_share"] - ndtri(1 - alpha / 2) * r["complier_share_se"]

    # the analysis sample grows with assignments times the share of assigned participants with an outcome
    n = np.array([r["n_treatment"] + r["n_control"] for r in rows], dtype=float)
    assigned = np.array([r["n_treatment_assigned"] + r["n_control_assigned"] for r in rows], dtype=float)
    with np.errstate(all="ignore"):
        observed_share = np.where(assigned > 0, n / assigned, np.nan)
    acc = np.array([accrual.get(r["site_id"], 0.0) for r in rows]) * observed_share
    fc = precision_forecast([f(r.get("itt_se")) for r in rows], [f(r.get("complier_share")) for r in rows],
                            [share_low(r) for r in rows], n, acc, plan.target_mde, alpha, plan.power)
    out = []
    for i, r in enumerate(rows):
        out.append(_forecast_row(ctx, "site", r["site_id"], outcome, int(n[i]), fc, i, f(r.get("complier_share")),
                                 clean(accrual.get(r["site_id"], 0.0))))
    # the fixed-effect pool of all sites
    fixed = {p["quantity"]: p for p in pooled if p["outcome"] == outcome and p["method"] == "fixed"
             and p.get("group_field") is None}
    if "itt" in fixed and "complier_share" in fixed:
        p_itt, p_pi = fixed["itt"], fixed["complier_share"]
        pool_sites, _, _, _ = _values(rows, "itt")
        pos = {r["site_id"]: i for i, r in enumerate(rows)}
        n_pool = int(sum(n[pos[s]] for s in pool_sites))
        acc_pool = float(np.nansum([acc[pos[s]] for s in pool_sites]))
        fcp = precision_forecast([f(p_itt.get("se"))], [f(p_pi.get("estimate"))], [f(p_pi.get("ci_low"))],
                                 [n_pool], [acc_pool], plan.target_mde, alpha, plan.power)
        out.append(_forecast_row(ctx, "pooled", None, outcome, n_pool, fcp, 0, f(p_pi.get("estimate")),
                                 clean(sum(accrual.get(s, 0.0) for s in pool_sites))))
    return out


def _forecast_row(ctx: RunContext, scope: str, site: str | None, outcome: str, n: int, fc, i: int,
                  share: float, accrual: float | None) -> dict:
    weeks = float(fc.weeks_to_target[i])
    date_ = ctx.as_of + timedelta(days=math.ceil(7 * weeks)) if np.isfinite(weeks) else None
    notes = [fc.note[i]] if fc.note[i] else []
    if ctx.config.planning.target_mde is None:
        notes.append("no [planning] target_mde configured: no forecast date")
    elif np.isfinite(weeks):
        notes.append("assumes the standard error falls as 1/sqrt(n) at the current complier share, "
                     "missing-outcome rate and accrual")
    return {"run_id": ctx.run_id, "scope": scope, "site_id": site, "outcome": outcome, "n": n,
            "mde_itt": clean(fc.mde_itt[i]), "mde_cace": clean(fc.mde_cace[i]), "complier_share": clean(share),
            "accrual_per_week": accrual, "target_mde": ctx.config.planning.target_mde,
            "weeks_to_target": clean(weeks), "forecast_date": date_, "note": "; ".join(notes) or None}
