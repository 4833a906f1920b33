"""Validated, atomic ingestion of site files into the warehouse.

One file is one batch and loads in one transaction.  The file is read by
DuckDB (CSV or Parquet) into a temporary stage, every field is parsed and
checked by one generated ``SELECT`` (:mod:`takeup.pipeline.ingest.row_checks`), rows that
fail go to ``quarantine`` with a reason, exact duplicates (inside the file
or already stored) are counted and dropped, records that contradict a
stored record with the same key are quarantined as ``conflicting_*``, and
the rest is stored with participant identifiers replaced by their keyed
pseudonym.  For every file ``rows_read = rows_loaded + rows_quarantined +
rows_duplicate``.

Uptake and outcome rows whose participant has no assignment yet are
stored all the same ("pending"); the estimation joins them as soon as the
assignment arrives, so arrival order never loses data.
"""

from __future__ import annotations

from takeup.pipeline.errors import IngestError, InfrastructureError, infrastructure_problem  # noqa: F401

import csv
import hashlib
import io
import os
import re
import unicodedata
from dataclasses import dataclass, field
from datetime import date, datetime, timezone
from pathlib import Path

import duckdb
import numpy as np

from takeup.pipeline.pseudonym import PseudonymKey
from takeup.pipeline.ingest.sniff import SourcePlan, sniff_source
from takeup.pipeline.ingest.row_checks import (ParsePlan, build_parse_plan, is_numeric_type, known_columns,
                                               required_columns)
from takeup.pipeline.warehouse import transaction
from takeup.schemas.config import StudyConfig, nearest_name
from takeup.schemas.ddl import columns_of
from takeup.schemas.records import KIND_TABLE, RECORD_KINDS, STORED_MODELS

__all__ = ["IngestError", "BatchReport", "ingest_file", "file_sha256", "detect_kind", "NATURAL_KEYS"]

#: natural key per kind: a second record with the same key and other values is a conflict
NATURAL_KEYS: dict[str, tuple[str, ...]] = {
    "assignment": ("site_id", "participant_key"),
    "uptake": ("site_id", "participant_key", "observed_on"),
    "outcome": ("site_id", "participant_key", "outcome", "measured_on"),
}
_CONFLICT_REASON = {"assignment": "conflicting_assignment", "uptake": "conflicting_uptake",
                    "outcome": "conflicting_outcome"}




@dataclass(frozen=True)
class BatchReport:
    """What happened to one file."""

    file: str
    status: str                 # loaded | duplicate_batch | rejected (| deferred: a drop-folder file still being written)
    batch_id: str | None = None
    kind: str | None = None
    rows_read: int = 0
    rows_loaded: int = 0
    rows_quarantined: int = 0
    rows_duplicate: int = 0
    rows_pending: int = 0       # loaded uptake/outcome rows still waiting for their assignment
    reasons: dict[str, int] = field(default_factory=dict)
    message: str | None = None

    @property
    def adds_up(self) -> bool:
        return self.rows_read == self.rows_loaded + self.rows_quarantined + self.rows_duplicate


def file_sha256(path: Path) -> str:
    return _read_pass(path, scan_lines=False)[0]


def _read_pass(path: Path, scan_lines: bool) -> tuple[str, list[int]]:
    """SHA-256 of the file and, for CSV, the physical numbers of its blank lines outside quotes.

    One pass in 1 MiB chunks; the line scan is vectorised (numpy) and keeps the parity of
    quote characters across chunks, so a blank line inside a quoted value is not counted.
    DuckDB's CSV reader skips blank lines; knowing them keeps ``source_row`` the physical line.
    """
    h = hashlib.sha256()
    blanks: list[np.ndarray] = []
    line = 1            # physical line number at the start of the chunk
    pending = 0         # bytes of the current (unterminated) line seen in earlier chunks
    pending_cr = False  # ... and whether they are exactly one carriage return
    parity = 0          # quote characters seen so far, mod 2
    with open(path, "rb") as fh:
        for chunk in iter(lambda: fh.read(1 << 20), b""):
            h.update(chunk)
            if not scan_lines:
                continue
            buf = np.frombuffer(chunk, dtype=np.uint8)
            nl = np.flatnonzero(buf == 10)
            quotes = np.flatnonzero(buf == 34)
            if len(nl):
                starts = np.concatenate(([0], nl[:-1] + 1))
                length = nl - starts
                length[0] += pending
                ends_cr = np.zeros(len(nl), dtype=bool)
                ends_cr[length > 0] = buf[np.maximum(nl[length > 0] - 1, 0)] == 13
                if pending and nl[0] == 0:
                    ends_cr[0] = pending_cr
                blank = (length == 0) | ((length == 1) & ends_cr)
                inside = (parity + np.searchsorted(quotes, nl)) % 2 == 1
                hit = np.flatnonzero(blank & ~inside)
                if len(hit):
                    blanks.append(hit + line)
                tail = len(buf) - nl[-1] - 1
                pending_cr = tail == 1 and buf[-1] == 13
                pending = tail
                line += len(nl)
            else:
                pending_cr = pending == 0 and len(buf) == 1 and buf[0] == 13
                pending += len(buf)
            parity = (parity + len(quotes)) % 2
    lines = [int(x) for x in np.concatenate(blanks)] if blanks else []
    return h.hexdigest(), lines


