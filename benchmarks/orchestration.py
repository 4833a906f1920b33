"""Orchestration overhead on the demo: in-process run vs Prefect flow (ephemeral API vs a running local server).

    .venv/bin/python benchmarks/orchestration.py [--repeats 3] [--port 4319] [--warehouse DEMO.duckdb --as-of DATE]

Builds the demo warehouse once (generate + ingest, like ``takeup demo --no-run``) unless one is given,
then times complete ``takeup run`` commands as a user starts them (a fresh process each: Python
start-up, imports, run, exit):

* ``in process``: ``takeup run`` (the floor, measured in the same session);
* ``orchestrated, ephemeral API``: ``takeup run --orchestrated`` without ``PREFECT_API_URL``
  (Prefect starts and stops its ephemeral API inside the command);
* ``orchestrated, running server``: the same with ``PREFECT_API_URL`` pointing at a server started
  once by ``takeup api-server`` (its start-up is printed separately: paid once, not per run).

Prints a markdown table (median and min of the repeats; overhead = median minus the in-process
median).  Timing is reported, never asserted.
"""

from __future__ import annotations

import argparse
import json
import os
import signal
import statistics
import subprocess
import sys
import tempfile
import time
from datetime import date
from pathlib import Path

RESULTS = Path(__file__).resolve().parent / "orchestration_results.json"

sys.path.insert(0, str(Path(__file__).resolve().parents[1]))

TAKEUP = str(Path(sys.executable).with_name("takeup"))


def build_demo(root: Path) -> tuple[Path, date]:
    from takeup.pipeline.demo import generate_demo
    from takeup.pipeline.ingest.many_files import ingest_paths
    from takeup.pipeline.warehouse import init_warehouse
    from takeup.schemas.config import load_config
    manifest = generate_demo(root / "demo")
    path = root / "demo.duckdb"
    init_warehouse(path, load_config(manifest.config_path))
    ingest_paths(path, list(manifest.files))
    return path, manifest.as_of


def timed_run(warehouse: Path, as_of: date, orchestrated: bool, env: dict) -> float:
    cmd = [TAKEUP, "run", "--warehouse", str(warehouse), "--as-of", as_of.isoformat(), "--quiet"]
    if orchestrated:
        cmd.append("--orchestrated")
    t0 = time.perf_counter()
    done = subprocess.run(cmd, env=env, capture_output=True, text=True)
    elapsed = time.perf_counter() - t0
    if done.returncode not in (0, 1):
        raise SystemExit(f"{' '.join(cmd)} failed ({done.returncode}): {done.stderr.strip()}")
    return elapsed


def timed_import(module: str, env: dict) -> float:
    """A fresh process that only imports ``module`` (what every command pays before any work)."""
    t0 = time.perf_counter()
    subprocess.run([sys.executable, "-c", f"import {module}"], env=env, check=True)
    return time.perf_counter() - t0


def start_server(port: int, env: dict) -> tuple[subprocess.Popen, str, float]:
    t0 = time.perf_counter()
    proc = subprocess.Popen([TAKEUP, "api-server", "--port", str(port)], env=env, stdout=subprocess.PIPE,
                            stderr=subprocess.STDOUT, text=True)
    for line in proc.stdout:                      # the command prints the URL once the API answers
        if line.startswith("export PREFECT_API_URL="):
            return proc, line.split("=", 1)[1].strip(), time.perf_counter() - t0
    raise SystemExit(f"takeup api-server exited ({proc.wait()}) without announcing its URL")


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--repeats", type=int, default=3)
    ap.add_argument("--port", type=int, default=4319)
    ap.add_argument("--warehouse", type=Path, default=None, help="an existing demo warehouse (skips the build)")
    ap.add_argument("--as-of", type=date.fromisoformat, default=None, help="cutoff for --warehouse")
    args = ap.parse_args()
    env = dict(os.environ)
    env.setdefault("TAKEUP_ID_KEY", "benchmark-key-not-secret")
    env.setdefault("PREFECT_SERVER_ANALYTICS_ENABLED", "false")
    env.setdefault("DO_NOT_TRACK", "1")
    env.pop("PREFECT_API_URL", None)
    os.environ["TAKEUP_ID_KEY"] = env["TAKEUP_ID_KEY"]
    with tempfile.TemporaryDirectory() as tmp:
        if args.warehouse is not None:
            if args.as_of is None:
                raise SystemExit("--warehouse needs --as-of")
            warehouse, as_of = args.warehouse, args.as_of
        else:
            print("building the demo warehouse ...", file=sys.stderr)
            warehouse, as_of = build_demo(Path(tmp))
        times: dict[str, list[float]] = {"in process": [], "orchestrated, ephemeral API": [],
                                         "orchestrated, running server": []}
        imports: dict[str, list[float]] = {"takeup.pipeline.cli": [], "takeup.flows.monitor": []}
        proc, url, startup = start_server(args.port, env)
        try:
            with_server = dict(env, PREFECT_API_URL=url)
            for _ in range(args.repeats):              # interleaved, so load changes hit every mode alike
                times["in process"].append(timed_run(warehouse, as_of, False, env))
                times["orchestrated, ephemeral API"].append(timed_run(warehouse, as_of, True, env))
                times["orchestrated, running server"].append(timed_run(warehouse, as_of, True, with_server))
                for module in imports:
                    imports[module].append(timed_import(module, env))
        finally:
            proc.send_signal(signal.SIGTERM)
            try:
                proc.wait(timeout=30)
            except subprocess.TimeoutExpired:
                proc.kill()
    floor = statistics.median(times["in process"])
    print(f"| mode (demo, `takeup run`, fresh process) | median s | min s | minus in-process (median) |")
    print("|---|---:|---:|---:|")
    for mode, ts in times.items():
        med = statistics.median(ts)
        over = "floor" if mode == "in process" else f"{med - floor:+.1f}"
        print(f"| {mode} | {med:.1f} | {min(ts):.1f} | {over} |")
    for module, ts in imports.items():
        print(f"| (only `import {module}`, fresh process) | {statistics.median(ts):.1f} | {min(ts):.1f} | "
              f"{statistics.median(ts) - statistics.median(imports['takeup.pipeline.cli']):+.1f} vs the CLI import |")
    print(f"\n`takeup api-server` start-up (once, until it answers): {startup:.1f} s; {args.repeats} repeats per mode, "
          f"interleaved; {os.cpu_count()} CPU(s).")
    med = {mode: statistics.median(ts) for mode, ts in times.items()}
    summary = (f"demo, fresh `takeup run` process: in process {med['in process']:.1f} s; orchestrated with the "
               f"ephemeral API {med['orchestrated, ephemeral API']:.1f} s "
               f"({med['orchestrated, ephemeral API'] - floor:+.1f} s); against a running `takeup api-server` "
               f"{med['orchestrated, running server']:.1f} s ({med['orchestrated, running server'] - floor:+.1f} s; "
               f"server start-up {startup:.1f} s, paid once)")
    RESULTS.write_text(json.dumps({"when": time.strftime("%Y-%m-%d %H:%M UTC", time.gmtime()), "median_s": med,
                                   "api_server_startup_s": startup, "repeats": args.repeats, "summary": summary},
                                  indent=1))


if __name__ == "__main__":
    main()
