"""Data safety: files are read literally and exactly as the contract says, nothing is destroyed,
raw identifiers never reach disk or messages, and every failure is one line.

Each test reproduces one crafted input of the data-safety review and checks the fixed behaviour.
"""

from __future__ import annotations

import hashlib
import hmac
import os
from datetime import date
from pathlib import Path

import duckdb
import numpy as np
import pandas as pd
import pytest

from takeup.pipeline.cli import main
from takeup.pipeline.errors import InfrastructureError, OptionError
from takeup.pipeline.ingest import batch as ingest_mod
from takeup.pipeline.ingest.batch import ingest_file
from takeup.pipeline.ingest.many_files import ingest_paths
from takeup.pipeline.pseudonym import (PseudonymKey, PseudonymKeyError, key_file_for, legacy_fingerprint, load_key)
from takeup.pipeline.warehouse import WarehouseError, check_key, connect, init_warehouse
from takeup.schemas.config import StudyConfig, parse_config
from tests.conftest import TEST_KEY, write_csv

A_HEADER = "site_id,participant_id,arm,assigned_on"
U_HEADER = "site_id,participant_id,observed_on,took_up"
O_HEADER = "site_id,participant_id,outcome,measured_on,value"


def _ingest(warehouse: Path, path: Path, config: StudyConfig | None = None, kind=None, con_setup=None):
    con = connect(warehouse)
    try:
        if con_setup:
            con.execute(con_setup)
        key = check_key(con, load_key(warehouse), warehouse)
        return ingest_file(con, path, key, config or StudyConfig(), kind=kind)
    finally:
        con.close()


def _rows(warehouse: Path, sql: str) -> list[tuple]:
    con = duckdb.connect(str(warehouse), read_only=True)
    try:
        return con.execute(sql).fetchall()
    finally:
        con.close()


def _quarantine(warehouse: Path) -> list[tuple]:
    return _rows(warehouse, "SELECT source_row, field, reason, offending_value FROM quarantine ORDER BY source_row, reason")


# ----------------------------------------------------------------------------- nothing destroyed
def test_demo_refuses_to_replace_existing_files_without_force(tmp_path, capsys, key_env):
    out = tmp_path / "demo"
    (out / "incoming").mkdir(parents=True)
    (out / "incoming" / "mine.csv").write_text("precious\n")
    (out / "study.toml").write_text('study_id = "mine"\n')
    prod = tmp_path / "prod.duckdb"
    prod.write_bytes(b"not really a warehouse, but somebody's file")
    code = main(["demo", "--out", str(out), "--warehouse", str(prod), "--no-run"])
    err = capsys.readouterr().err
    assert code == 2 and len(err.strip().splitlines()) == 1
    assert "--force" in err and str(prod) in err and "incoming" in err and "study.toml" in err
    assert prod.read_bytes() == b"not really a warehouse, but somebody's file"
    assert (out / "incoming" / "mine.csv").read_text() == "precious\n"
    assert (out / "study.toml").read_text() == 'study_id = "mine"\n'


def test_generate_demo_replaces_only_when_asked(tmp_path):
    from takeup.pipeline.demo import generate_demo
    (tmp_path / "study.toml").write_text("x = 1\n")
    with pytest.raises(FileExistsError, match="study.toml"):
        generate_demo(tmp_path)
    assert (tmp_path / "study.toml").read_text() == "x = 1\n"
    m = generate_demo(tmp_path, replace=True)
    assert m.config_path.read_text().startswith('study_id = "evening-numeracy-2026"')


def test_file_names_with_glob_characters_are_read_literally(warehouse, tmp_path):
    write_csv(tmp_path / "wk1.csv", A_HEADER, "S1,p1,control,2026-01-05")
    write_csv(tmp_path / "wk2.csv", A_HEADER, "S1,p2,treatment,2026-01-05")
    star = write_csv(tmp_path / "wk*.csv", A_HEADER, "S1,p9,control,2026-01-06")
    odd = write_csv(tmp_path / "wk[1]?.csv", A_HEADER, "S1,p8,control,2026-01-06")
    reports = ingest_paths(warehouse, [star, odd, tmp_path / "wk1.csv", tmp_path / "wk2.csv"])
    assert [(r.status, r.rows_read, r.rows_loaded) for r in reports] == [("loaded", 1, 1)] * 4
    assert _rows(warehouse, "SELECT count(*) FROM assignments") == [(4,)]
    assert _rows(warehouse, "SELECT file_name, rows_read FROM batches ORDER BY file_name") == [
        ("wk*.csv", 1), ("wk1.csv", 1), ("wk2.csv", 1), ("wk[1]?.csv", 1)]


