"""Files that are not the contract's CSV get the right message, or are read the right way.

Each case is a file as other software writes it (semicolon- or tab-separated, Windows-1252,
gzip, a workbook, binary garbage, a 5 MB field, 100,000 columns, Parquet of the wrong
types); the checks are on the status, the reason (naming file, row or field) and the row
accounting ``read = loaded + quarantined + duplicate``.
"""

from __future__ import annotations

import gzip
import zipfile
from pathlib import Path

import duckdb
import pandas as pd
import pytest

from takeup.pipeline.cli import main
from takeup.pipeline.ingest.many_files import ingest_paths
from takeup.pipeline.pseudonym import load_key
from tests.conftest import write_csv

A_HEADER = "site_id,participant_id,arm,assigned_on"


def _one(warehouse: Path, f: Path, **kw):
    r = ingest_paths(warehouse, [f], **kw)[0]
    assert r.adds_up
    return r


def _rows(warehouse: Path, sql: str):
    con = duckdb.connect(str(warehouse), read_only=True)
    try:
        return con.execute(sql).fetchall()
    finally:
        con.close()


@pytest.mark.parametrize("sep,word", [(";", "semicolon"), ("\t", "tab")])
def test_semicolon_and_tab_files_are_read_or_refused_by_name(warehouse, tmp_path, sep, word):
    f = tmp_path / "a.csv"
    f.write_text(A_HEADER.replace(",", sep) + f"\nS1{sep}p1{sep}control{sep}2026-01-05\n"
                 f"S1{sep}p2{sep}treatment{sep}2026-01-05\n")
    r = _one(warehouse, f, delimiter=",")
    assert r.status == "rejected" and f"looks {word}-separated" in r.message and "a.csv" in r.message
    r = _one(warehouse, f)                       # --delimiter auto, the default
    assert (r.status, r.rows_loaded) == ("loaded", 2) and f"{word}-separated" in r.message


def test_duplicate_header_still_named_with_a_semicolon_delimiter(warehouse, tmp_path):
    f = write_csv(tmp_path / "a.csv", "site_id;arm;participant_id;Arm;assigned_on", "S1;control;p1;treatment;2026-01-05")
    r = _one(warehouse, f)
    assert r.status == "rejected" and "column 'arm' appears twice" in r.message


def test_windows_1252_is_named_and_read_with_encoding(warehouse, tmp_path, capsys):
    f = tmp_path / "a.csv"
    f.write_bytes((A_HEADER + "\nCaf\u00e9,p1,control,2026-01-05\nS2,p\u20ac2,treatment,2026-01-05\n").encode("cp1252"))
    r = _one(warehouse, f)
    assert r.status == "rejected"
    assert "line 2: the file is not UTF-8 (looks like Latin-1/Windows-1252)" in r.message
    assert "re-export it as UTF-8 or pass --encoding" in r.message
    assert main(["ingest", "--warehouse", str(warehouse), "--encoding", "cp1252", str(f)]) == 0
    assert sorted(s for (s,) in _rows(warehouse, "SELECT site_id FROM assignments")) == ["Caf\u00e9", "S2"]
    key = load_key(warehouse)
    assert (key.pseudonym("S2", "p\u20ac2"),) in _rows(warehouse, "SELECT participant_key FROM assignments")
    with pytest.raises(SystemExit) as e:             # argparse: usage error
        main(["ingest", "--warehouse", str(warehouse), "--encoding", "klingon", str(f)])
    assert e.value.code == 2 and "unknown text encoding" in capsys.readouterr().err


def test_gzip_csv_is_read_and_counted_by_its_lines(warehouse, tmp_path):
    f = tmp_path / "wk1.csv.gz"
    f.write_bytes(gzip.compress((A_HEADER + "\nS1,p1,control,2026-01-05\n\nS1,p2,nope,2026-01-05\n").encode()))
    r = _one(warehouse, f)
    assert (r.status, r.rows_read, r.rows_loaded, r.rows_quarantined) == ("loaded", 2, 1, 1)
    assert _rows(warehouse, "SELECT source_row, reason FROM quarantine") == [(4, "unknown_arm")]  # blank line 3 counted
    assert _one(warehouse, f).status == "duplicate_batch"
    broken = tmp_path / "cut.csv.gz"
    broken.write_bytes(f.read_bytes()[:-12])
    r = _one(warehouse, broken)
    assert r.status == "rejected" and "gzip data is truncated or damaged" in r.message


