"""Pooled rows of one run: meta-analysis of site estimates, pooled 2SLS, subgroups, influence.

Inputs are the run's ``site_estimates`` rows (spec ``unadjusted``) and the
same per-site moments the site estimates came from.  Quantities:

* ``cace``: sites with ``included_in_pool`` (see :mod:`takeup.pipeline.run.site_rows`);
* ``itt`` and ``complier_share``: every site whose estimate and SE are defined.

For each quantity the methods ``fixed``, ``dl``, ``reml``, ``pm`` are written
as rows; each random-effects method also gets a ``<method>_hksj`` row with
the Hartung-Knapp-Sidik-Jonkman standard error and t interval (same tau2).
``pooled_2sls`` (quantity ``cace``) is 2SLS with site fixed effects and
site-specific first stages over the pooled sites' moments; its ``q`` column
holds Hansen's J test of equal complier effects.
"""

from __future__ import annotations

from typing import Iterable

import numpy as np

from takeup.pipeline.stats.estimators.moments import ArmMoments, SiteMoments
from takeup.pipeline.stats.estimators.pooled_2sls import pooled_2sls
from takeup.pipeline.stats.meta_analysis.influence import site_influence
from takeup.pipeline.stats.meta_analysis.meta import MetaResult, combine
from takeup.pipeline.stats.meta_analysis.subgroups import between_group_test
from takeup.pipeline.run.site_rows import clean
from takeup.schemas.config import StudyConfig

__all__ = ["pool_outcome", "QUANTITIES", "INFLUENCE_METHOD"]

QUANTITIES = {"cace": ("cace", "cace_se"), "itt": ("itt", "itt_se"),
              "complier_share": ("complier_share", "complier_share_se")}
INFLUENCE_METHOD = "reml"


def _meta_row(run_id: str, outcome: str, quantity: str, res: MetaResult, method_label: str,
              hksj: bool, group_field: str | None, group: str | None, note: str | None) -> dict:
    est_se = res.hksj_se if hksj else res.se
    lo = res.hksj_ci_low if hksj else res.ci_low
    hi = res.hksj_ci_high if hksj else res.ci_high
    notes = [n for n in (res.note, note) if n]
    if res.method == "fixed" and clean(res.pi_low) is not None:
        notes.append("pi_low/pi_high: with tau2 = 0 by assumption this is a t(k-2) confidence interval "
                     "for the common effect, not a prediction interval for a new site")
    elif hksj and clean(res.pi_low) is not None:
        notes.append("pi_low/pi_high: t(k-2) with sqrt(tau2 + se^2) and the conventional (not the HKSJ) "
                     "standard error of the same tau2")
    return {
        "run_id": run_id, "outcome": outcome, "quantity": quantity, "method": method_label,
        "group_field": group_field, "group": group,
        "estimate": clean(res.estimate), "se": clean(est_se), "ci_low": clean(lo), "ci_high": clean(hi),
        "pi_low": clean(res.pi_low), "pi_high": clean(res.pi_high),
        "tau2": clean(res.tau2), "tau2_ci_low": clean(res.tau2_ci_low), "tau2_ci_high": clean(res.tau2_ci_high),
        "q": clean(res.q), "q_df": int(res.q_df) if clean(res.q_df) is not None else None,
        "q_pvalue": clean(res.q_pvalue), "i2": clean(res.i2), "h2": clean(res.h2),
        "n_sites": int(res.n_sites), "note": "; ".join(notes) if notes else None,
    }


def _values(rows: list[dict], quantity: str) -> tuple[list[str], np.ndarray, np.ndarray, list[str]]:
    est_col, se_col = QUANTITIES[quantity]
    sites, y, v, left_out = [], [], [], []
    for r in rows:
        ok = r.get(est_col) is not None and r.get(se_col) is not None and r[se_col] > 0
        if quantity == "cace":
            ok = ok and r["included_in_pool"]
        if ok:
            sites.append(r["site_id"])
            y.append(r[est_col])
            v.append(r[se_col] ** 2)
        else:
            why = r.get("pool_exclusion_reason") if quantity == "cace" else (
                "estimate or standard error not available")
            left_out.append(f"{r['site_id']} ({why})")
    return sites, np.array(y, dtype=float), np.array(v, dtype=float), left_out


def _left_out_note(left_out: list[str]) -> str | None:
    if not left_out:
        return None
    shown = ", ".join(left_out[:20]) + (f" and {len(left_out) - 20} more" if len(left_out) > 20 else "")
    return f"sites left out: {shown}"


