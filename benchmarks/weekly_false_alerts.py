#!/usr/bin/env python
"""False alerts of clean sites over a year of weekly runs: per-run tests against anytime-valid ones.

Two measurements, both with fixed seeds:

1. **The pipeline** (``--sites``, default 100, ``--looks``, default 52): a clean study
   (``benchmarks/clean_study.py``, a 52-week season; the last ``--null-sites`` sites have
   no compliers, the boundary of the null of ``negative_first_stage``) is ingested once,
   copied, and monitored every week (``takeup``'s ``run_monitoring`` with ``as_of`` = the
   end of each week) once with ``[sequential] alert_tests = "per_run"`` (fixed-sample
   p-values, the earlier behaviour) and once with the default ``"anytime_valid"``.
   Printed per rule: sites with at least one alert (new or ongoing) in any run.
2. **The tests alone, many studies** (``--studies``, default 200): the same accrual,
   compliance and missingness drawn for ``studies x sites`` sites, the rules' statistics
   computed at each of the weekly looks (vectorised; the functions of
   ``takeup.pipeline.stats``), and counted three ways: a site tested alone (no
   Benjamini-Hochberg: the worst case, as for a study of one site), a site within a study
   of ``--sites`` sites with BH at every look (as the pipeline does), and the share of
   studies in which any site ever raises the rule.

``tests/test_weekly_false_alerts.py`` runs a smaller version of part 2 and a short
version of part 1.  Targets are reported, never asserted here.

Usage::

    .venv/bin/python benchmarks/weekly_false_alerts.py            # about 5 minutes on 2 cores
    .venv/bin/python benchmarks/weekly_false_alerts.py --no-pipeline --studies 500
"""

from __future__ import annotations

import argparse
import os
import shutil
import sys
import tempfile
import time
from dataclasses import dataclass
from datetime import datetime, timedelta, timezone
from pathlib import Path

import numpy as np

HERE = Path(__file__).resolve().parent
sys.path.insert(0, str(HERE))
sys.path.insert(0, str(HERE.parent))

SEED = 20261213
KEY = "takeup-benchmark-key (not a secret)"
TEST_RULES = ("negative_first_stage", "first_stage_decline", "differential_missing_outcomes",
              "missing_uptake_reports", "sample_ratio_mismatch")
OTHER_RULES = ("outlier_site", "control_uptake_drift", "treatment_uptake_drift")


def log(msg: str) -> None:
    print(f"[{datetime.now():%H:%M:%S}] {msg}", file=sys.stderr, flush=True)


# ----------------------------------------------------------------------------- part 2: the tests alone
@dataclass(frozen=True)
class LookPValues:
    """Per rule: p-values (sites x looks) of the per-run test and of the anytime-valid one."""

    per_run: dict
    anytime: dict
    levels: dict


