"""The fast paths give what the plain paths give.

* Windows of small files (``ingest/file_groups.py``) against loading the same files one by
  one with ``ingest_file`` (the reference path): the same batches, counts, quarantine rows,
  stored records, pending counts and participant state — on the demo's files and on a
  made-up set with cross-file duplicates and conflicts, pending rows, malformed lines,
  unreadable and shifted files; and per-file atomicity when a file or a window fails.
* The run's analysis sample read from ``participant_state`` against the join of the
  record tables, for cutoffs before, inside and after the data and for a data cutoff
  between batches (the run's inputs must be identical frames).
* A warehouse of the previous schema (2: no participant state) upgrades on a writable
  open and reproduces a run stored before the upgrade.

The reference for each comparison is the project's own plain path (the code these paths
replace); exact equality is required (no tolerance: the same SQL aggregates, same rows).
"""

from __future__ import annotations

import re
import shutil
from datetime import date, timedelta

import duckdb
import pandas as pd
import pyarrow as pa
import pyarrow.parquet as pq
import pytest

import takeup.pipeline.ingest.file_groups as file_groups
import takeup.pipeline.run.sample_sql as sample_sql
from takeup.pipeline.demo import demo_as_of
from takeup.pipeline.ingest.batch import ingest_file
from takeup.pipeline.ingest.many_files import ingest_paths
from takeup.pipeline.participant_state import basis_for, refresh_state
from takeup.pipeline.pseudonym import load_key
from takeup.pipeline.run.inputs import collect_inputs, new_run_context
from takeup.pipeline.warehouse import check_key, connect, init_warehouse, stored_config
from takeup.schemas.config import StudyConfig
from tests.conftest import write_csv


# ----------------------------------------------------------------------------- helpers
def _one_by_one(path, files):
    con = connect(path)
    try:
        key = check_key(con, load_key(path), path)
        cfg = stored_config(con) or StudyConfig()
        reports = [ingest_file(con, f, key, cfg) for f in files]
        refresh_state(con, basis_for(con, cfg))
        return reports
    finally:
        con.close()


def _snapshot(path) -> dict[str, pd.DataFrame]:
    con = duckdb.connect(str(path), read_only=True)
    try:
        out = {"batches": con.execute(
            "SELECT file_name, sha256, kind, site_ids, rows_read, rows_loaded, rows_quarantined, rows_duplicate, "
            "status, message FROM batches ORDER BY received_at").df(),
            "quarantine": con.execute("SELECT source_file, source_row, field, reason, offending_value "
                                      "FROM quarantine ORDER BY ALL").df()}
        for t in ("assignments", "uptake_events", "outcome_measurements", "assignment_covariates"):
            out[t] = con.execute(f"SELECT b.file_name, t.* EXCLUDE (batch_id) REPLACE "
                                 f"(CAST(t.participant_key AS VARCHAR) AS participant_key) FROM {t} t JOIN batches b "
                                 "USING (batch_id) ORDER BY ALL").df()
        out["participant_state"] = con.execute(
            "SELECT * EXCLUDE (last_received_at) REPLACE (CAST(participant_key AS VARCHAR) AS participant_key) "
            "FROM participant_state ORDER BY participant_key, slot").df()
        return out
    finally:
        con.close()


def _report_rows(reports):
    """Reports without the batch ids (they hold the receipt time)."""
    return [(r.status, r.kind, r.rows_read, r.rows_loaded, r.rows_quarantined, r.rows_duplicate, r.rows_pending,
             dict(r.reasons), re.sub(r"b\d{8}T\d+-[0-9a-f]{12}", "<batch>", r.message or "")) for r in reports]


def _assert_same(a, b):
    for name in a:
        pd.testing.assert_frame_equal(a[name].reset_index(drop=True), b[name].reset_index(drop=True), obj=name)


def _two_warehouses(tmp_path, config=None):
    paths = []
    for label in ("windows", "alone"):
        p = tmp_path / f"{label}.duckdb"
        init_warehouse(p, config)
        paths.append(p)
    return paths


