"""Export the result tables of one run to Parquet or CSV files.

One file per result table (``runs``, ``site_estimates``, ...), holding the
rows of a single run: by default the latest finished run (status ``ok`` or
``partial``, newest ``started_at``), the same run the ``latest_*`` views
show.  Columns and their order follow the result-table contract in
:mod:`takeup.schemas.results`.

Every query is run by DuckDB's ``COPY (SELECT ...) TO ...`` with bound
parameters; nothing read from the database or given by the caller is
formatted into SQL text.  Each file is first written under a temporary
name in the target directory and then renamed, so a reader never sees a
half-written file.

CSV files are meant to be opened in spreadsheets, which execute cells that
look like formulas.  Text cells beginning with ``=``, ``+``, ``-``, ``@``,
a tab or a carriage return are therefore prefixed with a single quote
``'`` (OWASP, "CSV Injection"); numeric, date and boolean columns are left
as they are so that they read back with their types.  Parquet files hold
the values unchanged.
"""

from __future__ import annotations

from takeup.pipeline.errors import ExportError  # noqa: F401  (re-exported)

import os
import secrets
from pathlib import Path

import duckdb

from takeup.schemas.config import nearest_name
from takeup.schemas.ddl import columns_of
from takeup.schemas.results import RESULT_TABLES

__all__ = ["ExportError", "FORMATS", "FORMULA_PREFIXES", "export_tables", "resolve_run_id"]

#: accepted export formats -> file extension
FORMATS: dict[str, str] = {"parquet": "parquet", "csv": "csv"}

#: first characters that make a spreadsheet read a cell as a formula (OWASP, "CSV Injection")
FORMULA_PREFIXES: tuple[str, ...] = ("=", "+", "-", "@", "\t", "\r")




def _quote(identifier: str) -> str:
    return '"' + identifier.replace('"', '""') + '"'


def resolve_run_id(con: duckdb.DuckDBPyConnection, run_id: str | None = None) -> str:
    """Return ``run_id`` after checking it exists, or the latest finished run.

    Parameters
    ----------
    con : duckdb.DuckDBPyConnection
        Open warehouse.
    run_id : str, optional
        Run to use; ``None`` selects the latest run with status ``ok`` or
        ``partial`` (newest ``started_at``, ties broken by ``run_id``, as
        in the ``latest_*`` views).

    Returns
    -------
    str
        The run id.

    Raises
    ------
    ExportError
        When ``run_id`` is not in ``runs``, or no run has finished yet.
    """
    if run_id is None:
        # fetchall, not fetchone: leave no unfinished result on the caller's connection
        rows = con.execute(
            "SELECT run_id FROM runs WHERE status IN ('ok', 'partial') "
            "ORDER BY started_at DESC, run_id DESC LIMIT 1").fetchall()
        if not rows:
            n = con.execute("SELECT count(*) FROM runs").fetchall()[0][0]
            detail = (f"the warehouse has {n} run(s), none finished with status ok or partial"
                      if n else "the warehouse has no runs yet; run the monitoring first")
            raise ExportError(f"no finished run to export: {detail}")
        return str(rows[0][0])
    rows = con.execute("SELECT run_id FROM runs WHERE run_id = ?", [run_id]).fetchall()
    if not rows:
        known = [r[0] for r in con.execute(
            "SELECT run_id FROM runs ORDER BY started_at DESC LIMIT 200").fetchall()]
        near = nearest_name(run_id, known)
        hint = f"; did you mean {near!r}?" if near else ""
        raise ExportError(f"unknown run {run_id!r}: it is not in the runs table{hint}")
    return str(rows[0][0])


def _check_format(fmt: str) -> str:
    key = str(fmt).strip().lower()
    if key in FORMATS:
        return key
    near = nearest_name(key, tuple(FORMATS))
    if near is None:
        # difflib found nothing close: still name the most similar valid format
        import difflib
        near = max(FORMATS, key=lambda f: difflib.SequenceMatcher(None, key, f).ratio())
    raise ValueError(f"unknown export format {fmt!r}; did you mean {near!r}? "
                     f"Accepted formats: {', '.join(FORMATS)}")


