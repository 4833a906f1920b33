#!/usr/bin/env python
"""Benchmarks of takeup: ingestion throughput, estimation from moments, the whole run.

Measures, on simulated data (fixed seed; sites x participants per site):

1. **Ingestion** — :func:`takeup.pipeline.ingest.batch.ingest_file` on one assignment file of
   ``--ingest-rows`` rows, as Parquet and as CSV, each into a fresh warehouse, in a
   child process (so its peak RSS is the ingestion's own): rows/s and peak RSS.
2. **Estimation** on one participant table (columns site_id, outcome, z, d,
   uptake_observed, y, as the run's ``_sample`` temp table):

   (a) the moment path of the pipeline: ``sample_sql.site_outcome_period_moments`` (DuckDB
       aggregation per site x arm) + ``moments_for_outcome`` + ``wald_estimates``
       (analysis sample and first stage) + ``anderson_rubin_set`` + ``tf_interval`` +
       ``complier_outcome_means``;
   (b) a per-site loop of linearmodels ``IV2SLS(y, const, d, z).fit(cov_type="robust",
       debiased=True)`` over the same rows in memory (timed on ``--lm-sites`` random
       sites and scaled linearly to all sites);
   (c) a bare DuckDB ``GROUP BY site_id, z`` scan of the same table (the floor);

   and checks that (a) and (b) give the same CACE, standard error and first-stage F.
3. **Whole run** — the participants are written as assignment, uptake and outcome
   Parquet files, ingested with ``takeup ingest`` (one process, the real path) and
   monitored with ``takeup run --warehouse W --as-of DATE`` (process start, joins,
   estimates, pooling, trends, alerts, writes), each timed as a subprocess with its
   peak RSS (``os.wait4`` rusage of that child).
4. **Report** -- ``takeup report`` of that run (subprocess): wall time and file size.

Prints a Markdown table (figures, targets, machine) and writes it to
``benchmarks/last_results.md``.  Targets are reported, never asserted.

Usage::

    .venv/bin/python benchmarks/run_benchmarks.py                       # 1,000 x 10,000
    .venv/bin/python benchmarks/run_benchmarks.py --sites 50 --per-site 2000 --ingest-rows 100000
"""

from __future__ import annotations

import argparse
import json
import os
import platform
import resource
import shutil
import subprocess
import sys
import tempfile
import time
from datetime import date, datetime, timezone
from pathlib import Path

import numpy as np

ROOT = Path(__file__).resolve().parents[1]
if str(ROOT) not in sys.path:
    sys.path.insert(0, str(ROOT))

SEED = 20240611
BENCH_KEY = "takeup-benchmark-key (not a secret)"
OUTCOME = "score"
START = np.datetime64("2025-01-06")      # a Monday: first assignment date
ASSIGN_DAYS = 140                         # assignments spread over 20 weeks
AS_OF = date(2025, 9, 30)                 # every simulated date lies on or before this
FOLLOW_MIN, FOLLOW_MAX = 60, 120          # follow-up window (days after assignment)
MISSING_OUTCOME = 0.05                    # share of participants without an outcome measurement

# targets from the project's issues (measured and reported, never asserted)
TARGET_PARQUET_ROWS_S = 1_000_000
TARGET_CSV_ROWS_S = 300_000
TARGET_B_OVER_A = 100.0
TARGET_A_OVER_C = 3.0
TARGET_B_OVER_D = 5.0
TARGET_PEAK_BYTES = 2 * 1024 ** 3
TARGET_REPORT_S = 20.0
TARGET_REPORT_BYTES = 3 * 1024 ** 2


# ----------------------------------------------------------------------------- helpers
def site_names(k: int) -> list[str]:
    width = max(4, len(str(k)))
    return [f"S{i + 1:0{width}d}" for i in range(k)]


def study_config(sites: list[str]):
    from takeup.schemas.config import FollowUp, OutcomeSpec, SiteSpec, StudyConfig
    return StudyConfig(study_id="benchmark", outcomes=(OutcomeSpec(name=OUTCOME, primary=True),),
                       follow_up=FollowUp(min_days=FOLLOW_MIN, max_days=FOLLOW_MAX),
                       sites=tuple(SiteSpec(site_id=s) for s in sites))


def fmt_s(x: float) -> str:
    return f"{x:,.3f} s" if x < 100 else f"{x:,.1f} s"


def fmt_bytes(b: float) -> str:
    return f"{b / 1024 ** 3:.2f} GiB" if b >= 1024 ** 3 else f"{b / 1024 ** 2:,.0f} MiB"


def fmt_rate(r: float) -> str:
    return f"{r:,.0f} rows/s"


def met(ok: bool) -> str:
    return "yes" if ok else "**no**"


def log(msg: str) -> None:
    print(f"[{datetime.now():%H:%M:%S}] {msg}", file=sys.stderr, flush=True)