# ----------------------------------------------------------------------------- many small files
def _made_up_files(d):
    """Files that exercise the sequential rules across files (see the module doc)."""
    a = "site_id,participant_id,arm,assigned_on"
    u = "site_id,participant_id,observed_on,took_up"
    files = [
        write_csv(d / "01_a.csv", a, "S1,P1,treatment,2025-01-06", "S1,P2,control,2025-01-06",
                  "S1,P3,treatment,2025-01-07", "S1,P3,treatment,2025-01-07", "S1,P4,control,2025-01-08"),
        # uptake of a participant assigned only later in the window (pending), and of P1
        write_csv(d / "02_u.csv", u, "S1,P1,2025-01-20,yes", "S1,P9,2025-01-20,no", "S1,P9,2025-01-20,no"),
        # P1 identical (duplicate), P2 other arm (conflict), P6 twice with different arms (conflict, both)
        write_csv(d / "03_a.csv", a, "S1,P1,treatment,2025-01-06", "S1,P2,treatment,2025-01-06",
                  "S1,P6,treatment,2025-01-09", "S1,P6,control,2025-01-09", "S1,P7,control,2025-13-01"),
        # P6 once: stored now; P9 arrives: the pending uptake joins it
        write_csv(d / "04_a.csv", a, "S1,P6,control,2025-01-09", "S1,P9,treatment,2025-01-10"),
        # P6 again, identical (duplicate) and P4 with another date (conflict)
        write_csv(d / "05_a.csv", a, "S1,P6,control,2025-01-09", "S1,P4,control,2025-01-09"),
        write_csv(d / "06_u.csv", u, "S1,P9,2025-01-21,yes", "S1,P2,2025-01-21,perhaps", "S1,P3,2025-01-21,1"),
        # a malformed line (extra field): this file goes alone, the others stay in windows
        write_csv(d / "07_u.csv", u, "S1,P4,2025-01-22,no", "S1,P5,2025-01-22,no,extra", "S1,P6,2025-01-22,yes"),
        write_csv(d / "08_a.csv", a),                                       # header only
        write_csv(d / "09_a.csv", a, 'S1,"P10,treatment,2025-01-06'),        # unterminated quote: rejected
        write_csv(d / "10_a.csv", a, *[f"P{i},S1,treatment,2025-01-06" for i in range(40)]),  # shifted columns
        write_csv(d / "11_x.csv", "site_id,participant_id,colour", "S1,P1,red"),               # no record kind
        write_csv(d / "12_a.csv", a, "S2,P1,control,2025-01-06", "", "S2,P2,treatment,2025-01-06"),  # blank line
    ]
    files.append(d / "13_a_copy.csv")
    shutil.copyfile(files[0], files[-1])                                   # same content: duplicate batch
    tbl = pa.table({"site_id": ["S3", "S3", "S3"], "participant_id": ["Q1", "Q2", "Q2"],
                    "arm": ["treatment", "control", "treatment"], "assigned_on": [date(2025, 1, 6)] * 3})
    pq.write_table(tbl, d / "14_a.parquet")
    files.append(d / "14_a.parquet")
    files.append(write_csv(d / "15_u.csv", u, "S3,Q1,2025-01-20,no", "S1,P6,2025-01-23,no"))
    return files


def test_windows_equal_one_by_one_on_made_up_files(tmp_path, key_env):
    d = tmp_path / "files"
    d.mkdir()
    files = _made_up_files(d)
    win, alone = _two_warehouses(tmp_path)
    r_win = ingest_paths(win, files)
    r_alone = _one_by_one(alone, files)
    assert _report_rows(r_win) == _report_rows(r_alone)
    _assert_same(_snapshot(win), _snapshot(alone))
    statuses = [r.status for r in r_win]
    # rejected: header only (08), unterminated quote (09), shifted columns (10), no record kind (11)
    assert statuses.count("rejected") == 4 and statuses[-3] == "duplicate_batch"
    # the cases the file set is built for did happen
    q = _snapshot(win)["quarantine"]
    assert (q.reason == "conflicting_assignment").sum() == 6     # P2, P6 x2 (03), P4 (05), Q2 x2 (14)
    assert r_win[1].rows_pending == 1 and r_win[0].rows_loaded == 4 and r_win[0].rows_duplicate == 1


