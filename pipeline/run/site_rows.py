"""Per-site estimates table: moments -> Wald/2SLS, weak-IV sets, complier means.

The numbers come from :mod:`takeup.pipeline.stats.estimators`; this module only lines
them up as rows of ``site_estimates`` (one per site x outcome x spec) and
applies the documented rule for entering the pooled CACE:

    a site enters the CACE pool when its status is ``ok``, its CACE and
    standard error are defined, and its first-stage F is at least
    ``estimation.pool_min_first_stage_f`` (default 10, the Staiger & Stock
    rule of thumb).  ITT and complier-share pools use every site whose
    estimate and standard error are defined.
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np
import pandas as pd

from takeup.pipeline.stats.estimators.complier_means import complier_outcome_means, kappa_complier_means
from takeup.pipeline.stats.estimators.missing_uptake import complier_share_bounds
from takeup.pipeline.stats.estimators.moments import ClusterMoments
from takeup.pipeline.stats.estimators.wald import wald_estimates
from takeup.pipeline.stats.estimators.weak_iv import anderson_rubin_set, tf_interval
from takeup.pipeline.run.sample_sql import MomentTable
from takeup.schemas.config import StudyConfig

__all__ = ["estimate_sites", "rows_from_estimates", "complier_profile_rows", "adjusted_row", "clean",
           "PRIMARY_SPECS", "is_primary"]

_AR_KINDS = {"interval", "two_rays", "real_line", "empty"}


def clean(x):
    """A float for the table: None for NaN/inf/None (never write NaN or inf)."""
    if x is None:
        return None
    try:
        v = float(x)
    except (TypeError, ValueError):
        return None
    return v if math.isfinite(v) else None


def _fmt(x) -> str:
    v = clean(x)
    return "n/a" if v is None else f"{v:.3f}"


def _join_notes(*notes) -> str | None:
    parts = []
    for n in notes:
        if n:
            for p in str(n).split("; "):
                if p and p not in parts:
                    parts.append(p)
    return "; ".join(parts) if parts else None


#: specs of the row that stands for a site x outcome (pooling, alerts, sequences, report): one per
#: site x outcome, ``stratified`` for sites with two or more strata, ``unadjusted`` otherwise
PRIMARY_SPECS: tuple[str, ...] = ("unadjusted", "stratified")


def is_primary(row: dict) -> bool:
    """Whether a ``site_estimates`` row is its site x outcome's primary row."""
    return row.get("spec", "unadjusted") in PRIMARY_SPECS


def estimate_sites(table: MomentTable, config: StudyConfig, run_id: str,
                   clusters: ClusterMoments | None = None) -> list[dict]:
    """Rows of ``site_estimates`` (spec ``unadjusted``) for one outcome."""
    level = config.estimation.level
    min_cl = config.estimation.min_clusters_per_arm
    est = wald_estimates(table.moments, clusters=clusters, level=level, min_clusters_per_arm=min_cl)
    fs_only = wald_estimates(table.first_stage_moments, level=level)
    cm = complier_outcome_means(table.moments)
    return rows_from_estimates(table, config, run_id, est, fs_only, cm, clusters is not None, "unadjusted")