def simulate_look_p_values(n_sites: int, looks: int, seed: int, q: float = 0.05, srm_level: float = 0.001,
                           horizon: float = 1000.0, planned_looks: int = 52, window: int = 4,
                           median_weekly: float = 10.0) -> LookPValues:
    """Raw p-values of the five test rules for clean sites at each weekly look.

    Accrual, compliance and missingness as in ``clean_study.py`` (weekly Poisson arrivals with
    a log-normal site rate, 50/50 lottery, complier share ~ Beta(11, 9) and always-takers
    ~ Beta(2, 25), uptake reports missing for 0-6% and outcomes for 2-20% of both arms
    alike).  Uptake is reported two weeks after assignment (a cohort closes then) and the
    outcome is due eleven weeks after; for ``negative_first_stage`` uptake is 30% in both
    arms (complier share 0, the boundary of its null).  Loops over looks only.
    """
    from scipy import stats as st

    from takeup.pipeline.stats import anytime_tests as at
    from takeup.pipeline.stats.significance import (sample_ratio_test, two_proportion_difference_test,
                                                    two_proportion_z)

    rng = np.random.default_rng(seed)
    k, weeks = n_sites, looks
    rate = median_weekly * np.exp(rng.normal(0.0, 0.55, k))
    start = rng.integers(0, 6, k)
    arrivals = rng.poisson(rate[:, None] * (np.arange(weeks)[None, :] >= start[:, None]))
    n_t = rng.binomial(arrivals, 0.5)
    n_c = arrivals - n_t
    complier = np.minimum(rng.beta(11, 9, k), 0.95)
    always = np.minimum(rng.beta(2, 25, k), 0.95 - complier)
    no_rep = rng.uniform(0.0, 0.06, k)[:, None]
    mis_up_t, mis_up_c = rng.binomial(n_t, no_rep), rng.binomial(n_c, no_rep)
    ob_t, ob_c = n_t - mis_up_t, n_c - mis_up_c                     # with an uptake report, per weekly cohort
    x_t = rng.binomial(ob_t, (always + complier)[:, None])          # took up, among those reported
    x_c = rng.binomial(ob_c, always[:, None])
    nul_t, nul_c = rng.binomial(ob_t, 0.3), rng.binomial(ob_c, 0.3)  # complier share 0
    miss_y = rng.uniform(0.02, 0.20, k)[:, None]
    mis_y_t, mis_y_c = rng.binomial(n_t, miss_y), rng.binomial(n_c, miss_y)
    rho_c = at.ratio_concentration(srm_level, horizon)

    def cum(a, upto):            # cumulative over cohorts 0..upto-1 (upto may be <= 0)
        return a[:, :max(upto, 0)].sum(axis=1).astype(float)

    names = TEST_RULES
    per_run = {r: np.full((k, looks), np.nan) for r in names}
    anytime = {r: np.full((k, looks), np.nan) for r in names}
    for j in range(looks):
        w = j + 1                                  # weeks of data at this look
        closed = w - 2                             # cohorts whose uptake reports are in
        # negative_first_stage at the null boundary, on closed cohorts
        nt, nc = cum(ob_t, closed), cum(ob_c, closed)
        ok = (nt >= 2) & (nc >= 2)
        with np.errstate(all="ignore"):
            pt, pc = cum(nul_t, closed) / nt, cum(nul_c, closed) / nc
            se = np.sqrt(pt * (1 - pt) / nt + pc * (1 - pc) / nc)
            z = np.where(ok & (se > 0), (pt - pc) / np.where(se > 0, se, 1.0), np.nan)
        p = st.norm.cdf(z)
        per_run["negative_first_stage"][:, j] = p
        anytime["negative_first_stage"][:, j] = at.one_sided_mixture_p_value(
            at.z_from_p_value(p, two_sided=False), nt + nc, q, horizon, "larger")
        # missing uptake reports: difference of missing shares among those due a report
        dt, dc = cum(n_t, closed), cum(n_c, closed)
        ok = (dt >= 2) & (dc >= 2)
        p = np.where(ok, two_proportion_z(cum(mis_up_t, closed), np.maximum(dt, 1), cum(mis_up_c, closed),
                                          np.maximum(dc, 1)).p_value, np.nan)
        per_run["missing_uptake_reports"][:, j] = p
        anytime["missing_uptake_reports"][:, j] = at.two_sided_mixture_p_value(at.z_from_p_value(p), dt + dc,
                                                                               q, horizon)
        # differential missing outcomes among those due an outcome (eleven weeks after assignment)
        due = w - 11
        dt, dc = cum(n_t, due), cum(n_c, due)
        ok = (dt >= 2) & (dc >= 2)
        p = np.where(ok, two_proportion_z(cum(mis_y_t, due), np.maximum(dt, 1), cum(mis_y_c, due),
                                          np.maximum(dc, 1)).p_value, np.nan)
        per_run["differential_missing_outcomes"][:, j] = p
        anytime["differential_missing_outcomes"][:, j] = at.two_sided_mixture_p_value(at.z_from_p_value(p),
                                                                                      dt + dc, q, horizon)
        # sample ratio: everyone assigned so far against 50/50
        at_, ac_ = cum(n_t, w), cum(n_c, w)
        ok = (at_ + ac_) > 0
        chi = sample_ratio_test(np.column_stack([at_, ac_]), np.full((k, 2), 0.5))
        per_run["sample_ratio_mismatch"][:, j] = np.where(ok, chi.p_value, np.nan)
        anytime["sample_ratio_mismatch"][:, j] = np.where(ok, at.ratio_mixture_p_value(at_, ac_, 0.5, rho_c), np.nan)
        # first-stage decline: the latest `window` closed cohorts against the earlier ones
        if closed > window:
            rec = slice(closed - window, closed)
            args = [x_t[:, :rec.start].sum(1), ob_t[:, :rec.start].sum(1), x_c[:, :rec.start].sum(1),
                    ob_c[:, :rec.start].sum(1), x_t[:, rec].sum(1), ob_t[:, rec].sum(1), x_c[:, rec].sum(1),
                    ob_c[:, rec].sum(1)]
            args = [np.asarray(a, float) for a in args]
            ok = np.all([a > 0 for a in (args[1], args[3], args[5], args[7])], axis=0)
            safe = [np.maximum(a, 1) if i % 2 else a for i, a in enumerate(args)]
            res = two_proportion_difference_test(*safe, alternative="decline")
            per_run["first_stage_decline"][:, j] = np.where(ok, res.p_value, np.nan)
            res = two_proportion_difference_test(*safe, alternative="decline", variance="pooled_by_arm")
            # the look number counts runs with estimates for the site: weeks since its first participant
            look = np.maximum(w - start, 1)
            anytime["first_stage_decline"][:, j] = at.spent_p_value(np.where(ok, res.p_value, np.nan), look,
                                                                    planned_looks)
    levels = {r: q for r in names}
    levels["sample_ratio_mismatch"] = srm_level
    return LookPValues(per_run, anytime, levels)


