#!/usr/bin/env python
"""Benchmark of regional / sharded operation: moments per shard, the central run from packages.

Builds, on simulated data (deterministic hash-based draws; no ingestion — rows are generated in
DuckDB straight into the warehouse tables, as ingestion would store them):

* ``--shards`` shard warehouses of ``--per-shard`` participants each (``--sites`` sites split evenly
  between them), and one combined warehouse holding the same rows;

and measures, each as a subprocess with its own peak RSS (``os.wait4``):

1. ``takeup run`` on the combined warehouse (the one-warehouse reference: its cost grows with
   participants);
2. ``takeup moments`` on every shard (wall time, peak memory, package size);
3. ``takeup run --from-moments`` with the shards' packages (the central run);
4. the same central run from *one* package of the combined warehouse (1 shard), to show the central
   run's cost depends on sites and periods, not on participants or the number of packages;
5. a bare ``takeup runs`` call (process start-up: the floor of every command).

The central runs' site estimates are checked against the one-warehouse run (max |difference|).
Prints a Markdown table and writes ``benchmarks/moments_packages_results.md``.  Nothing is asserted
about time.

Usage::

    .venv/bin/python benchmarks/moments_packages.py                     # 4 shards x 1,000,000, 200 sites
    .venv/bin/python benchmarks/moments_packages.py --per-shard 200000 --sites 40
"""

from __future__ import annotations

import argparse
import json
import os
import platform
import subprocess
import sys
import tempfile
import time
from datetime import date, datetime
from pathlib import Path

import duckdb

AS_OF = date(2026, 9, 30)
START = date(2026, 3, 2)
BENCH_KEY = "benchmark-key-not-secret"


def log(msg: str) -> None:
    print(f"[{datetime.now():%H:%M:%S}] {msg}", file=sys.stderr, flush=True)


def run_child(cmd: list[str]) -> tuple[int, float, int, str, str]:
    """(exit code, wall seconds, peak RSS bytes, stdout, stderr) of one child process."""
    with tempfile.TemporaryFile("w+") as out, tempfile.TemporaryFile("w+") as err:
        t = time.perf_counter()
        proc = subprocess.Popen(cmd, stdout=out, stderr=err, env=os.environ.copy())
        _, status, usage = os.wait4(proc.pid, 0)
        wall = time.perf_counter() - t
        out.seek(0)
        err.seek(0)
        return os.waitstatus_to_exitcode(status), wall, usage.ru_maxrss * 1024, out.read(), err.read()


def takeup_cmd() -> list[str]:
    script = Path(sys.executable).parent / "takeup"
    return [str(script)] if script.exists() else [sys.executable, "-m", "takeup.pipeline.cli"]


def check(cmd: list[str], what: str) -> tuple[float, int, str]:
    code, wall, peak, so, se = run_child(cmd)
    if code not in (0, 1):
        raise RuntimeError(f"{what} exited with {code}:\n{so[-2000:]}\n{se[-2000:]}")
    log(f"{what}: {wall:.1f} s, peak {peak / 2 ** 20:.0f} MiB")
    return wall, peak, so


def study_config(sites: list[str]):
    from takeup.schemas.config import parse_config
    return parse_config({"study_id": "bench-shards", "outcomes": [{"name": "score", "primary": True}],
                         "follow_up": {"min_days": 60, "max_days": 120},
                         "sites": [{"site_id": s} for s in sites]})


