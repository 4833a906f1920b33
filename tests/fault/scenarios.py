"""Fault-injection scenarios shared by the tests (small) and ``benchmarks/fault_suite.py`` (large).

Each scenario returns a plain dict of counts; the tests assert on them, the script prints
them as the README's Reliability table.  Processes are the real command line
(``python -m takeup.pipeline.cli``) so a kill -9 hits what users run.
"""

from __future__ import annotations

import importlib.util
import os
import shutil
import signal
import subprocess
import sys
import time
from pathlib import Path

import duckdb
import numpy as np

ROOT = Path(__file__).resolve().parents[2]
KEY = "fault-suite-key-not-secret"
A_HEADER = "site_id,participant_id,arm,assigned_on"
RESULT_TABLES = ("site_estimates", "complier_profile", "pooled_estimates", "subgroup_tests", "site_influence",
                 "uptake_trends", "alerts", "precision_forecasts")
RECORD_TABLES = ("assignments", "uptake_events", "outcome_measurements")


def env() -> dict:
    e = dict(os.environ)
    e.update({"TAKEUP_ID_KEY": KEY, "PREFECT_SERVER_ANALYTICS_ENABLED": "false", "DO_NOT_TRACK": "1",
              "PYTHONPATH": os.pathsep.join(filter(None, [str(ROOT), e.get("PYTHONPATH")]))})
    return e


def cli(*args: str) -> list[str]:
    return [sys.executable, "-m", "takeup.pipeline.cli", *args]


def clean_study_module():
    spec = importlib.util.spec_from_file_location("clean_study", ROOT / "benchmarks" / "clean_study.py")
    mod = importlib.util.module_from_spec(spec)
    sys.modules.setdefault("clean_study", mod)
    spec.loader.exec_module(mod)
    return mod


def assignment_csv(path: Path, n_rows: int, seed: int, sites: list[str] | None = None, prefix: str = "p",
                   month: str = "2026-01") -> Path:
    """An assignment file of ``n_rows`` distinct participants (written with numpy, no row loop)."""
    rng = np.random.default_rng(seed)
    names = np.array(sites or [f"S{i}" for i in range(20)])
    site = names[np.arange(n_rows) % len(names)]
    pid = np.char.add(f"{prefix}{seed}-", np.arange(n_rows).astype(str))
    arm = np.where(rng.random(n_rows) < 0.5, "treatment", "control")
    day = np.char.add(month + "-", np.char.zfill((1 + rng.integers(0, 28, n_rows)).astype(str), 2))
    lines = np.char.add(np.char.add(np.char.add(np.char.add(np.char.add(np.char.add(site, ","), pid), ","), arm),
                                    ","), day)
    path.write_text(A_HEADER + "\n" + "\n".join(lines.tolist()) + "\n")
    return path


def new_warehouse(path: Path, config_path: Path | None = None) -> Path:
    from takeup.pipeline.warehouse import init_warehouse
    from takeup.schemas.config import load_config
    old = os.environ.get("TAKEUP_ID_KEY")
    os.environ["TAKEUP_ID_KEY"] = KEY
    try:
        init_warehouse(path, load_config(config_path) if config_path else None)
    finally:
        if old is None:
            os.environ.pop("TAKEUP_ID_KEY")
        else:
            os.environ["TAKEUP_ID_KEY"] = old
    return path


def copy_warehouse(src: Path, dst: Path) -> Path:
    for suffix in ("", ".wal"):
        s, d = Path(str(src) + suffix), Path(str(dst) + suffix)
        if d.exists():
            d.unlink()
        if s.exists():
            shutil.copy2(s, d)
    return dst


