"""Drop folders: a file moves only after its batch committed; files being written wait; a crash between
commit and move is a no-op replay."""

from __future__ import annotations

import os
import time
from pathlib import Path

import duckdb

from takeup.pipeline.cli import main
from takeup.pipeline.ingest import drop_folder
from takeup.pipeline.ingest.drop_folder import DropFolders, ingest_drop_folder, unsettled
from takeup.pipeline.ingest.many_files import ingest_paths
from tests.conftest import write_csv

A_HEADER = "site_id,participant_id,arm,assigned_on"


def _aged(path: Path, seconds: float = 120) -> Path:
    t = time.time() - seconds
    os.utime(path, (t, t))
    return path


def _counts(warehouse: Path) -> tuple:
    con = duckdb.connect(str(warehouse), read_only=True)
    try:
        return con.execute("SELECT (SELECT count(*) FROM assignments), (SELECT count(*) FROM batches), "
                           "(SELECT count(*) FROM quarantine)").fetchone()
    finally:
        con.close()


def test_files_move_after_commit_with_reasons_beside_rejected_ones(warehouse, tmp_path, capsys):
    inc = tmp_path / "incoming"
    (inc / "north").mkdir(parents=True)
    good = _aged(write_csv(inc / "north" / "wk1.csv", A_HEADER, "S1,p1,control,2026-01-05"))
    bad = _aged(write_csv(inc / "wk1.csv", "no,header,here", "1,2,3"))
    fresh = write_csv(inc / "wk2.csv", A_HEADER, "S1,p2,control,2026-01-05")          # just written
    done, rej = tmp_path / "processed", tmp_path / "rejected"
    assert main(["ingest", "--warehouse", str(warehouse), "--processed", str(done), "--rejected", str(rej),
                 str(inc)]) == 1
    out = capsys.readouterr().out
    assert "waiting   wk2.csv: still being written" in out and "1 still being written" in out
    assert (done / "north" / "wk1.csv").read_text() == "site_id,participant_id,arm,assigned_on\nS1,p1,control,2026-01-05\n"
    assert not good.exists() and not bad.exists() and fresh.exists()
    reason = (rej / "wk1.csv.reason.txt").read_text()
    assert "cannot find a header" in reason and "batch b" in reason
    # next pass: the settled file loads; the same name again in processed/ gets a numbered suffix
    _aged(fresh)
    _aged(write_csv(inc / "north" / "wk1.csv", A_HEADER, "S1,p3,treatment,2026-01-05"))
    assert main(["ingest", "--warehouse", str(warehouse), "--processed", str(done), "--rejected", str(rej),
                 str(inc)]) == 0
    assert sorted(p.relative_to(done).as_posix() for p in done.rglob("*.csv")) == [
        "north/wk1-1.csv", "north/wk1.csv", "wk2.csv"]
    assert list(inc.rglob("*.csv")) == [] and _counts(warehouse)[0] == 3


def test_a_crash_between_commit_and_move_is_a_harmless_replay(warehouse, tmp_path, monkeypatch):
    inc = tmp_path / "incoming"
    inc.mkdir()
    f = _aged(write_csv(inc / "wk1.csv", A_HEADER, "S1,p1,control,2026-01-05", "S1,p2,nope,2026-01-05"))
    folders = DropFolders(tmp_path / "processed", tmp_path / "rejected", (inc,), settle=10)

    def crash(path, report, folders):
        raise KeyboardInterrupt("killed after the commit, before the move")

    monkeypatch.setattr(drop_folder, "move_after_commit", crash)
    try:
        ingest_drop_folder(warehouse, [inc], folders)
    except KeyboardInterrupt:
        pass
    before = _counts(warehouse)
    assert before == (1, 1, 1) and f.exists()          # committed, not moved
    monkeypatch.undo()
    monkeypatch.setenv("TAKEUP_ID_KEY", "test-key-not-secret")
    reports = ingest_drop_folder(warehouse, [inc], folders)
    assert [r.status for r in reports] == ["duplicate_batch"]
    assert _counts(warehouse) == before and not f.exists() and (tmp_path / "processed" / "wk1.csv").exists()


def test_a_file_growing_with_an_old_modification_time_waits(tmp_path, monkeypatch):
    f = _aged(write_csv(tmp_path / "a.csv", A_HEADER, "S1,p1,control,2026-01-05"))
    assert unsettled(f, 10) is None
    real_sleep = time.sleep

    def grow(seconds):           # another program appends while we look twice, keeping the old mtime
        st = f.stat()
        with open(f, "a") as fh:
            fh.write("S1,p2,control,2026-01-05\n")
        os.utime(f, ns=(st.st_atime_ns, st.st_mtime_ns))
        real_sleep(seconds)

    monkeypatch.setattr(drop_folder.time, "sleep", grow)
    assert unsettled(f, 10) == "its size is still changing"


def test_without_drop_folders_nothing_moves(warehouse, tmp_path):
    f = write_csv(tmp_path / "a.csv", A_HEADER, "S1,p1,control,2026-01-05")
    assert ingest_paths(warehouse, [f])[0].status == "loaded" and f.exists()
    assert main(["ingest", "--warehouse", str(warehouse), "--settle", "5", str(f)]) == 2


def test_serve_passes_the_drop_folders_to_both_deployments(tmp_path):
    from takeup.flows.serve import build_deployments
    from takeup.schemas.config import parse_config
    cfg = parse_config({"study_id": "s"})
    drop = {"processed": str(tmp_path / "in" / "processed"), "rejected": str(tmp_path / "in" / "rejected"),
            "settle": 30.0}
    deps = build_deployments(tmp_path / "w.duckdb", cfg, incoming=tmp_path / "in", drop=drop)
    assert [d.parameters["drop"] for d in deps] == [drop, drop]