# ----------------------------------------------------------------------------- Parquet types
def test_parquet_float_ids_are_rejected_store_ids_as_text(warehouse, tmp_path):
    f = tmp_path / "a.parquet"
    pd.DataFrame({"site_id": ["S1", "S1"], "participant_id": [1.0, 2.0], "arm": ["control", "treatment"],
                  "assigned_on": ["2026-01-05"] * 2}).to_parquet(f, index=False)
    r = _ingest(warehouse, f)
    assert r.status == "rejected" and "store ids as text" in r.message and "column 2 (participant_id)" in r.message
    assert _rows(warehouse, "SELECT count(*) FROM assignments") == [(0,)]


def test_parquet_float_took_up_from_pandas_with_a_nan(warehouse, tmp_path):
    f = tmp_path / "u.parquet"
    # pandas writes a 1/0 column holding a missing value as float64 1.0 / 0.0 / NaN
    pd.DataFrame({"site_id": ["S1"] * 4, "participant_id": ["p1", "p2", "p3", "p4"],
                  "observed_on": ["2026-01-09"] * 4, "took_up": [1.0, 0.0, np.nan, 2.0]}).to_parquet(f, index=False)
    r = _ingest(warehouse, f)
    assert (r.rows_loaded, r.rows_quarantined) == (2, 2)
    assert _rows(warehouse, "SELECT took_up FROM uptake_events ORDER BY source_row") == [(True,), (False,)]
    assert [(q[0], q[2]) for q in _quarantine(warehouse)] == [(3, "missing_value"), (4, "invalid_boolean")]


def test_parquet_time_zone_aware_timestamps_give_the_utc_date(warehouse, tmp_path):
    f = tmp_path / "a.parquet"
    # 20:00 UTC on 1 July is already 2 July in Auckland (UTC+12 in July)
    pd.DataFrame({"site_id": ["S1"], "participant_id": ["p1"], "arm": ["control"],
                  "assigned_on": pd.to_datetime(["2025-07-01T20:00:00Z"])}).to_parquet(f, index=False)
    r = _ingest(warehouse, f, con_setup="SET TimeZone = 'Pacific/Auckland'")   # as on a host in New Zealand
    assert r.rows_loaded == 1
    assert _rows(warehouse, "SELECT assigned_on FROM assignments") == [(date(2025, 7, 1),)]


# ----------------------------------------------------------------------------- cluster randomisation
def test_cluster_randomisation_needs_cluster_id(warehouse, tmp_path):
    cfg = parse_config({"randomisation_unit": "cluster"})
    f = write_csv(tmp_path / "a.csv", A_HEADER + ",cluster_id", "S1,p1,control,2026-01-05,K1",
                  "S1,p2,treatment,2026-01-05,", "S1,p3,treatment,2026-01-05,K2")
    r = _ingest(warehouse, f, cfg)
    assert (r.rows_loaded, r.rows_quarantined) == (2, 1)
    assert _quarantine(warehouse) == [(3, "cluster_id", "missing_value", None)]
    g = write_csv(tmp_path / "b.csv", A_HEADER, "S1,p4,control,2026-01-05")
    r = _ingest(warehouse, g, cfg)
    assert r.status == "rejected" and "cluster_id" in r.message and "randomises by cluster" in r.message


# ----------------------------------------------------------------------------- the contract, exactly
@pytest.mark.parametrize("value", ["2026/01/10", "2026-1-9", "2026-01-12T10:00", "20260110", "2026-01-10 "])
def test_only_iso_dates_are_dates(warehouse, tmp_path, value):
    f = write_csv(tmp_path / "a.csv", A_HEADER, "S1,p0,control,2026-01-05", f"S1,p1,control,{value}")
    r = _ingest(warehouse, f)
    if value.strip() == value:
        assert (r.rows_loaded, r.rows_quarantined) == (1, 1)
        assert _quarantine(warehouse) == [(3, "assigned_on", "invalid_date", value)]
    else:                       # surrounding white space is trimmed: the value is a valid ISO date
        assert (r.rows_loaded, r.rows_quarantined) == (2, 0)