# ----------------------------------------------------------------------------- consistency
def consistency(warehouse: Path) -> dict:
    """Open the warehouse read-only and count every broken invariant (all 0 when consistent)."""
    con = duckdb.connect(str(warehouse), read_only=True)
    try:
        stored = " + ".join(f"(SELECT count(*) FROM {t} r WHERE r.batch_id = b.batch_id)" for t in RECORD_TABLES)
        q = con.execute(f"""
            SELECT count(*) FILTER (WHERE status = 'loaded' AND rows_loaded != {stored}),
                   count(*) FILTER (WHERE status = 'loaded' AND rows_quarantined !=
                        (SELECT count(DISTINCT source_row) FROM quarantine q WHERE q.batch_id = b.batch_id)),
                   count(*) FILTER (WHERE rows_read != rows_loaded + rows_quarantined + rows_duplicate)
            FROM batches b""").fetchone()
        orphans = sum(con.execute(f"SELECT count(*) FROM {t} WHERE batch_id NOT IN "
                                  "(SELECT batch_id FROM batches WHERE status = 'loaded')").fetchone()[0]
                      for t in RECORD_TABLES)
        twice = con.execute("SELECT count(*) FROM (SELECT sha256 FROM batches WHERE status = 'loaded' "
                            "GROUP BY sha256 HAVING count(*) > 1)").fetchone()[0]
        half = sum(con.execute(f"SELECT count(*) FROM {t} WHERE run_id NOT IN "
                               "(SELECT run_id FROM runs WHERE status IN ('ok', 'partial'))").fetchone()[0]
                   for t in RESULT_TABLES)
        statuses = dict(con.execute("SELECT status, count(*) FROM runs GROUP BY status").fetchall())
        rows = {t: con.execute(f"SELECT count(*) FROM {t}").fetchone()[0] for t in RECORD_TABLES}
        batches = con.execute("SELECT count(*) FROM batches WHERE status = 'loaded'").fetchone()[0]
    finally:
        con.close()
    return {"partial_batches": q[0] + orphans, "quarantine_mismatch": q[1], "rows_not_adding_up": q[2],
            "batches_loaded_twice": twice, "half_written_run_rows": half, "runs": statuses, "rows": rows,
            "loaded_batches": batches}


def broken(c: dict) -> int:
    return (c["partial_batches"] + c["quarantine_mismatch"] + c["rows_not_adding_up"] + c["batches_loaded_twice"]
            + c["half_written_run_rows"])


# ----------------------------------------------------------------------------- kill -9
def _timed(cmd: list[str]) -> float:
    t = time.monotonic()
    out = subprocess.run(cmd, env=env(), capture_output=True, text=True)
    if out.returncode not in (0, 1):
        raise RuntimeError(f"{cmd[3:5]} failed ({out.returncode}): {out.stderr.strip()}")
    return time.monotonic() - t


def _timed_any(cmd: list[str]) -> float:
    t = time.monotonic()
    subprocess.run(cmd, env=env(), capture_output=True)
    return time.monotonic() - t


def _kill_at(cmd: list[str], delay: float) -> bool:
    """Start ``cmd``, SIGKILL it after ``delay`` seconds; True when it was still running (really killed)."""
    proc = subprocess.Popen(cmd, env=env(), stdout=subprocess.DEVNULL, stderr=subprocess.DEVNULL)
    try:
        proc.wait(timeout=delay)
        return False
    except subprocess.TimeoutExpired:
        proc.send_signal(signal.SIGKILL)
        proc.wait()
        return True


