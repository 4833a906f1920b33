"""Publication: Parquet versions switched atomically, the DuckDB snapshot, retries, suppression, no keys.

The warehouse is the demo scenario (invented data) with two finished runs.  Checks
are against the warehouse itself (exact values), the manifest's SHA-256 recomputed
with hashlib, and the small-cell rule recomputed independently with pandas.
"""

from __future__ import annotations

import json
import os
import random
import shutil
import signal
import subprocess
import sys
import textwrap
import time
from datetime import timedelta
from pathlib import Path

import duckdb
import pandas as pd
import pytest

from takeup.pipeline.cli import main
from takeup.pipeline.outputs.publish.parquet_folder import current_manifest, publish_parquet, verify_version
from takeup.pipeline.warehouse import SCHEMA_VERSION, connect, store_config, stored_config
from takeup.schemas.config import PublishSettings
from takeup.schemas.publication import SMALL_CELLS, SUPPRESSION_FLAG
from takeup.schemas.results import LATEST_VIEWS, RESULT_TABLES

from tests.conftest import TEST_KEY

ROOT = Path(__file__).resolve().parents[1]


def _set_publish(path: Path, **settings) -> None:
    con = connect(path)
    try:
        cfg = stored_config(con)
        store_config(con, cfg.model_copy(update={"publish": PublishSettings(**settings)}))
    finally:
        con.close()


@pytest.fixture(scope="module")
def two_runs(demo_warehouse, tmp_path_factory):
    """The demo warehouse with two finished runs (4 weeks apart) and no [publish] targets."""
    from takeup.pipeline.run.stages import run_monitoring
    os.environ["TAKEUP_ID_KEY"] = TEST_KEY
    src = demo_warehouse["path"]
    path = tmp_path_factory.mktemp("pub") / "w.duckdb"
    shutil.copy(src, path)
    _set_publish(path)
    as_of = demo_warehouse["manifest"].as_of
    r1 = run_monitoring(path, as_of=as_of - timedelta(days=28))
    r2 = run_monitoring(path, as_of=as_of)
    return {"path": path, "runs": [r1.run_id, r2.run_id], "demo": demo_warehouse}


@pytest.fixture
def wh(two_runs, tmp_path, key_env):
    path = tmp_path / "w.duckdb"
    shutil.copy(two_runs["path"], path)
    return path


def _publications(path: Path) -> pd.DataFrame:
    con = connect(path, read_only=True)
    try:
        return con.execute("SELECT * FROM publications ORDER BY started_at, target, run_id").df()
    finally:
        con.close()


def _parquet_rows(path: Path) -> int:
    return duckdb.connect().execute("SELECT count(*) FROM read_parquet(?)", [str(path)]).fetchone()[0]


# ----------------------------------------------------------------------------- Parquet folder
def test_parquet_version_manifest_and_switch(wh, two_runs, tmp_path, capsys):
    out = tmp_path / "pub"
    r1, r2 = two_runs["runs"]
    assert main(["publish", "--warehouse", str(wh), "--parquet", str(out), "--run", r1]) == 0
    first = os.readlink(out / "current")
    m1 = verify_version(out / "current")          # every file's SHA-256 recomputed against the manifest
    assert m1["run_id"] == r1 and m1["schema_version"] == SCHEMA_VERSION and m1["runs"] == [r1]
    expected = {f"{t}.parquet" for t in RESULT_TABLES} | {f"{v}.parquet" for v in LATEST_VIEWS} | {"manifest.json"}
    assert {p.name for p in (out / "current").iterdir()} == expected
    for name, meta in m1["files"].items():
        assert _parquet_rows(out / "current" / name) == meta["rows"]

    assert main(["publish", "--warehouse", str(wh), "--parquet", str(out), "--run", r2]) == 0
    assert os.readlink(out / "current") != first
    assert (out / first).is_dir()                 # the old version stays for readers that resolved it
    m2 = verify_version(out / "current")
    assert m2["run_id"] == r2 and m2["runs"] == [r1, r2] and m2["as_of"] == str(two_runs["demo"]["manifest"].as_of)
    con = connect(wh, read_only=True)
    try:
        for view, table in LATEST_VIEWS.items():
            n = con.execute(f'SELECT count(*) FROM "{table}" WHERE run_id = ?', [r2]).fetchone()[0]
            assert m2["files"][f"{view}.parquet"]["rows"] == n
            got = duckdb.connect().execute("SELECT DISTINCT run_id FROM read_parquet(?)",
                                           [str(out / "current" / f"{view}.parquet")]).fetchall()
            assert got in ([(r2,)], [])
        for table in RESULT_TABLES:
            n = con.execute(f'SELECT count(*) FROM "{table}" WHERE run_id IN (?, ?)', [r1, r2]).fetchone()[0]
            assert m2["files"][f"{table}.parquet"]["rows"] == n
    finally:
        con.close()
    # a tampered file no longer matches its manifest
    victim = out / "current" / "alerts.parquet"
    victim.write_bytes(victim.read_bytes() + b"x")
    with pytest.raises(Exception, match="SHA-256"):
        verify_version(out / "current")


