"""Ingestion: quarantine reasons, atomicity, idempotence, conflicts, late arrival, pseudonymisation."""

from __future__ import annotations

import hashlib
import hmac
from pathlib import Path

import duckdb
import pandas as pd
import pytest

from takeup.pipeline.ingest import batch as ingest_mod
from takeup.pipeline.ingest.batch import ingest_file
from takeup.pipeline.ingest.many_files import ingest_paths
from takeup.pipeline.pseudonym import load_key
from takeup.pipeline.warehouse import connect, init_warehouse
from takeup.schemas.config import StudyConfig, parse_config
from tests.conftest import TEST_KEY, write_csv

A_HEADER = "site_id,participant_id,arm,assigned_on"
TABLES = ("assignments", "uptake_events", "outcome_measurements", "batches", "quarantine", "assignment_covariates")


def _ingest(warehouse: Path, path: Path, config: StudyConfig | None = None, kind=None):
    con = connect(warehouse)
    try:
        return ingest_file(con, path, load_key(warehouse), config or StudyConfig(), kind=kind)
    finally:
        con.close()


def _counts(warehouse: Path) -> dict:
    con = duckdb.connect(str(warehouse), read_only=True)
    try:
        return {t: con.execute(f"SELECT count(*) FROM {t}").fetchone()[0] for t in TABLES}
    finally:
        con.close()


def _snapshot(warehouse: Path) -> dict:
    con = duckdb.connect(str(warehouse), read_only=True)
    try:
        return {t: con.execute(f"SELECT * FROM {t} ORDER BY ALL").fetchall() for t in TABLES}
    finally:
        con.close()


def _quarantine(warehouse: Path) -> pd.DataFrame:
    con = duckdb.connect(str(warehouse), read_only=True)
    try:
        return con.execute("SELECT * FROM quarantine ORDER BY source_row, reason").df()
    finally:
        con.close()


@pytest.mark.parametrize("row,field,reason", [
    ("S1,p1,treatmnt,2026-01-05", "arm", "unknown_arm"),
    ("S1,,control,2026-01-05", "participant_id", "missing_id"),
    ("S1,p1,control,2026-02-30", "assigned_on", "invalid_date"),
    ("S1,p1,control,05/01/2026", "assigned_on", "invalid_date"),
    ("S1,p1,control,1850-01-01", "assigned_on", "invalid_date"),
    ("S1,p1,control,2999-01-01", "assigned_on", "future_date"),
    ("S1,p1,control,", "assigned_on", "missing_value"),
    (",p1,control,2026-01-05", "site_id", "missing_value"),
    ("S1,p1,control,2026-01-05,extra", None, "malformed_row"),
], ids=lambda v: v if isinstance(v, str) and "," not in v else None)
def test_assignment_quarantine_reasons(warehouse, tmp_path, row, field, reason):
    f = write_csv(tmp_path / "a.csv", A_HEADER, "S1,ok1,treatment,2026-01-05", row)
    r = _ingest(warehouse, f)
    assert r.status == "loaded"
    assert (r.rows_read, r.rows_loaded, r.rows_quarantined, r.rows_duplicate) == (2, 1, 1, 0)
    q = _quarantine(warehouse)
    assert list(q.reason) == [reason]
    assert q.field.iloc[0] == field
    assert q.source_row.iloc[0] == 3          # header is line 1, the good row line 2
    assert q.source_file.iloc[0] == "a.csv"


@pytest.mark.parametrize("kind,header,row,reason", [
    ("uptake", "site_id,participant_id,observed_on,took_up", "S1,p1,2026-01-09,maybe", "invalid_boolean"),
    ("uptake", "site_id,participant_id,observed_on,took_up", "S1,p1,2026-13-01,1", "invalid_date"),
    ("outcome", "site_id,participant_id,outcome,measured_on,value", "S1,p1,score,2026-03-01,n/a", "not_a_number"),
    ("outcome", "site_id,participant_id,outcome,measured_on,value", "S1,p1,score,2026-03-01,inf", "not_finite"),
    ("outcome", "site_id,participant_id,outcome,measured_on,value", "S1,p1,score,2026-03-01,NaN", "not_finite"),
    ("outcome", "site_id,participant_id,outcome,measured_on,value", "S1,p1,score,2026-03-01,", "missing_value"),
])
def test_uptake_and_outcome_quarantine_reasons(warehouse, tmp_path, kind, header, row, reason):
    good = {"uptake": "S1,p0,2026-01-09,yes", "outcome": "S1,p0,score,2026-03-01,51.5"}[kind]
    r = _ingest(warehouse, write_csv(tmp_path / "f.csv", header, good, row))
    assert r.kind == kind
    assert (r.rows_loaded, r.rows_quarantined) == (1, 1)
    assert list(_quarantine(warehouse).reason) == [reason]