def rows_from_estimates(table: MomentTable, config: StudyConfig, run_id: str, est, fs_only, cm, clustered: bool,
                        spec: str) -> list[dict]:
    """``site_estimates`` rows of one outcome from Wald-type estimates (unstratified or stratified).

    ``est`` and ``fs_only`` are :class:`WaldEstimates` of the analysis sample and of the
    first-stage sample (sites without outcomes), ``cm`` the complier outcome means.
    """
    level = config.estimation.level
    ar = anderson_rubin_set(est.itt, est.complier_share, est.itt_se ** 2, est.complier_share_se ** 2,
                            est.cov_itt_fs, level=level, df=est.ci_df)
    tf = tf_interval(est.cace, est.cace_se, est.first_stage_f)
    missing = table.n_assigned - table.n_uptake_observed
    bounds = complier_share_bounds(table.sum_d_assigned[:, 1], missing[:, 1], table.n_assigned[:, 1],
                                   table.sum_d_assigned[:, 0], missing[:, 0], table.n_assigned[:, 0])
    complete_case = config.uptake_missing == "complete_case"
    floor = config.estimation.pool_min_first_stage_f
    rows = []
    m = table.moments
    for i, site in enumerate(table.sites):
        n_t, n_c = int(m.treated.n[i]), int(m.control.n[i])
        nat_c, nat_t = int(table.n_assigned[i, 0]), int(table.n_assigned[i, 1])
        due_c, due_t = int(table.n_due[i, 0]), int(table.n_due[i, 1])
        meas_c, meas_t = int(table.n_measured[i, 0]), int(table.n_measured[i, 1])
        um_c, um_t = int(missing[i, 0]), int(missing[i, 1])
        no_outcomes = n_t == 0 and n_c == 0
        src = fs_only if no_outcomes else est
        status = str(src.status[i])
        note = src.note[i]
        if no_outcomes:
            status = "no_outcomes" if status in ("ok", "negative_first_stage", "constant_outcome",
                                                 "zero_cace_variance") else status
            # keep the first-stage notes only: the first-stage-only moments carry Y := 0, so their
            # outcome notes (constant outcome, vanishing residuals) say nothing about this site
            fs_notes = [p for p in str(src.note[i] or "").split("; ")
                        if p and "ITT" not in p and "CACE" not in p and "outcome" not in p]
            note = _join_notes("no outcome measurements in the follow-up window yet: ITT and CACE are "
                               "not available; uptake and first stage use all assigned participants (with an uptake report, "
                               "under the complete-case rule)", *fs_notes)
        ar_kind = str(ar.kind[i])
        ar_ok = (not no_outcomes) and ar_kind in _AR_KINDS
        f_stat = clean(src.first_stage_f[i])
        row = {
            "run_id": run_id, "site_id": site, "outcome": table.outcome, "spec": spec,
            "n_treatment": n_t, "n_control": n_c,
            "n_treatment_assigned": nat_t, "n_control_assigned": nat_c,
            "due_treatment": due_t, "due_control": due_c,
            "missing_outcome_treatment": due_t - meas_t, "missing_outcome_control": due_c - meas_c,
            "uptake_missing_treatment": um_t, "uptake_missing_control": um_c,
            "uptake_treatment": clean(src.uptake_treatment[i]), "uptake_control": clean(src.uptake_control[i]),
            "complier_share": clean(src.complier_share[i]), "complier_share_se": clean(src.complier_share_se[i]),
            "complier_share_ci_low": clean(src.complier_share_ci_low[i]),
            "complier_share_ci_high": clean(src.complier_share_ci_high[i]),
            "complier_share_bound_low": clean(bounds.low[i]), "complier_share_bound_high": clean(bounds.high[i]),
            "always_taker_share": clean(src.always_taker_share[i]),
            "never_taker_share": clean(src.never_taker_share[i]),
            "itt": None if no_outcomes else clean(est.itt[i]),
            "itt_se": None if no_outcomes else clean(est.itt_se[i]),
            "itt_ci_low": None if no_outcomes else clean(est.itt_ci_low[i]),
            "itt_ci_high": None if no_outcomes else clean(est.itt_ci_high[i]),
            "cace": None if no_outcomes else clean(est.cace[i]),
            "cace_se": None if no_outcomes else clean(est.cace_se[i]),
            "cace_ci_low": None if no_outcomes else clean(est.cace_ci_low[i]),
            "cace_ci_high": None if no_outcomes else clean(est.cace_ci_high[i]),
            "first_stage_f": f_stat,
            "ar_set": ar_kind if ar_ok else None,
            "ar_ci_low": clean(ar.low[i]) if ar_ok else None,
            "ar_ci_high": clean(ar.high[i]) if ar_ok else None,
            "tf_ci_low": None if no_outcomes else clean(tf.low[i]),
            "tf_ci_high": None if no_outcomes else clean(tf.high[i]),
            "tf_se": None if no_outcomes else clean(tf.se[i]),
            "se_type": src.se_type,
            "n_clusters": (int(src.n_clusters[i]) if clustered and np.isfinite(src.n_clusters[i])
                           else None),
            "ci_df": (int(src.ci_df[i]) if clustered and np.isfinite(src.ci_df[i]) else None),
            "complier_mean_treated": None if no_outcomes else clean(cm.complier_treated[i]),
            "complier_mean_untreated": None if no_outcomes else clean(cm.complier_control[i]),
            "status": status,
        }
        extra_notes = []
        if not no_outcomes and ar_kind not in _AR_KINDS and ar.note[i]:
            extra_notes.append(f"Anderson-Rubin set not available: {ar.note[i]}")
        elif ar_ok and ar_kind != "interval" and ar.note[i]:
            extra_notes.append(str(ar.note[i]))
        if not no_outcomes and row["cace"] is not None and row["tf_ci_low"] is None and tf.note[i]:
            extra_notes.append(str(tf.note[i]))
        if clustered and row["tf_ci_low"] is not None:
            extra_notes.append(f"the tF interval uses the critical values of Lee et al. (2022), derived for many "
                               f"clusters; with {row['n_clusters']} clusters prefer the Anderson-Rubin set, which "
                               f"uses t({row['ci_df']})")
        if um_t or um_c:
            rule = ("left out of the uptake and outcome moments (complete case)" if complete_case
                    else "counted as not taken up (uptake_missing = not_taken_up)")
            extra_notes.append(f"{um_t} treated and {um_c} controls have no uptake report by the cutoff: {rule}; "
                               f"worst-case complier-share bounds [{_fmt(bounds.low[i])}, {_fmt(bounds.high[i])}]")
        # the pooling rule
        reason = None
        if status != "ok":
            reason = f"status {status}"
        elif row["cace"] is None or row["cace_se"] is None:
            reason = "CACE or its standard error not available"
        elif f_stat is None or f_stat < floor:
            reason = f"first-stage F {f_stat:.2f} below the pooling floor {floor:g}" if f_stat is not None \
                else "first-stage F not available"
        row["included_in_pool"] = reason is None
        row["pool_exclusion_reason"] = reason
        row["note"] = _join_notes(note, *extra_notes)
        rows.append(row)
    return rows