def fill(path: Path, config, sites: list[str], first_site: int, n_sites: int, per_site: int, tag: str) -> None:
    """Generate the participants of sites ``first_site .. first_site + n_sites - 1`` straight into ``path``.

    Draws are hashes of the participant number, so a participant has the same rows in a shard and in
    the combined warehouse.
    """
    from takeup.pipeline.warehouse import connect, init_warehouse
    init_warehouse(path, config)
    con = connect(path)
    try:
        n = n_sites * per_site
        lo = first_site * per_site
        params = {"lo": lo, "hi": lo + n, "per": per_site, "start": START}
        now = datetime.now().replace(microsecond=0)
        for kind in ("assignment", "uptake", "outcome"):
            con.execute("INSERT INTO batches VALUES ($b, $f, $h, $k, NULL, $t, $n, $n, 0, 0, 'loaded', NULL)",
                        {"b": f"{tag}-{kind}", "f": f"{tag}-{kind}.parquet",
                         "h": f"{abs(hash((tag, kind))):064x}"[:64], "k": kind, "t": now, "n": n})
        u = "(hash(i, {salt}) % 1000000) / 1000000.0"
        con.execute(f"""
            CREATE TEMP TABLE p AS
            SELECT i, 'S' || lpad(CAST(i // $per AS VARCHAR), 4, '0') AS site_id,
                   {u.format(salt=1)} < 0.5 AS treated, {u.format(salt=2)} AS typ,
                   CAST($start + to_days(CAST(floor({u.format(salt=3)} * 150) AS INTEGER)) AS DATE) AS assigned_on,
                   {u.format(salt=4)} AS e1, {u.format(salt=5)} AS e2, {u.format(salt=6)} AS miss
            FROM range($lo, $hi) t(i)
        """, params)
        con.execute("""
            INSERT INTO assignments SELECT $tag || '-assignment', i, CAST(i AS UHUGEINT) + 1000000000000, site_id,
                   CASE WHEN treated THEN 'treatment' ELSE 'control' END, assigned_on, NULL, NULL FROM p
        """, {"tag": tag})
        con.execute("""
            INSERT INTO uptake_events SELECT $tag || '-uptake', i, CAST(i AS UHUGEINT) + 1000000000000, site_id,
                   CAST(assigned_on + to_days(7) AS DATE), typ < 0.1 OR (treated AND typ < 0.7) FROM p
        """, {"tag": tag})
        con.execute("""
            INSERT INTO outcome_measurements SELECT $tag || '-outcome', i, CAST(i AS UHUGEINT) + 1000000000000,
                   site_id, 'score', CAST(assigned_on + to_days(90) AS DATE),
                   round(50 + 3 * CAST(typ < 0.1 OR (treated AND typ < 0.7) AS DOUBLE)
                         + 6 * sqrt(-2 * ln(greatest(e1, 1e-9))) * cos(6.283185307 * e2), 2)
            FROM p WHERE miss >= 0.1 AND assigned_on + to_days(90) <= $as_of
        """, {"tag": tag, "as_of": AS_OF})
        con.execute("DROP TABLE p")
        con.execute("CHECKPOINT")
    finally:
        con.close()


def latest_estimates(path: Path):
    con = duckdb.connect(str(path), read_only=True)
    try:
        return con.execute("""SELECT site_id, cace, cace_se FROM site_estimates WHERE run_id =
            (SELECT run_id FROM runs ORDER BY started_at DESC LIMIT 1) AND spec = 'unadjusted'
            ORDER BY site_id""").df()
    finally:
        con.close()


