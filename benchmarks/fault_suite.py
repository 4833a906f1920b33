"""Fault-injection suite at the README's sizes: prints the Reliability table (and writes it to
``benchmarks/fault_suite_results.md``).

    .venv/bin/python benchmarks/fault_suite.py [--kills 20] [--rows 300000] [--fuzz 1000] [--writers 8]

The scenarios are those of ``tests/fault/`` (imported from there, so the README's figures and
the CI checks share one implementation); here they run with more kills, larger files and
1,000+ generated files.  Needs root for the disk-full scenario (a size-limited tmpfs);
otherwise that row says why it was skipped.
"""

from __future__ import annotations

import argparse
import itertools
import os
import sys
import tempfile
import time
from collections import Counter
from pathlib import Path

ROOT = Path(__file__).resolve().parents[1]
sys.path.insert(0, str(ROOT))

from tests.fault import scenarios  # noqa: E402


def fuzz(work: Path, n: int) -> dict:
    from hypothesis import HealthCheck, given, settings

    from takeup.pipeline.warehouse import init_warehouse
    from takeup.schemas.config import parse_config
    from tests.fault.fuzz import check_one, malformed_files
    os.environ["TAKEUP_ID_KEY"] = scenarios.KEY
    warehouse = work / "fuzz.duckdb"
    init_warehouse(warehouse, parse_config({"outcomes": [{"name": "score"}]}))
    results: list[dict] = []
    counter = itertools.count()

    @settings(max_examples=n, deadline=None, database=None, suppress_health_check=list(HealthCheck))
    @given(malformed_files())
    def one(f):
        results.append(check_one(warehouse, work, next(counter), *f))

    one()
    c = scenarios.consistency(warehouse)
    kinds = Counter(r["file"].split("_", 1)[1].split(".", 1)[0] + (" parquet" if r["file"].endswith(".parquet")
                                                                   else " csv") for r in results)
    return {"files": len(results), "by_kind_format": dict(sorted(kinds.items())),
            "status": dict(Counter(r["status"] for r in results)),
            "tracebacks": sum(r["traceback"] for r in results),
            "not_adding_up": sum(not r["adds_up"] for r in results),
            "wrong_exit_code": sum(r["rc"] != r["expected_rc"] for r in results),
            "broken": scenarios.broken(c), "examples": [r for r in results if not r["contract_ok"]][:5]}


