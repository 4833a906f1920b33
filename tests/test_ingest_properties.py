"""Property-based: malformed files never raise, and every row is accounted for."""

from __future__ import annotations

import duckdb
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from takeup.pipeline.ingest.batch import ingest_file
from takeup.pipeline.pseudonym import PseudonymKey
from takeup.schemas.config import StudyConfig
from takeup.schemas.ddl import create_table_sql
from takeup.schemas.records import STORAGE_TABLES

HEADERS = {
    "assignment": ["site_id", "participant_id", "arm", "assigned_on"],
    "uptake": ["site_id", "participant_id", "observed_on", "took_up"],
    "outcome": ["site_id", "participant_id", "outcome", "measured_on", "value"],
}
cell = st.one_of(
    st.sampled_from(["", " ", "S1", "S2", "treatment", "control", "CONTROL ", "2026-01-05", "2026-02-30",
                     "2999-01-01", "yes", "no", "1", "0", "maybe", "nan", "inf", "-1e308", "3.5", "score",
                     "\"quoted, comma\"", "=cmd()", "é", "1e999"]),
    st.text(alphabet=st.characters(blacklist_categories=("Cs",), blacklist_characters="\r\n\x00"), max_size=12),
)


def _memory_warehouse():
    con = duckdb.connect(":memory:")
    for table, model in STORAGE_TABLES.items():
        con.execute(create_table_sql(table, model))
    return con


@settings(max_examples=60, deadline=None, suppress_health_check=[HealthCheck.function_scoped_fixture])
@given(kind=st.sampled_from(sorted(HEADERS)),
       rows=st.lists(st.lists(cell, min_size=2, max_size=7), min_size=0, max_size=12),
       data=st.data())
def test_malformed_csv_never_raises_and_accounts_for_every_row(tmp_path_factory, kind, rows, data):
    header = HEADERS[kind]
    lines = [",".join(header)] + [",".join(r) for r in rows]
    text = "\n".join(lines) + data.draw(st.sampled_from(["\n", "", "\n\n"]))
    path = tmp_path_factory.mktemp("prop") / f"{kind}.csv"
    path.write_text(text, encoding="utf-8")
    con = _memory_warehouse()
    try:
        r = ingest_file(con, path, PseudonymKey(b"k", "test"), StudyConfig())
        if r.status == "rejected":
            assert r.message and path.name in r.message
            assert con.execute("SELECT count(*) FROM quarantine").fetchone()[0] == 0
            return
        assert r.rows_read == r.rows_loaded + r.rows_quarantined + r.rows_duplicate
        table = {"assignment": "assignments", "uptake": "uptake_events", "outcome": "outcome_measurements"}[r.kind]
        assert con.execute(f"SELECT count(*) FROM {table}").fetchone()[0] == r.rows_loaded
        assert con.execute("SELECT count(DISTINCT source_row) FROM quarantine").fetchone()[0] == r.rows_quarantined
        b = con.execute("SELECT rows_read, rows_loaded, rows_quarantined, rows_duplicate FROM batches").fetchone()
        assert b == (r.rows_read, r.rows_loaded, r.rows_quarantined, r.rows_duplicate)
    finally:
        con.close()


@settings(max_examples=30, deadline=None)
@given(raw=st.binary(max_size=300))
def test_arbitrary_bytes_never_raise(tmp_path_factory, raw):
    path = tmp_path_factory.mktemp("bytes") / "blob.csv"
    path.write_bytes(raw)
    con = _memory_warehouse()
    try:
        r = ingest_file(con, path, PseudonymKey(b"k", "test"), StudyConfig())
        assert r.status in ("loaded", "rejected")
        if r.status == "loaded":
            assert r.rows_read == r.rows_loaded + r.rows_quarantined + r.rows_duplicate
    finally:
        con.close()