def test_keep_versions_prunes_old_versions(wh, two_runs, tmp_path):
    out = tmp_path / "pub"
    con = connect(wh)
    try:
        for i in range(5):
            status, _, _ = publish_parquet(con, out, two_runs["runs"][i % 2], 5, keep_versions=2,
                                           schema_version=SCHEMA_VERSION)
            assert status == "ok"
    finally:
        con.close()
    versions = sorted(p.name for p in (out / "versions").iterdir())
    assert len(versions) == 2
    assert os.path.basename(os.readlink(out / "current")) == versions[-1]
    assert current_manifest(out)["run_id"] == two_runs["runs"][0]


def test_republish_is_idempotent(wh, two_runs, tmp_path, capsys):
    out, snap = tmp_path / "pub", tmp_path / "dash.duckdb"
    args = ["publish", "--warehouse", str(wh), "--parquet", str(out), "--duckdb", str(snap)]
    assert main(args) == 0
    version, digest = os.readlink(out / "current"), snap.read_bytes()
    capsys.readouterr()
    assert main(args) == 0                                   # nothing pending: nothing written
    assert "nothing to publish" in capsys.readouterr().out
    assert main(args + ["--run", two_runs["runs"][1]]) == 0  # the same run again: unchanged
    assert os.readlink(out / "current") == version and snap.read_bytes() == digest
    pubs = _publications(wh)
    assert (pubs["status"] == "unchanged").sum() == 2
    assert len(list((out / "versions").iterdir())) == 1


# ----------------------------------------------------------------------------- DuckDB snapshot
READER = textwrap.dedent("""
    import sys, duckdb
    con = duckdb.connect(sys.argv[1], read_only=sys.argv[2] == "ro")
    def state():
        return con.execute("SELECT (SELECT run_id FROM publication), (SELECT count(*) FROM latest_site_estimates), "
                           "(SELECT count(*) FROM runs)").fetchone()
    print("before", *state(), flush=True)
    sys.stdin.readline()
    print("after", *state(), flush=True)
""")


@pytest.mark.parametrize("mode", ["ro", "rw"])
def test_snapshot_held_open_while_run_and_publish_proceed(wh, two_runs, tmp_path, capsys, mode):
    snap = tmp_path / "dash.duckdb"
    assert main(["publish", "--warehouse", str(wh), "--duckdb", str(snap), "--run", two_runs["runs"][0]]) == 0
    reader = subprocess.Popen([sys.executable, "-c", READER, str(snap), mode], stdin=subprocess.PIPE,
                              stdout=subprocess.PIPE, text=True)
    try:
        before = reader.stdout.readline().split()
        assert before[:2] == ["before", two_runs["runs"][0]]
        # while the dashboard holds the snapshot: an explicit publication, then a run that publishes itself
        assert main(["publish", "--warehouse", str(wh), "--duckdb", str(snap)]) == 0
        _set_publish(wh, duckdb_file=str(snap))
        capsys.readouterr()
        assert main(["run", "--warehouse", str(wh), "--as-of", str(two_runs["demo"]["manifest"].as_of)]) == 0
        out = capsys.readouterr().out
        new_run = out.split()[1].rstrip(":")
        assert f"published run {new_run} to duckdb:{snap}: ok" in out
        reader.stdin.write("\n")
        reader.stdin.flush()
        after = reader.stdout.readline().split()
        assert after[1:] == before[1:]            # the open connection still reads its own, whole snapshot
    finally:
        reader.stdin.close()
        reader.wait(timeout=60)
    con = duckdb.connect(str(snap), read_only=True)
    try:
        assert con.execute("SELECT run_id FROM publication").fetchone()[0] == new_run
        assert con.execute("SELECT count(*) FROM runs").fetchone()[0] == 3
        assert {r[0] for r in con.execute("SELECT DISTINCT run_id FROM latest_site_estimates").fetchall()} == {new_run}
    finally:
        con.close()
    assert not list(tmp_path.glob(".dash.duckdb.tmp-*")) and not Path(str(snap) + ".wal").exists()