def main(argv=None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--shards", type=int, default=4)
    ap.add_argument("--per-shard", type=int, default=1_000_000)
    ap.add_argument("--sites", type=int, default=200, help="sites in all (split evenly between the shards)")
    ap.add_argument("--workdir", type=Path, default=None)
    args = ap.parse_args(argv)
    os.environ["TAKEUP_ID_KEY"] = BENCH_KEY
    if args.sites % args.shards:
        ap.error("--sites must be a multiple of --shards")
    per_site = args.per_shard * args.shards // args.sites
    sites = [f"S{i:04d}" for i in range(args.sites)]
    config = study_config(sites)
    work = Path(args.workdir or tempfile.mkdtemp(prefix="takeup-bench-shards-"))
    work.mkdir(parents=True, exist_ok=True)
    k = args.sites // args.shards
    t = time.perf_counter()
    shards = []
    for s in range(args.shards):
        p = work / f"shard{s}.duckdb"
        fill(p, config, sites, s * k, k, per_site, f"shard{s}")
        shards.append(p)
    combined = work / "combined.duckdb"
    fill(combined, config, sites, 0, args.sites, per_site, "combined")
    log(f"generated {args.shards} shards x {args.per_shard:,} and a combined warehouse in "
        f"{time.perf_counter() - t:.0f} s")
    tk = takeup_cmd()
    as_of = ["--as-of", AS_OF.isoformat()]
    startup, startup_peak, _ = check(tk + ["runs", "--warehouse", str(combined), "--limit", "1"], "takeup runs")
    one_wall, one_peak, _ = check(tk + ["run", "--warehouse", str(combined), "--quiet"] + as_of,
                                  f"takeup run, one warehouse of {args.per_shard * args.shards:,}")
    rows = []
    for s, p in enumerate(shards):
        out = work / "packages" / f"shard{s}.zip"
        wall, peak, _ = check(tk + ["moments", "--warehouse", str(p), "--out", str(out), "--force"] + as_of,
                              f"takeup moments, shard {s}")
        rows.append((s, wall, peak, out.stat().st_size))
    central = work / "central.duckdb"
    from takeup.pipeline.warehouse import init_warehouse
    init_warehouse(central, config)
    c4_wall, c4_peak, _ = check(tk + ["run", "--warehouse", str(central), "--quiet", "--from-moments",
                                      str(work / "packages")], f"central run from {args.shards} packages")
    est4 = latest_estimates(central)
    whole = work / "whole" / "combined.zip"
    w_wall, w_peak, _ = check(tk + ["moments", "--warehouse", str(combined), "--out", str(whole), "--force"] + as_of,
                              "takeup moments, combined warehouse")
    central1 = work / "central1.duckdb"
    init_warehouse(central1, config)
    c1_wall, c1_peak, _ = check(tk + ["run", "--warehouse", str(central1), "--quiet", "--from-moments", str(whole)],
                                "central run from 1 package")
    ref = latest_estimates(combined)
    diff4 = float((ref.cace - est4.cace).abs().max())
    diff1 = float((ref.cace - latest_estimates(central1).cace).abs().max())
    total = args.per_shard * args.shards
    mib = lambda b: f"{b / 2 ** 20:.0f} MiB"   # noqa: E731
    lines = [
        f"Sharded / regional operation: {args.shards} shards x {args.per_shard:,} participants "
        f"({args.sites} sites, {per_site:,} per site, one outcome, weekly periods) and one warehouse of "
        f"{total:,}; as of {AS_OF}. Machine: {os.cpu_count()} cores ({platform.processor() or platform.machine()}), "
        f"shared with other jobs while measured; Python {platform.python_version()}, DuckDB {duckdb.__version__}.",
        "",
        "| step | participants read | wall | wall above the floor | peak RSS | note |",
        "|---|---:|---:|---:|---:|---|",
        f"| process start-up (`takeup runs`, the floor) | 0 | {startup:.1f} s | 0 | {mib(startup_peak)} | |",
        f"| `takeup run`, one warehouse | {total:,} | {one_wall:.1f} s | {one_wall - startup:.1f} s | "
        f"{mib(one_peak)} | reference |",
    ]
    for s, wall, peak, size in rows:
        lines.append(f"| `takeup moments`, shard {s} | {args.per_shard:,} | {wall:.1f} s | {wall - startup:.1f} s | "
                     f"{mib(peak)} | package {size / 1024:.0f} KiB |")
    lines += [
        f"| `takeup moments`, the whole study as 1 shard | {total:,} | {w_wall:.1f} s | {w_wall - startup:.1f} s | "
        f"{mib(w_peak)} | package {whole.stat().st_size / 1024:.0f} KiB |",
        f"| central run from {args.shards} packages | 0 | {c4_wall:.1f} s | {c4_wall - startup:.1f} s | "
        f"{mib(c4_peak)} | max abs CACE difference vs one warehouse {diff4:.1e} |",
        f"| central run from 1 package | 0 | {c1_wall:.1f} s | {c1_wall - startup:.1f} s | {mib(c1_peak)} | "
        f"max abs CACE difference {diff1:.1e} |",
        "",
        f"Shards in parallel (one machine per shard, or Dask workers): the slowest shard's moments "
        f"({max(r[1] for r in rows):.1f} s) plus the central run ({c4_wall:.1f} s) against "
        f"{one_wall:.1f} s for one warehouse.",
    ]
    text = "\n".join(lines)
    print(text)
    (Path(__file__).parent / "moments_packages_results.md").write_text(text + "\n")
    return 0


if __name__ == "__main__":
    sys.exit(main())