def _unclosed_quote_line(path: Path) -> int | None:
    """The first physical line with an odd number of quote characters, when the file's count is odd.

    Used only after the CSV reader failed, to say where a quoted value is never closed.
    """
    buf = np.frombuffer(Path(path).read_bytes(), dtype=np.uint8)
    quotes = np.flatnonzero(buf == 34)
    if len(quotes) % 2 == 0:
        return None
    nl = np.flatnonzero(buf == 10)
    per_line = np.bincount(np.searchsorted(nl, quotes))
    odd = np.flatnonzero(per_line % 2 == 1)
    return int(odd[0]) + 1 if len(odd) else None


def literal_path(path: Path) -> str:
    """``path`` as DuckDB's file readers take it literally: glob characters bracketed.

    DuckDB expands ``*``, ``?`` and ``[...]`` in the path given to ``read_csv`` /
    ``read_parquet``; ``[*]`` matches only a literal ``*``, so a file named ``wk*.csv``
    reads as itself and never as every ``wk…csv`` beside it.
    """
    return re.sub(r"([*?\[])", r"[\1]", str(Path(path).resolve()))

def _q(name: str) -> str:
    return '"' + name.replace('"', '""') + '"'


def _file_format(path: Path) -> str:
    with open(path, "rb") as fh:
        head = fh.read(4)
    if head == b"PAR1":
        return "parquet"
    return "csv"


def _all_known(config: StudyConfig | None = None) -> set[str]:
    names = set().union(*(known_columns(k) for k in RECORD_KINDS))
    return names | set(config.covariates if config is not None else ())


def _columns_phrase(columns: list[str], known: set[str]) -> str:
    """The header described without echoing names that are not column names (they may be data)."""
    found = [c for c in columns if c in known]
    other = [i + 1 for i, c in enumerate(columns) if c not in known]
    parts = []
    if found:
        parts.append("found " + ", ".join(found))
    if other:
        parts.append(f"column{'s' if len(other) > 1 else ''} {', '.join(map(str, other))} "
                     f"{'are' if len(other) > 1 else 'is'} not a known column name")
    return "; ".join(parts) or "no columns"


def detect_kind(columns: list[str], file: str) -> str:
    """Record kind from a file's header (raises :class:`IngestError` when none or several fit)."""
    cols = set(columns)
    fits = [k for k in RECORD_KINDS if required_columns(k) <= cols]
    if len(fits) == 1:
        return fits[0]
    if len(fits) > 1:
        raise IngestError(f"{file}: the columns fit several record kinds ({', '.join(fits)}); "
                          "say which with --kind")
    best = min(RECORD_KINDS, key=lambda k: len(required_columns(k) - cols))
    missing = sorted(required_columns(best) - cols)
    raise IngestError(f"{file}: cannot tell the record kind from the columns ({_columns_phrase(columns, _all_known())}); "
                      f"closest is '{best}', which also needs {', '.join(missing)}")


def _csv_header(path: Path, delimiter: str = ",") -> list[str]:
    """The first record of a CSV file, split by Python's csv module (for checks DuckDB hides)."""
    with open(path, "rb") as fh:
        head = fh.read(1 << 20)
    text = head.decode("utf-8", errors="replace").lstrip("\ufeff")
    try:
        row = next(csv.reader(io.StringIO(text), delimiter=delimiter, quotechar='"'), [])
    except csv.Error:
        return []
    return row