@pytest.mark.parametrize("value,reason", [("1_000", "not_a_number"), ("1,5", "not_a_number"), ("12 kg", "not_a_number"),
                                          ("0x1A", "not_a_number"), ("-1.5e3", None), (".5", None), ("+3", None),
                                          ("Infinity", "not_finite")])
def test_numbers_are_plain_decimals(warehouse, tmp_path, value, reason):
    f = write_csv(tmp_path / "o.csv", O_HEADER, "S1,p0,score,2026-03-01,1", f'S1,p1,score,2026-03-01,"{value}"')
    r = _ingest(warehouse, f)
    assert r.rows_quarantined == (1 if reason else 0)
    if reason:
        assert [q[2] for q in _quarantine(warehouse)] == [reason]


def test_implausible_dates_are_quarantined(warehouse, tmp_path):
    f = write_csv(tmp_path / "a.csv", A_HEADER, "S1,p1,control,2026-01-05", "S1,p2,control,1925-01-05",
                  "S1,p3,control,1850-01-05")
    r = _ingest(warehouse, f)         # default window: the ingestion day minus 10 years
    assert (r.rows_loaded, r.rows_quarantined) == (1, 2)
    assert [(q[0], q[2], q[3]) for q in _quarantine(warehouse)] == [(3, "implausible_date", "1925-01-05"),
                                                                    (4, "invalid_date", "1850-01-05")]
    cfg = parse_config({"dates": {"earliest": "2025-06-01"}})
    g = write_csv(tmp_path / "b.csv", A_HEADER, "S1,p4,control,2025-05-31", "S1,p5,control,2025-06-01")
    r = _ingest(warehouse, g, cfg)
    assert (r.rows_loaded, r.rows_quarantined) == (1, 1)


def test_as_of_is_bounded_by_the_data(warehouse, tmp_path):
    from takeup.pipeline.run.stages import run_monitoring
    _ingest(warehouse, write_csv(tmp_path / "a.csv", A_HEADER, "S1,p1,control,2026-01-05",
                                 "S1,p2,treatment,2026-01-05"))
    with pytest.raises(OptionError, match="too far ahead"):
        run_monitoring(warehouse, as_of=date(2250, 1, 1))
    with pytest.raises(OptionError, match="before the first assignment"):
        run_monitoring(warehouse, as_of=date(1925, 1, 1))
    assert _rows(warehouse, "SELECT count(*) FROM runs") == [(0,)]        # nothing started, nothing written


@pytest.mark.parametrize("newline", ["\n", "\r\n"])
def test_source_row_stays_the_physical_line_after_blank_lines(warehouse, tmp_path, newline):
    f = tmp_path / "a.csv"
    lines = [A_HEADER, "S1,p1,control,2026-01-05", "", "S1,p2,control,2026-01-05", "", "",
             "S1,p3,control,2026-01-05,extra", "S1,p4,nope,2026-01-05", "", 'S1,"p5",control,2026-01-05', ""]
    f.write_bytes(newline.join(lines).encode())
    r = _ingest(warehouse, f)
    assert (r.rows_read, r.rows_loaded, r.rows_quarantined) == (5, 3, 2)
    assert [(q[0], q[2]) for q in _quarantine(warehouse)] == [(7, "malformed_row"), (8, "unknown_arm")]
    assert _rows(warehouse, "SELECT source_row FROM assignments ORDER BY 1") == [(2,), (4,), (10,)]
    assert _quarantine(warehouse)[0][3] == "more fields than the header"


def test_unterminated_quote_names_its_line(warehouse, tmp_path):
    f = tmp_path / "a.csv"
    f.write_text(f'{A_HEADER}\nS1,p1,control,2026-01-05\nS1,"p2,control,2026-01-05\nS1,p3,control,2026-01-05\n')
    r = _ingest(warehouse, f)
    assert r.status == "rejected" and "line 3" in r.message and "never closed" in r.message
    assert "sniff" not in r.message.lower()