def kill_ingest(work: Path, n_rows: int, n_kills: int, seed: int = 1) -> dict:
    """kill -9 ``takeup ingest`` of a large file at ``n_kills`` random moments, then ingest to completion."""
    rng = np.random.default_rng(seed)
    base = new_warehouse(work / "base.duckdb")
    small = assignment_csv(work / "small.csv", 50, seed=99, prefix="q")
    subprocess.run(cli("ingest", "--warehouse", str(base), "--quiet", str(small)), env=env(), check=True,
                   capture_output=True)
    big = assignment_csv(work / "big.csv", n_rows, seed=seed)
    trial = work / "trial.duckdb"
    copy_warehouse(base, trial)
    full = _timed(cli("ingest", "--warehouse", str(trial), "--quiet", str(big)))
    # start-up, opening and hashing: the time a no-op ingest of the small file takes; kills fall after 80 % of it
    start = _timed(cli("ingest", "--warehouse", str(trial), "--quiet", str(small)))
    out = {"kills": 0, "killed_before_commit": 0, "finished_before_kill": 0, "opens": 0, "broken": 0,
           "resumed_ok": 0, "rows_expected": n_rows + 50, "rows_wrong": 0, "seconds_full": full}
    for _ in range(n_kills):
        copy_warehouse(base, trial)
        killed = _kill_at(cli("ingest", "--warehouse", str(trial), "--quiet", str(big)),
                          rng.uniform(0.8 * start, full))
        out["kills"] += 1
        c = consistency(trial)
        out["opens"] += 1
        out["broken"] += broken(c)
        if c["rows"]["assignments"] == 50:
            out["killed_before_commit"] += 1
        elif not killed:
            out["finished_before_kill"] += 1
        elif c["rows"]["assignments"] != n_rows + 50:
            out["broken"] += 1                           # a partial batch would show here
        rc = subprocess.run(cli("ingest", "--warehouse", str(trial), "--quiet", str(big)), env=env(),
                            capture_output=True).returncode
        c = consistency(trial)
        out["broken"] += broken(c)
        if rc == 0 and c["rows"]["assignments"] == n_rows + 50 and c["loaded_batches"] == 2:
            out["resumed_ok"] += 1
        else:
            out["rows_wrong"] += 1
    return out


def run_fixture(work: Path, n_sites: int, seed: int = 3) -> tuple[Path, str]:
    """A warehouse holding a clean simulated study (no run yet) and its as-of date."""
    cs = clean_study_module()
    study = cs.simulate_clean_study(n_sites, seed=seed)
    from takeup.pipeline.ingest.many_files import ingest_paths
    from takeup.pipeline.warehouse import init_warehouse
    path = work / "study.duckdb"
    old = os.environ.get("TAKEUP_ID_KEY")
    os.environ["TAKEUP_ID_KEY"] = KEY
    try:
        init_warehouse(path, study.config)
        ingest_paths(path, cs.write_files(study, work / "files"))
    finally:
        if old is None:
            os.environ.pop("TAKEUP_ID_KEY")
        else:
            os.environ["TAKEUP_ID_KEY"] = old
    return path, study.as_of.isoformat()


def kill_run(work: Path, n_sites: int, n_kills: int, seed: int = 2) -> dict:
    """kill -9 ``takeup run`` at ``n_kills`` random moments; the next run completes and marks it abandoned."""
    rng = np.random.default_rng(seed)
    base, as_of = run_fixture(work, n_sites)
    trial = work / "trial_run.duckdb"
    copy_warehouse(base, trial)
    full = _timed(cli("run", "--warehouse", str(trial), "--as-of", as_of, "--quiet"))
    # start-up and opening: a run refused at once (an --as-of before the data); kills fall after 80 % of it
    start = _timed_any(cli("run", "--warehouse", str(trial), "--as-of", "1901-01-01", "--quiet"))
    out = {"kills": 0, "killed_mid_run": 0, "killed_after_commit": 0, "killed_before_start": 0, "finished_before_kill": 0, "opens": 0,
           "broken": 0, "abandoned_marked": 0, "left_running": 0, "resumed_ok": 0, "seconds_full": full}
    for _ in range(n_kills):
        copy_warehouse(base, trial)
        killed = _kill_at(cli("run", "--warehouse", str(trial), "--as-of", as_of, "--quiet"),
                          rng.uniform(0.8 * start, full))
        out["kills"] += 1
        c = consistency(trial)
        out["opens"] += 1
        out["broken"] += broken(c)
        running = c["runs"].get("running", 0)
        if running:
            out["killed_mid_run"] += 1
        elif c["runs"].get("ok", 0):
            out["finished_before_kill" if not killed else "killed_after_commit"] += 1   # after: while closing
        else:
            out["killed_before_start"] += 1
        rc = subprocess.run(cli("run", "--warehouse", str(trial), "--as-of", as_of, "--quiet"), env=env(),
                            capture_output=True).returncode
        c2 = consistency(trial)
        out["broken"] += broken(c2)
        out["abandoned_marked"] += c2["runs"].get("abandoned", 0)
        out["left_running"] += c2["runs"].get("running", 0)
        if rc in (0, 1) and c2["runs"].get("ok", 0) == c["runs"].get("ok", 0) + 1 \
                and c2["runs"].get("abandoned", 0) == running:
            out["resumed_ok"] += 1
    return out