# ----------------------------------------------------------------------------- failures and retries
def test_failed_target_is_recorded_and_retried(wh, two_runs, tmp_path, capsys):
    out, snap = tmp_path / "pub", tmp_path / "dash.duckdb"
    out.write_text("a file where the folder should be")
    assert main(["publish", "--warehouse", str(wh), "--parquet", str(out), "--duckdb", str(snap)]) == 1
    err = capsys.readouterr().err
    assert f"to parquet:{out} FAILED" in err and "is a file" in err
    pubs = _publications(wh)
    assert set(pubs.loc[pubs["target"] == f"parquet:{out}", "status"]) == {"failed"}
    assert set(pubs.loc[pubs["target"] == f"duckdb:{snap}", "status"]) == {"ok"}
    assert snap.is_file()
    out.unlink()
    assert main(["publish", "--warehouse", str(wh), "--parquet", str(out), "--duckdb", str(snap)]) == 0
    pubs = _publications(wh)
    ok = pubs[(pubs["target"] == f"parquet:{out}") & (pubs["status"] == "ok")]
    assert sorted(ok["run_id"]) == sorted(two_runs["runs"])          # both runs retried, one version
    assert current_manifest(out)["runs"] == two_runs["runs"]
    assert len(pubs[pubs["target"] == f"duckdb:{snap}"]) == 2         # the snapshot was up to date


def test_failed_publication_keeps_the_run_ok_and_exits_1(wh, two_runs, tmp_path, capsys):
    blocker = tmp_path / "not_a_folder"
    blocker.write_text("x")
    _set_publish(wh, parquet_dir=str(blocker), duckdb_file="dash.duckdb")
    rc = main(["run", "--warehouse", str(wh), "--as-of", str(two_runs["demo"]["manifest"].as_of)])
    captured = capsys.readouterr()
    assert rc == 1
    assert "FAILED" in captured.err and "the run is kept as it is" in captured.err
    run_id = captured.out.split()[1].rstrip(":")
    con = connect(wh, read_only=True)
    try:
        assert con.execute("SELECT status FROM runs WHERE run_id = ?", [run_id]).fetchone()[0] == "ok"
        assert con.execute("SELECT count(*) FROM site_estimates WHERE run_id = ?", [run_id]).fetchone()[0] > 0
    finally:
        con.close()
    assert (wh.parent / "dash.duckdb").is_file()      # the other target was published (relative to the warehouse)
    blocker.unlink()
    assert main(["publish", "--warehouse", str(wh)]) == 0
    assert current_manifest(blocker)["run_id"] == run_id


def test_usage_errors(wh, tmp_path, capsys):
    assert main(["publish", "--warehouse", str(wh)]) == 2
    assert "no publication target" in capsys.readouterr().err
    assert main(["publish", "--warehouse", str(wh), "--parquet", str(tmp_path / "p"), "--run", "r-nope"]) == 2
    assert "unknown run 'r-nope'" in capsys.readouterr().err
    assert main(["publish", "--warehouse", str(wh), "--postgres", "mysql://u:hunter2@h/db"]) == 2
    err = capsys.readouterr().err
    assert "postgresql://" in err and "hunter2" not in err


# ----------------------------------------------------------------------------- suppression and keys
def _expected_trends(exact: pd.DataFrame, k: int) -> pd.DataFrame:
    """The small-cell rule recomputed with pandas: 1 <= count < k in n_assigned or n_taken_up."""
    small = exact["n_assigned"].between(1, k - 1) | exact["n_taken_up"].between(1, k - 1)
    key = ["run_id", "site_id", "basis", "period_start"]
    shared = small.groupby([exact[c] for c in key]).transform("any")
    return exact.assign(_small=small, _shared=shared)