@pytest.mark.parametrize("name,members,word", [
    ("book.xlsx", {"[Content_Types].xml": "<x/>", "xl/workbook.xml": "<x/>"}, "Excel workbook (.xlsx)"),
    ("sheet.ods", {"mimetype": "application/vnd.oasis.opendocument.spreadsheet"}, "OpenDocument spreadsheet"),
])
def test_spreadsheets_are_told_to_export_as_csv(warehouse, tmp_path, name, members, word):
    f = tmp_path / name
    with zipfile.ZipFile(f, "w") as z:
        for k, v in members.items():
            z.writestr(k, v)
    r = _one(warehouse, f)
    assert r.status == "rejected" and word in r.message and "export it as CSV" in r.message
    assert _rows(warehouse, "SELECT status FROM batches") == [("rejected",)]


def test_header_only_binary_and_huge_files_get_their_reason(warehouse, tmp_path):
    f = write_csv(tmp_path / "h.csv", A_HEADER)
    r = _one(warehouse, f)
    assert r.status == "rejected" and "names its columns but holds no records" in r.message
    f = tmp_path / "b.csv"
    f.write_bytes(bytes(range(256)) * 40)
    r = _one(warehouse, f)
    assert r.status == "rejected" and "looks binary" in r.message
    f = tmp_path / "wide.csv"
    f.write_text(",".join(f"c{i}" for i in range(100_000)) + "\n" + ",".join("1" * 100_000) + "\n")
    r = _one(warehouse, f)
    assert r.status == "rejected" and "the header has 100,000 columns" in r.message


def test_a_5_mb_field_is_one_quarantined_row_naming_the_field(warehouse, tmp_path):
    f = write_csv(tmp_path / "a.csv", A_HEADER, "S1,p1,control,2026-01-05", "S1," + "x" * 5_000_000 + ",control,2026-01-05",
                  "S1,p3,treatment,2026-01-05")
    r = _one(warehouse, f)
    assert (r.status, r.rows_read, r.rows_loaded, r.rows_quarantined) == ("loaded", 3, 2, 1)
    assert _rows(warehouse, "SELECT source_row, field, reason, offending_value FROM quarantine") == [
        (3, "participant_id", "too_long", None)]


def test_parquet_columns_of_the_wrong_type_are_quarantined_by_field(warehouse, tmp_path):
    f = tmp_path / "a.parquet"
    pd.DataFrame({"site_id": ["S1", "S1"], "participant_id": ["p1", "p2"], "arm": [1, 0],
                  "assigned_on": [20260105, 20260106]}).to_parquet(f)
    r = _one(warehouse, f)
    assert (r.status, r.rows_read, r.rows_quarantined) == ("loaded", 2, 2)
    assert sorted(set(_rows(warehouse, "SELECT field, reason FROM quarantine"))) == [
        ("arm", "unknown_arm"), ("assigned_on", "invalid_date")]
    f = tmp_path / "u.parquet"
    pd.DataFrame({"site_id": [1.5], "participant_id": ["p1"], "observed_on": ["2026-01-05"],
                  "took_up": ["maybe"]}).to_parquet(f)
    r = _one(warehouse, f)
    assert r.status == "rejected" and "column 1 (site_id) holds DOUBLE numbers" in r.message


def test_exit_codes_follow_the_contract(warehouse, tmp_path, capsys):
    good = write_csv(tmp_path / "g.csv", A_HEADER, "S1,p1,control,2026-01-05")
    semi = tmp_path / "s.csv"
    semi.write_text(A_HEADER.replace(",", ";") + "\nS1;p2;control;2026-01-05\n")
    assert main(["ingest", "--warehouse", str(warehouse), str(good), str(semi)]) == 0
    assert "read as semicolon-separated" in capsys.readouterr().out
    bad = tmp_path / "x.xlsx"
    bad.write_bytes(b"PK\x03\x04" + b"\x00" * 64)
    assert main(["ingest", "--warehouse", str(warehouse), str(bad)]) == 1
    with pytest.raises(SystemExit) as e:
        main(["ingest", "--warehouse", str(warehouse), "--delimiter", "colon", str(good)])
    assert e.value.code == 2
