#!/usr/bin/env python
"""False alarms on clean simulated studies, and the many-site report's time and size.

For each number of sites (default 200 and 1,000) a clean study is simulated
(``benchmarks/clean_study.py``: fixed seed, realistic accrual, compliance,
missingness and effect heterogeneity, no planted problem), ingested into a fresh
warehouse and monitored once at the defaults.  Printed per rule: the sites with an
active alert and their share of all sites, against the targets (each test rule <= its
nominal level; ``outlier_site`` <= 1%; any alert <= 5% of sites).  Then the drift rules
again under alternative settings (one more run each, same data), and ``takeup report``
on the warehouse: wall time (subprocess, including start-up) and file size, against
<= 20 s and <= 3 MB.  Targets are reported, never asserted.

Usage::

    .venv/bin/python benchmarks/false_alarms.py                  # 200 and 1,000 sites
    .venv/bin/python benchmarks/false_alarms.py --sites 60 --keep
"""

from __future__ import annotations

import argparse
import os
import shutil
import subprocess
import sys
import tempfile
import time
from datetime import datetime, timezone
from pathlib import Path

HERE = Path(__file__).resolve().parent
sys.path.insert(0, str(HERE))
sys.path.insert(0, str(HERE.parent))

from clean_study import alert_shares, build_warehouse, simulate_clean_study  # noqa: E402

SEED = 20261202
KEY = "takeup-benchmark-key (not a secret)"
TARGET_OUTLIER = 0.01
TARGET_ANY = 0.05
TARGET_REPORT_S = 20.0
TARGET_REPORT_BYTES = 3 * 1024 ** 2

#: rule -> (kind, nominal share of sites per run at the defaults, or None)
RULE_KINDS = {
    "negative_first_stage": ("test, BH at q = 0.05", 0.05),
    "first_stage_decline": ("test, BH at q = 0.05", 0.05),
    "differential_missing_outcomes": ("test, BH at q = 0.05", 0.05),
    "outlier_site": ("test, BH at q = 0.05", TARGET_OUTLIER),
    "sample_ratio_mismatch": ("test at p < 0.001, no BH", 0.001),
    "control_uptake_drift": ("CUSUM, in-control ARL 2,000 participants", None),
    "treatment_uptake_drift": ("CUSUM, in-control ARL 2,000 participants", None),
    "weak_first_stage": ("threshold F < 10 (a small site's instrument is weak)", None),
    "stale_site": ("threshold 14 days (every site sends up to the cutoff)", 0.0),
}
#: alternative drift settings measured on the same data
VARIANTS = {
    "drift_baseline = \"site\"": {"drift_baseline": "site"},
    "drift_baseline_periods = 8": {"drift_baseline_periods": 8},
    "drift_arl0 = 20000": {"drift_arl0": 20000.0},
    "drift_odds_ratio = 4": {"drift_odds_ratio": 4.0},
    "drift_arl0 = 20000, drift_baseline_periods = 8": {"drift_arl0": 20000.0, "drift_baseline_periods": 8},
}


def log(msg: str) -> None:
    print(f"[{datetime.now():%H:%M:%S}] {msg}", file=sys.stderr, flush=True)


def takeup_cmd() -> list[str]:
    script = Path(sys.executable).parent / "takeup"
    return [str(script)] if script.exists() else [sys.executable, "-m", "takeup.pipeline.cli"]


def measure(k: int, seed: int, scratch: Path) -> dict:
    import duckdb
    from takeup.pipeline.run.stages import run_monitoring
    root = scratch / f"sites{k}"
    root.mkdir()
    t = time.perf_counter()
    study = simulate_clean_study(k, seed)
    path, summary = build_warehouse(study, root)
    log(f"{k} sites, {study.n_participants:,} participants: simulated, ingested and run in "
        f"{time.perf_counter() - t:.1f} s")
    con = duckdb.connect(str(path), read_only=True)
    try:
        shares = alert_shares(con, summary.run_id, k)
        timings = con.execute("SELECT timings_json FROM runs WHERE run_id = $r", {"r": summary.run_id}).fetchone()[0]
        # for comparison: the replaced outlier rule (estimate outside the REML prediction interval)
        old = con.execute(
            "SELECT count(*) FROM site_estimates s, pooled_estimates p WHERE s.run_id = $r AND p.run_id = $r "
            "AND s.spec = 'unadjusted' AND s.included_in_pool AND p.quantity = 'cace' AND p.method = 'reml' "
            "AND p.group_field IS NULL AND p.outcome = s.outcome AND (s.cace < p.pi_low OR s.cace > p.pi_high)",
            {"r": summary.run_id}).fetchone()[0]
        shares["replaced_pi_rule"] = (int(old), old / k)
    finally:
        con.close()
    variants = {}
    for label, change in VARIANTS.items():
        cfg = study.config.model_copy(update={"alerts": study.config.alerts.model_copy(update=change)})
        s = run_monitoring(path, as_of=study.as_of, config=cfg)
        con = duckdb.connect(str(path), read_only=True)
        try:
            variants[label] = alert_shares(con, s.run_id, k)
        finally:
            con.close()
        log(f"  {label}: {variants[label]}")
    # the report of the default run: render it as a user would
    default_run = summary.run_id
    out = root / "report.html"
    t = time.perf_counter()
    r = subprocess.run(takeup_cmd() + ["report", "--warehouse", str(path), "--out", str(out), "--run", default_run],
                       capture_output=True, text=True)
    report_s = time.perf_counter() - t
    if r.returncode != 0:
        raise RuntimeError(f"takeup report failed: {r.stderr[-2000:]}")
    log(f"  report {report_s:.1f} s, {out.stat().st_size / 1024 ** 2:.2f} MiB")
    return {"k": k, "n": study.n_participants, "shares": shares, "variants": variants, "report_s": report_s,
            "report_bytes": out.stat().st_size, "timings": timings, "path": path}


