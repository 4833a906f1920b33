"""Stratified ``site_estimates`` rows and complier profiles for sites with randomisation strata.

For every site with two or more strata (see :mod:`takeup.pipeline.run.strata_sql`):

* its ``unadjusted`` row of each outcome becomes ``unstratified`` (kept for comparison,
  not pooled, not the row alerts and the report use);
* a ``stratified`` row is added (:func:`takeup.pipeline.stats.estimators.stratified.stratified_wald`):
  stratum-weighted ITT, complier share and CACE with robust or cluster-robust SEs,
  first-stage F, Anderson-Rubin set, tF interval and stratum-weighted complier means.
  That row is the site's primary row (pooled under the usual rule);
* the site's complier profile uses kappa weights with each stratum's own treated share.

Strata with one arm only, or fewer than two participants in an arm, are left out of the
stratified row, whose note says how many strata and participants that drops; a site
left with no usable stratum gets status ``no_usable_strata`` and null estimates.
"""

from __future__ import annotations

from dataclasses import replace

import numpy as np
import pandas as pd

from takeup.pipeline.run.sample_sql import MomentTable
from takeup.pipeline.run.site_rows import clean, rows_from_estimates
from takeup.pipeline.stats.estimators.complier_means import complier_outcome_means
from takeup.pipeline.stats.estimators.moments import ArmMoments, SiteMoments
from takeup.pipeline.stats.estimators.stratified import (MIN_PER_ARM, StratifiedMoments, StratumClusterMoments,
                                                         stratified_kappa_means, stratified_wald,
                                                         weighted_site_moments)
from takeup.schemas.config import StudyConfig

__all__ = ["stratified_moments_for_outcome", "stratified_cluster_moments", "stratify_outcome_rows",
           "stratified_profile_rows", "stratified_covariances"]

_SUMS = ("n", "sum_d", "sum_y", "sum_dd", "sum_yy", "sum_dy")
#: columns of a stratified row that are null when no stratum is usable
_ESTIMATE_COLUMNS = ("uptake_treatment", "uptake_control", "complier_share", "complier_share_se",
                     "complier_share_ci_low", "complier_share_ci_high", "always_taker_share", "never_taker_share",
                     "itt", "itt_se", "itt_ci_low", "itt_ci_high", "cace", "cace_se", "cace_ci_low", "cace_ci_high",
                     "first_stage_f", "ar_set", "ar_ci_low", "ar_ci_high", "tf_ci_low", "tf_ci_high", "tf_se",
                     "complier_mean_treated", "complier_mean_untreated", "n_clusters", "ci_df")


def _cells(frame: pd.DataFrame, sites: list[str]) -> tuple[pd.DataFrame, np.ndarray, tuple[str, ...]]:
    """Unique (site, stratum) cells of ``frame`` restricted to ``sites``, in site order."""
    pos = {s: i for i, s in enumerate(sites)}
    f = frame[frame.site_id.isin(pos)]
    keys = f[["site_id", "stratum"]].drop_duplicates()
    keys = keys.assign(_pos=keys.site_id.map(pos)).sort_values(["_pos", "stratum"]).reset_index(drop=True)
    return keys, keys._pos.to_numpy(dtype=np.int64), tuple(keys.stratum.astype(str))


def stratified_moments_for_outcome(frame: pd.DataFrame, outcome: str, sites: list[str]
                                   ) -> tuple[StratifiedMoments, StratifiedMoments]:
    """Analysis-sample and first-stage-sample :class:`StratifiedMoments` of one outcome."""
    f = frame[frame.outcome == outcome]
    keys, site_index, strata = _cells(f, sites)

    def arm(z: int, cols: dict[str, str]) -> dict[str, np.ndarray]:
        sub = f[f.z == z].set_index(["site_id", "stratum"])
        idx = pd.MultiIndex.from_frame(keys[["site_id", "stratum"]])
        sub = sub.reindex(idx)
        return {k: sub[v].fillna(0).to_numpy(dtype=float) for k, v in cols.items()}

    main = {k: k for k in _SUMS}
    t, c = arm(1, main), arm(0, main)
    fs = {"n": "n_first_stage", "sum_d": "sum_d_first_stage"}
    ft, fc = arm(1, fs), arm(0, fs)

    def fs_arm(a):
        zero = np.zeros_like(a["n"])
        return ArmMoments(n=a["n"], sum_d=a["sum_d"], sum_y=zero, sum_dd=a["sum_d"], sum_yy=zero, sum_dy=zero)

    k = len(sites)
    analysis = StratifiedMoments(SiteMoments(ArmMoments(**t), ArmMoments(**c)), site_index, strata, k)
    first = StratifiedMoments(SiteMoments(fs_arm(ft), fs_arm(fc)), site_index, strata, k)
    return analysis, first