def main() -> int:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--kills", type=int, default=20)
    ap.add_argument("--rows", type=int, default=300_000, help="rows of the large file killed during ingestion")
    ap.add_argument("--sites", type=int, default=30, help="sites of the study killed during runs")
    ap.add_argument("--writers", type=int, default=8)
    ap.add_argument("--fuzz", type=int, default=1000)
    ap.add_argument("--only", choices=["kill_ingest", "kill_run", "disk_full", "concurrency", "fuzz", "injection"],
                    action="append")
    args = ap.parse_args()
    os.environ.setdefault("PREFECT_SERVER_ANALYTICS_ENABLED", "false")
    os.environ.setdefault("DO_NOT_TRACK", "1")
    todo = args.only or ["kill_ingest", "kill_run", "disk_full", "concurrency", "fuzz", "injection"]
    lines = ["| scenario | size | outcome | broken invariants |", "|---|---|---|---|"]
    with tempfile.TemporaryDirectory(prefix="takeup-faults-") as tmp:
        base = Path(tmp)
        for name in todo:
            work = base / name
            work.mkdir()
            t = time.monotonic()
            if name == "kill_ingest":
                r = scenarios.kill_ingest(work, args.rows, args.kills)
                row = (f"kill -9 during `takeup ingest` | {r['kills']} kills, file of {args.rows:,} rows "
                       f"({r['seconds_full']:.1f} s uninterrupted) | warehouse opened {r['opens']}/{r['kills']}; killed "
                       f"before the commit {r['killed_before_commit']}, finished first {r['finished_before_kill']}; "
                       f"re-run completed {r['resumed_ok']}/{r['kills']}, file loaded once with all rows "
                       f"| {r['broken'] + r['rows_wrong']} partial batches / rows lost")
            elif name == "kill_run":
                r = scenarios.kill_run(work, args.sites, args.kills)
                row = (f"kill -9 during `takeup run` | {r['kills']} kills, {args.sites} sites "
                       f"({r['seconds_full']:.1f} s uninterrupted) | warehouse opened {r['opens']}/{r['kills']}; killed "
                       f"mid-run {r['killed_mid_run']} (rows marked `abandoned` by the next run: "
                       f"{r['abandoned_marked']}), after its commit {r['killed_after_commit']}, before its row "
                       f"{r['killed_before_start']}, finished first "
                       f"{r['finished_before_kill']}; next run completed {r['resumed_ok']}/{r['kills']}, left "
                       f"`running` {r['left_running']} | {r['broken']} half-written runs / partial batches")
            elif name == "disk_full":
                r = scenarios.disk_full(work)
                if "skipped" in r:
                    row = f"disk full | tmpfs 24 MB | skipped: {r['skipped']} | -"
                else:
                    row = (f"disk full (ingest, then run) | tmpfs 24 MB, file of 400,000 rows | ingest exit "
                           f"{r['ingest_exit']} ({r['ingest_message'][0].split(': ', 1)[-1]}); run exit "
                           f"{r['run_exit']}; previous state intact: {'yes' if r['state_intact'] else 'NO'}; "
                           f"tracebacks {r['tracebacks']}; after freeing space the run exits "
                           f"{r['run_after_space_freed']} | {r['broken']}")
            elif name == "concurrency":
                r = scenarios.concurrency(work, args.writers, 20_000)
                row = (f"concurrent writers | {r['writers']} `takeup ingest` of different files at once + a run + "
                       f"a reader holding another DuckDB file | exit 0: {r['ingest_exit_0']}/{r['writers']} ingests, "
                       f"run exit {r['run_exit']}; {r['waited']} waited for the lock; files loaded exactly once "
                       f"{r['files_loaded_once']}/{r['writers']}; rows lost {r['rows_lost']}, duplicated "
                       f"{r['rows_duplicated']}; tracebacks {r['tracebacks']} | {r['broken']}")
            elif name == "fuzz":
                r = fuzz(work, args.fuzz)
                row = (f"fuzz (hypothesis) | {r['files']:,} malformed files: "
                       + ", ".join(f"{k} {v}" for k, v in r["by_kind_format"].items())
                       + f" | {', '.join(f'{k} {v}' for k, v in sorted(r['status'].items()))}; tracebacks "
                         f"{r['tracebacks']}; read != loaded + quarantined + duplicate: {r['not_adding_up']}; exit "
                         f"code off the contract: {r['wrong_exit_code']} | {r['broken']}")
                for ex in r["examples"]:
                    print("  fuzz case off the contract:", ex, file=sys.stderr)
            else:
                r = scenarios.injection(work)
                ok = all(r[k] for k in ("tables_unchanged", "sites_literal", "study_id_literal",
                                        "outcome_config_refused", "outcome_rows_quarantined", "header_file_rejected",
                                        "outside_written"))
                row = (f"injection | quotes and SQL in file names, header names, site ids, outcome names, study_id; "
                       f"`..` in export/report run ids and targets | tables unchanged "
                       f"{'yes' if r['tables_unchanged'] else 'NO'}; values stored literally "
                       f"{'yes' if r['sites_literal'] and r['study_id_literal'] else 'NO'}; hostile header and "
                       f"outcome names refused / quarantined; `..` run ids exit {r['bad_run_exit']}, nothing "
                       f"written outside the target: {'yes' if r['outside_written'] else 'NO'}; tracebacks "
                       f"{r['tracebacks']} | {0 if ok else 1}")
            lines.append(f"| {row} |")
            print(lines[-1], f"  [{time.monotonic() - t:.0f} s]", flush=True)
    table = "\n".join(lines)
    print()
    print(table)
    if not args.only:
        (ROOT / "benchmarks" / "fault_suite_results.md").write_text(table + "\n")
    return 0


if __name__ == "__main__":
    sys.exit(main())