# ----------------------------------------------------------------------------- disk full
def mount_small_fs(where: Path, size_mb: int) -> str | None:
    """Mount a tmpfs of ``size_mb`` at ``where``; returns None, or why it cannot (then the caller skips)."""
    where.mkdir(parents=True, exist_ok=True)
    if shutil.which("mount") is None:
        return "no mount command on this machine"
    r = subprocess.run(["mount", "-t", "tmpfs", "-o", f"size={size_mb}m,mode=0700", "tmpfs", str(where)],
                       capture_output=True, text=True)
    if r.returncode != 0:
        return f"mounting a size-limited tmpfs is not permitted here ({r.stderr.strip() or r.returncode})"
    return None


def unmount(where: Path) -> None:
    subprocess.run(["umount", "-l", str(where)], capture_output=True)


def disk_full(work: Path, size_mb: int = 24, n_rows: int = 400_000) -> dict:
    """Ingest and run against a warehouse on a full file system: a clear error, the previous state intact."""
    mnt = work / "small_fs"
    why = mount_small_fs(mnt, size_mb)
    if why:
        return {"skipped": why}
    try:
        wh = new_warehouse(mnt / "w.duckdb")
        first = assignment_csv(work / "first.csv", 2_000, seed=5)
        subprocess.run(cli("ingest", "--warehouse", str(wh), "--quiet", str(first)), env=env(), check=True,
                       capture_output=True)
        before = consistency(wh)
        big = assignment_csv(work / "big_df.csv", n_rows, seed=6)
        # fill the file system but a little, so DuckDB's next write meets ENOSPC
        filler = mnt / "filler"
        free = shutil.disk_usage(mnt).free
        with open(filler, "wb") as fh:
            fh.write(b"\0" * max(0, free - (2 << 20)))
        ing = subprocess.run(cli("ingest", "--warehouse", str(wh), str(big)), env=env(), capture_output=True,
                             text=True)
        run = subprocess.run(cli("run", "--warehouse", str(wh), "--as-of", "2026-02-28"), env=env(),
                             capture_output=True, text=True)
        filler.unlink()
        after = consistency(wh)
        again = subprocess.run(cli("ingest", "--warehouse", str(wh), "--quiet", str(first)), env=env(),
                               capture_output=True, text=True)
        rerun = subprocess.run(cli("run", "--warehouse", str(wh), "--as-of", "2026-02-28", "--quiet"), env=env(),
                               capture_output=True, text=True)
        final = consistency(wh)
        return {"ingest_exit": ing.returncode, "ingest_message": ing.stderr.strip().splitlines()[-1:],
                "run_exit": run.returncode, "run_message": run.stderr.strip().splitlines()[-1:],
                "tracebacks": ("Traceback" in ing.stderr) + ("Traceback" in run.stderr),
                "state_intact": before["rows"] == after["rows"] and before["loaded_batches"] == after["loaded_batches"],
                "broken": broken(after) + broken(final), "opens_after": again.returncode in (0, 1),
                "run_after_space_freed": rerun.returncode, "runs_after": final["runs"]}
    finally:
        unmount(mnt)


