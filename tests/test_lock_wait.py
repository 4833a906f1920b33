"""Writers wait for the warehouse lock, readers too; a killed run is marked abandoned by the next run.

The lock holder is a second process (DuckDB's file lock is per process), started with
the same interpreter; the checks are on behaviour (opens after the holder leaves, one
notice, a plain sentence naming the holder's PID), never on timings.
"""

from __future__ import annotations

import json
import os
import signal
import subprocess
import sys
from pathlib import Path

import duckdb
import pytest

from takeup.pipeline import warehouse as wh
from takeup.pipeline.cli import main
from takeup.pipeline.errors import WarehouseBusyError
from takeup.pipeline.ingest.many_files import ingest_paths
from takeup.pipeline.run.abandoned import owner_alive, process_owner
from takeup.pipeline.run.stages import run_monitoring
from tests.conftest import write_csv

A_HEADER = "site_id,participant_id,arm,assigned_on"

#: DuckDB 2.0's message when another process holds the lock (copied from a real failure)
DUCKDB_LOCK_TEXT = ('IO Error: Could not set lock on file "/tmp/w.duckdb": Conflicting lock is held in '
                    '/usr/local/bin/python3.11 (PID 7412). However, you would be able to open this database in '
                    'read-only mode, e.g. by using the -readonly parameter in the CLI. See also '
                    'https://duckdb.org/docs/current/connect/concurrency')


def _holder(path: Path, read_only: bool, seconds: float, ready: Path) -> subprocess.Popen:
    """A process that opens ``path`` and keeps it open for ``seconds`` (or until killed)."""
    code = ("import duckdb, sys, time, pathlib; "
            f"c = duckdb.connect({str(path)!r}, read_only={read_only}); "
            f"pathlib.Path({str(ready)!r}).write_text('x'); time.sleep({seconds})")
    proc = subprocess.Popen([sys.executable, "-c", code])
    while not ready.exists():
        if proc.poll() is not None:
            raise RuntimeError("the lock holder ended early")
        import time
        time.sleep(0.05)
    return proc


def test_lock_holder_is_read_from_duckdbs_message():
    assert wh._lock_holder(Exception(DUCKDB_LOCK_TEXT)) == "PID 7412, /usr/local/bin/python3.11"
    assert wh._lock_holder(Exception("IO Error: Cannot open file: No such file")) is None


def test_writer_waits_for_a_reader_then_opens(warehouse, tmp_path, capsys):
    proc = _holder(warehouse, True, 2.0, tmp_path / "ready")
    try:
        con = wh.connect(warehouse, wait=120)      # a reader's lock blocks a writer; it leaves after 2 s
        con.close()
    finally:
        proc.kill()
        proc.wait()
    err = capsys.readouterr().err
    assert err.count("is locked by another process") == 1 and f"PID {proc.pid}" in err


def test_after_the_wait_a_plain_sentence_and_exit_1(warehouse, tmp_path, capsys):
    proc = _holder(warehouse, False, 600, tmp_path / "ready")
    try:
        with pytest.raises(WarehouseBusyError, match=f"PID {proc.pid}"):
            wh.connect(warehouse, wait=0.3)
        capsys.readouterr()
        for argv in (["run", "--as-of", "2026-01-31"], ["runs"], ["alerts"], ["ingest", str(tmp_path / "x.csv")]):
            write_csv(tmp_path / "x.csv", A_HEADER, "S1,p1,control,2026-01-05")
            assert main([argv[0], "--warehouse", str(warehouse), "--wait", "0.2", *argv[1:]]) == 1, argv
            err = capsys.readouterr().err.strip().splitlines()
            assert len(err) == 2 and "waiting up to 0.2 s" in err[0], err        # the notice, then one line
            assert "still locked by another process" in err[1] and f"PID {proc.pid}" in err[1]
            assert "--wait" in err[1] and "Traceback" not in err[1]
    finally:
        proc.kill()
        proc.wait()
    # the holder was killed: the warehouse opens, nothing was written meanwhile
    con = duckdb.connect(str(warehouse), read_only=True)
    assert con.execute("SELECT count(*) FROM batches").fetchone() == (0,)
    con.close()