def _check_header_names(names: list[str], file: str, config: StudyConfig) -> None:
    """Empty, duplicated and data-looking header names, described by position for unknown names."""
    known = _all_known(config)
    norm = [unicodedata.normalize("NFC", n).strip().lower() for n in names]
    for i, n in enumerate(norm):
        if not n:
            raise IngestError(f"{file}: column {i + 1} of the header has an empty name")
    seen: dict[str, int] = {}
    for i, n in enumerate(norm):
        if n in seen:
            if n in known:
                raise IngestError(f"{file}: column '{n}' appears twice in the header (columns {seen[n] + 1} "
                                  f"and {i + 1})")
            raise IngestError(f"{file}: columns {seen[n] + 1} and {i + 1} of the header have the same name")
        seen[n] = i
    if norm and not any(n in known or nearest_name(n, sorted(known)) for n in norm):
        raise IngestError(f"{file}: cannot find a header: none of the {len(norm)} values on the first line is a "
                          "column name (expected e.g. site_id, participant_id, arm, assigned_on); the first line "
                          "must name the columns")


#: the longest CSV line read (DuckDB's default is 2 MB): a 5 MB field reaches the row checks (``too_long`` for
#: identifiers) instead of failing the whole file; a longer line rejects the file, naming the limit
MAX_LINE_BYTES = 32 << 20


def _stage(con: duckdb.DuckDBPyConnection, path: Path, fmt: str, blank_lines: list[int] = (),
           delimiter: str = ",") -> tuple[int, list[int]]:
    """Read the file into temp table ``_stage`` with a ``_row`` column; returns (rows, rejected lines).

    ``blank_lines`` (physical numbers) are lines the CSV reader skips: together with the
    rejected lines they are the lines that hold no accepted record.
    """
    src = literal_path(path)
    if fmt == "parquet":
        con.execute("CREATE OR REPLACE TEMP TABLE _stage AS SELECT file_row_number + 1 AS _row, "
                    "* EXCLUDE (file_row_number) FROM read_parquet($p, file_row_number = true)", {"p": src})
        return con.execute("SELECT count(*) FROM _stage").fetchone()[0], []
    con.execute("DROP TABLE IF EXISTS _stage_rej")
    con.execute("DROP TABLE IF EXISTS _stage_rej_scan")
    con.execute(
        "CREATE OR REPLACE TEMP TABLE _stage AS SELECT row_number() OVER () + 1 AS _row, * FROM read_csv($p, "
        "header = true, all_varchar = true, delim = $d, quote = '\"', escape = '\"', null_padding = false, "
        "store_rejects = true, rejects_table = '_stage_rej', rejects_scan = '_stage_rej_scan', strict_mode = true, "
        "compression = 'none', max_line_size = $m)",
        {"p": src, "d": delimiter, "m": MAX_LINE_BYTES})
    n, rejected = con.execute("SELECT (SELECT count(*) FROM _stage), "
                              "(SELECT list(DISTINCT line ORDER BY line) FROM _stage_rej)").fetchone()
    rejected = list(rejected or [])
    skipped = sorted(set(rejected) | set(blank_lines))
    if skipped:
        # accepted records fill the physical lines not taken by rejected or blank ones, in order
        # t = accepted records before a skipped line; c = skipped lines up to it (ties: keep the largest c)
        con.execute("CREATE OR REPLACE TEMP TABLE _stage_skip (line BIGINT)")
        con.execute("INSERT INTO _stage_skip SELECT unnest($l::BIGINT[])", {"l": skipped})
        con.execute("CREATE OR REPLACE TEMP TABLE _stage_thr AS SELECT t, max(c) AS c FROM ("
                    "SELECT line - 1 - (row_number() OVER (ORDER BY line) - 1) AS t, "
                    "row_number() OVER (ORDER BY line) AS c FROM _stage_skip) GROUP BY t")
        con.execute("CREATE OR REPLACE TEMP TABLE _stage AS SELECT s._row + coalesce(th.c, 0) AS _row, s.* EXCLUDE (_row) "
                    "FROM _stage s ASOF LEFT JOIN _stage_thr th ON s._row - 1 >= th.t")
    return n + len(rejected), rejected


_MALFORMED_TEXT = {
    "TOO MANY COLUMNS": "more fields than the header",
    "MISSING COLUMNS": "fewer fields than the header",
    "UNQUOTED VALUE": "a quote inside an unquoted field",
    "INVALID UNICODE": "not valid UTF-8 text",
    "LINE SIZE OVER MAXIMUM": "the line is too long",
}


def _first_long_line(path: Path, limit: int) -> int | None:
    """The physical number of the first line longer than ``limit`` bytes (chunked newline scan)."""
    line, length = 1, 0
    with open(path, "rb") as fh:
        for chunk in iter(lambda: fh.read(1 << 22), b""):
            nl = np.flatnonzero(np.frombuffer(chunk, dtype=np.uint8) == 10)
            if not len(nl):
                length += len(chunk)
                if length > limit:
                    return line
                continue
            lengths = np.diff(np.concatenate(([-1], nl))) - 1
            lengths[0] += length
            long = np.flatnonzero(lengths > limit)
            if len(long):
                return line + int(long[0])
            line += len(nl)
            length = len(chunk) - int(nl[-1]) - 1
            if length > limit:
                return line
    return None