def run_child(cmd: list[str], cwd: Path | None = None) -> tuple[int, float, int, str, str]:
    """Run ``cmd``; return (exit code, wall seconds, peak RSS in bytes, stdout, stderr).

    The peak RSS is the ``ru_maxrss`` of this one child, from ``os.wait4``.
    """
    with tempfile.TemporaryFile("w+") as out, tempfile.TemporaryFile("w+") as err:
        t = time.perf_counter()
        proc = subprocess.Popen(cmd, stdout=out, stderr=err, cwd=cwd, env=os.environ.copy())
        _, status, usage = os.wait4(proc.pid, 0)
        wall = time.perf_counter() - t
        proc.returncode = os.waitstatus_to_exitcode(status)
        out.seek(0)
        err.seek(0)
        return proc.returncode, wall, usage.ru_maxrss * 1024, out.read(), err.read()


def machine_info() -> dict:
    cpu = "unknown"
    try:
        for line in Path("/proc/cpuinfo").read_text().splitlines():
            if line.startswith("model name"):
                cpu = line.split(":", 1)[1].strip()
                break
    except OSError:
        pass
    mem = None
    try:
        for line in Path("/proc/meminfo").read_text().splitlines():
            if line.startswith("MemTotal"):
                mem = int(line.split()[1]) * 1024
    except OSError:
        pass
    import duckdb, linearmodels, pandas, pyarrow
    try:
        nproc = len(os.sched_getaffinity(0))
    except AttributeError:  # pragma: no cover - not Linux
        nproc = os.cpu_count()
    return {"nproc": nproc, "cpu": cpu, "mem": mem, "python": platform.python_version(),
            "duckdb": duckdb.__version__, "numpy": np.__version__, "pandas": pandas.__version__,
            "pyarrow": pyarrow.__version__, "linearmodels": linearmodels.__version__,
            "os": platform.platform()}


# ----------------------------------------------------------------------------- data
def simulate(k: int, per_site: int, seed: int) -> dict[str, np.ndarray]:
    """Participants of ``k`` sites x ``per_site`` (vectorised; no loop over rows or sites).

    Per site: complier share ~ U(0.25, 0.8), always-taker share ~ U(0, 0.15), CACE ~
    N(2, 1), control mean ~ N(50, 5); 5% of the sites have a weak first stage (complier
    share U(0, 0.03)).  Z ~ Bernoulli(0.5); Y = mu + 0.3 * (type is always-taker) +
    CACE * D + N(0, 6^2).
    """
    rng = np.random.default_rng(seed)
    n = k * per_site
    site = np.repeat(np.arange(k, dtype=np.int32), per_site)
    comp = rng.uniform(0.25, 0.8, k)
    weak = rng.random(k) < 0.05
    comp[weak] = rng.uniform(0.0, 0.03, weak.sum())
    always = rng.uniform(0.0, 0.15, k)
    cace = rng.normal(2.0, 1.0, k)
    mu = rng.normal(50.0, 5.0, k)
    z = (rng.random(n) < 0.5).astype(np.int8)
    u = rng.random(n)
    is_always = u < always[site]
    is_complier = ~is_always & (u < always[site] + comp[site])
    d = (is_always | (is_complier & (z == 1))).astype(np.float64)
    y = mu[site] + 0.3 * is_always + cace[site] * d + rng.normal(0.0, 6.0, n)
    assigned = START + rng.integers(0, ASSIGN_DAYS, n).astype("timedelta64[D]")
    observed = assigned + rng.integers(1, 29, n).astype("timedelta64[D]")
    measured = assigned + rng.integers(85, 100, n).astype("timedelta64[D]")
    has_y = rng.random(n) >= MISSING_OUTCOME
    return {"site": site, "z": z, "d": d, "y": y, "has_y": has_y, "assigned": assigned,
            "observed": observed, "measured": measured}


def _participant_ids(idx: np.ndarray):
    import pyarrow as pa
    import pyarrow.compute as pc
    return pc.binary_join_element_wise("P", pa.array(idx.astype(np.int64)).cast(pa.string()), "")


def _site_array(site: np.ndarray, names: list[str]):
    import pyarrow as pa
    return pa.DictionaryArray.from_arrays(pa.array(site, type=pa.int32()), pa.array(names))