def _subset(m: SiteMoments, idx: np.ndarray) -> SiteMoments:
    def arm(a: ArmMoments) -> ArmMoments:
        return ArmMoments(n=a.n[idx], sum_d=a.sum_d[idx], sum_y=a.sum_y[idx], sum_dd=a.sum_dd[idx],
                          sum_yy=a.sum_yy[idx], sum_dy=a.sum_dy[idx])
    return SiteMoments(treated=arm(m.treated), control=arm(m.control))


def pool_outcome(run_id: str, outcome: str, rows: list[dict], moments: SiteMoments, site_order: Iterable[str],
                 config: StudyConfig, groups: dict[str, str | None]) -> tuple[list[dict], list[dict], list[dict]]:
    """Pooled, subgroup-test and influence rows for one outcome."""
    level = config.estimation.level
    methods = list(config.estimation.pool_methods)
    pooled: list[dict] = []
    subgroup: list[dict] = []
    influence: list[dict] = []
    order = list(site_order)
    for quantity in QUANTITIES:
        sites, y, v, left_out = _values(rows, quantity)
        note = _left_out_note(left_out)
        for method in methods:
            res = combine(y, v, method=method, level=level)
            pooled.append(_meta_row(run_id, outcome, quantity, res, method, False, None, None, note))
            if method != "fixed":
                pooled.append(_meta_row(run_id, outcome, quantity, res, f"{method}_hksj", True, None, None, note))
        # subgroups by registry group
        labels = [groups.get(s) for s in sites]
        if any(g is not None for g in labels) and len(sites) > 0:
            method = INFLUENCE_METHOD if INFLUENCE_METHOD in methods else methods[0]
            sg = between_group_test(y, v, labels, method=method)
            for lab, res in zip(sg.labels, sg.results):
                pooled.append(_meta_row(run_id, outcome, quantity, res, method, False, "group", str(lab), None))
            subgroup.append({
                "run_id": run_id, "outcome": outcome, "quantity": quantity, "method": method,
                "group_field": "group", "n_groups": len(sg.labels), "q_between": clean(sg.q_between),
                "q_between_df": int(sg.df) if sg.df is not None and clean(sg.df) is not None else None,
                "q_between_pvalue": clean(sg.pvalue), "note": sg.note or None,
            })
        # influence diagnostics
        if len(sites) >= 1:
            inf = site_influence(y, v, method=INFLUENCE_METHOD)
            for i, s in enumerate(sites):
                influence.append({
                    "run_id": run_id, "outcome": outcome, "quantity": quantity, "method": INFLUENCE_METHOD,
                    "site_id": s, "estimate": clean(y[i]), "se": clean(np.sqrt(v[i])),
                    "loo_estimate": clean(inf.loo_estimate[i]), "loo_se": clean(inf.loo_se[i]),
                    "loo_tau2": clean(inf.loo_tau2[i]), "std_residual": clean(inf.std_residual[i]),
                    "eb_estimate": clean(inf.eb_estimate[i]), "eb_se": clean(inf.eb_se[i]),
                })
        if quantity == "cace":
            pos = {s: i for i, s in enumerate(order)}
            idx = np.array([pos[s] for s in sites], dtype=int)
            res2 = pooled_2sls(_subset(moments, idx), level=level) if len(idx) else None
            row = {
                "run_id": run_id, "outcome": outcome, "quantity": "cace", "method": "pooled_2sls",
                "group_field": None, "group": None, "pi_low": None, "pi_high": None, "tau2": None,
                "tau2_ci_low": None, "tau2_ci_high": None, "i2": None, "h2": None,
            }
            if res2 is None:
                row.update({"estimate": None, "se": None, "ci_low": None, "ci_high": None, "q": None,
                            "q_df": None, "q_pvalue": None, "n_sites": 0,
                            "note": "no site qualifies for the CACE pool"})
            else:
                notes = [n for n in (res2.note, note, "q is Hansen's J test of equal complier effects "
                                     "across sites (robust weighting)") if n]
                row.update({"estimate": clean(res2.estimate), "se": clean(res2.se), "ci_low": clean(res2.ci_low),
                            "ci_high": clean(res2.ci_high), "q": clean(res2.j_stat),
                            "q_df": int(res2.j_df) if clean(res2.j_df) is not None else None,
                            "q_pvalue": clean(res2.j_pvalue), "n_sites": int(res2.n_sites_used),
                            "note": "; ".join(notes)})
            pooled.append(row)
    return pooled, subgroup, influence