# ----------------------------------------------------------------------------- concurrency
def concurrency(work: Path, n_writers: int = 8, rows_each: int = 2_000) -> dict:
    """``n_writers`` ingests of different files at once, plus a run, plus a reader holding another DuckDB file."""
    base, as_of = run_fixture(work, 10)
    sites = clean_study_module().site_names(10)
    files = [assignment_csv(work / f"site_{i}.csv", rows_each, seed=100 + i, sites=sites, prefix=f"c{i}-",
                            month="2025-03") for i in range(n_writers)]
    snapshot = work / "snapshot.duckdb"
    duckdb.connect(str(snapshot)).close()
    ready = work / "reader_ready"
    reader = subprocess.Popen([sys.executable, "-c",
                               f"import duckdb, time, pathlib; c = duckdb.connect({str(snapshot)!r}, read_only=True); "
                               f"pathlib.Path({str(ready)!r}).write_text('x'); time.sleep(600)"])
    try:
        while not ready.exists():
            time.sleep(0.05)
        before = consistency(base)
        procs = [subprocess.Popen(cli("ingest", "--warehouse", str(base), "--wait", "600", "--quiet", str(f)),
                                  env=env(), stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True)
                 for f in files]
        procs.append(subprocess.Popen(cli("run", "--warehouse", str(base), "--wait", "600", "--as-of", as_of,
                                          "--quiet"), env=env(), stdout=subprocess.PIPE, stderr=subprocess.PIPE,
                                      text=True))
        results = [(p.wait(), p.stderr.read()) for p in procs]
    finally:
        reader.kill()
        reader.wait()
    after = consistency(base)
    con = duckdb.connect(str(base), read_only=True)
    per_file = dict(con.execute("SELECT file_name, count(*) FROM batches WHERE status = 'loaded' "
                                "GROUP BY file_name").fetchall())
    con.close()
    expected = before["rows"]["assignments"] + n_writers * rows_each
    got = after["rows"]["assignments"]
    return {"writers": n_writers, "ingest_exit_0": sum(rc == 0 for rc, _ in results[:-1]),
            "run_exit": results[-1][0], "files_loaded_once": sum(per_file.get(f.name) == 1 for f in files),
            "rows_lost": max(0, expected - got), "rows_duplicated": max(0, got - expected),
            "waited": sum("waiting up to" in err for _, err in results), "broken": broken(after),
            "runs_ok": after["runs"].get("ok", 0), "tracebacks": sum("Traceback" in err for _, err in results)}


# ----------------------------------------------------------------------------- injection
EVIL = "x'); DROP TABLE batches; --\"; DELETE FROM runs; --"


def _tables(warehouse: Path) -> dict:
    con = duckdb.connect(str(warehouse), read_only=True)
    try:
        names = [r[0] for r in con.execute("SELECT table_name FROM duckdb_tables() WHERE schema_name = 'main' "
                                           "ORDER BY 1").fetchall()]
        return {t: con.execute(f'SELECT count(*) FROM "{t}"').fetchone()[0] for t in names}
    finally:
        con.close()