def stratified_cluster_moments(frame: pd.DataFrame, outcome: str, sites: list[str],
                               sm: StratifiedMoments) -> StratumClusterMoments:
    """Cluster cells of one outcome, pointing at the cells of ``sm``."""
    f = frame[(frame.outcome == outcome) & frame.site_id.isin(set(sites))]
    cell_pos = {(sites[s], st): j for j, (s, st) in enumerate(zip(sm.site_index.tolist(), sm.stratum))}
    cell = np.array([cell_pos.get((a, b), -1) for a, b in zip(f.site_id, f.stratum)], dtype=np.int64)
    keep = cell >= 0
    f = f[keep]
    clusters = pd.factorize(f.site_id + "\x1f" + f.cluster_id)[0]
    return StratumClusterMoments(cell_index=cell[keep], cluster_index=clusters, z=f.z.to_numpy(dtype=float),
                                 n=f.n.to_numpy(dtype=float), sum_d=f.sum_d.to_numpy(dtype=float),
                                 sum_y=f.sum_y.to_numpy(dtype=float))


def _kept_sums(sm: StratifiedMoments, kept: np.ndarray) -> SiteMoments:
    """Raw per-site sums over the kept strata (the counts shown on the stratified row)."""
    k, si = sm.n_sites, sm.site_index

    def arm(a: ArmMoments) -> ArmMoments:
        return ArmMoments(**{n: np.bincount(si, weights=np.where(kept, getattr(a, n), 0.0), minlength=k)
                             for n in _SUMS})

    return SiteMoments(arm(sm.cells.treated), arm(sm.cells.control))


def _dropped_note(n_strata: int, n_dropped_strata: int, n_dropped: int) -> str | None:
    if not n_dropped_strata:
        return None
    return (f"{n_dropped_strata} of {n_strata + n_dropped_strata} strata left out of the stratified estimate "
            f"(one arm only, or fewer than {MIN_PER_ARM} participants in an arm): {n_dropped} participant"
            f"{'s' if n_dropped != 1 else ''} not used")


def stratify_outcome_rows(rows: list[dict], table: MomentTable, stratum_moments: pd.DataFrame,
                          stratum_clusters: pd.DataFrame | None, config: StudyConfig, run_id: str,
                          strat_sites: tuple[str, ...]) -> list[dict]:
    """Turn one outcome's ``unadjusted`` rows of stratified sites into ``unstratified`` and add ``stratified`` rows.

    ``table`` is the outcome's :class:`MomentTable` over every site; ``rows`` its unadjusted rows.
    """
    sites = [s for s in table.sites if s in set(strat_sites)]
    if not sites:
        return rows
    analysis, first, clusters, res = _estimate(stratum_moments, stratum_clusters, table.outcome, sites, config)
    res_fs = stratified_wald(first, level=config.estimation.level)
    cm = complier_outcome_means(weighted_site_moments(analysis, res.kept))
    pos = {s: i for i, s in enumerate(table.sites)}
    idx = np.array([pos[s] for s in sites], dtype=np.int64)

    def sub(a):
        return a[idx]

    sub_table = MomentTable(
        outcome=table.outcome, sites=tuple(sites), moments=_kept_sums(analysis, res.kept),
        n_assigned=sub(table.n_assigned), sum_d_assigned=sub(table.sum_d_assigned),
        first_stage_moments=_kept_sums(first, res_fs.kept), n_uptake_observed=sub(table.n_uptake_observed),
        n_due=sub(table.n_due), n_measured=sub(table.n_measured))
    new = rows_from_estimates(sub_table, config, run_id, res.estimates, res_fs.estimates, cm, clusters is not None,
                              "stratified")
    by_site = {r["site_id"]: r for r in rows if r["spec"] == "unadjusted"}
    for i, r in enumerate(new):
        no_outcomes = r["n_treatment"] == 0 and r["n_control"] == 0 and int(res.n_strata[i]) == 0
        src = res_fs if no_outcomes else res
        r["n_strata"] = int(src.n_strata[i])
        r["n_strata_dropped"] = int(src.n_strata_dropped[i])
        parts = [r["note"], _dropped_note(int(src.n_strata[i]), int(src.n_strata_dropped[i]), int(src.n_dropped[i]))]
        base = by_site.get(r["site_id"])
        if base is not None and base.get("cace") is not None and r.get("cace") is not None:
            parts.append(f"stratified over {r['n_strata']} strata (weights = the strata's shares of the site's "
                         f"sample); the unstratified CACE is {base['cace']:.3f}")
        r["note"] = "; ".join(p for p in parts if p) or None
        if str(res.estimates.status[i]) == "no_usable_strata" and int(res.n_strata_dropped[i]) > 0:
            # outcomes exist but no stratum has both arms: not a site without outcomes
            for key in _ESTIMATE_COLUMNS:
                r[key] = None
            r["status"] = "no_usable_strata"
            r["note"] = "; ".join(p for p in (str(res.estimates.note[i]), parts[1]) if p)
            r["included_in_pool"] = False
            r["pool_exclusion_reason"] = "status no_usable_strata"
    for r in rows:
        if r["spec"] == "unadjusted" and r["site_id"] in by_site and r["site_id"] in set(sites):
            r["spec"] = "unstratified"
            r["included_in_pool"] = False
            r["pool_exclusion_reason"] = "the site randomises within strata: its stratified row is pooled"
    return rows + new