def _read_failure(exc: duckdb.Error, path: Path, fmt: str, name: str | None = None) -> Exception:
    """The error to raise when DuckDB cannot read the file: infrastructure, or a one-line IngestError.

    DuckDB's own message is not passed on: it can quote the file's content.
    """
    name = name or path.name
    problem = infrastructure_problem(exc)
    if problem:
        return InfrastructureError(f"{name}: {problem} while reading the file")
    if fmt == "parquet":
        return IngestError(f"{name}: cannot read the file as Parquet (truncated, or not a Parquet file)")
    text = str(exc)
    line = _unclosed_quote_line(path)
    if line is not None:
        return IngestError(f"{name}: line {line}: a quoted value is never closed (unterminated quote); "
                           "the file cannot be split into rows")
    if "invalid unicode" in text.lower():
        return IngestError(f"{name}: the file is not UTF-8 text")
    if "maximum line size" in text.lower():
        line = _first_long_line(path, MAX_LINE_BYTES)
        where = f"line {line}" if line else "a line"
        return IngestError(f"{name}: {where} is longer than {MAX_LINE_BYTES >> 20} MiB, the most a record may "
                           "take; no field needs that much (a missing closing quote or a binary value?)")
    return IngestError(f"{name}: cannot read the file as CSV (comma-separated, double quotes, a header line)")


def _stage_columns(con: duckdb.DuckDBPyConnection, file: str, config: StudyConfig) -> dict[str, str]:
    cols = con.execute("SELECT column_name, data_type FROM duckdb_columns() "
                       "WHERE table_name = '_stage' AND database_name = 'temp' ORDER BY column_index").fetchall()
    cols = [(n, t) for n, t in cols if n != "_row"]
    _check_header_names([n for n, _ in cols], file, config)
    out: dict[str, str] = {}
    renames = []
    for name, dtype in cols:
        norm = unicodedata.normalize("NFC", name).strip().lower()
        out[norm] = dtype
        if norm != name:
            renames.append((name, norm))
    for old, new in renames:
        con.execute(f"ALTER TABLE _stage RENAME COLUMN {_q(old)} TO {_q(new)}")
    return out


#: id columns that must be text (or whole numbers) in typed files such as Parquet
_TEXT_ID_COLUMNS = ("site_id", "participant_id", "cluster_id", "stratum")


def _check_columns(kind: str, columns: dict[str, str], config: StudyConfig, file: str) -> tuple[str, ...]:
    names = list(columns)
    required = set(required_columns(kind))
    if kind == "assignment" and config.randomisation_unit == "cluster":
        required.add("cluster_id")
    missing = sorted(required - set(columns))
    if missing:
        why = " (the study randomises by cluster)" if missing == ["cluster_id"] else ""
        raise IngestError(f"{file}: {kind} files need the column(s) {', '.join(missing)}{why}")
    allowed = known_columns(kind) | (set(config.covariates) if kind == "assignment" else set())
    for pos, col in enumerate(names, start=1):
        if col not in allowed:
            decl = " (declare covariates under 'covariates' in the study configuration)" if kind == "assignment" else ""
            hint = nearest_name(col, sorted(allowed))
            if hint:        # a near miss of a column name is a mistyped header, safe to repeat
                raise IngestError(f"{file}: unexpected column '{col}' (column {pos}) in a {kind} file; "
                                  f"did you mean '{hint}'?{decl}")
            if col in _all_known(config):
                raise IngestError(f"{file}: column '{col}' (column {pos}) does not belong in a {kind} file{decl}")
            raise IngestError(f"{file}: column {pos} of the header is not a column of a {kind} file "
                              f"(accepted: {', '.join(sorted(allowed))}){decl}")
    for pos, col in enumerate(names, start=1):
        dtype = columns[col]
        if col in _TEXT_ID_COLUMNS and is_numeric_type(dtype) and (dtype in ("FLOAT", "DOUBLE")
                                                                   or dtype.startswith("DECIMAL")):
            raise IngestError(f"{file}: column {pos} ({col}) holds {dtype} numbers; store ids as text "
                              "(as numbers, an id 1 reads as '1.0' and never matches the same id sent as text)")
    return tuple(c for c in config.covariates if c in columns) if kind == "assignment" else ()


#: without a site registry, a file whose site_id column has more distinct values than this, in
#: more than half of its rows, is taken for shifted columns (participant ids read as site ids)
MAX_UNREGISTERED_SITES_PER_FILE = 20