def test_duplicate_header_names_are_rejected(warehouse, tmp_path):
    f = write_csv(tmp_path / "a.csv", "site_id,arm,participant_id,Arm,assigned_on", "S1,control,p1,treatment,2026-01-05")
    r = _ingest(warehouse, f)
    assert r.status == "rejected"
    assert "column 'arm' appears twice" in r.message and "did you mean" not in r.message


def test_ids_are_nfc_normalised_trimmed_and_control_characters_refused(warehouse, tmp_path):
    nfc, nfd = "Caf\u00e9", "Cafe\u0301"
    f = tmp_path / "a.csv"
    f.write_text(f"{A_HEADER}\n{nfc},\tp1,control,2026-01-05\n{nfd},p2 ,treatment,2026-01-05\n"
                 "S\u0007X,p3,control,2026-01-05\nS2,p\u001f4,control,2026-01-05\n", encoding="utf-8")
    r = _ingest(warehouse, f)
    assert (r.rows_loaded, r.rows_quarantined) == (2, 2)
    assert _rows(warehouse, "SELECT DISTINCT site_id FROM assignments") == [(nfc,)]
    assert [(q[1], q[2], q[3]) for q in _quarantine(warehouse)] == [("site_id", "control_character", None),
                                                                    ("participant_id", "control_character", None)]
    # the tab and the trailing blank are trimmed before hashing: the same participant as "p1" / "p2"
    key = load_key(warehouse)
    assert sorted(k for (k,) in _rows(warehouse, "SELECT participant_key FROM assignments")) == sorted(
        [key.pseudonym(nfc, "p1"), key.pseudonym(nfc, "p2")])


def test_conflicting_rows_inside_one_file_follow_the_documented_rule(warehouse, tmp_path):
    # README: inside one file, all rows sharing a key with other values are quarantined; against
    # stored rows, the stored one stays
    f = write_csv(tmp_path / "a.csv", A_HEADER, "S1,p1,control,2026-01-05", "S1,p1,treatment,2026-01-05")
    r = _ingest(warehouse, f)
    assert (r.rows_loaded, r.rows_quarantined) == (0, 2)
    readme = (Path(__file__).resolve().parents[1] / "README.md").read_text()
    prose = " ".join(readme.replace("*", "").lower().split())
    assert "inside one file, every row of a conflicting key is quarantined" in prose


# ----------------------------------------------------------------------------- privacy
def test_headerless_file_is_rejected_without_echoing_its_first_row(warehouse, tmp_path):
    secret = "RAW-HEADERLESS-0042"
    f = write_csv(tmp_path / "a.csv", f"S1,{secret},control,2026-01-05", "S1,RAW-HEADERLESS-0043,control,2026-01-05")
    r = _ingest(warehouse, f)
    assert r.status == "rejected" and "header" in r.message
    assert secret not in r.message and "2026-01-05" not in r.message
    assert not any(secret in str(v) for row in _rows(warehouse, "SELECT * FROM batches") for v in row)


def test_unknown_header_is_described_by_position(warehouse, tmp_path):
    f = write_csv(tmp_path / "a.csv", "site_id,participant_id,arm,assigned_on,RAW-ID-77", "S1,p1,control,2026-01-05,x")
    r = _ingest(warehouse, f)
    assert r.status == "rejected" and "column 5" in r.message and "RAW-ID-77" not in r.message


def test_shifted_columns_never_copy_the_value(warehouse, tmp_path):
    cfg = parse_config({"sites": [{"site_id": "S1"}], "covariates": ["age"]})
    # participant ids slid into site_id and into the covariate column
    f = write_csv(tmp_path / "a.csv", A_HEADER + ",age", "RAW-SHIFT-1,S1,control,2026-01-05,30",
                  "S1,p2,control,2026-01-05,RAW-SHIFT-2", "S1,p3,control,2026-01-05,41")
    r = _ingest(warehouse, f, cfg)
    assert (r.rows_loaded, r.rows_quarantined) == (1, 2)
    assert _quarantine(warehouse) == [(2, "site_id", "unknown_site", None), (3, "age", "not_a_number", None)]