def _estimate(stratum_moments: pd.DataFrame, stratum_clusters: pd.DataFrame | None, outcome: str,
              sites: list[str], config: StudyConfig):
    analysis, first = stratified_moments_for_outcome(stratum_moments, outcome, sites)
    clusters = (stratified_cluster_moments(stratum_clusters, outcome, sites, analysis)
                if stratum_clusters is not None else None)
    res = stratified_wald(analysis, clusters=clusters, level=config.estimation.level,
                          min_clusters_per_arm=config.estimation.min_clusters_per_arm)
    return analysis, first, clusters, res


def stratified_covariances(inputs, outcome: str, config: StudyConfig) -> dict[str, float]:
    """Covariance of the stratified ITT and complier share per stratified site (for the anytime-valid set)."""
    sites = list(inputs.stratified_sites)
    if not sites:
        return {}
    _, _, _, res = _estimate(inputs.stratum_moments, inputs.stratum_clusters, outcome, sites, config)
    return {s: float(res.estimates.cov_itt_fs[i]) for i, s in enumerate(sites)}


def stratified_profile_rows(profile: list[dict], cells: pd.DataFrame, sites: tuple[str, ...],
                            covariates: list[str], strat_sites: tuple[str, ...], run_id: str) -> list[dict]:
    """Replace the complier-profile rows of stratified sites by kappa means with stratum-specific shares."""
    chosen = [s for s in sites if s in set(strat_sites)]
    if not chosen or not covariates or cells is None or cells.empty:
        return profile
    out = [r for r in profile if r["site_id"] not in set(chosen)]
    for cov in covariates:
        sub = cells[(cells.covariate == cov) & cells.site_id.isin(set(chosen))]
        keys, site_index, _ = _cells(sub.assign(stratum=sub.stratum.astype(str)), chosen) if len(sub) else (
            pd.DataFrame(columns=["site_id", "stratum"]), np.zeros(0, np.int64), ())
        cell_pos = {(a, b): j for j, (a, b) in enumerate(zip(keys.site_id, keys.stratum))}
        nc = np.zeros((len(keys), 2, 2))
        sx = np.zeros((len(keys), 2, 2))
        if len(sub):
            j = np.array([cell_pos[(a, b)] for a, b in zip(sub.site_id, sub.stratum)], dtype=np.int64)
            zi, di = sub.z.to_numpy(dtype=int), sub.d.to_numpy(dtype=int)
            np.add.at(nc, (j, zi, di), sub.n.to_numpy(dtype=float))
            np.add.at(sx, (j, zi, di), sub.sum_x.to_numpy(dtype=float))
        comp, overall, at, nt, note = stratified_kappa_means(site_index, len(chosen), nc, sx)
        n_site = np.bincount(site_index, weights=nc.sum(axis=(1, 2)), minlength=len(chosen))
        for i, site in enumerate(chosen):
            out.append({"run_id": run_id, "site_id": site, "covariate": cov, "n": int(n_site[i]),
                        "mean_all": clean(overall[i]), "mean_compliers": clean(comp[i]),
                        "mean_always_takers": clean(at[i]), "mean_never_takers": clean(nt[i]), "note": note[i]})
    return out