def test_windows_equal_one_by_one_on_demo_files(tmp_path, key_env, demo_warehouse):
    manifest = demo_warehouse["manifest"]
    from takeup.schemas.config import load_config
    files = [f for f in manifest.files if f.parent.name <= "week_07" or f.parent.name == "week_15"]
    win, alone = _two_warehouses(tmp_path, load_config(manifest.config_path))
    r_win = ingest_paths(win, files)
    r_alone = _one_by_one(alone, files)
    assert _report_rows(r_win) == _report_rows(r_alone)
    _assert_same(_snapshot(win), _snapshot(alone))
    assert sum(r.rows_quarantined for r in r_win) > 0 and sum(r.rows_pending for r in r_win) > 0


def test_a_failing_window_falls_back_to_files_one_by_one(tmp_path, key_env, monkeypatch):
    """A failure while a window is written rolls it back; every file then loads alone, whole."""
    d = tmp_path / "files"
    d.mkdir()
    files = _made_up_files(d)
    calls = {"n": 0}
    real = file_groups._insert

    def failing_insert(con, kind, *args):
        calls["n"] += 1
        real(con, kind, *args)
        if kind == "uptake":          # after the assignments of the window were written
            raise duckdb.IOException("simulated failure in the middle of a window")

    monkeypatch.setattr(file_groups, "_insert", failing_insert)
    win, alone = _two_warehouses(tmp_path)
    r_win = ingest_paths(win, files)
    r_alone = _one_by_one(alone, files)
    assert calls["n"] > 0
    assert _report_rows(r_win) == _report_rows(r_alone)
    _assert_same(_snapshot(win), _snapshot(alone))


def test_a_rejected_file_in_a_window_stores_nothing_and_others_load(tmp_path, key_env):
    d = tmp_path / "files"
    d.mkdir()
    a = "site_id,participant_id,arm,assigned_on"
    good = [write_csv(d / f"g{i:02d}.csv", a, f"S1,P{i}a,treatment,2025-01-06", f"S1,P{i}b,control,2025-01-06")
            for i in range(30)]
    bad = write_csv(d / "bad.csv", a, *[f"P{i},S1,treatment,2025-01-06" for i in range(30)])
    files = good[:15] + [bad] + good[15:]
    path = tmp_path / "w.duckdb"
    init_warehouse(path)
    reports = ingest_paths(path, files)
    by_name = {r.file.rsplit("/", 1)[-1]: r for r in reports}
    assert by_name["bad.csv"].status == "rejected"
    assert all(by_name[f.name].status == "loaded" and by_name[f.name].rows_loaded == 2 for f in good)
    con = duckdb.connect(str(path), read_only=True)
    try:
        n_bad = con.execute("SELECT count(*) FROM assignments a JOIN batches b USING (batch_id) "
                            "WHERE b.file_name = 'bad.csv'").fetchone()[0]
        n_all = con.execute("SELECT count(*) FROM assignments").fetchone()[0]
    finally:
        con.close()
    assert n_bad == 0 and n_all == 60


# ----------------------------------------------------------------------------- the run's sample
def _assert_same_inputs(a, b):
    """Counts exactly; sums to 1e-12 relative (the same rows summed in another order)."""
    import dataclasses

    import numpy as np
    assert a.sites == b.sites and a.outcomes == b.outcomes
    for name in ("moments", "covariate_cells", "cohort_counts", "calendar_counts", "site_activity"):
        pd.testing.assert_frame_equal(getattr(a, name), getattr(b, name), obj=name, check_exact=False, rtol=1e-12)
    assert a.adjusted.keys() == b.adjusted.keys()
    for o in a.adjusted:
        for part in ("cross", "scores"):
            x, y = getattr(a.adjusted[o], part), getattr(b.adjusted[o], part)
            for f in dataclasses.fields(x):
                u, v = np.asarray(getattr(x, f.name), float), np.asarray(getattr(y, f.name), float)
                np.testing.assert_allclose(u, v, rtol=1e-10, atol=1e-10 * max(1.0, float(np.abs(np.nan_to_num(v)).max(initial=0.0))))