def test_shifted_columns_without_a_registry_reject_the_file(warehouse, tmp_path):
    rows = [f"RAW-NOREG-{i:04d},S1,control,2026-01-05" for i in range(40)]
    r = _ingest(warehouse, write_csv(tmp_path / "a.csv", A_HEADER, *rows))
    assert r.status == "rejected" and "column 1 (site_id)" in r.message and "RAW-NOREG" not in r.message
    assert _rows(warehouse, "SELECT count(*) FROM assignments") == [(0,)]


def test_pseudonym_encoding_is_injective():
    key = PseudonymKey(b"0123456789abcdef0123", "test")
    # the old separator encoding gave these two pairs the same message
    assert key.message("A\x1fB", "C") != key.message("A", "B\x1fC")
    assert key.with_encoding("separator").message("A\x1fB", "C") == key.with_encoding("separator").message("A", "B\x1fC")
    # RFC 2104 reference: Python's hmac over the documented message
    assert key.pseudonym("S1", "p1") == int(hmac.new(key.key, b"2:S12:p1", hashlib.sha256).hexdigest()[:32], 16)


def test_sql_pseudonym_equals_the_python_reference_for_any_ids(warehouse, tmp_path):
    ids = [("S1", "p:1"), ("S1", "12:x"), ("Zürich-Nord", "Ünal-7"), ("S1", "a" * 150)]
    f = tmp_path / "a.csv"
    f.write_text(A_HEADER + "\n" + "".join(f"{s},{p},control,2026-01-05\n" for s, p in ids), encoding="utf-8")
    assert _ingest(warehouse, f).rows_loaded == 4
    key = load_key(warehouse)
    got = sorted(k for (k,) in _rows(warehouse, "SELECT participant_key FROM assignments"))
    assert got == sorted(key.pseudonym(s, p) for s, p in ids)


def test_short_user_keys_are_refused_and_generated_keys_are_long(tmp_path, monkeypatch):
    monkeypatch.setenv("TAKEUP_ID_KEY", "short-key")
    with pytest.raises(PseudonymKeyError, match="at least 16"):
        load_key(tmp_path / "w.duckdb")
    monkeypatch.delenv("TAKEUP_ID_KEY")
    path, key_path = init_warehouse(tmp_path / "w.duckdb")
    assert len(bytes.fromhex(key_path.read_text().strip())) >= 32


def test_key_check_is_salted_and_slow_not_a_plain_fingerprint(tmp_path, key_env):
    a, _ = init_warehouse(tmp_path / "a.duckdb")
    b, _ = init_warehouse(tmp_path / "b.duckdb")
    meta_a = dict(_rows(a, "SELECT key, value FROM warehouse_meta"))
    meta_b = dict(_rows(b, "SELECT key, value FROM warehouse_meta"))
    assert "key_fingerprint" not in meta_a
    assert meta_a["key_check"].startswith("scrypt$") and meta_a["key_check"] != meta_b["key_check"]
    assert meta_a["schema_version"] == "3" and meta_a["pseudonym_encoding"] == "length_prefixed"


def test_schema_1_warehouse_is_upgraded_and_keeps_its_pseudonyms(tmp_path, key_env):
    path, _ = init_warehouse(tmp_path / "old.duckdb")
    key = PseudonymKey(TEST_KEY.encode(), "test")
    con = duckdb.connect(str(path))       # turn it into what schema version 1 wrote
    con.execute("DELETE FROM warehouse_meta")
    con.executemany("INSERT INTO warehouse_meta VALUES (?, ?)",
                    [("schema_version", "1"), ("key_fingerprint", legacy_fingerprint(key)), ("created_at", "x")])
    con.close()
    f = write_csv(tmp_path / "a.csv", A_HEADER, "S1,p1,control,2026-01-05")
    assert ingest_paths(path, [f])[0].rows_loaded == 1
    meta = dict(_rows(path, "SELECT key, value FROM warehouse_meta"))
    assert meta["schema_version"] == "3" and meta["pseudonym_encoding"] == "separator"
    assert "key_fingerprint" not in meta and meta["key_check"].startswith("scrypt$")
    # the stored rows keep the encoding the warehouse was built with (RFC 2104 reference, old message)
    expected = int(hmac.new(TEST_KEY.encode(), b"S1\x1fp1", hashlib.sha256).hexdigest()[:32], 16)
    assert _rows(path, "SELECT participant_key FROM assignments") == [(expected,)]
    os.environ["TAKEUP_ID_KEY"] = "another-key-0123456789"
    try:
        with pytest.raises(WarehouseError, match="not the one"):
            ingest_paths(path, [f])
    finally:
        os.environ["TAKEUP_ID_KEY"] = TEST_KEY