def test_small_cells_suppressed_in_published_copies_only(wh, two_runs, tmp_path):
    snap, out = tmp_path / "dash.duckdb", tmp_path / "pub"
    assert main(["publish", "--warehouse", str(wh), "--duckdb", str(snap), "--parquet", str(out)]) == 0
    k = 5
    con = connect(wh, read_only=True)
    exact = con.execute("SELECT * FROM uptake_trends ORDER BY ALL").df()
    sites = con.execute("SELECT * FROM site_estimates ORDER BY ALL").df()
    con.close()
    exp = _expected_trends(exact, k)
    assert exp["_small"].any() and (~exp["_small"]).any()    # the demo has both kinds of cells
    s = duckdb.connect(str(snap), read_only=True)
    pub = s.execute("SELECT * FROM uptake_trends").df()
    pub_sites = s.execute("SELECT * FROM site_estimates").df()
    s.close()
    key = ["run_id", "site_id", "arm", "basis", "period_start"]
    m = exp.merge(pub, on=key, suffixes=("", "_pub"), validate="one_to_one")
    assert len(m) == len(exact)
    assert (m[SUPPRESSION_FLAG] == (m["_small"] | m["_shared"])).all()
    for c in ("n_assigned", "n_taken_up", "uptake_share", "cumulative_uptake_share", "cusum"):
        assert m.loc[m["_small"], f"{c}_pub"].isna().all()
    for c in ("first_stage", "first_stage_se"):
        assert m.loc[m["_shared"], f"{c}_pub"].isna().all()
    shown = m[~m["_small"] & ~m["_shared"]]
    for c in ("n_assigned", "n_taken_up", "uptake_share", "first_stage", "cusum"):
        pd.testing.assert_series_equal(shown[c], shown[f"{c}_pub"], check_names=False, check_dtype=False)
    counts = pub[["n_assigned", "n_taken_up"]].stack()
    assert ((counts == 0) | (counts >= k)).all()             # no published count from 1 to k-1
    # per-arm counts of site_estimates
    for group in SMALL_CELLS["site_estimates"]:
        small = sites[list(group.counts)].apply(lambda col: col.between(1, k - 1)).any(axis=1)
        mm = sites.assign(_small=small).merge(pub_sites, on=["run_id", "site_id", "outcome", "spec"],
                                              suffixes=("", "_pub"))
        for c in (*group.counts, *group.derived):
            assert mm.loc[mm["_small"], f"{c}_pub"].isna().all()
            pd.testing.assert_series_equal(mm.loc[~mm["_small"], c], mm.loc[~mm["_small"], f"{c}_pub"],
                                           check_names=False, check_dtype=False)
        assert mm.loc[mm["_small"], SUPPRESSION_FLAG].all()
    # the Parquet copy holds the same published rows as the snapshot
    pq = duckdb.connect().execute("SELECT * FROM read_parquet(?) ORDER BY ALL",
                                  [str(out / "current" / "uptake_trends.parquet")]).df()
    pd.testing.assert_frame_equal(pq, pub.sort_values(list(pub.columns)).reset_index(drop=True),
                                  check_dtype=False)


def _participant_values(wh: Path, demo_root: Path) -> set[str]:
    con = connect(wh, read_only=True)
    keys = {str(r[0]) for r in con.execute("SELECT participant_key FROM assignments").fetchall()}
    con.close()
    mem = duckdb.connect()
    raw = mem.execute(
        "SELECT DISTINCT CAST(participant_id AS VARCHAR) FROM read_csv(?, union_by_name = true, all_varchar = true)",
        [str(demo_root / "incoming" / "*" / "*assignment*.csv")]).fetchall()
    raw += mem.execute("SELECT DISTINCT CAST(participant_id AS VARCHAR) FROM read_parquet(?, union_by_name = true)",
                       [str(demo_root / "incoming" / "*" / "*assignment*.parquet")]).fetchall()
    return keys | {r[0] for r in raw if r[0]}


def published_values_hit(con: duckdb.DuckDBPyConnection, relation: str, secrets: set[str]) -> list[str]:
    """Columns of ``relation`` whose name or some value is a participant key or identifier."""
    cols = [r[0] for r in con.execute(f"DESCRIBE SELECT * FROM {relation}").fetchall()]
    bad = [c for c in cols if "participant" in c.lower()]
    con.execute("CREATE OR REPLACE TEMP TABLE _secret AS SELECT unnest(?::VARCHAR[]) AS v", [sorted(secrets)])
    for c in cols:
        n = con.execute(f'SELECT count(*) FROM {relation} WHERE CAST("{c}" AS VARCHAR) IN (SELECT v FROM _secret)'
                        ).fetchone()[0]
        if n:
            bad.append(c)
    return bad