def _bh_by_study(p: np.ndarray, study_size: int) -> np.ndarray:
    """BH-adjusted p-values within consecutive blocks of ``study_size`` sites, at every look."""
    from takeup.pipeline.stats.significance import benjamini_hochberg
    out = np.full_like(p, np.nan)
    for s in range(0, p.shape[0], study_size):
        block = p[s:s + study_size]
        for j in range(p.shape[1]):
            out[s:s + study_size, j] = benjamini_hochberg(block[:, j]).p_adjusted
    return out


def ever_rates(pv: LookPValues, study_size: int) -> dict:
    """Per rule and version: (alone, within a study with BH, any site of a study) ever-alert rates."""
    out = {}
    for rule, level in pv.levels.items():
        row = {}
        for version, table in (("per_run", pv.per_run[rule]), ("anytime", pv.anytime[rule])):
            bh = rule != "sample_ratio_mismatch"           # the pipeline's sample-ratio check has no BH
            hit_alone = np.any(np.nan_to_num(table, nan=1.0) < level if not bh
                               else np.nan_to_num(table, nan=1.0) <= level, axis=1)
            adj = _bh_by_study(table, study_size) if bh else table
            hit = np.any((np.nan_to_num(adj, nan=1.0) <= level) if bh else (np.nan_to_num(adj, nan=1.0) < level),
                         axis=1)
            studies = hit.reshape(-1, study_size).any(axis=1)
            row[version] = (float(hit_alone.mean()), float(hit.mean()), float(studies.mean()))
        out[rule] = row
    return out


# ----------------------------------------------------------------------------- part 1: the pipeline
def run_pipeline(n_sites: int, looks: int, null_sites: int, seed: int, scratch: Path) -> dict:
    """Weekly runs of both versions on one clean study; per rule: sites ever alerted (and the study's size)."""
    import duckdb

    from clean_study import SEASON_START, simulate_clean_study, write_files
    from takeup.pipeline.ingest.many_files import ingest_paths
    from takeup.pipeline.run.stages import run_monitoring
    from takeup.pipeline.warehouse import init_warehouse

    study = simulate_clean_study(n_sites, seed, season_weeks=looks, null_first_stage=null_sites)
    os.environ.setdefault("TAKEUP_ID_KEY", KEY)
    path = scratch / "base.duckdb"
    init_warehouse(path, study.config)
    reports = ingest_paths(path, write_files(study, scratch / "files"))
    if any(r.status != "loaded" or r.rows_quarantined for r in reports):
        raise RuntimeError(f"clean study did not load cleanly: {reports}")
    out = {"participants": study.n_participants, "sites": n_sites, "null_sites": null_sites, "seconds": {}}
    for version in ("per_run", "anytime_valid"):
        wh = scratch / f"{version}.duckdb"
        shutil.copy(path, wh)
        cfg = study.config
        cfg = cfg.model_copy(update={"sequential": cfg.sequential.model_copy(update={"alert_tests": version})})
        t0 = time.perf_counter()
        for week in range(1, looks + 1):
            as_of = SEASON_START + timedelta(weeks=week) - timedelta(days=1)
            run_monitoring(wh, as_of=as_of, config=cfg)
        out["seconds"][version] = time.perf_counter() - t0
        con = duckdb.connect(str(wh), read_only=True)
        try:
            rows = con.execute("SELECT rule, site_id, max(CASE WHEN p_value <= $q THEN 1 ELSE 0 END) AS by_test "
                               "FROM alerts WHERE status IN ('new', 'ongoing') GROUP BY rule, site_id",
                               {"q": cfg.alerts.fdr_q}).df()
        finally:
            con.close()
        null_names = set(study.config.sites[i].site_id for i in range(n_sites - null_sites, n_sites))
        counts = {}
        for rule in TEST_RULES + OTHER_RULES:
            r = rows[rows.rule == rule]
            if rule == "missing_uptake_reports":
                r = r[r.by_test == 1]                     # the test route (the share threshold is not a test)
            if rule == "negative_first_stage":
                counts[rule] = int(r.site_id.isin(null_names).sum())
            else:
                counts[rule] = int(len(r))
        out[version] = counts
        log(f"pipeline {version}: {looks} weekly runs in {out['seconds'][version]:.0f} s")
    return out