def test_files_are_private(tmp_path, key_env):
    from takeup.pipeline.run.stages import run_monitoring
    w = tmp_path / "w.duckdb"
    assert main(["init", "--warehouse", str(w)]) == 0
    rows = [f"S1,p{i},{'treatment' if i % 2 else 'control'},2026-01-05" for i in range(40)]
    ups = [f"S1,p{i},2026-01-20,{i % 3 == 0}" for i in range(40)]
    ingest_paths(w, [write_csv(tmp_path / "a.csv", A_HEADER, *rows), write_csv(tmp_path / "u.csv", U_HEADER, *ups)])
    run_monitoring(w, as_of=date(2026, 2, 1))
    assert main(["export", "--warehouse", str(w), "--out", str(tmp_path / "exp"), "--format", "csv"]) == 0
    assert main(["report", "--warehouse", str(w), "--out", str(tmp_path / "r.html")]) == 0
    assert main(["report", "--warehouse", str(w), "--out", str(tmp_path / "shared.html"), "--mode", "640"]) == 0
    assert (tmp_path / "w.duckdb.tmp").stat().st_mode & 0o777 == 0o700
    for p in [w, *tmp_path.joinpath("exp").iterdir(), tmp_path / "r.html", *tmp_path.glob("w.duckdb*")]:
        if p.is_file():
            assert p.stat().st_mode & 0o077 == 0, p
    assert (tmp_path / "shared.html").stat().st_mode & 0o777 == 0o640