def write_participant_files(data: dict, names: list[str], out: Path, rows_per_file: int) -> dict[str, list[Path]]:
    """Assignment, uptake and outcome Parquet files, one file per block of sites."""
    import pyarrow as pa
    import pyarrow.parquet as pq
    out.mkdir(parents=True, exist_ok=True)
    k = len(names)
    per_site = len(data["site"]) // k
    sites_per_file = max(1, rows_per_file // max(per_site, 1))
    files: dict[str, list[Path]] = {"assignment": [], "uptake": [], "outcome": []}
    arm_dict = pa.array(["control", "treatment"])
    for block, first in enumerate(range(0, k, sites_per_file)):
        lo, hi = first * per_site, min(k, first + sites_per_file) * per_site
        sl = slice(lo, hi)
        idx = np.arange(lo, hi)
        pid = _participant_ids(idx)
        site = _site_array(data["site"][sl], names)
        a = pa.table({"site_id": site, "participant_id": pid,
                      "arm": pa.DictionaryArray.from_arrays(pa.array(data["z"][sl].astype(np.int32)), arm_dict),
                      "assigned_on": pa.array(data["assigned"][sl], type=pa.date32())})
        u = pa.table({"site_id": site, "participant_id": pid,
                      "observed_on": pa.array(data["observed"][sl], type=pa.date32()),
                      "took_up": pa.array(data["d"][sl] > 0.5)})
        keep = data["has_y"][sl]
        o = pa.table({"site_id": site.filter(pa.array(keep)), "participant_id": pid.filter(pa.array(keep)),
                      "outcome": pa.array(np.full(int(keep.sum()), OUTCOME)),
                      "measured_on": pa.array(data["measured"][sl][keep], type=pa.date32()),
                      "value": pa.array(data["y"][sl][keep])})
        for kind, tbl in (("assignment", a), ("uptake", u), ("outcome", o)):
            path = out / f"block{block:04d}_{kind}.parquet"
            pq.write_table(tbl, path)
            files[kind].append(path)
    return files


def write_ingest_file(n_rows: int, k: int, per_site: int, names: list[str], out: Path, seed: int
                      ) -> tuple[Path, Path]:
    """One assignment file of ``n_rows`` rows as Parquet and as CSV (same content)."""
    import pyarrow as pa
    import pyarrow.csv as pcsv
    import pyarrow.parquet as pq
    rng = np.random.default_rng(seed + 1)
    site = ((np.arange(n_rows) // max(per_site, 1)) % k).astype(np.int32)
    z = (rng.random(n_rows) < 0.5)
    assigned = START + rng.integers(0, ASSIGN_DAYS, n_rows).astype("timedelta64[D]")
    tbl = pa.table({"site_id": pa.array(np.array(names, dtype=object)[site]),
                    "participant_id": _participant_ids(np.arange(n_rows)),
                    "arm": pa.array(np.where(z, "treatment", "control")),
                    "assigned_on": pa.array(assigned, type=pa.date32())})
    pq_path, csv_path = out / "ingest_assignment.parquet", out / "ingest_assignment.csv"
    pq.write_table(tbl, pq_path)
    pcsv.write_csv(tbl, csv_path)
    return pq_path, csv_path


# ----------------------------------------------------------------------------- 1. ingestion
class _TimedConnection:
    """Wraps a DuckDB connection and records the seconds of every ``execute`` (profiling only)."""

    def __init__(self, con):
        self._con = con
        self.log: list[tuple[float, str]] = []

    def execute(self, sql, *args):
        t = time.perf_counter()
        out = self._con.execute(sql, *args)
        self.log.append((time.perf_counter() - t, " ".join(str(sql).split())))
        return out

    def __getattr__(self, name):
        return getattr(self._con, name)


def child_ingest(warehouse: str, file: str) -> None:
    """Child process: ingest one file into an existing warehouse, print JSON."""
    from takeup.pipeline.ingest.batch import ingest_file
    from takeup.pipeline.pseudonym import load_key
    from takeup.pipeline.warehouse import check_key, connect, stored_config
    wh = Path(warehouse)
    con = connect(wh)
    key = load_key(wh)
    check_key(con, key, wh)
    cfg = stored_config(con)
    timed = _TimedConnection(con)
    rss_before = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss * 1024
    t = time.perf_counter()
    rep = ingest_file(timed, file, key, cfg)
    secs = time.perf_counter() - t
    con.close()
    top = sorted(timed.log, reverse=True)[:5]
    print(json.dumps({"seconds": secs, "status": rep.status, "rows_read": rep.rows_read,
                      "rows_loaded": rep.rows_loaded, "rows_quarantined": rep.rows_quarantined,
                      "message": rep.message, "rss_before": rss_before,
                      "peak_rss": resource.getrusage(resource.RUSAGE_SELF).ru_maxrss * 1024,
                      "statements": [[round(t, 3), q[:110]] for t, q in top]}))


def bench_ingest(path: Path, workdir: Path, config, label: str) -> dict:
    from takeup.pipeline.warehouse import init_warehouse
    wh = workdir / f"ingest_{label}.duckdb"
    init_warehouse(wh, config)
    code, wall, peak, out, err = run_child([sys.executable, str(Path(__file__).resolve()),
                                            "--child-ingest", str(wh), str(path)])
    if code != 0:
        raise RuntimeError(f"ingestion child failed ({code}):\n{err}")
    res = json.loads(out.strip().splitlines()[-1])
    if res["status"] != "loaded" or res["rows_loaded"] != res["rows_read"]:
        raise RuntimeError(f"ingestion of {path.name} did not load every row: {res}")
    res["rows_s"] = res["rows_read"] / res["seconds"]
    res["wall"] = wall
    res["child_peak"] = peak
    res["file_bytes"] = path.stat().st_size
    for suffix in ("", ".wal"):
        p = Path(str(wh) + suffix)
        if p.exists():
            p.unlink()
    return res


# ----------------------------------------------------------------------------- 2. estimation
def sample_table(con, data: dict, names: list[str]) -> None:
    """Temp table ``_sample`` shaped like the run's analysis sample (one outcome)."""
    import pyarrow as pa
    n = len(data["site"])
    y = pa.array(data["y"], mask=~data["has_y"])
    tbl = pa.table({"site_id": _site_array(data["site"], names).cast(pa.string()),
                    "outcome": pa.array(np.full(n, OUTCOME)),
                    "z": pa.array(data["z"].astype(np.int32)),
                    "d": pa.array(data["d"]),
                    "uptake_observed": pa.array(np.ones(n, dtype=bool)),
                    "in_uptake": pa.array(np.ones(n, dtype=bool)),        # every uptake reported
                    "outcome_due": pa.array(np.ones(n, dtype=bool)),      # every participant due an outcome
                    "y": y,
                    "assigned_on": pa.array(data["assigned"], type=pa.date32())})
    con.register("_sample_arrow", tbl)
    con.execute("CREATE OR REPLACE TEMP TABLE _sample AS SELECT * FROM _sample_arrow")
    con.unregister("_sample_arrow")


def estimation_step(con, config) -> tuple[dict, dict]:
    """(a): the pipeline's moment path; returns results and per-stage seconds."""
    from takeup.pipeline.stats.estimators.complier_means import complier_outcome_means
    from takeup.pipeline.stats.estimators.wald import wald_estimates
    from takeup.pipeline.stats.estimators.weak_iv import anderson_rubin_set, tf_interval
    from takeup.pipeline.run.sample_sql import moments_for_outcome, site_outcome_period_moments
    level = config.estimation.level
    origin = con.execute("SELECT min(assigned_on) FROM _sample").fetchall()[0][0]
    t0 = time.perf_counter()
    frame, _ = site_outcome_period_moments(con, origin, 7)    # the run's path: moments and cohort counts
    t1 = time.perf_counter()
    sites = sorted(frame.site_id.unique())
    table = moments_for_outcome(frame, OUTCOME, sites)
    t2 = time.perf_counter()
    est = wald_estimates(table.moments, level=level)
    fs_only = wald_estimates(table.first_stage_moments, level=level)
    ar = anderson_rubin_set(est.itt, est.complier_share, est.itt_se ** 2, est.complier_share_se ** 2,
                            est.cov_itt_fs, level=level)
    tf = tf_interval(est.cace, est.cace_se, est.first_stage_f)
    cm = complier_outcome_means(table.moments)
    t3 = time.perf_counter()
    return ({"sites": sites, "est": est, "fs_only": fs_only, "ar": ar, "tf": tf, "cm": cm, "table": table},
            {"sql": t1 - t0, "arrange": t2 - t1, "estimators": t3 - t2, "total": t3 - t0})


def bare_scan(con) -> float:
    t = time.perf_counter()
    con.execute("SELECT site_id, z, count(*), sum(d), sum(y) FROM _sample GROUP BY site_id, z").fetchall()
    return time.perf_counter() - t


def linearmodels_loop(data: dict, names: list[str], lm_sites: int, seed: int) -> dict:
    """(b): per-site IV2SLS fits on the complete cases, on a random subset of sites."""
    import pandas as pd
    from linearmodels.iv import IV2SLS
    keep = data["has_y"]
    df = pd.DataFrame({"site": data["site"][keep], "const": 1.0, "d": data["d"][keep],
                       "z": data["z"][keep].astype(np.float64), "y": data["y"][keep]})
    k = len(names)
    rng = np.random.default_rng(seed + 2)
    chosen = np.sort(rng.choice(k, size=min(lm_sites, k), replace=False))
    t0 = time.perf_counter()
    groups = df.groupby("site", sort=True).indices
    t1 = time.perf_counter()
    cace, se, f = [], [], []
    for s in chosen:
        g = df.iloc[groups[s]]
        res = IV2SLS(g["y"], g[["const"]], g["d"], g["z"]).fit(cov_type="robust", debiased=True)
        cace.append(res.params["d"])
        se.append(res.std_errors["d"])
        f.append(res.first_stage.diagnostics["f.stat"].iloc[0])
    t2 = time.perf_counter()
    return {"sites": chosen, "cace": np.array(cace), "cace_se": np.array(se), "f": np.array(f),
            "groupby": t1 - t0, "loop_subset": t2 - t1,
            "scaled": (t1 - t0) + (t2 - t1) * k / len(chosen), "n_fitted": len(chosen)}


def compare_cace(cace, se, f, ref_cace, ref_se, ref_f=None) -> dict:
    """Agreement of two sets of per-site CACE estimates (same site order).

    The relative difference of a CACE is only meaningful away from zero: at a site
    with a weak first stage the CACE can be ~0 and its relative difference then
    reflects the conditioning of either computation, not a discrepancy.  So the
    headline is ``max |delta CACE| / SE`` over all sites, beside the relative
    difference over the sites with first-stage F >= 10 (common practice threshold)
    and over all sites.
    """
    cace, se, f = (np.asarray(x, float) for x in (cace, se, f))
    ref_cace, ref_se = np.asarray(ref_cace, float), np.asarray(ref_se, float)
    ok = np.isfinite(cace) & np.isfinite(ref_cace) & np.isfinite(se) & (se > 0)
    strong = ok & np.isfinite(f) & (f >= 10.0)
    out = {"n": int(len(cace)), "n_strong": int(strong.sum()),
           "nan_mismatch": int((np.isfinite(cace) != np.isfinite(ref_cace)).sum()),
           "cace_over_se": float(np.max(np.abs(cace[ok] - ref_cace[ok]) / se[ok])) if ok.any() else float("nan"),
           "cace_rel_strong": max_rel_diff(cace[strong], ref_cace[strong]),
           "cace_rel_all": max_rel_diff(cace[ok], ref_cace[ok]),
           "se_rel": max_rel_diff(se[ok], ref_se[ok])}
    out["f_rel"] = max_rel_diff(f, ref_f) if ref_f is not None else float("nan")
    return out


def agree(c: dict, tol: float = 1e-9) -> bool:
    """All differences below ``tol`` (1e-9: three orders above the ~1e-12 expected from rounding)."""
    vals = [c["cace_over_se"], c["cace_rel_strong"], c["se_rel"]] + ([c["f_rel"]] if np.isfinite(c["f_rel"]) else [])
    return c["nan_mismatch"] == 0 and all(np.isfinite(v) and v < tol for v in vals)


def describe(c: dict) -> str:
    text = (f"CACE: max abs diff / SE {c['cace_over_se']:.1e}; max rel diff {c['cace_rel_strong']:.1e} "
            f"({c['n_strong']:,} sites with F >= 10), {c['cace_rel_all']:.1e} (all); SE: {c['se_rel']:.1e}")
    if np.isfinite(c["f_rel"]):
        text += f"; F: {c['f_rel']:.1e}"
    return text


def max_rel_diff(a: np.ndarray, b: np.ndarray) -> float:
    a, b = np.asarray(a, float), np.asarray(b, float)
    ok = np.isfinite(a) & np.isfinite(b)
    if (np.isfinite(a) != np.isfinite(b)).any():
        return float("nan")
    return float(np.max(np.abs(a[ok] - b[ok]) / np.maximum(np.abs(b[ok]), 1e-300))) if ok.any() else float("nan")


# ----------------------------------------------------------------------------- 3. whole run
def takeup_cmd() -> list[str]:
    script = Path(sys.executable).parent / "takeup"
    return [str(script)] if script.exists() else [sys.executable, "-m", "takeup.pipeline.cli"]


def run_timings(warehouse: Path) -> tuple[dict, "object"]:
    import duckdb
    con = duckdb.connect(str(warehouse), read_only=True)
    try:
        run_id, timings, status, message = con.execute(
            "SELECT run_id, timings_json, status, message FROM runs ORDER BY started_at DESC LIMIT 1").fetchone()
        est = con.execute("SELECT site_id, cace, cace_se, first_stage_f FROM site_estimates "
                          "WHERE run_id = $r AND spec = 'unadjusted' AND outcome = $o ORDER BY site_id",
                          {"r": run_id, "o": OUTCOME}).df()
        counts = dict(con.execute(
            "SELECT 'assignments', count(*) FROM assignments UNION ALL "
            "SELECT 'uptake_events', count(*) FROM uptake_events UNION ALL "
            "SELECT 'outcome_measurements', count(*) FROM outcome_measurements").fetchall())
    finally:
        con.close()
    return {"run_id": run_id, "status": status, "message": message, "timings": json.loads(timings or "{}"),
            "counts": counts}, est


def bench_full_run(data: dict, names: list[str], config, scratch: Path, args, est_a: dict) -> dict:
    """(d): Parquet files -> ``takeup ingest`` (per kind) -> ``takeup run``, each a timed subprocess."""
    import pyarrow.parquet as pq
    from takeup.pipeline.warehouse import init_warehouse
    t = time.perf_counter()
    files = write_participant_files(data, names, scratch / "files", args.rows_per_file)
    write_secs = time.perf_counter() - t
    n_rows = 0
    ordered = files["assignment"] + files["uptake"] + files["outcome"]
    for f in ordered:
        n_rows += pq.ParquetFile(f).metadata.num_rows
    log(f"{len(ordered)} files, {n_rows:,} rows written in {write_secs:.1f} s")
    wh = scratch / "run.duckdb"
    init_warehouse(wh, config)
    ingest = {}
    for kind in ("assignment", "uptake", "outcome"):
        kind_rows = sum(pq.ParquetFile(f).metadata.num_rows for f in files[kind])
        code, wall, peak, so, se = run_child(
            takeup_cmd() + ["ingest", "--warehouse", str(wh), "--quiet", "--kind", kind]
            + [str(f) for f in files[kind]])
        if code != 0:
            raise RuntimeError(f"takeup ingest ({kind}) exited with {code}:\n{so[-2000:]}\n{se[-2000:]}")
        ingest[kind] = {"wall": wall, "peak": peak, "rows": kind_rows, "files": len(files[kind])}
        log(f"(d0) takeup ingest {kind}: {kind_rows:,} rows in {wall:.1f} s "
            f"({kind_rows / wall:,.0f} rows/s), peak {fmt_bytes(peak)}")
    ingest_wall = sum(v["wall"] for v in ingest.values())
    ingest_peak = max(v["peak"] for v in ingest.values())
    code, run_wall, run_peak, so, se = run_child(
        takeup_cmd() + ["run", "--warehouse", str(wh), "--as-of", AS_OF.isoformat(), "--quiet"])
    if code not in (0, 1):
        raise RuntimeError(f"takeup run exited with {code}:\n{so[-2000:]}\n{se[-2000:]}")
    log(f"(d) takeup run {run_wall:.1f} s, peak {fmt_bytes(run_peak)}; exit {code}\n{so.strip()}\n{se.strip()}")
    run, stored = run_timings(wh)
    if run["status"] not in ("ok", "partial") or stored.empty:
        raise RuntimeError(f"takeup run did not finish (status {run['status']}): {run['message']}\n{se[-3000:]}")
    code_s, start_wall, _, so_s, se_s = run_child(
        takeup_cmd() + ["runs", "--warehouse", str(wh), "--limit", "1", "--json"])
    if code_s != 0:
        raise RuntimeError(f"takeup runs exited with {code_s}:\n{se_s[-2000:]}")
    log(f"takeup start-up (takeup runs --limit 1): {start_wall:.2f} s")
    if run["counts"] != {"assignments": args.sites * args.per_site,
                         "uptake_events": args.sites * args.per_site,
                         "outcome_measurements": n_rows - 2 * args.sites * args.per_site}:
        raise RuntimeError(f"warehouse does not hold every participant: {run['counts']}")
    report = scratch / "report.html"
    code_r, report_wall, report_peak, so_r, se_r = run_child(
        takeup_cmd() + ["report", "--warehouse", str(wh), "--out", str(report)])
    if code_r != 0:
        raise RuntimeError(f"takeup report exited with {code_r}:\n{se_r[-2000:]}")
    report_bytes = report.stat().st_size
    log(f"(e) takeup report {report_wall:.1f} s, {report_bytes / 1024 ** 2:.2f} MiB, peak {fmt_bytes(report_peak)}")
    a_vals = np.array([est_a[s] for s in stored.site_id])
    dcmp = compare_cace(stored.cace.to_numpy(dtype=float), stored.cace_se.to_numpy(dtype=float),
                        stored.first_stage_f.to_numpy(dtype=float), a_vals[:, 0], a_vals[:, 1], a_vals[:, 2])
    return {"n_files": len(ordered), "rows": n_rows, "write": write_secs, "ingest_wall": ingest_wall,
            "ingest_peak": ingest_peak, "ingest": ingest, "run_wall": run_wall, "run_peak": run_peak, "run": run,
            "exit": code, "startup": start_wall, "da": dcmp, "report_wall": report_wall,
            "report_bytes": report_bytes, "report_peak": report_peak}


# ----------------------------------------------------------------------------- report
def render(args, info: dict, r: dict) -> str:
    lines = []
    n_total = args.sites * args.per_site
    lines.append(f"Benchmark of {datetime.now(timezone.utc):%Y-%m-%d %H:%M} UTC; "
                 f"{args.sites:,} sites x {args.per_site:,} participants = {n_total:,} participants; "
                 f"ingestion file {args.ingest_rows:,} rows; seed {SEED}.")
    lines.append("")
    lines.append(f"Machine: {info['nproc']} cores ({info['cpu']}), "
                 f"{fmt_bytes(info['mem']) if info['mem'] else '? RAM'}, {info['os']}; "
                 f"Python {info['python']}, DuckDB {info['duckdb']}, numpy {info['numpy']}, pandas "
                 f"{info['pandas']}, pyarrow {info['pyarrow']}, linearmodels {info['linearmodels']}. "
                 f"Load average at start {r['load_start']}, at end {r['load_end']}.")
    lines.append("")
    lines.append("| Measurement | Value | Target | Met |")
    lines.append("|---|---:|---:|:---:|")
    for label in ("parquet", "csv"):
        ing = r.get(f"ingest_{label}")
        if ing is None:
            continue
        target = TARGET_PARQUET_ROWS_S if label == "parquet" else TARGET_CSV_ROWS_S
        lines.append(f"| Ingestion, {label.upper() if label == 'csv' else 'Parquet'} ({ing['rows_read']:,} "
                     f"assignment rows, `ingest_file`) | {fmt_s(ing['seconds'])} = {fmt_rate(ing['rows_s'])} "
                     f"| >= {target:,} rows/s | {met(ing['rows_s'] >= target)} |")
        lines.append(f"| Ingestion, {label.upper() if label == 'csv' else 'Parquet'}: peak RSS of the "
                     f"process | {fmt_bytes(ing['peak_rss'])} (before: {fmt_bytes(ing['rss_before'])}) "
                     f"| bounded | |")
    a, c, b = r["a"], r["c"], r["b"]
    lines.append(f"| (a) moment path: DuckDB moments + Wald/AR/tF/complier means, {args.sites:,} sites "
                 f"(best of {args.repeats}) | {fmt_s(a['total'])} (SQL {fmt_s(a['sql'])}, arrange "
                 f"{fmt_s(a['arrange'])}, estimators {fmt_s(a['estimators'])}) | | |")
    lines.append(f"| (a') the same + `estimate_sites` rows (info) | {fmt_s(r['a_rows'])} | | |")
    scaled = "" if b["n_fitted"] == args.sites else \
        f"; timed on {b['n_fitted']:,} random sites ({fmt_s(b['loop_subset'])}) and scaled x{args.sites / b['n_fitted']:g}"
    lines.append(f"| (b) per-site linearmodels `IV2SLS` loop, {args.sites:,} sites | {fmt_s(b['scaled'])} "
                 f"(groupby {fmt_s(b['groupby'])}{scaled}) | | |")
    lines.append(f"| (c) bare DuckDB `GROUP BY site_id, z` scan (best of {args.repeats}) | {fmt_s(c)} | | |")
    lines.append(f"| (b)/(a) | {b['scaled'] / a['total']:,.0f}x | >= {TARGET_B_OVER_A:g}x "
                 f"| {met(b['scaled'] / a['total'] >= TARGET_B_OVER_A)} |")
    lines.append(f"| (a)/(c) | {a['total'] / c:,.2f}x | <= {TARGET_A_OVER_C:g}x "
                 f"| {met(a['total'] / c <= TARGET_A_OVER_C)} |")
    lines.append(f"| (a) vs (b) on the {b['n_fitted']:,} sites of (b) | {describe(r['ab'])} | ~1e-12 "
                 f"| {met(agree(r['ab']))} |")
    d = r.get("d")
    if d is not None:
        lines.append(f"| Data files for (d): {d['n_files']} Parquet files, {d['rows']:,} rows, written in "
                     f"| {fmt_s(d['write'])} | | |")
        for kind, v in d["ingest"].items():
            lines.append(f"| (d0) `takeup ingest --kind {kind}`: {v['files']} files, {v['rows']:,} rows (subprocess) "
                         f"| {fmt_s(v['wall'])} = {fmt_rate(v['rows'] / v['wall'])}; peak RSS {fmt_bytes(v['peak'])} "
                         f"| | |")
        lines.append(f"| (d0) ingestion total | {fmt_s(d['ingest_wall'])} = {fmt_rate(d['rows'] / d['ingest_wall'])}; "
                     f"peak RSS {fmt_bytes(d['ingest_peak'])} | | |")
        t = d["run"]["timings"]
        stages = ", ".join(f"{k} {v:.2f}" for k, v in t.items())
        lines.append(f"| (d) `takeup run --as-of {AS_OF}` on the {n_total:,} participants (subprocess; status "
                     f"{d['run']['status']}) | {fmt_s(d['run_wall'])} (stages, s: {stages}) | | |")
        lines.append(f"| (d) for comparison: start-up of the `takeup` command (`takeup runs --limit 1`) "
                     f"| {fmt_s(d['startup'])} | | |")
        lines.append(f"| (d) peak RSS of `takeup run` | {fmt_bytes(d['run_peak'])} | <= 2 GiB "
                     f"| {met(d['run_peak'] <= TARGET_PEAK_BYTES)} |")
        lines.append(f"| (b)/(d) | {b['scaled'] / d['run_wall']:,.1f}x | >= {TARGET_B_OVER_D:g}x "
                     f"| {met(b['scaled'] / d['run_wall'] >= TARGET_B_OVER_D)} |")
        lines.append(f"| (d) stored `site_estimates` vs (a), {d['da']['n']:,} sites | {describe(d['da'])} "
                     f"| ~1e-12 | {met(agree(d['da']))} |")
        lines.append(f"| (e) `takeup report` of that run (subprocess; peak RSS {fmt_bytes(d['report_peak'])}) "
                     f"| {fmt_s(d['report_wall'])} | <= {TARGET_REPORT_S:g} s | {met(d['report_wall'] <= TARGET_REPORT_S)} |")
        lines.append(f"| (e) size of the report | {d['report_bytes'] / 1024 ** 2:.2f} MiB | <= 3 MiB "
                     f"| {met(d['report_bytes'] <= TARGET_REPORT_BYTES)} |")
    else:
        lines.append("| (d) whole run | skipped (`--skip-full-run`) | | |")
    lines.append("")
    lines.append("Peak RSS is the child process's `ru_maxrss` (`os.wait4`); (a) and (c) run in one "
                 "in-memory DuckDB connection on the same `_sample`-shaped table (building it is not timed); "
                 "(b) fits complete cases with `fit(cov_type=\"robust\", debiased=True)`, reading CACE, its "
                 "SE and `first_stage.diagnostics[\"f.stat\"]`. (d) includes process start-up.")
    for label in ("parquet", "csv"):
        ing = r.get(f"ingest_{label}")
        if ing is not None:
            lines.append("")
            lines.append(f"Slowest statements of the {label} ingestion ({ing['seconds']:.2f} s in all):")
            lines.append("")
            for secs, sql in ing["statements"]:
                lines.append(f"- {secs:.3f} s `{sql[:90]}...`")
    return "\n".join(lines)


# ----------------------------------------------------------------------------- throughput (issue 11)
def throughput_section() -> str:
    """The throughput table from ``benchmarks/throughput_results.json``, and the scaling plot redrawn."""
    sys.path.insert(0, str(Path(__file__).resolve().parent))
    import throughput
    if not throughput.RESULTS.exists():
        return "Throughput: not measured yet (run benchmarks/throughput.py)."
    res = json.loads(throughput.RESULTS.read_text())
    throughput.plot(res, Path(__file__).resolve().parent / "scaling.svg")
    return throughput.render_table(res)


# ----------------------------------------------------------------------------- main
def parse_args(argv=None):
    p = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    p.add_argument("--sites", type=int, default=1000, help="number of sites (default 1000)")
    p.add_argument("--per-site", type=int, default=10_000, help="participants per site (default 10000)")
    p.add_argument("--ingest-rows", type=int, default=1_000_000,
                   help="rows of the assignment file of the ingestion benchmark (default 1000000)")
    p.add_argument("--lm-sites", type=int, default=100,
                   help="sites on which the linearmodels loop is timed, scaled linearly to --sites (default 100)")
    p.add_argument("--rows-per-file", type=int, default=1_000_000,
                   help="approximate rows per Parquet file of the whole-run warehouse (default 1000000)")
    p.add_argument("--repeats", type=int, default=3, help="repetitions of (a) and (c); the best is kept (default 3)")
    p.add_argument("--workdir", type=Path, default=Path(tempfile.gettempdir()),
                   help="directory under which a fresh scratch directory is made (default: the system temp dir)")
    p.add_argument("--keep", action="store_true", help="keep the scratch directory (files and warehouses)")
    p.add_argument("--skip-full-run", action="store_true", help="skip (d): files, takeup ingest, takeup run")
    p.add_argument("--out", type=Path, default=Path(__file__).resolve().parent / "last_results.md",
                   help="where to write the Markdown table (default benchmarks/last_results.md)")
    p.add_argument("--throughput-only", action="store_true",
                   help="print only the throughput table (small files, big file vs HMAC floor, run vs naive join, "
                        "scaling) from benchmarks/throughput_results.json (made by benchmarks/throughput.py) and "
                        "redraw benchmarks/scaling.svg")
    p.add_argument("--readme", action="store_true",
                   help="with --throughput-only: replace the table between the throughput markers of README.md")
    p.add_argument("--child-ingest", nargs=2, metavar=("WAREHOUSE", "FILE"), help=argparse.SUPPRESS)
    return p.parse_args(argv)


def main(argv=None) -> int:
    args = parse_args(argv)
    os.environ["TAKEUP_ID_KEY"] = BENCH_KEY
    if args.child_ingest:
        child_ingest(*args.child_ingest)
        return 0
    if args.throughput_only:
        text = throughput_section()
        print(text)
        if args.readme:
            readme = ROOT / "README.md"
            body = readme.read_text()
            start, end = "<!-- throughput:begin -->", "<!-- throughput:end -->"
            i, j = body.index(start) + len(start), body.index(end)
            readme.write_text(body[:i] + "\n" + text + "\n" + body[j:])
        return 0
    import duckdb

    info = machine_info()
    r: dict = {"load_start": " ".join(f"{x:.2f}" for x in os.getloadavg())}
    args.workdir.mkdir(parents=True, exist_ok=True)
    scratch = Path(tempfile.mkdtemp(prefix="takeup-bench-", dir=args.workdir))
    log(f"scratch directory {scratch}")
    names = site_names(args.sites)
    config = study_config(names)
    try:
        # 1. ingestion
        t = time.perf_counter()
        pq_path, csv_path = write_ingest_file(args.ingest_rows, args.sites, args.per_site, names, scratch, SEED)
        log(f"ingestion files written in {time.perf_counter() - t:.1f} s")
        for label, path in (("parquet", pq_path), ("csv", csv_path)):
            res = bench_ingest(path, scratch, config, label)
            r[f"ingest_{label}"] = res
            log(f"ingest {label}: {res['seconds']:.2f} s, {res['rows_s']:,.0f} rows/s, "
                f"peak RSS {fmt_bytes(res['peak_rss'])}")
            for secs, sql in res["statements"]:
                log(f"    {secs:7.3f} s  {sql}")
        pq_path.unlink()
        csv_path.unlink()

        # 2. estimation
        t = time.perf_counter()
        data = simulate(args.sites, args.per_site, SEED)
        log(f"simulated {len(data['site']):,} participants in {time.perf_counter() - t:.1f} s")
        con = duckdb.connect()
        sample_table(con, data, names)
        best = None
        for _ in range(args.repeats):
            out, secs = estimation_step(con, config)
            if best is None or secs["total"] < best["total"]:
                best = secs
        r["a"] = best
        log(f"(a) {best}")
        from takeup.pipeline.run.site_rows import estimate_sites
        t = time.perf_counter()
        out2, _ = estimation_step(con, config)
        rows = estimate_sites(out2["table"], config, "bench")
        r["a_rows"] = time.perf_counter() - t
        r["c"] = min(bare_scan(con) for _ in range(args.repeats))
        log(f"(c) {r['c']:.3f} s")
        con.close()
        b = linearmodels_loop(data, names, args.lm_sites, SEED)
        r["b"] = b
        log(f"(b) scaled {b['scaled']:.1f} s (subset {b['loop_subset']:.1f} s on {b['n_fitted']} sites)")
        pos = {s: i for i, s in enumerate(out["sites"])}
        idx = np.array([pos[names[s]] for s in b["sites"]])
        est = out["est"]
        r["ab"] = compare_cace(est.cace[idx], est.cace_se[idx], est.first_stage_f[idx],
                               b["cace"], b["cace_se"], b["f"])
        log(f"(a) vs (b): {describe(r['ab'])}")
        est_a = {s: (est.cace[i], est.cace_se[i], est.first_stage_f[i]) for s, i in pos.items()}
        del rows, out2

        # 3. whole run
        if not args.skip_full_run:
            r["d"] = bench_full_run(data, names, config, scratch, args, est_a)
        r["load_end"] = " ".join(f"{x:.2f}" for x in os.getloadavg())
        text = render(args, info, r) + "\n\n" + throughput_section()
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