def _cell(shares: dict, rule: str) -> str:
    n, share = shares.get(rule, (0, 0.0))
    return f"{n:,} ({100 * share:.1f}%)"


def render(results: list[dict], seed: int) -> str:
    lines = [f"False alarms on clean simulated studies ({datetime.now(timezone.utc):%Y-%m-%d %H:%M} UTC; "
             f"seed {seed}; `benchmarks/false_alarms.py`). Sites with an active alert after one run at the "
             "defaults, and their share of all sites:", ""]
    head = "| rule | kind | target (share of sites) | " + " | ".join(
        f"{r['k']:,} sites ({r['n']:,} participants)" for r in results) + " | met |"
    lines += [head, "|---|---|---:|" + "---:|" * len(results) + ":---:|"]
    for rule, (kind, nominal) in RULE_KINDS.items():
        target = "" if nominal is None else ("none" if nominal == 0 else f"<= {100 * nominal:g}%")
        if nominal is None:
            ok = ""
        else:
            ok = "yes" if all(r["shares"].get(rule, (0, 0.0))[1] <= nominal for r in results) else "**no**"
        lines.append(f"| `{rule}` | {kind} | {target} | " + " | ".join(_cell(r["shares"], rule) for r in results)
                     + f" | {ok} |")
    ok_any = "yes" if all(r["shares"]["any"][1] <= TARGET_ANY for r in results) else "**no**"
    lines.append(f"| any alert | | <= {100 * TARGET_ANY:g}% | " + " | ".join(_cell(r["shares"], "any") for r in results)
                 + f" | {ok_any} |")
    lines.append("| for comparison: the replaced `outlier_site` rule (CACE outside the REML prediction interval) "
                 "| | | " + " | ".join(_cell(r["shares"], "replaced_pi_rule") for r in results) + " | |")
    lines += ["", "The drift rules under other settings (one more run on the same data each):", "",
              "| setting | " + " | ".join(f"{r['k']:,} sites: control / treatment drift / any alert" for r in results)
              + " |", "|---|" + "---:|" * len(results)]
    for label in VARIANTS:
        cells = []
        for r in results:
            v = r["variants"][label]
            cells.append(f"{_cell(v, 'control_uptake_drift')} / {_cell(v, 'treatment_uptake_drift')} / "
                         f"{_cell(v, 'any')}")
        lines.append(f"| `{label}` | " + " | ".join(cells) + " |")
    lines += ["", "The HTML report of the default run (`takeup report`, subprocess, including start-up):", "",
              "| sites | time | target | size | target | met |", "|---:|---:|---:|---:|---:|:---:|"]
    for r in results:
        ok = "yes" if r["report_s"] <= TARGET_REPORT_S and r["report_bytes"] <= TARGET_REPORT_BYTES else "**no**"
        lines.append(f"| {r['k']:,} | {r['report_s']:.1f} s | <= {TARGET_REPORT_S:g} s | "
                     f"{r['report_bytes'] / 1024 ** 2:.2f} MiB | <= 3 MiB | {ok} |")
    lines += ["", "Run stage timings (s): " + "; ".join(f"{r['k']:,} sites {r['timings']}" for r in results)]
    return "\n".join(lines)


def main(argv=None) -> int:
    p = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    p.add_argument("--sites", type=int, nargs="+", default=[200, 1000])
    p.add_argument("--seed", type=int, default=SEED)
    p.add_argument("--keep", action="store_true", help="keep the scratch directory (warehouses, reports)")
    p.add_argument("--out", type=Path, default=HERE / "false_alarms_results.md")
    args = p.parse_args(argv)
    os.environ.setdefault("TAKEUP_ID_KEY", KEY)
    scratch = Path(tempfile.mkdtemp(prefix="takeup-clean-"))
    log(f"scratch directory {scratch}")
    try:
        results = [measure(k, args.seed + i, scratch) for i, k in enumerate(args.sites)]
        text = render(results, args.seed)
        print(text)
        args.out.write_text(text + "\n")
        log(f"written to {args.out}")
    finally:
        if args.keep:
            log(f"kept {scratch}")
        else:
            shutil.rmtree(scratch, ignore_errors=True)
    return 0


if __name__ == "__main__":
    sys.exit(main())
