"""Property-based: malformed files never raise, and every row is accounted for."""

from __future__ import annotations

import duckdb
import pytest
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


#: few distinct values, so that files repeat rows and natural keys within and across batches
_SMALL = {
    "site_id": ["S1", "S2"], "participant_id": ["P1", "P2", "P3"], "arm": ["treatment", "control"],
    "assigned_on": ["2026-01-05", "2026-01-06"], "observed_on": ["2026-01-05", "2026-01-06"],
    "took_up": ["yes", "no"], "outcome": ["score"], "measured_on": ["2026-02-05"], "value": ["1", "2.5"],
}


def _expected_classes(valid: list[tuple], stored: list[tuple], key_idx: list[int]) -> set[tuple]:
    """The documented classification, written out in Python over the checked rows.

    ``valid``: ``(_row, *values)`` of the rows that passed the checks; ``stored``: the
    stored records' values.  Returns ``(_row, _extra, *values, _dup, _conflict)`` per
    distinct row.
    """
    groups: dict[tuple, list[int]] = {}
    for row, *values in valid:
        groups.setdefault(tuple(values), []).append(row)
    per_key: dict[tuple, int] = {}
    for values in groups:
        k = tuple(values[i] for i in key_idx)
        per_key[k] = per_key.get(k, 0) + 1
    out = set()
    for values, rows in groups.items():
        k = tuple(values[i] for i in key_idx)
        same_key = [s for s in stored if tuple(s[i] for i in key_idx) == k]
        dup = any(s == values for s in same_key)
        conflict = not dup and (per_key[k] > 1 or bool(same_key))
        out.add((min(rows), len(rows) - 1, *values, dup, conflict))
    return out


@settings(max_examples=40, deadline=None, suppress_health_check=[HealthCheck.function_scoped_fixture])
@given(data=st.data())
def test_duplicates_and_conflicts_follow_the_documented_rules(tmp_path_factory, data):
    """``_valid`` after each of three assignment batches equals a plain Python model of the rules.

    Exact duplicates inside a file collapse (``_extra``); a distinct row identical to a stored
    one is a duplicate; another distinct row of the file or a stored row with the same natural
    key makes it a conflict.  (Assignment files; uptake and outcome files with conflicts: the
    regression test below.)
    """
    kind = "assignment"
    from takeup.pipeline.ingest.batch import NATURAL_KEYS
    from takeup.schemas.records import KIND_TABLE
    header = HEADERS[kind]
    folder = tmp_path_factory.mktemp("classes")
    con = _memory_warehouse()
    try:
        for n in range(3):
            rows = data.draw(st.lists(st.tuples(*(st.sampled_from(_SMALL[c]) for c in header)), min_size=1,
                                      max_size=10))
            path = folder / f"{kind}{n}.csv"
            path.write_text("\n".join([",".join(header)] + [",".join(r) for r in rows]) + "\n", encoding="utf-8")
            cols = [r[0] for r in con.execute(
                "SELECT column_name FROM duckdb_columns() WHERE table_name = $t AND column_name NOT IN "
                "('batch_id', 'source_row') ORDER BY column_index", {"t": KIND_TABLE[kind]}).fetchall()]
            qcols = ", ".join(f'"{c}"' for c in cols)
            stored = con.execute(f"SELECT {qcols} FROM {KIND_TABLE[kind]}").fetchall()
            r = ingest_file(con, path, PseudonymKey(b"k", "test"), StudyConfig(), kind=kind)
            if r.status == "duplicate_batch":         # the same content as an earlier file: nothing classified
                continue
            assert r.status == "loaded", r.message
            valid = con.execute(f"SELECT _row, {qcols} FROM _parsed WHERE NOT _bad").fetchall()
            got = set(con.execute(f"SELECT _row, _extra, {qcols}, _dup, _conflict FROM _valid").fetchall())
            assert got == _expected_classes(valid, stored, [cols.index(c) for c in NATURAL_KEYS[kind]])
    finally:
        con.close()


@pytest.mark.parametrize("kind,header,first,second,reason", [
    ("outcome", "site_id,participant_id,outcome,measured_on,value", "S1,P1,score,2026-02-05,1",
     "S1,P1,score,2026-02-05,2.5", "conflicting_outcome"),
    ("uptake", "site_id,participant_id,observed_on,took_up", "S1,P1,2026-02-05,1", "S1,P1,2026-02-05,0",
     "conflicting_uptake"),
])
def test_uptake_and_outcome_conflicts_are_quarantined_when_a_file_is_loaded_alone(tmp_path, kind, header, first,
                                                                                  second, reason):
    """Regression: quarantining the conflicts of an uptake/outcome file loaded alone referred to
    assignment_probability (a column only assignment files have), so the whole file was rejected
    with an internal binder error.  Conflicts inside the file and against a stored row."""
    con = _memory_warehouse()
    try:
        within = tmp_path / f"{kind}_within.csv"
        within.write_text(f"{header}\n{first}\n{second}\n", encoding="utf-8")
        r = ingest_file(con, within, PseudonymKey(b"k", "test"), StudyConfig(), kind=kind)
        assert r.status == "loaded" and r.reasons == {reason: 2}, r.message
        stored = tmp_path / f"{kind}_stored.csv"
        stored.write_text(f"{header}\n{first}\n", encoding="utf-8")
        assert ingest_file(con, stored, PseudonymKey(b"k", "test"), StudyConfig(), kind=kind).rows_loaded == 1
        later = tmp_path / f"{kind}_later.csv"
        later.write_text(f"{header}\n{second}\n", encoding="utf-8")
        r = ingest_file(con, later, PseudonymKey(b"k", "test"), StudyConfig(), kind=kind)
        assert r.status == "loaded" and r.reasons == {reason: 1} and r.rows_loaded == 0, r.message
    finally:
        con.close()