def test_registry_and_declared_outcomes(warehouse, tmp_path):
    config = parse_config({"sites": [{"site_id": "S1"}], "outcomes": [{"name": "score"}]})
    a = write_csv(tmp_path / "a.csv", A_HEADER, "S1,p1,control,2026-01-05", "S9,p2,control,2026-01-05")
    r = _ingest(warehouse, a, config)
    assert (r.rows_loaded, r.rows_quarantined) == (1, 1)
    o = write_csv(tmp_path / "o.csv", "site_id,participant_id,outcome,measured_on,value",
                  "S1,p1,score,2026-03-01,1", "S1,p1,scor,2026-03-01,1")
    r = _ingest(warehouse, o, config)
    assert (r.rows_loaded, r.rows_quarantined) == (1, 1)
    reasons = set(_quarantine(warehouse).reason)
    assert reasons == {"unknown_site", "unknown_outcome"}


def test_offending_values_never_hold_identifiers(warehouse, tmp_path):
    f = write_csv(tmp_path / "a.csv", A_HEADER, "S1,SECRET-ID-1,oops,2026-01-05", "S1,SECRET-ID-2,control,bad")
    _ingest(warehouse, f)
    q = _quarantine(warehouse)
    assert set(q.offending_value) == {"oops", "bad"}
    assert not any("SECRET" in str(v) for v in q.to_numpy().ravel())


def test_counts_add_up_and_exact_duplicates(warehouse, tmp_path):
    f = write_csv(tmp_path / "a.csv", A_HEADER, "S1,p1,control,2026-01-05", "S1,p1,control,2026-01-05",
                  "S1,p2,treatment,2026-01-05")
    r = _ingest(warehouse, f)
    assert (r.rows_read, r.rows_loaded, r.rows_duplicate, r.rows_quarantined) == (3, 2, 1, 0)
    # the same rows again in a file with other content: all duplicates, none loaded twice
    g = write_csv(tmp_path / "b.csv", A_HEADER, "S1,p2,treatment,2026-01-05", "S1,p1,control,2026-01-05",
                  "S1,p3,control,2026-01-06")
    r = _ingest(warehouse, g)
    assert (r.rows_read, r.rows_loaded, r.rows_duplicate) == (3, 1, 2)
    assert _counts(warehouse)["assignments"] == 3


def test_same_content_any_name_is_a_noop(warehouse, tmp_path):
    f = write_csv(tmp_path / "a.csv", A_HEADER, "S1,p1,control,2026-01-05")
    first = _ingest(warehouse, f)
    before = _snapshot(warehouse)
    copy = tmp_path / "renamed_copy.csv"
    copy.write_bytes(f.read_bytes())
    again = _ingest(warehouse, copy)
    assert again.status == "duplicate_batch" and again.batch_id == first.batch_id
    assert _snapshot(warehouse) == before


def test_conflicting_assignment_is_quarantined_not_overwritten(warehouse, tmp_path):
    _ingest(warehouse, write_csv(tmp_path / "a.csv", A_HEADER, "S1,p1,control,2026-01-05"))
    r = _ingest(warehouse, write_csv(tmp_path / "b.csv", A_HEADER, "S1,p1,treatment,2026-01-05"))
    assert (r.rows_loaded, r.rows_quarantined) == (0, 1)
    assert r.reasons == {"conflicting_assignment": 1}
    con = duckdb.connect(str(warehouse), read_only=True)
    assert con.execute("SELECT arm FROM assignments").fetchall() == [("control",)]
    con.close()


def test_conflict_inside_one_file_quarantines_both(warehouse, tmp_path):
    r = _ingest(warehouse, write_csv(tmp_path / "a.csv", A_HEADER, "S1,p1,control,2026-01-05",
                                     "S1,p1,treatment,2026-01-05", "S1,p2,control,2026-01-05"))
    assert (r.rows_loaded, r.rows_quarantined) == (1, 2)
    assert sorted(_quarantine(warehouse).source_row) == [2, 3]