def test_privacy_scan_of_every_file_and_output(tmp_path, monkeypatch, capsys):
    """Plant raw ids, run crafted ingestions (headerless, shifted columns, memory pressure), a run,
    exports and the report; no planted id appears in any file of the warehouse directory (the
    database, .wal, key, spill directory), in any output, or in anything printed."""
    monkeypatch.setenv("TAKEUP_ID_KEY", TEST_KEY)
    home = tmp_path / "wh"
    home.mkdir()
    w = home / "w.duckdb"
    cfg = tmp_path / "study.toml"
    cfg.write_text('study_id = "scan"\ncovariates = ["age"]\n[[sites]]\nsite_id = "S1"\n[[sites]]\nsite_id = "S2"\n')
    assert main(["init", "--warehouse", str(w), "--config", str(cfg)]) == 0
    inc = tmp_path / "incoming"
    inc.mkdir()
    planted = [f"PLANTED-{i:07d}-ID" for i in range(300)]
    n_big = 300_000
    big = inc / "big.csv"
    with open(big, "w") as fh:   # memory pressure: a large file under a small memory budget
        fh.write(A_HEADER + ",age\n")
        fh.writelines(f"S{1 + i % 2},PLANTED-{i:07d}-ID,{'treatment' if i % 2 else 'control'},2026-01-05,{20 + i % 50}\n"
                      for i in range(n_big))
    write_csv(inc / "headerless.csv", f"S1,{planted[0]},control,2026-01-05,33", f"S1,{planted[1]},control,2026-01-05,1")
    write_csv(inc / "shifted.csv", A_HEADER + ",age", f"{planted[2]},S1,control,2026-01-05,3",
              f"S2,p-ok,control,2026-01-05,{planted[3]}")
    write_csv(inc / "uptake.csv", U_HEADER, *[f"S{1 + i % 2},{planted[i]},2026-01-19,{i % 3 == 0}" for i in range(4, 300)])
    spill_seen: list[tuple[str, int, int]] = []
    real_parse = ingest_mod._parse

    def parse_and_look(con, *args, **kwargs):      # while the raw rows are staged: what is on disk?
        real_parse(con, *args, **kwargs)
        tmp = home / "w.duckdb.tmp"
        spill_seen.append(("<dir>", tmp.stat().st_mode & 0o777, 0))
        spill_seen.extend((p.name, p.stat().st_mode & 0o777, p.stat().st_size) for p in tmp.iterdir())

    monkeypatch.setattr(ingest_mod, "_parse", parse_and_look)
    monkeypatch.setenv("TAKEUP_MEMORY_LIMIT", "60MB")
    code = main(["ingest", "--warehouse", str(w), str(big)])
    monkeypatch.delenv("TAKEUP_MEMORY_LIMIT")
    assert code in (0, 4)             # loaded after spilling, or refused as out of memory: never rejected
    assert main(["ingest", "--warehouse", str(w), str(inc / "headerless.csv"), str(inc / "shifted.csv"),
                 str(inc / "uptake.csv")]) == 1
    assert main(["run", "--warehouse", str(w), "--as-of", "2026-02-01"]) in (0, 1)
    assert main(["export", "--warehouse", str(w), "--out", str(tmp_path / "out" / "csv"), "--format", "csv"]) == 0
    assert main(["export", "--warehouse", str(w), "--out", str(tmp_path / "out" / "pq")]) == 0
    assert main(["report", "--warehouse", str(w), "--out", str(tmp_path / "out" / "report.html")]) == 0
    assert main(["alerts", "--warehouse", str(w)]) == 0
    printed = capsys.readouterr()
    assert all(mode == 0o700 for name, mode, _ in spill_seen if name == "<dir>")
    assert all(mode & 0o077 == 0 for name, mode, _ in spill_seen if name != "<dir>")
    # the memory budget did make DuckDB spill (otherwise this test would not test spilling)
    assert any(size > 0 for name, _, size in spill_seen if name != "<dir>"), spill_seen
    needles = [p.encode() for p in planted] + [b"PLANTED-"]
    files = [p for p in [*home.rglob("*"), *(tmp_path / "out").rglob("*")] if p.is_file()]
    assert any(p.name == "w.duckdb" for p in files) and len(files) > 5
    for p in files:
        data = p.read_bytes()
        assert not any(n in data for n in needles), p
    assert "PLANTED-" not in printed.out + printed.err
    rej = _rows(w, "SELECT file_name, message FROM batches WHERE status = 'rejected' ORDER BY 1")
    assert [r[0] for r in rej] == ["headerless.csv"]


# ----------------------------------------------------------------------------- one-line failures
def _one_line_err(capsys) -> str:
    err = capsys.readouterr().err
    assert len(err.strip().splitlines()) == 1, err
    assert "Traceback" not in err
    return err


def test_cli_failures_are_one_line_with_the_right_exit_code(tmp_path, capsys, key_env):
    w = tmp_path / "w.duckdb"
    assert main(["init", "--warehouse", str(w)]) == 0
    ingest_paths(w, [write_csv(tmp_path / "a.csv", A_HEADER, "S1,p1,control,2026-01-05", "S1,p2,treatment,2026-01-05")])
    capsys.readouterr()
    assert main(["run", "--warehouse", str(w), "--as-of", "2300-01-01"]) == 2
    assert "--as-of 2300-01-01" in _one_line_err(capsys)
    assert main(["run", "--warehouse", str(w), "--as-of", "2026-01-31", "--quiet"]) in (0, 1)
    capsys.readouterr()
    a_file = tmp_path / "exists.txt"
    a_file.write_text("mine\n")
    assert main(["export", "--warehouse", str(w), "--out", str(a_file)]) == 2
    assert "is a file" in _one_line_err(capsys) and a_file.read_text() == "mine\n"
    assert main(["report", "--warehouse", str(w), "--out", str(tmp_path)]) == 2
    assert "is a directory" in _one_line_err(capsys)
    bad = tmp_path / "study.toml"
    bad.write_text('study_id = "x"\n[schedule]\ncron = "not a cron"\n')
    assert main(["serve", "--warehouse", str(w), "--config", str(bad), "--once"]) == 2
    assert "schedule.cron" in capsys.readouterr().err
    bad.write_text('study_id = "x"\n[schedule]\ntimezone = "Mars/Olympus"\n')
    assert main(["serve", "--warehouse", str(w), "--config", str(bad), "--once"]) == 2
    assert "unknown time zone" in capsys.readouterr().err