@pytest.mark.parametrize("days_before", [0, 40, 100, 150])
def test_run_inputs_from_state_equal_the_join(demo_warehouse, tmp_path, monkeypatch, days_before):
    path = tmp_path / "demo.duckdb"
    shutil.copy(demo_warehouse["path"], path)
    as_of = demo_as_of() - timedelta(days=days_before)
    con = connect(path, read_only=True)
    try:
        modes = []
        real = sample_sql.build_participants

        def spy(*a):
            modes.append(real(*a))
            return modes[-1]

        monkeypatch.setattr(sample_sql, "build_participants", spy)
        import takeup.pipeline.run.inputs as inputs_mod
        monkeypatch.setattr(inputs_mod, "build_participants", spy)
        ctx = new_run_context(stored_config(con), as_of=as_of)
        fast = collect_inputs(con, ctx)
        monkeypatch.setattr(sample_sql, "state_is_current", lambda *a: False)
        slow = collect_inputs(con, ctx)
    finally:
        con.close()
    assert modes[1] == "records"
    # today: everything from the state; 40 days back: the state plus the participants with later
    # records recomputed; further back most participants have later records: the join throughout
    assert modes[0] == {0: "state", 40: "state+records"}.get(days_before, modes[0])
    _assert_same_inputs(fast, slow)