def test_same_participant_id_at_two_sites_is_two_participants(warehouse, tmp_path):
    r = _ingest(warehouse, write_csv(tmp_path / "a.csv", A_HEADER, "S1,p1,control,2026-01-05",
                                     "S2,p1,treatment,2026-01-05"))
    assert r.rows_loaded == 2 and r.rows_quarantined == 0


def test_late_assignment_counts_pending_rows(warehouse, tmp_path):
    up = write_csv(tmp_path / "u.csv", "site_id,participant_id,observed_on,took_up", "S1,p1,2026-01-09,1")
    r = _ingest(warehouse, up)
    assert r.rows_loaded == 1 and r.rows_pending == 1
    _ingest(warehouse, write_csv(tmp_path / "a.csv", A_HEADER, "S1,p1,treatment,2026-01-05"))
    con = duckdb.connect(str(warehouse), read_only=True)
    joined = con.execute("SELECT count(*) FROM assignments a JOIN uptake_events u USING (site_id, participant_key)"
                         ).fetchone()[0]
    con.close()
    assert joined == 1


def test_failure_mid_batch_leaves_warehouse_unchanged(warehouse, tmp_path, monkeypatch):
    _ingest(warehouse, write_csv(tmp_path / "a.csv", A_HEADER, "S1,p1,control,2026-01-05"))
    before = _snapshot(warehouse)
    real = ingest_mod._insert_records

    def insert_then_fail(con, *args, **kwargs):
        real(con, *args, **kwargs)               # rows, batch and quarantine rows written inside the transaction ...
        raise RuntimeError("injected failure")   # ... then the batch fails

    monkeypatch.setattr(ingest_mod, "_insert_records", insert_then_fail)
    bad = write_csv(tmp_path / "b.csv", A_HEADER, "S1,p2,control,2026-01-05", "S1,p3,oops,2026-01-05")
    with pytest.raises(RuntimeError, match="injected failure"):
        _ingest(warehouse, bad)
    assert _snapshot(warehouse) == before
    monkeypatch.setattr(ingest_mod, "_insert_records", real)
    assert _ingest(warehouse, bad).rows_loaded == 1      # and the same file loads once the fault is gone


def test_pseudonymisation_matches_hmac_and_no_raw_id_is_stored(warehouse, tmp_path):
    ids = ["RAW-ALPHA-7", "RAW-BRAVO-8"]
    _ingest(warehouse, write_csv(tmp_path / "a.csv", A_HEADER, f"S1,{ids[0]},control,2026-01-05",
                                 f"S1,{ids[1]},bogus,2026-01-05"))
    _ingest(warehouse, write_csv(tmp_path / "u.csv", "site_id,participant_id,observed_on,took_up",
                                 f"S1,{ids[0]},2026-01-09,no"))
    con = duckdb.connect(str(warehouse), read_only=True)
    key = con.execute("SELECT participant_key FROM assignments").fetchone()[0]
    # RFC 2104 HMAC-SHA256 via Python's hmac module as the reference, over the documented
    # length-prefixed message: byte length of the site id, ':', site id, the same for the participant id
    msg = f"2:S1{len(ids[0])}:{ids[0]}".encode()
    expected = int(hmac.new(TEST_KEY.encode(), msg, hashlib.sha256).hexdigest()[:32], 16)
    assert key == expected
    for table in TABLES + ("study_configs", "warehouse_meta"):
        text = [str(v) for row in con.execute(f"SELECT * FROM {table}").fetchall() for v in row]
        assert not any(i in cell for cell in text for i in ids), table
    con.close()
    raw = warehouse.read_bytes()
    assert not any(i.encode() in raw for i in ids)


def test_parquet_input_and_covariates(tmp_path, key_env):
    path = tmp_path / "w.duckdb"
    cfg = parse_config({"covariates": ["age"]})
    init_warehouse(path, cfg)
    df = pd.DataFrame({"site_id": ["S1", "S1", "S1"], "participant_id": [1, 2, 3],
                       "arm": ["treatment", "control", "control"],
                       "assigned_on": pd.to_datetime(["2026-01-05"] * 3).date, "age": [30.0, None, 41.5]})
    f = tmp_path / "a.parquet"
    df.to_parquet(f, index=False)
    r = _ingest(path, f, cfg)
    assert (r.rows_read, r.rows_loaded, r.rows_quarantined) == (3, 3, 0)
    con = duckdb.connect(str(path), read_only=True)
    assert con.execute("SELECT count(*), count(value), sum(value) FROM assignment_covariates").fetchone() == (3, 2, 71.5)
    con.close()


