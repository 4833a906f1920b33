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

from takeup.pipeline.errors import IngestError  # noqa: F401  (re-exported)

import hashlib
from dataclasses import dataclass, field
from datetime import date, datetime, timezone
from pathlib import Path

import duckdb

from takeup.pipeline.pseudonym import PseudonymKey
from takeup.pipeline.ingest.row_checks import ParsePlan, build_parse_plan, known_columns, required_columns
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
    status: str                 # loaded | duplicate_batch | rejected
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
    h = hashlib.sha256()
    with open(path, "rb") as fh:
        for chunk in iter(lambda: fh.read(1 << 20), b""):
            h.update(chunk)
    return h.hexdigest()


def _q(name: str) -> str:
    return '"' + name.replace('"', '""') + '"'


def _file_format(path: Path) -> str:
    with open(path, "rb") as fh:
        head = fh.read(4)
    if head == b"PAR1":
        return "parquet"
    return "csv"


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
    raise IngestError(f"{file}: cannot tell the record kind from the columns {sorted(cols)}; "
                      f"closest is '{best}', which also needs {', '.join(missing)}")


def _stage(con: duckdb.DuckDBPyConnection, path: Path, fmt: str) -> tuple[int, list[int]]:
    """Read the file into temp table ``_stage`` with a ``_row`` column; returns (rows, rejected lines)."""
    if fmt == "parquet":
        con.execute("CREATE OR REPLACE TEMP TABLE _stage AS SELECT file_row_number + 1 AS _row, "
                    "* EXCLUDE (file_row_number) FROM read_parquet($p, file_row_number = true)", {"p": str(path)})
        return con.execute("SELECT count(*) FROM _stage").fetchone()[0], []
    con.execute("DROP TABLE IF EXISTS _stage_rej")
    con.execute("DROP TABLE IF EXISTS _stage_rej_scan")
    con.execute(
        "CREATE OR REPLACE TEMP TABLE _stage AS SELECT row_number() OVER () + 1 AS _row, * FROM read_csv($p, "
        "header = true, all_varchar = true, delim = ',', quote = '\"', escape = '\"', null_padding = false, "
        "store_rejects = true, rejects_table = '_stage_rej', rejects_scan = '_stage_rej_scan', strict_mode = true)",
        {"p": str(path)})
    n, rejected = con.execute("SELECT (SELECT count(*) FROM _stage), "
                              "(SELECT list(DISTINCT line ORDER BY line) FROM _stage_rej)").fetchone()
    rejected = list(rejected or [])
    if rejected:
        # accepted records fill the physical lines not taken by rejected ones, in order
        # t = accepted records before a rejected line; c = rejected lines up to it (ties: keep the largest c)
        con.execute("CREATE OR REPLACE TEMP TABLE _stage_thr AS SELECT t, max(c) AS c FROM ("
                    "SELECT line - 1 - (row_number() OVER (ORDER BY line) - 1) AS t, "
                    "row_number() OVER (ORDER BY line) AS c FROM (SELECT DISTINCT line FROM _stage_rej)) GROUP BY t")
        con.execute("CREATE OR REPLACE TEMP TABLE _stage AS SELECT s._row + coalesce(th.c, 0) AS _row, s.* EXCLUDE (_row) "
                    "FROM _stage s ASOF LEFT JOIN _stage_thr th ON s._row - 1 >= th.t")
    return n + len(rejected), rejected


def _stage_columns(con: duckdb.DuckDBPyConnection, file: str) -> dict[str, str]:
    cols = con.execute("SELECT column_name, data_type FROM duckdb_columns() "
                       "WHERE table_name = '_stage' AND database_name = 'temp' ORDER BY column_index").fetchall()
    out: dict[str, str] = {}
    renames = []
    for name, dtype in cols:
        if name == "_row":
            continue
        norm = name.strip().lower()
        if not norm:
            raise IngestError(f"{file}: a column of the header has an empty name")
        if norm in out:
            raise IngestError(f"{file}: column '{name}' appears twice in the header")
        out[norm] = dtype
        if norm != name:
            renames.append((name, norm))
    for old, new in renames:
        con.execute(f"ALTER TABLE _stage RENAME COLUMN {_q(old)} TO {_q(new)}")
    return out


def _check_columns(kind: str, columns: dict[str, str], config: StudyConfig, file: str) -> tuple[str, ...]:
    missing = sorted(required_columns(kind) - set(columns))
    if missing:
        raise IngestError(f"{file}: {kind} files need the column(s) {', '.join(missing)}")
    allowed = known_columns(kind) | (set(config.covariates) if kind == "assignment" else set())
    for col in columns:
        if col not in allowed:
            hint = nearest_name(col, sorted(allowed))
            extra = f"; did you mean '{hint}'?" if hint else ""
            decl = " (declare covariates under 'covariates' in the study configuration)" if kind == "assignment" else ""
            raise IngestError(f"{file}: unexpected column '{col}' in a {kind} file{extra}{decl}")
    return tuple(c for c in config.covariates if c in columns) if kind == "assignment" else ()