def test_no_participant_key_in_any_published_column(wh, two_runs, tmp_path):
    snap, out = tmp_path / "dash.duckdb", tmp_path / "pub"
    assert main(["publish", "--warehouse", str(wh), "--duckdb", str(snap), "--parquet", str(out)]) == 0
    secrets = _participant_values(wh, two_runs["demo"]["manifest"].root)
    assert len(secrets) > 1000
    s = duckdb.connect(str(snap), read_only=True)
    rels = [r[0] for r in s.execute("SELECT table_name FROM information_schema.tables").fetchall()]
    assert set(RESULT_TABLES) | set(LATEST_VIEWS) <= set(rels)
    for rel in rels:
        assert published_values_hit(s, f'"{rel}"', secrets) == [], rel
    s.close()
    mem = duckdb.connect()
    for f in sorted((out / "current").glob("*.parquet")):
        assert published_values_hit(mem, f"read_parquet('{f}')", secrets) == [], f.name
    manifest = (out / "current" / "manifest.json").read_text()
    assert not any(v in manifest for v in secrets if len(v) > 6)


# ----------------------------------------------------------------------------- kill -9
def test_kill_9_during_publish_leaves_old_or_new_version(wh, two_runs, tmp_path):
    """A publishing process killed at random moments: each copy is whole (old or new), the warehouse opens."""
    out, snap = tmp_path / "pub", tmp_path / "dash.duckdb"
    runs = two_runs["runs"]
    env = {**os.environ, "TAKEUP_ID_KEY": TEST_KEY}
    cmd = [sys.executable, "-m", "takeup.pipeline.cli", "publish", "--warehouse", str(wh), "--parquet", str(out),
           "--duckdb", str(snap)]
    t0 = time.monotonic()
    assert subprocess.run(cmd + ["--run", runs[0]], env=env, capture_output=True).returncode == 0
    whole = time.monotonic() - t0      # how long one publication takes here: the kill moments spread over it
    rng = random.Random(20261202)
    kills = 0
    for i in range(8):
        target = runs[(i + 1) % 2]
        p = subprocess.Popen(cmd + ["--run", target], env=env, stdout=subprocess.DEVNULL, stderr=subprocess.DEVNULL)
        try:
            p.wait(timeout=rng.uniform(0.3, 1.0) * whole)
        except subprocess.TimeoutExpired:
            os.kill(p.pid, signal.SIGKILL)
            p.wait()
            kills += 1
        m = verify_version(out / "current")                # whole: every file matches its manifest
        assert m["run_id"] in runs
        s = duckdb.connect(str(snap), read_only=True)
        try:
            got = s.execute("SELECT run_id FROM publication").fetchone()[0]
            assert got in runs
            assert {r[0] for r in s.execute("SELECT DISTINCT run_id FROM latest_site_estimates").fetchall()} == {got}
        finally:
            s.close()
        connect(wh).close()                                 # the warehouse opens (read-write)
    assert kills >= 1
    assert subprocess.run(cmd + ["--run", runs[1]], env=env, capture_output=True).returncode == 0
    assert verify_version(out / "current")["run_id"] == runs[1]
    assert not list((out / "versions").glob(".tmp-*")) and not list(tmp_path.glob(".dash.duckdb.tmp-*"))


def test_redaction_of_postgres_urls():
    from takeup.pipeline.outputs.publish.targets import Target, redact_url
    assert redact_url("postgresql://pub:pw%40x@db:5432/m?sslmode=require&password=pw2") == \
        "postgresql://pub@db:5432/m?sslmode=require"
    assert redact_url("host=db user=pub password='p w' dbname=m") == "host=db user=pub password=*** dbname=m"
    t = Target("postgres", "postgresql://pub:Secr3t@db/m")
    assert t.name == "postgresql://pub@db/m"
    assert "Secr3t" not in t.scrub("failed for postgresql://pub:Secr3t@db/m: bad password Secr3t")