def adjusted_row(base: dict, est, j: int, run_id: str) -> dict:
    """A ``covariate_adjusted`` row from entry ``j`` of :class:`AdjustedEstimates` and the site's unadjusted row."""
    keep = ("site_id", "outcome", "n_treatment", "n_control", "n_treatment_assigned", "n_control_assigned",
            "due_treatment", "due_control", "uptake_missing_treatment", "uptake_missing_control",
            "complier_share_bound_low", "complier_share_bound_high",
            "missing_outcome_treatment", "missing_outcome_control", "uptake_treatment", "uptake_control",
            "always_taker_share", "never_taker_share", "complier_mean_treated", "complier_mean_untreated")
    row = {k: base[k] for k in keep}
    tf = tf_interval(est.cace[j:j + 1], est.cace_se[j:j + 1], est.first_stage_f[j:j + 1])
    row.update({
        "run_id": run_id, "spec": "covariate_adjusted",
        "complier_share": clean(est.first_stage_coef[j]), "complier_share_se": clean(est.first_stage_se[j]),
        "itt": None, "itt_se": None,
        "cace": clean(est.cace[j]), "cace_se": clean(est.cace_se[j]),
        "cace_ci_low": clean(est.ci_low[j]), "cace_ci_high": clean(est.ci_high[j]),
        "first_stage_f": clean(est.first_stage_f[j]), "ar_set": None, "ar_ci_low": None, "ar_ci_high": None,
        "tf_ci_low": clean(tf.low[0]), "tf_ci_high": clean(tf.high[0]), "tf_se": clean(tf.se[0]),
        "se_type": est.se_type, "n_clusters": None, "included_in_pool": False,
        "pool_exclusion_reason": "covariate-adjusted rows are reported, not pooled",
        "status": str(est.status[j]),
        "note": _join_notes(est.note[j] or None, "complier_share here is the covariate-adjusted first-stage "
                                                 "coefficient; ITT is reported on the unadjusted row"),
    })
    return row


def complier_profile_rows(cells: pd.DataFrame, sites: tuple[str, ...], covariates: list[str],
                          run_id: str) -> list[dict]:
    """Rows of ``complier_profile`` from per-site x covariate x (z, d) cell sums."""
    if not covariates or cells.empty:
        return []
    k = len(sites)
    pos = {s: i for i, s in enumerate(sites)}
    rows = []
    for j, cov in enumerate(covariates):
        n_cells = np.zeros((k, 2, 2))
        sx = np.zeros((k, 2, 2))
        sub = cells[cells.covariate == cov]
        sub = sub[sub.site_id.isin(pos)]
        si = sub.site_id.map(pos).to_numpy()
        zi = sub.z.to_numpy(dtype=int)
        di = sub.d.to_numpy(dtype=int)
        np.add.at(n_cells, (si, zi, di), sub.n.to_numpy(dtype=float))
        np.add.at(sx, (si, zi, di), sub.sum_x.to_numpy(dtype=float))
        km = kappa_complier_means(n_cells, sx)
        for i, site in enumerate(sites):
            rows.append({
                "run_id": run_id, "site_id": site, "covariate": cov, "n": int(n_cells[i].sum()),
                "mean_all": clean(km.overall_mean[i]), "mean_compliers": clean(km.complier_mean[i]),
                "mean_always_takers": clean(km.always_taker_mean[i]),
                "mean_never_takers": clean(km.never_taker_mean[i]),
                "note": km.note[i] if km.note[i] else None,
            })
    return rows