def injection(work: Path) -> dict:
    """SQL metacharacters and quotes in file names, headers, site ids, outcome names, study_id; `..` targets."""
    cfg = work / "study.toml"
    study = "s'; DROP TABLE runs; --"
    outcome = 'o\'"; DROP TABLE assignments; --'
    cfg.write_text(f'study_id = {json_str(study)}\n[[outcomes]]\nname = {json_str(outcome)}\n')
    wh = work / "w.duckdb"
    refused = subprocess.run(cli("init", "--warehouse", str(wh), "--config", str(cfg)), env=env(),
                             capture_output=True, text=True)          # outcome names are identifiers: refused
    cfg.write_text(f'study_id = {json_str(study)}\n[[outcomes]]\nname = "score"\n')
    subprocess.run(cli("init", "--warehouse", str(wh), "--config", str(cfg)), env=env(), check=True,
                   capture_output=True)
    sites = [f"S{i}{EVIL}" if i % 2 else f"S{i}\"'`;" for i in range(6)]
    incoming = work / "in"
    incoming.mkdir()
    a = incoming / f"a{EVIL.replace('/', '_')}.csv"
    rows = [f'"{s.replace(chr(34), chr(34) * 2)}",p{i}-{j},{"treatment" if j % 2 else "control"},2026-01-05'
            for i, s in enumerate(sites) for j in range(8)]
    a.write_text(A_HEADER + "\n" + "\n".join(rows) + "\n")
    u = incoming / "u'\";--.csv"
    u.write_text("site_id,participant_id,observed_on,took_up\n" + "\n".join(
        f'"{s.replace(chr(34), chr(34) * 2)}",p{i}-{j},2026-01-20,{j % 2}' for i, s in enumerate(sites)
        for j in range(8)) + "\n")
    o = incoming / "o.csv"
    o.write_text("site_id,participant_id,outcome,measured_on,value\n" + "\n".join(
        f'"{s.replace(chr(34), chr(34) * 2)}",p{i}-{j},"{outcome.replace(chr(34), chr(34) * 2) if j == 0 else "score"}"'
        f',2026-02-01,{j}' for i, s in enumerate(sites) for j in range(8)) + "\n")
    h = incoming / "h.csv"
    h.write_text(A_HEADER + ',"' + EVIL.replace('"', '""') + '"\nS1,p1,control,2026-01-05,x\n')
    before = _tables(wh)
    ing = subprocess.run(cli("ingest", "--warehouse", str(wh), str(incoming)), env=env(), capture_output=True,
                         text=True)
    mid = _tables(wh)
    run = subprocess.run(cli("run", "--warehouse", str(wh), "--as-of", "2026-02-28", "--quiet"), env=env(),
                         capture_output=True, text=True)
    after = _tables(wh)
    con = duckdb.connect(str(wh), read_only=True)
    stored_sites = sorted(r[0] for r in con.execute("SELECT DISTINCT site_id FROM assignments").fetchall())
    stored_outcomes = [r[0] for r in con.execute("SELECT DISTINCT outcome FROM outcome_measurements").fetchall()]
    unknown_outcomes = con.execute("SELECT count(*) FROM quarantine WHERE reason = 'unknown_outcome'").fetchone()[0]
    study_ids = [r[0] for r in con.execute("SELECT DISTINCT study_id FROM runs r, "
                                           "(SELECT json_extract_string(config_json, '$.study_id') AS study_id "
                                           "FROM study_configs) c").fetchall()]
    est_sites = sorted(r[0] for r in con.execute("SELECT DISTINCT site_id FROM site_estimates").fetchall())
    con.close()
    # export / report targets: a run id with `..` is refused, files land only inside --out
    outside = work / "evil"
    exp_dir = work / "export"
    bad_run = subprocess.run(cli("export", "--warehouse", str(wh), "--out", str(exp_dir), "--run", "../../evil"),
                             env=env(), capture_output=True, text=True)
    good = subprocess.run(cli("export", "--warehouse", str(wh), "--out", str(exp_dir / ".." / "export")), env=env(),
                          capture_output=True, text=True)
    rep = subprocess.run(cli("report", "--warehouse", str(wh), "--out", str(work / "r" / ".." / "report.html"),
                             "--run", "../../evil"), env=env(), capture_output=True, text=True)
    written = sorted(p.relative_to(work).as_posix() for p in work.rglob("*")
                     if p.is_file() and not p.is_relative_to(incoming) and not p.name.startswith("w.duckdb")
                     and p.name != "study.toml")
    return {
        "tables_unchanged": set(before) == set(mid) == set(after),
        "ingest_exit": ing.returncode, "run_exit": run.returncode,
        "rows": {t: after[t] for t in ("assignments", "uptake_events", "outcome_measurements", "batches")},
        "sites_literal": stored_sites == sorted(sites) and est_sites == sorted(sites),
        "outcome_config_refused": refused.returncode == 2 and "outcomes[0].name" in refused.stderr,
        "outcome_rows_quarantined": stored_outcomes == ["score"] and unknown_outcomes == len(sites),
        "study_id_literal": study_ids == [study],
        "header_file_rejected": "h.csv" in ing.stderr and "column 5 of the header" in ing.stderr,
        "bad_run_exit": bad_run.returncode, "report_bad_run_exit": rep.returncode,
        "export_exit": good.returncode, "outside_written": not outside.exists() and all(
            w.startswith("export/") for w in written),
        "tracebacks": sum("Traceback" in x.stderr for x in (ing, run, bad_run, good, rep)),
    }


def json_str(text: str) -> str:
    """A TOML basic string (JSON's escaping is valid TOML for these characters)."""
    import json
    return json.dumps(text)