def test_wait_option_is_checked_and_reaches_the_connections(monkeypatch):
    seen = {}

    def fake(args):
        seen["wait"] = wh.lock_wait_seconds()
        return 0

    from takeup.pipeline import cli
    monkeypatch.setitem(cli.COMMANDS, "runs", fake)
    monkeypatch.delenv(wh.LOCK_WAIT_ENV, raising=False)
    assert main(["runs", "--wait", "7.5"]) == 0 and seen["wait"] == 7.5
    assert main(["runs"]) == 0 and seen["wait"] == cli.WAIT_DEFAULT == wh.DEFAULT_LOCK_WAIT
    assert os.environ.get(wh.LOCK_WAIT_ENV) is None            # restored after the command
    assert cli._LOCK_WAIT_ENV == wh.LOCK_WAIT_ENV
    with pytest.raises(SystemExit) as e:
        main(["runs", "--wait", "-1"])
    assert e.value.code == 2


def test_killed_run_is_marked_abandoned_by_the_next_run(warehouse, tmp_path):
    ingest_paths(warehouse, [write_csv(tmp_path / "a.csv", A_HEADER, "S1,p1,control,2026-01-05",
                                       "S1,p2,treatment,2026-01-05")])
    # a process that starts a run and is killed (SIGKILL) before it writes anything else
    code = ("import os, signal; from takeup.pipeline.warehouse import connect; "
            "from takeup.pipeline.run import writer; from takeup.pipeline.run.inputs import new_run_context; "
            "from takeup.schemas.config import StudyConfig; import datetime; "
            f"con = connect({str(warehouse)!r}); "
            "ctx = new_run_context(StudyConfig(), as_of=datetime.date(2026, 1, 31)); "
            "writer.start_run(con, ctx); print(ctx.run_id, flush=True); os.kill(os.getpid(), signal.SIGKILL)")
    out = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, env=os.environ)
    assert out.returncode == -signal.SIGKILL
    killed = out.stdout.strip()
    con = duckdb.connect(str(warehouse), read_only=True)
    status, owner = con.execute("SELECT status, timings_json FROM runs WHERE run_id = $r", {"r": killed}).fetchone()
    con.close()
    assert status == "running" and owner_alive(json.loads(owner)["owner"]) is False
    summary = run_monitoring(warehouse, as_of=None)
    con = duckdb.connect(str(warehouse), read_only=True)
    rows = dict(con.execute("SELECT run_id, status FROM runs").fetchall())
    msg = con.execute("SELECT message FROM runs WHERE run_id = $r", {"r": killed}).fetchone()[0]
    leftovers = con.execute("SELECT count(*) FROM site_estimates WHERE run_id = $r", {"r": killed}).fetchone()[0]
    con.close()
    assert rows == {killed: "abandoned", summary.run_id: "ok"}
    assert "abandoned" in msg and "killed or crashed" in msg and leftovers == 0


def test_a_live_owner_is_never_abandoned():
    assert owner_alive(process_owner()) is True
    me = process_owner()
    if me["start"] is not None:          # Linux: a reused process id (other start time) is not the owner
        assert owner_alive({**me, "start": me["start"] + 1}) is False
    assert owner_alive({**me, "host": me["host"] + "-elsewhere"}) is None   # another host: cannot tell


def test_existing_warehouse_gains_the_abandoned_status(warehouse):
    # a warehouse created before `abandoned` existed: its runs CHECK lists four statuses
    con = duckdb.connect(str(warehouse))
    con.execute("DROP TABLE runs")
    con.execute(wh.create_table_sql("runs", wh.all_table_models()["runs"]).replace(", 'abandoned'", ""))
    con.execute("INSERT INTO runs (run_id, mode, as_of, started_at, status, code_version, config_hash, "
                "input_fingerprint, n_batches, n_sites) VALUES ('r1', 'in_process', DATE '2026-01-31', "
                "TIMESTAMP '2026-02-01 10:00:00', 'ok', 'old', 'h', '', 0, 0)")
    with pytest.raises(duckdb.ConstraintException):
        con.execute("UPDATE runs SET status = 'abandoned'")
    con.close()
    con = wh.connect(warehouse)           # a writer's connection widens the check, keeping the rows
    con.execute("INSERT INTO runs (run_id, mode, as_of, started_at, status, code_version, config_hash, "
                "input_fingerprint, n_batches, n_sites) VALUES ('r2', 'in_process', DATE '2026-01-31', "
                "TIMESTAMP '2026-02-01 11:00:00', 'abandoned', 'new', 'h', '', 0, 0)")
    assert con.execute("SELECT run_id, status FROM runs ORDER BY run_id").fetchall() == [("r1", "ok"),
                                                                                        ("r2", "abandoned")]
    assert con.execute("SELECT count(*) FROM latest_site_estimates").fetchone()[0] >= 0     # the views still resolve
    con.close()