def test_run_inputs_with_a_data_cutoff_between_batches(demo_warehouse, tmp_path, monkeypatch):
    path = tmp_path / "demo.duckdb"
    shutil.copy(demo_warehouse["path"], path)
    con = connect(path, read_only=True)
    try:
        times = [r[0] for r in con.execute("SELECT received_at FROM batches ORDER BY received_at").fetchall()]
        cutoff = times[len(times) * 9 // 10]
        ctx = new_run_context(stored_config(con), as_of=demo_as_of(), data_cutoff=cutoff)
        fast = collect_inputs(con, ctx)
        monkeypatch.setattr(sample_sql, "state_is_current", lambda *a: False)
        slow = collect_inputs(con, ctx)
    finally:
        con.close()
    _assert_same_inputs(fast, slow)


def test_state_follows_late_assignments_and_a_new_follow_up_rule(warehouse, tmp_path):
    """Pending uptake/outcome rows enter the state when their assignment arrives; a new rule rebuilds it."""
    from takeup.pipeline.run.stages import run_monitoring
    d = tmp_path
    u = write_csv(d / "u.csv", "site_id,participant_id,observed_on,took_up", "S1,P1,2025-01-20,yes",
                  "S1,P2,2025-01-20,no")
    o = write_csv(d / "o.csv", "site_id,participant_id,outcome,measured_on,value", "S1,P1,score,2025-03-20,5",
                  "S1,P1,score,2025-03-25,7", "S1,P2,score,2025-03-21,3")
    ingest_paths(warehouse, [u, o])
    con = duckdb.connect(str(warehouse), read_only=True)
    assert con.execute("SELECT count(*) FROM participant_state").fetchone()[0] == 0
    con.close()
    a = write_csv(d / "a.csv", "site_id,participant_id,arm,assigned_on", "S1,P1,treatment,2025-01-06",
                  "S1,P2,control,2025-01-06")
    ingest_paths(warehouse, [a])
    con = duckdb.connect(str(warehouse), read_only=True)
    rows = con.execute("SELECT z, took_up, y FROM participant_state ORDER BY z").fetchall()
    con.close()
    assert rows == [(0, False, 3.0), (1, True, 7.0)]          # follow-up rule 'last' (default)
    con = connect(warehouse)
    try:
        cfg = stored_config(con).model_copy(update={"follow_up": stored_config(con).follow_up.model_copy(
            update={"rule": "first"})})
        assert refresh_state(con, basis_for(con, cfg)) == "rebuilt"
        assert con.execute("SELECT y FROM participant_state WHERE z = 1").fetchone()[0] == 5.0
    finally:
        con.close()
    run_monitoring(warehouse, as_of=date(2025, 6, 30))       # the stored config again: rebuilt for 'last'
    con = duckdb.connect(str(warehouse), read_only=True)
    assert con.execute("SELECT y FROM participant_state WHERE z = 1").fetchone()[0] == 7.0
    con.close()


def test_state_written_in_parts_equals_one_statement(demo_warehouse, tmp_path, monkeypatch):
    """A large state is written part by part (equal ranges of the participant key) to stay
    inside the memory budget; the rows must be those of one statement, for a rebuild and for an
    update of the participants a new batch touches."""
    import takeup.pipeline.participant_state as ps

    snaps = {}
    real = ps.state_rows_sql
    for label, per_part in (("one", 10**9), ("parts", 97)):
        path = tmp_path / f"{label}.duckdb"
        shutil.copy(demo_warehouse["path"], path)
        monkeypatch.setattr(ps, "STATE_PART_PARTICIPANTS", per_part)
        con = connect(path)
        try:
            statements = []
            monkeypatch.setattr(ps, "state_rows_sql", lambda *a, **k: statements.append(k.get("part")) or real(*a, **k))
            con.execute("DELETE FROM warehouse_meta WHERE key = 'state_basis'")    # forces a rebuild
            assert refresh_state(con, basis_for(con, stored_config(con))) == "rebuilt"
            n = con.execute("SELECT count(*) FROM assignments").fetchone()[0]
            assert len(statements) == (1 if per_part > n else -(-n // per_part)) and len(statements) > 0
            # an update: one batch's participants recomputed (their state rows deleted and written again)
            batch = con.execute("SELECT batch_id FROM batches WHERE kind = 'uptake' AND status = 'loaded' "
                                "ORDER BY received_at DESC LIMIT 1").fetchone()[0]
            con.execute("DELETE FROM participant_state_batches WHERE batch_id = $b", {"b": batch})
            assert refresh_state(con, basis_for(con, stored_config(con))) == "updated"
        finally:
            con.close()
        snaps[label] = _snapshot(path)["participant_state"]
    pd.testing.assert_frame_equal(snaps["one"], snaps["parts"])
    assert len(snaps["one"]) > 0


# ----------------------------------------------------------------------------- schema 2 -> 3
def _to_schema_2(path):
    """Rewrite a warehouse into the previous layout: no participant state, schema_version 2."""
    con = duckdb.connect(str(path))
    try:
        con.execute("DROP TABLE participant_state")
        con.execute("DROP TABLE participant_state_batches")
        con.execute("DELETE FROM warehouse_meta WHERE key IN ('state_basis', 'schema_version')")
        con.execute("INSERT INTO warehouse_meta VALUES ('schema_version', '2')")
    finally:
        con.close()


def test_schema_2_warehouse_upgrades_and_reproduces_old_runs(demo_warehouse, tmp_path, key_env, monkeypatch):
    import takeup.pipeline.run.stages as stages
    import takeup.pipeline.warehouse as warehouse_mod
    from takeup.pipeline.demo import generate_late_files
    from takeup.pipeline.run.reproduce import reproduce_run
    path = tmp_path / "demo.duckdb"
    shutil.copy(demo_warehouse["path"], path)
    _to_schema_2(path)
    with monkeypatch.context() as m:
        # runs stored by the previous code: no upgrade, no state, the sample from the record tables
        m.setattr(warehouse_mod, "upgrade_to_state", lambda con: False)
        m.setattr(stages, "prepare_state", lambda con, config: "skipped")
        old_runs = [stages.run_monitoring(path, as_of=demo_as_of() - timedelta(days=d)) for d in (60, 0)]
    _to_schema_2(path)                     # exactly the previous layout again, with its runs
    con = duckdb.connect(str(path), read_only=True)
    tables = {r[0] for r in con.execute("SELECT table_name FROM information_schema.tables").fetchall()}
    con.close()
    assert "participant_state" not in tables
    # a read-only command on the old layout works (from the record tables) and changes nothing
    assert reproduce_run(path, old_runs[0].run_id).identical
    # the first writable open upgrades; later files arrive; the old runs still reproduce
    ingest_paths(path, list(generate_late_files(tmp_path)))
    con = duckdb.connect(str(path), read_only=True)
    meta = dict(con.execute("SELECT key, value FROM warehouse_meta").fetchall())
    n_state = con.execute("SELECT count(*) FROM participant_state").fetchone()[0]
    n_assigned = con.execute("SELECT count(*) FROM assignments").fetchone()[0]
    con.close()
    assert meta["schema_version"] == "3" and "upgraded_2_to_3_at" in meta
    assert n_state == n_assigned            # one outcome in the demo: one row per assigned participant
    for run in old_runs:
        result = reproduce_run(path, run.run_id)
        assert result.identical, result