# ----------------------------------------------------------------------------- output
def _pct(x: float) -> str:
    return f"{100 * x:.1f}%"


def table(pipe: dict | None, rates: dict | None, args) -> str:
    lines = [f"False alerts of clean sites over {args.looks} weekly runs ({datetime.now(timezone.utc):%Y-%m-%d %H:%M} "
             f"UTC; seed {args.seed}; `benchmarks/weekly_false_alerts.py`).", ""]
    levels = {r: 0.05 for r in TEST_RULES}
    levels["sample_ratio_mismatch"] = 0.001
    if pipe is not None:
        n, m = pipe["sites"], pipe["null_sites"]
        lines += [f"**The pipeline**: one clean study of {n} sites ({pipe['participants']:,} participants; the last "
                  f"{m} without compliers, the null boundary of `negative_first_stage`), monitored every week; sites "
                  f"with at least one alert of the rule in any run:", "",
                  "| rule | level | per-run tests | anytime-valid tests |", "|---|---:|---:|---:|"]
        for rule in TEST_RULES + OTHER_RULES:
            denom = m if rule == "negative_first_stage" else n
            lv = f"{levels[rule]:g}" if rule in levels else ""
            a, b = pipe["per_run"][rule], pipe["anytime_valid"][rule]
            lines.append(f"| `{rule}`{' (test route)' if rule == 'missing_uptake_reports' else ''} | {lv} | "
                         f"{a} of {denom} ({_pct(a / denom)}) | {b} of {denom} ({_pct(b / denom)}) |")
        lines += ["", f"Weekly runs took {pipe['seconds']['per_run']:.0f} s and {pipe['seconds']['anytime_valid']:.0f} s "
                  f"({args.looks} runs each).", ""]
    if rates is not None:
        lines += [f"**The tests alone**: {args.studies} simulated studies of {args.sites} clean sites "
                  f"({args.studies * args.sites:,} sites), {args.looks} weekly looks; share of sites (or studies) "
                  "with at least one alert over the year:", "",
                  "| rule | level | site tested alone: per-run / anytime | site in a study, BH each look: per-run / "
                  "anytime | studies with any false alert: per-run / anytime |", "|---|---:|---:|---:|---:|"]
        for rule in TEST_RULES:
            r = rates[rule]
            lines.append(f"| `{rule}` | {levels[rule]:g} | {_pct(r['per_run'][0])} / **{_pct(r['anytime'][0])}** | "
                         f"{_pct(r['per_run'][1])} / {_pct(r['anytime'][1])} | "
                         f"{_pct(r['per_run'][2])} / {_pct(r['anytime'][2])} |")
    return "\n".join(lines)


def main(argv: list[str] | None = None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--sites", type=int, default=100)
    ap.add_argument("--looks", type=int, default=52)
    ap.add_argument("--null-sites", type=int, default=20)
    ap.add_argument("--studies", type=int, default=200)
    ap.add_argument("--seed", type=int, default=SEED)
    ap.add_argument("--no-pipeline", action="store_true")
    ap.add_argument("--out", type=Path, default=HERE / "weekly_false_alerts_results.md")
    args = ap.parse_args(argv)
    rates = None
    t0 = time.perf_counter()
    pv = simulate_look_p_values(args.studies * args.sites, args.looks, args.seed)
    rates = ever_rates(pv, args.sites)
    log(f"tests alone: {time.perf_counter() - t0:.0f} s")
    pipe = None
    if not args.no_pipeline:
        scratch = Path(tempfile.mkdtemp(prefix="takeup-weekly-"))
        try:
            pipe = run_pipeline(args.sites, args.looks, args.null_sites, args.seed, scratch)
        finally:
            shutil.rmtree(scratch, ignore_errors=True)
    text = table(pipe, rates, args)
    print(text)
    args.out.write_text(text + "\n")
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