def _params(plan_sql: str, key: PseudonymKey, config: StudyConfig, today: date) -> dict:
    params = {}
    if "$ipad" in plan_sql:
        params["ipad"] = key.ipad
        params["opad"] = key.opad
    if "$today" in plan_sql:
        params["today"] = today
    if "$registry" in plan_sql:
        params["registry"] = [s.site_id for s in config.sites]
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
    if rejected:
        con.execute("INSERT INTO quarantine SELECT $b, $f, line, NULL, 'malformed_row', left(error_message, 200) "
                    "FROM (SELECT line, min(error_message) AS error_message FROM _stage_rej GROUP BY line)",
                    {"b": batch_id, "f": file_name})


def _classify_valid(con, kind: str, plan: ParsePlan) -> None:
    """Split the rows that passed the checks into duplicates, conflicts and new records.

    Rows identical to an earlier row of the file collapse into it (``_extra`` counts
    them as duplicates); a distinct row is a duplicate when an identical row is
    already stored, and conflicts when another distinct row of the file, or a stored
    row, has the same natural key (:data:`NATURAL_KEYS`) but other values.
    (Aggregates and joins only: DuckDB window functions cost milliseconds of set-up
    per statement, which dominates on small weekly files.)
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
            SELECT {qkey}, count(*) AS _n FROM d GROUP BY {qkey}
        ), st AS (
            SELECT v._row, bool_or({same_rest}) AS _same FROM d v JOIN {_q(table)} t ON {on_key} GROUP BY v._row
        )
        SELECT d.*, coalesce(st._same, FALSE) AS _dup,
               NOT coalesce(st._same, FALSE) AND (kc._n > 1 OR st._row IS NOT NULL) AS _conflict
        FROM d JOIN kc ON {on_key_kc} LEFT JOIN st ON st._row = d._row
    """)


def _quarantine_conflicts(con, kind: str, batch_id: str, file_name: str) -> None:
    con.execute("INSERT INTO quarantine SELECT $b, $f, _row, NULL, $reason, NULL FROM _valid WHERE _conflict",
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


_TEMP_TABLES = ("_stage", "_stage_rej", "_stage_rej_scan", "_stage_thr", "_parsed", "_valid")


def _cleanup(con) -> None:
    for t in _TEMP_TABLES:
        con.execute(f"DROP TABLE IF EXISTS {t}")


def ingest_file(con: duckdb.DuckDBPyConnection, path: Path | str, key: PseudonymKey, config: StudyConfig,
                kind: str | None = None, today: date | None = None) -> BatchReport:
    """Ingest one CSV or Parquet file as one atomic batch.

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
    sha = file_sha256(path)
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

    try:
        with transaction(con):
            if path.stat().st_size == 0:
                raise IngestError(f"{name}: the file is empty (no header, no rows)")
            try:
                fmt = _file_format(path)
                rows_read, rejected = _stage(con, path, fmt)
            except duckdb.Error as exc:
                raise IngestError(f"{name}: cannot read the file as CSV or Parquet: {str(exc).splitlines()[0]}") from None
            columns = _stage_columns(con, name)
            file_kind = kind or detect_kind(list(columns), name)
            covariates = _check_columns(file_kind, columns, config, name)
            plan = build_parse_plan(file_kind, columns, covariates, PseudonymKey.sql)
            _parse(con, plan, key, config, today)
            con.execute("DROP TABLE _stage")          # raw identifiers go no further
            n_bad = con.execute("SELECT count(*) FILTER (WHERE _bad) FROM _parsed").fetchone()[0]
            if rejected:
                _quarantine_malformed(con, rejected, batch_id, name)
            if n_bad:
                _quarantine_checks(con, plan, batch_id, name)
            _classify_valid(con, file_kind, plan)
            n_dup, n_conf, n_ok, sites = con.execute(
                "SELECT coalesce(sum(_extra), 0) + count(*) FILTER (WHERE _dup), count(*) FILTER (WHERE _conflict), "
                "count(*) FILTER (WHERE NOT _dup AND NOT _conflict), "
                "string_agg(DISTINCT site_id, ',' ORDER BY site_id) FILTER (WHERE NOT _dup AND NOT _conflict) "
                "FROM _valid").fetchone()
            if n_conf:
                _quarantine_conflicts(con, file_kind, batch_id, name)
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
        # a file DuckDB cannot process (odd encodings, binary content): reject it, keep the warehouse as it was
        _cleanup(con)
        return reject(f"{name}: the file could not be processed: {str(exc).splitlines()[0]}")
    except BaseException:
        _cleanup(con)
        raise
    return BatchReport(file=str(path), status="loaded", batch_id=batch_id, kind=file_kind, rows_read=rows_read,
                       rows_loaded=n_ok, rows_quarantined=quarantined, rows_duplicate=n_dup,
                       rows_pending=pending, reasons=reasons)