def _check_site_column(con, config: StudyConfig, columns: dict[str, str], file: str) -> None:
    if config.sites:
        return          # the registry check quarantines unknown sites (without their value)
    n_sites, n_rows = con.execute("SELECT count(DISTINCT site_id), count(*) FROM _parsed WHERE NOT _bad").fetchone()
    if n_sites > MAX_UNREGISTERED_SITES_PER_FILE and 2 * n_sites > n_rows:
        pos = list(columns).index("site_id") + 1
        raise IngestError(f"{file}: column {pos} (site_id) has {n_sites} different values in {n_rows} rows; that "
                          "looks like participant identifiers, not sites (shifted columns?). Check the column "
                          "order, or list the sites under [[sites]] in the study configuration")


def _params(plan_sql: str, key: PseudonymKey, config: StudyConfig, today: date) -> dict:
    params = {}
    if "$ipad" in plan_sql:
        params["ipad"] = key.ipad
        params["opad"] = key.opad
    if "$today" in plan_sql:
        params["today"] = today
    if "$earliest" in plan_sql:
        params["earliest"] = config.dates.earliest_on(today)
    if "$registry" in plan_sql:
        params["registry"] = [unicodedata.normalize("NFC", s.site_id).strip() for s in config.sites]
    if "$outcomes" in plan_sql:
        params["outcomes"] = [o.name for o in config.outcomes]
    return params


def _parse(con: duckdb.DuckDBPyConnection, plan: ParsePlan, key: PseudonymKey,
           config: StudyConfig, today: date) -> None:
    flags = [f"({c.failed_sql}) IS TRUE AS _f{i}" for i, c in enumerate(plan.checks)]
    any_failed = " OR ".join(f"_f{i}" for i in range(len(plan.checks))) or "FALSE"
    sql = (f"CREATE TEMP TABLE _parsed AS SELECT *, {any_failed} AS _bad FROM "
           f"(SELECT *, {', '.join(flags)} FROM ({plan.select_sql}))")
    con.execute(sql.replace("CREATE TEMP TABLE", "CREATE OR REPLACE TEMP TABLE", 1), _params(sql, key, config, today))


def _quarantine_checks(con, plan: ParsePlan, batch_id: str, file_name: str) -> None:
    parts = [f"SELECT _row, '{c.field}' AS field, '{c.reason}' AS reason, {c.offending_sql} AS v "
             f"FROM _parsed WHERE _f{i}" for i, c in enumerate(plan.checks)]
    con.execute(f"INSERT INTO quarantine SELECT $b, $f, _row, field, reason, v FROM ({' UNION ALL '.join(parts)}) "
                "ORDER BY _row", {"b": batch_id, "f": file_name})


def _quarantine_malformed(con, rejected: list[int], batch_id: str, file_name: str) -> None:
    # a fixed description per error type: the reader's own message may quote the line
    if rejected:
        types = list(_MALFORMED_TEXT)
        con.execute("INSERT INTO quarantine SELECT $b, $f, line, NULL, 'malformed_row', "
                    "coalesce(list_extract($texts, list_position($types, error_type)), "
                    "'cannot be split into the header''s fields') "
                    "FROM (SELECT line, min(CAST(error_type AS VARCHAR)) AS error_type FROM _stage_rej GROUP BY line)",
                    {"b": batch_id, "f": file_name, "types": types, "texts": [_MALFORMED_TEXT[t] for t in types]})


def _classify_valid(con, kind: str, plan: ParsePlan) -> None:
    """Split the rows that passed the checks into duplicates, conflicts and new records.

    Rows identical to an earlier row of the file collapse into it (``_extra`` counts
    them as duplicates); a distinct row is a duplicate when an identical row is
    already stored, and conflicts when another distinct row of the file, or a stored
    row, has the same natural key (:data:`NATURAL_KEYS`) but other values.
    (Aggregates and joins only: DuckDB window functions cost milliseconds of set-up
    per statement, which dominates on small weekly files.  Only the keys held by more
    than one distinct row are kept for the join back, so on a big file, where nearly
    every key is unique, the join probes a small table instead of one row per record.)
    """
    table = KIND_TABLE[kind]
    cols = list(plan.value_columns) + [f"_cov_{c}" for c in plan.covariates]
    key = NATURAL_KEYS[kind]
    qcols = ", ".join(_q(c) for c in cols)
    qkey = ", ".join(_q(c) for c in key)
    on_key = " AND ".join(f"t.{_q(c)} = v.{_q(c)}" for c in key)
    on_key_kc = " AND ".join(f"kc.{_q(c)} = d.{_q(c)}" for c in key)
    same_rest = " AND ".join(f"t.{_q(c)} IS NOT DISTINCT FROM v.{_q(c)}"
                             for c in plan.value_columns if c not in key) or "TRUE"
    con.execute(f"""
        CREATE OR REPLACE TEMP TABLE _valid AS
        WITH d AS (
            SELECT min(_row) AS _row, count(*) - 1 AS _extra, {qcols} FROM _parsed WHERE NOT _bad GROUP BY {qcols}
        ), kc AS (
            SELECT {qkey}, TRUE AS _many FROM d GROUP BY {qkey} HAVING count(*) > 1
        ), st AS (
            SELECT v._row, bool_or({same_rest}) AS _same FROM d v JOIN {_q(table)} t ON {on_key} GROUP BY v._row
        )
        SELECT d.*, coalesce(st._same, FALSE) AS _dup,
               NOT coalesce(st._same, FALSE) AND (kc._many IS NOT NULL OR st._row IS NOT NULL) AS _conflict
        FROM d LEFT JOIN kc ON {on_key_kc} LEFT JOIN st ON st._row = d._row
    """)


