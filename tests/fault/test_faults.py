"""Fault injection, small enough for CI: kill -9 during ingest and run, disk full, concurrent writers,
hostile names.  ``benchmarks/fault_suite.py`` runs the same scenarios at the README's sizes.

Every check is a count of broken invariants that must be 0 (partial batches, rows not adding
up, half-written runs, files loaded twice, rows lost) or an exit code from the README's
contract; no timing is asserted.
"""

from __future__ import annotations

import os

import pytest

from tests.fault import scenarios


def test_kill_9_during_ingestion_leaves_no_partial_batch(tmp_path):
    r = scenarios.kill_ingest(tmp_path, n_rows=20_000, n_kills=2, seed=11)
    assert r["opens"] == r["kills"] == 2
    assert r["broken"] == 0 and r["rows_wrong"] == 0 and r["resumed_ok"] == 2


def test_kill_9_during_a_run_leaves_no_half_written_run(tmp_path):
    r = scenarios.kill_run(tmp_path, n_sites=6, n_kills=1, seed=12)
    assert r["opens"] == 1 and r["broken"] == 0 and r["left_running"] == 0 and r["resumed_ok"] == 1
    # a killed run's row (if the kill came after it was written) is marked abandoned by the next run
    assert r["abandoned_marked"] == r["killed_mid_run"]


@pytest.mark.skipif(os.geteuid() != 0, reason="mounting a size-limited tmpfs needs root")
def test_disk_full_is_named_and_the_previous_state_is_intact(tmp_path):
    r = scenarios.disk_full(tmp_path, size_mb=24, n_rows=400_000)
    if "skipped" in r:
        pytest.skip(r["skipped"])
    assert r["ingest_exit"] == 4 and "disk full" in r["ingest_message"][0] and "unchanged" in r["ingest_message"][0]
    assert r["run_exit"] in (0, 4)          # the run's rows may fit in the space left; if not: exit 4, named
    if r["run_exit"] == 4:
        assert "disk full" in r["run_message"][0]
    assert r["tracebacks"] == 0 and r["state_intact"] and r["broken"] == 0 and r["opens_after"]
    assert r["run_after_space_freed"] == 0 and "running" not in r["runs_after"]


def test_concurrent_writers_wait_for_each_other_and_lose_nothing(tmp_path):
    r = scenarios.concurrency(tmp_path, n_writers=3, rows_each=500)
    assert r["ingest_exit_0"] == 3 and r["files_loaded_once"] == 3 and r["run_exit"] == 0 and r["runs_ok"] == 1
    assert r["rows_lost"] == 0 and r["rows_duplicated"] == 0 and r["broken"] == 0 and r["tracebacks"] == 0


def test_hostile_names_are_inert(tmp_path):
    r = scenarios.injection(tmp_path)
    assert r["tables_unchanged"] and r["tracebacks"] == 0
    assert r["ingest_exit"] == 1 and r["header_file_rejected"]           # the hostile header names a position
    assert r["rows"] == {"assignments": 48, "uptake_events": 48, "outcome_measurements": 42, "batches": 4}
    assert r["sites_literal"] and r["study_id_literal"] and r["outcome_config_refused"]
    assert r["outcome_rows_quarantined"] and r["run_exit"] == 0
    assert r["bad_run_exit"] == 2 and r["report_bad_run_exit"] == 2 and r["export_exit"] == 0
    assert r["outside_written"]