def test_unexpected_column_rejects_file_with_suggestion(warehouse, tmp_path):
    f = write_csv(tmp_path / "a.csv", "site_id,participant_id,arm,assigned_on,cluser_id", "S1,p1,control,2026-01-05,c1")
    r = _ingest(warehouse, f)
    assert r.status == "rejected"
    assert "cluser_id" in r.message and "did you mean 'cluster_id'" in r.message and "a.csv" in r.message
    assert _counts(warehouse)["assignments"] == 0


@pytest.mark.parametrize("header,expected", [
    ("site_id,participant_id,foo", "cannot tell the record kind"),
    ("", "the file is empty"),
    ("\x00\x01garbage\xff", "looks binary"),    # NUL bytes: named as binary, not parsed
])
def test_unreadable_or_unknown_kind_is_rejected(warehouse, tmp_path, header, expected):
    f = tmp_path / "x.csv"
    f.write_bytes((header + ("\n" if header else "")).encode("latin-1"))
    r = _ingest(warehouse, f)
    assert r.status == "rejected" and expected in r.message


def test_kind_override_and_bad_kind(warehouse, tmp_path):
    f = write_csv(tmp_path / "a.csv", A_HEADER, "S1,p1,control,2026-01-05")
    r = _ingest(warehouse, f, kind="uptake")
    assert r.status == "rejected" and "need the column" in r.message
    with pytest.raises(ingest_mod.IngestError, match="did you mean 'outcome'"):
        _ingest(warehouse, f, kind="outcomes")


def test_source_rows_after_malformed_lines(warehouse, tmp_path):
    f = write_csv(tmp_path / "a.csv", A_HEADER, "S1,p1,control,2026-01-05", "S1,p2,control,x,y,z",
                  "S1,p3,control,2026-01-05", "S1,p4,control,2026-01-05,extra", "S1,p5,nope,2026-01-05")
    r = _ingest(warehouse, f)
    assert (r.rows_read, r.rows_loaded, r.rows_quarantined) == (5, 2, 3)
    q = _quarantine(warehouse)
    assert list(zip(q.source_row, q.reason)) == [(3, "malformed_row"), (5, "malformed_row"), (6, "unknown_arm")]
    con = duckdb.connect(str(warehouse), read_only=True)
    assert sorted(r[0] for r in con.execute("SELECT source_row FROM assignments").fetchall()) == [2, 4]
    con.close()


def test_wrong_key_is_refused(tmp_path, monkeypatch):
    from takeup.pipeline.warehouse import WarehouseError
    monkeypatch.setenv("TAKEUP_ID_KEY", "key-one-0123456789")
    path = tmp_path / "w.duckdb"
    init_warehouse(path)
    monkeypatch.setenv("TAKEUP_ID_KEY", "key-two-0123456789")
    f = write_csv(tmp_path / "a.csv", A_HEADER, "S1,p1,control,2026-01-05")
    with pytest.raises(WarehouseError, match="not the one"):
        ingest_paths(path, [f])


def test_warehouse_and_key_file_modes(tmp_path, monkeypatch):
    monkeypatch.delenv("TAKEUP_ID_KEY", raising=False)
    path, key_path = init_warehouse(tmp_path / "w.duckdb")
    assert path.stat().st_mode & 0o777 == 0o600
    assert key_path.stat().st_mode & 0o777 == 0o600


def test_demo_ingests_with_consistent_counts_and_replays_as_noop(demo_warehouse):
    reports = demo_warehouse["reports"]
    path = demo_warehouse["path"]
    assert all(r.adds_up for r in reports)
    assert sum(r.status == "duplicate_batch" for r in reports) == 1          # the file sent twice
    assert sum(r.status == "rejected" for r in reports) == 0
    quarantined = {Path(r.file).name: r.reasons for r in reports if r.rows_quarantined}
    assert set(quarantined) == {"C03_assignment.parquet", "C21_uptake.csv", "C09_outcome.csv"}
    before = _counts(path)
    import os
    os.environ["TAKEUP_ID_KEY"] = TEST_KEY
    try:
        again = ingest_paths(path, list(demo_warehouse["manifest"].files))
    finally:
        os.environ.pop("TAKEUP_ID_KEY", None)
    assert all(r.status == "duplicate_batch" for r in again)
    assert _counts(path) == before