def _flag_probability_conflicts(con, kind: str, plan: ParsePlan) -> None:
    """Mark assignment rows whose ``assignment_probability`` contradicts their site x stratum's.

    The probability must be constant within a site x stratum (rows without one say
    nothing).  A new row conflicts when a stored row of its site x stratum carries
    another value, or, with none stored, when the file itself gives more than one value
    for that site x stratum (then every row with a value there is held back: which one
    is right cannot be told).  Flagged rows join the conflicts (``_conflict``) with
    ``_pconf`` set, so they are quarantined as ``conflicting_probability``.
    """
    con.execute("ALTER TABLE _valid ADD COLUMN _pconf BOOLEAN DEFAULT FALSE")
    if kind != "assignment" or "assignment_probability" not in plan.value_columns:
        return
    con.execute("""
        WITH st AS (
            SELECT site_id, coalesce(stratum, '') AS s, min(assignment_probability) AS p
            FROM assignments WHERE assignment_probability IS NOT NULL GROUP BY ALL
        ), f AS (
            SELECT site_id, coalesce(stratum, '') AS s, count(DISTINCT assignment_probability) AS k
            FROM _valid WHERE assignment_probability IS NOT NULL AND NOT _conflict AND NOT _dup GROUP BY ALL
        ), bad AS (
            SELECT v._row FROM _valid v
            LEFT JOIN st ON st.site_id = v.site_id AND st.s = coalesce(v.stratum, '')
            LEFT JOIN f ON f.site_id = v.site_id AND f.s = coalesce(v.stratum, '')
            WHERE v.assignment_probability IS NOT NULL AND NOT v._conflict AND NOT v._dup
              AND ((st.p IS NOT NULL AND st.p <> v.assignment_probability) OR (st.p IS NULL AND f.k > 1))
        )
        UPDATE _valid SET _pconf = TRUE, _conflict = TRUE WHERE _row IN (SELECT _row FROM bad)
    """)


def _quarantine_conflicts(con, kind: str, plan: ParsePlan, batch_id: str, file_name: str) -> None:
    """Quarantine the rows :func:`_classify_valid` and :func:`_flag_probability_conflicts` held back.

    Only assignment files with an ``assignment_probability`` column can have probability
    conflicts (and have that column to show); uptake and outcome files quarantine key conflicts.
    """
    has_probability = kind == "assignment" and "assignment_probability" in plan.value_columns
    value = "CASE WHEN _pconf THEN CAST(assignment_probability AS VARCHAR) END" if has_probability else "NULL"
    con.execute("INSERT INTO quarantine SELECT $b, $f, _row, CASE WHEN _pconf THEN 'assignment_probability' END, "
                f"CASE WHEN _pconf THEN 'conflicting_probability' ELSE $reason END, {value} FROM _valid WHERE _conflict",
                {"b": batch_id, "f": file_name, "reason": _CONFLICT_REASON[kind]})


def _insert_records(con, kind: str, plan: ParsePlan, batch_id: str) -> None:
    table = KIND_TABLE[kind]
    stored = [c.name for c in columns_of(STORED_MODELS[kind])]
    exprs = []
    for c in stored:
        if c == "batch_id":
            exprs.append("$b")
        elif c == "source_row":
            exprs.append("_row")
        else:
            exprs.append(_q(c))
    con.execute(f"INSERT INTO {_q(table)} ({', '.join(_q(c) for c in stored)}) "
                f"SELECT {', '.join(exprs)} FROM _valid WHERE NOT _dup AND NOT _conflict",
                {"b": batch_id})
    for cov in plan.covariates:
        con.execute(f"INSERT INTO assignment_covariates SELECT $b, site_id, participant_key, $cov, {_q('_cov_' + cov)} "
                    f"FROM _valid WHERE NOT _dup AND NOT _conflict", {"b": batch_id, "cov": cov})