def test_internal_errors_are_one_line_and_traceback_only_under_debug(tmp_path, capsys, monkeypatch, key_env):
    from takeup.pipeline import cli
    w = tmp_path / "w.duckdb"
    assert main(["init", "--warehouse", str(w)]) == 0
    capsys.readouterr()

    def broken(args):
        raise KeyError("RAW-IN-A-BUG-42")

    monkeypatch.setitem(cli.COMMANDS, "runs", broken)
    assert main(["runs", "--warehouse", str(w)]) == 3
    err = _one_line_err(capsys)
    assert "internal error (KeyError)" in err and "RAW-IN-A-BUG-42" not in err
    assert main(["runs", "--warehouse", str(w), "--log-level", "debug"]) == 3
    err = capsys.readouterr().err
    assert "Traceback" in err and "broken" in err


def test_log_level_info_logs(tmp_path, capsys, key_env):
    w = tmp_path / "w.duckdb"
    assert main(["init", "--warehouse", str(w)]) == 0
    f = write_csv(tmp_path / "a.csv", A_HEADER, "S1,p1,control,2026-01-05")
    assert main(["ingest", "--warehouse", str(w), "--log-level", "info", str(f)]) == 0
    assert "INFO takeup: ingest: 1 path(s)" in capsys.readouterr().err
    assert main(["ingest", "--warehouse", str(w), str(f)]) == 0
    assert "INFO" not in capsys.readouterr().err


def test_out_of_memory_is_named_and_never_a_rejected_file(warehouse, tmp_path, monkeypatch, capsys):
    def oom(*args, **kwargs):
        raise duckdb.OutOfMemoryException("Out of Memory Error: could not allocate block of size 256 KiB")

    monkeypatch.setattr(ingest_mod, "_classify_valid", oom)
    f = write_csv(tmp_path / "a.csv", A_HEADER, "S1,p1,control,2026-01-05")
    with pytest.raises(InfrastructureError, match="out of memory"):
        ingest_paths(warehouse, [f])
    assert _rows(warehouse, "SELECT count(*) FROM batches") == [(0,)]
    assert main(["ingest", "--warehouse", str(warehouse), str(f)]) == 4
    assert "out of memory" in _one_line_err(capsys)
    monkeypatch.undo()
    monkeypatch.setenv("TAKEUP_ID_KEY", TEST_KEY)
    assert ingest_paths(warehouse, [f])[0].status == "loaded"     # the same file loads once memory allows


def test_unreadable_file_is_a_permission_problem_not_a_rejection(warehouse, tmp_path, monkeypatch):
    f = write_csv(tmp_path / "a.csv", A_HEADER, "S1,p1,control,2026-01-05")

    def denied(path, scan_lines):
        raise PermissionError(13, "Permission denied", str(path))

    monkeypatch.setattr(ingest_mod, "_read_pass", denied)
    with pytest.raises(InfrastructureError, match="permission denied"):
        ingest_paths(warehouse, [f])
    assert _rows(warehouse, "SELECT count(*) FROM batches") == [(0,)]


def test_serve_ingests_before_monitoring_never_at_the_same_instant(tmp_path):
    from takeup.flows.serve import build_deployments
    cfg = parse_config({"study_id": "s", "schedule": {"cron": "15 7 * * 2"}})
    deps = build_deployments(tmp_path / "w.duckdb", cfg, incoming=tmp_path)
    active = [(d.name, d.flow_name) for d in deps for sch in d.schedules if sch.active]
    assert active == [("s-monitor", "takeup-ingest-then-monitor")]      # the only scheduled flow run
    assert [d.schedules[0].active for d in deps if d.name == "s-ingest"] == [False]
    only_monitor = build_deployments(tmp_path / "w.duckdb", cfg)
    assert [(d.name, d.flow_name) for d in only_monitor] == [("s-monitor", "takeup-monitor")]