def _select_sql(table: str, neutralise_text: bool) -> tuple[str, list[str]]:
    """SELECT of ``table``'s contract columns for one run (``?`` = run id), and its text columns."""
    cols = columns_of(RESULT_TABLES[table])
    text_cols = [c.name for c in cols if c.sql_type == "VARCHAR"]
    parts = []
    for c in cols:
        q = _quote(c.name)
        if neutralise_text and c.sql_type == "VARCHAR":
            # constant SQL literals only: the prefixes are fixed characters, not data
            prefixes = ", ".join(f"chr({ord(p)})" for p in FORMULA_PREFIXES)
            parts.append(f"CASE WHEN left({q}, 1) IN ({prefixes}) THEN chr(39) || {q} ELSE {q} END AS {q}")
        else:
            parts.append(q)
    sql = f"SELECT {', '.join(parts)} FROM {_quote(table)} WHERE run_id = ? ORDER BY ALL"
    return sql, text_cols


def _copy_atomic(con: duckdb.DuckDBPyConnection, select_sql: str, run_id: str, target: Path,
                 fmt: str, text_cols: list[str], mode: int = 0o600) -> None:
    tmp = target.with_name(f".{target.name}.{secrets.token_hex(6)}.tmp")
    if fmt == "parquet":
        options = "FORMAT parquet"
    else:
        # quote every text cell (OWASP advises quoting cells); numbers stay unquoted
        force = f", FORCE_QUOTE ({', '.join(_quote(c) for c in text_cols)})" if text_cols else ""
        options = f"FORMAT csv, HEADER true{force}"
    try:
        con.execute(f"COPY ({select_sql}) TO ? ({options})", [run_id, str(tmp)])
        os.chmod(tmp, mode)
        os.replace(tmp, target)
    except BaseException:
        tmp.unlink(missing_ok=True)
        raise


def export_tables(con: duckdb.DuckDBPyConnection, out_dir: Path, fmt: str = "parquet",
                  run_id: str | None = None, mode: int = 0o600) -> list[Path]:
    """Write one file per result table with the rows of one run.

    Parameters
    ----------
    con : duckdb.DuckDBPyConnection
        Open warehouse (read-only connections work).
    out_dir : Path
        Directory for the files (created if missing).  Existing files of
        the same names are replaced.
    fmt : {"parquet", "csv"}
        File format (case-insensitive).
    run_id : str, optional
        Run to export; default the latest finished run.
    mode : int
        Permission bits of every file (default 0600: owner only).

    Returns
    -------
    list of Path
        The files written, in the order of :data:`takeup.schemas.results.RESULT_TABLES`
        (``runs.<ext>``, ``site_estimates.<ext>``, ...).

    Raises
    ------
    ValueError
        Unknown ``fmt``; the message names the nearest accepted format.
    ExportError
        Unknown ``run_id``, no finished run, or ``out_dir`` is an existing file.

    Notes
    -----
    In CSV files, text cells that begin with ``=``, ``+``, ``-``, ``@``, tab
    or carriage return get a leading ``'`` so spreadsheets show them as
    text instead of evaluating them; the rewrite is done in SQL on the
    VARCHAR columns only.

    References
    ----------
    OWASP Foundation. "CSV Injection". https://owasp.org/www-community/attacks/CSV_Injection
    """
    key = _check_format(fmt)
    out = Path(out_dir)
    if out.exists() and not out.is_dir():
        raise ExportError(f"--out {out} is a file; give a directory for the exported tables")
    rid = resolve_run_id(con, run_id)
    try:
        out.mkdir(parents=True, exist_ok=True)
    except (FileExistsError, NotADirectoryError):
        raise ExportError(f"--out {out}: a parent of it is a file, not a directory") from None
    written: list[Path] = []
    for table in RESULT_TABLES:
        sql, text_cols = _select_sql(table, neutralise_text=(key == "csv"))
        target = out / f"{table}.{FORMATS[key]}"
        _copy_atomic(con, sql, rid, target, key, text_cols, mode)
        written.append(target)
    return written