_TEMP_TABLES = ("_stage", "_stage_rej", "_stage_rej_scan", "_stage_skip", "_stage_thr", "_parsed", "_valid")


def _cleanup(con) -> None:
    for t in _TEMP_TABLES:
        con.execute(f"DROP TABLE IF EXISTS {t}")


def ingest_file(con: duckdb.DuckDBPyConnection, path: Path | str, key: PseudonymKey, config: StudyConfig,
                kind: str | None = None, today: date | None = None, delimiter: str = "auto",
                encoding: str = "utf-8") -> BatchReport:
    """Ingest one CSV (also gzip-compressed) or Parquet file as one atomic batch.

    The file is first looked at (:func:`~takeup.pipeline.ingest.sniff.sniff_source`):
    ``delimiter`` (``auto``: the one the header shows) and ``encoding`` say how a CSV
    file is read; spreadsheets, binary and wrongly encoded files are rejected with advice.

    Returns a :class:`BatchReport`.  A file that cannot be read, or whose columns do
    not fit a record kind, is reported with status ``rejected`` (and recorded in
    ``batches``) without storing any of its rows.  Any unexpected error rolls the
    whole batch back and is re-raised.
    """
    path = Path(path)
    name = path.name
    if kind is not None and kind not in RECORD_KINDS:
        hint = nearest_name(kind, RECORD_KINDS)
        raise IngestError(f"unknown record kind '{kind}'" + (f"; did you mean '{hint}'?" if hint else "")
                          + f" (accepted: {', '.join(RECORD_KINDS)})")
    if not path.is_file():
        raise IngestError(f"{path}: no such file")
    try:
        fmt = _file_format(path)
        sha, blank_lines = _read_pass(path, scan_lines=(fmt == "csv"))
    except OSError as exc:
        problem = infrastructure_problem(exc)
        if problem:
            raise InfrastructureError(f"{name}: {problem} while reading the file") from None
        raise IngestError(f"{name}: cannot read the file: {exc.strerror}") from None
    received = datetime.now(timezone.utc).replace(tzinfo=None)
    today = today or received.date()
    prior = con.execute("SELECT batch_id FROM batches WHERE sha256 = $s AND status = 'loaded' LIMIT 1",
                        {"s": sha}).fetchone()
    if prior is not None:
        return BatchReport(file=str(path), status="duplicate_batch", batch_id=prior[0],
                           message=f"same content as batch {prior[0]} already loaded; nothing to do")
    batch_id = f"b{received:%Y%m%dT%H%M%S%f}-{sha[:12]}"

    def reject(message: str) -> BatchReport:
        with transaction(con):
            con.execute("INSERT INTO batches VALUES ($b, $f, $s, $k, NULL, $t, 0, 0, 0, 0, 'rejected', $m)",
                        {"b": batch_id, "f": name, "s": sha, "k": kind, "t": received, "m": message})
        return BatchReport(file=str(path), status="rejected", batch_id=batch_id, kind=kind, message=message)

    source: SourcePlan | None = None
    try:
        with transaction(con):
            if path.stat().st_size == 0:
                raise IngestError(f"{name}: the file is empty (no header, no rows)")
            source = _sniff(con, path, config, delimiter, encoding)
            fmt, src = source.fmt, source.read_path
            if source.temporary:
                blank_lines = _read_pass(src, scan_lines=True)[1]
            if fmt == "csv":
                _check_header_names(_csv_header(src, source.delimiter), name, config)   # before DuckDB renames
            try:
                rows_read, rejected = _stage(con, src, fmt, blank_lines, source.delimiter)
            except duckdb.Error as exc:
                raise _read_failure(exc, src, fmt, name) from None
            columns = _stage_columns(con, name, config)
            file_kind = kind or detect_kind(list(columns), name)
            covariates = _check_columns(file_kind, columns, config, name)
            if rows_read == 0:
                raise IngestError(f"{name}: the file names its columns but holds no records; nothing to load")
            also = ("cluster_id",) if file_kind == "assignment" and config.randomisation_unit == "cluster" else ()
            plan = build_parse_plan(file_kind, columns, covariates, key.sql_expr, also_required=also)
            _parse(con, plan, key, config, today)
            con.execute("DROP TABLE _stage")          # raw identifiers go no further
            _check_site_column(con, config, columns, name)
            n_bad = con.execute("SELECT count(*) FILTER (WHERE _bad) FROM _parsed").fetchone()[0]
            if rejected:
                _quarantine_malformed(con, rejected, batch_id, name)
            if n_bad:
                _quarantine_checks(con, plan, batch_id, name)
            _classify_valid(con, file_kind, plan)
            _flag_probability_conflicts(con, file_kind, plan)
            n_dup, n_conf, n_ok, sites = con.execute(
                "SELECT coalesce(sum(_extra), 0) + count(*) FILTER (WHERE _dup), count(*) FILTER (WHERE _conflict), "
                "count(*) FILTER (WHERE NOT _dup AND NOT _conflict), "
                "string_agg(DISTINCT site_id, ',' ORDER BY site_id) FILTER (WHERE NOT _dup AND NOT _conflict) "
                "FROM _valid").fetchone()
            if n_conf:
                _quarantine_conflicts(con, file_kind, plan, batch_id, name)
            _insert_records(con, file_kind, plan, batch_id)
            quarantined = n_bad + n_conf + len(rejected)
            if n_ok + quarantined + n_dup != rows_read:  # pragma: no cover - invariant guard
                raise RuntimeError(f"{name}: row accounting does not add up "
                                   f"({rows_read} read, {n_ok} loaded, {quarantined} quarantined, {n_dup} duplicate)")
            con.execute("INSERT INTO batches VALUES ($b, $f, $s, $k, $sites, $t, $n, $l, $q, $d, 'loaded', NULL)",
                        {"b": batch_id, "f": name, "s": sha, "k": file_kind, "sites": sites, "t": received,
                         "n": rows_read, "l": n_ok, "q": quarantined, "d": n_dup})
            reasons = {}
            if quarantined:
                reasons = dict(con.execute("SELECT reason, count(DISTINCT source_row) FROM quarantine "
                                           "WHERE batch_id = $b GROUP BY reason ORDER BY reason",
                                           {"b": batch_id}).fetchall())
            pending = 0
            if file_kind != "assignment" and n_ok:
                pending = con.execute(
                    "SELECT count(*) FROM _valid v WHERE NOT _dup AND NOT _conflict AND NOT EXISTS "
                    "(SELECT 1 FROM assignments a WHERE a.site_id = v.site_id "
                    "AND a.participant_key = v.participant_key)").fetchone()[0]
    except IngestError as exc:
        _cleanup(con)
        return reject(str(exc))
    except duckdb.Error as exc:
        _cleanup(con)
        problem = infrastructure_problem(exc)
        if problem:
            # not the file's fault: nothing is recorded, the caller stops and says what to change
            limit = os.environ.get("TAKEUP_MEMORY_LIMIT")
            hint = (f"; raise TAKEUP_MEMORY_LIMIT (now {limit})" if problem == "out of memory" and limit else
                    "; set TAKEUP_MEMORY_LIMIT higher" if problem == "out of memory" else "")
            raise InfrastructureError(f"{name}: {problem} while ingesting the file{hint}; "
                                      "the warehouse is unchanged") from None
        # a file DuckDB cannot process (odd encodings, binary content): reject it, keep the warehouse as it was.
        # DuckDB's message is not repeated: it can quote the file's content
        return reject(f"{name}: the file could not be processed ({type(exc).__name__.removesuffix('Exception')} "
                      "error while checking its rows)")
    except BaseException:
        _cleanup(con)
        raise
    finally:
        if source is not None:
            source.cleanup()
    return BatchReport(file=str(path), status="loaded", batch_id=batch_id, kind=file_kind, rows_read=rows_read,
                       rows_loaded=n_ok, rows_quarantined=quarantined, rows_duplicate=n_dup,
                       rows_pending=pending, reasons=reasons, message=source.note)


def _sniff(con: duckdb.DuckDBPyConnection, path: Path, config: StudyConfig, delimiter: str,
           encoding: str) -> SourcePlan:
    """How to read ``path`` (see :mod:`takeup.pipeline.ingest.sniff`); copies go to the connection's spill dir."""
    temp = con.execute("SELECT current_setting('temp_directory')").fetchone()[0]
    known = _all_known(config)
    try:
        return sniff_source(path, known, max_columns=len(known), temp_dir=Path(temp) if temp else None,
                            delimiter=delimiter, encoding=encoding)
    except OSError as exc:
        problem = infrastructure_problem(exc)
        if problem:
            raise InfrastructureError(f"{path.name}: {problem} while reading the file") from None
        raise IngestError(f"{path.name}: cannot read the file: {exc.strerror}") from None
