"""Many small files staged and checked together, each still its own atomic batch.

A weekly drop is hundreds of small files; loading each in its own ~20-statement
transaction spends nearly all the time in per-statement overhead.  Here a
*window* of consecutive files is read with one DuckDB scan per file layout
(``read_csv`` / ``read_parquet`` over the list of files, with the file name
and row number of every row), parsed and checked by one generated ``SELECT``
per layout, classified (duplicates, conflicts, new records) by one set of
statements per record kind, and committed in one transaction that writes every
file's rows, quarantine rows and ``batches`` row.

Every file keeps the semantics of :func:`takeup.pipeline.ingest.batch.ingest_file`:

* its own ``batch_id``, receipt time (strictly increasing in file order) and
  counts, with ``rows_read = rows_loaded + rows_quarantined + rows_duplicate``;
* duplicates and conflicts are judged as if the files were loaded one after the
  other: a record is compared with the stored records *and* with the records that
  earlier files of the window store (see :func:`_classify`);
* a file that fails as a whole (unreadable, a header that fits no record kind,
  shifted columns) is rejected with the same message and stores none of its
  rows; the others load;
* pending uptake / outcome rows are counted against the assignments stored before
  the file, including those of earlier files of the window.

Files the window cannot take as they are go through ``ingest_file`` alone, in
their place in the order: large files, empty files, CSV files with blank lines
or lines the reader rejects, headers the checks refuse, a file with the same
content as an earlier one of the window, and any window whose scan fails.  If
anything goes wrong while the window is written, the transaction is rolled
back and its files are ingested one by one instead, so a file is always loaded
whole or not at all.
"""

from __future__ import annotations

import unicodedata
from dataclasses import dataclass, field
from datetime import date, datetime, timedelta, timezone
from pathlib import Path

import duckdb

from takeup.pipeline.errors import IngestError, infrastructure_problem
from takeup.pipeline.ingest.batch import (_all_known, _CONFLICT_REASON, NATURAL_KEYS, BatchReport, _check_columns,
                                          _check_header_names, _csv_header, _file_format, _params, _q, _read_pass,
                                          MAX_UNREGISTERED_SITES_PER_FILE, detect_kind, literal_path)
from takeup.pipeline.ingest.row_checks import ParsePlan, build_parse_plan
from takeup.pipeline.ingest.sniff import check_encoding_name, sniff_source
from takeup.pipeline.pseudonym import PseudonymKey
from takeup.schemas.config import StudyConfig
from takeup.schemas.ddl import columns_of
from takeup.schemas.records import KIND_TABLE, RECORD_KINDS, STORED_MODELS

__all__ = ["WindowFile", "prepare_file", "ingest_window", "WINDOW_MAX_FILES", "WINDOW_MAX_BYTES", "SMALL_FILE_BYTES", "NeedsAlone"]

#: files in one window (one transaction)
WINDOW_MAX_FILES = 400
#: files larger than this are ingested alone (a window is for the many-small-files case)
SMALL_FILE_BYTES = 4 * 1024 * 1024
#: bytes of one window
WINDOW_MAX_BYTES = 64 * 1024 * 1024


@dataclass
class WindowFile:
    """One file offered to a window, with what the Python pre-pass learnt about it."""

    path: Path
    fmt: str
    sha: str
    size: int
    header: tuple              # CSV: header names as written; Parquet: (name, type) pairs
    received: datetime | None = None
    idx: int = -1

    @property
    def name(self) -> str:
        return self.path.name

    @property
    def batch_id(self) -> str:
        return f"b{self.received:%Y%m%dT%H%M%S%f}-{self.sha[:12]}"

    @property
    def layout(self) -> tuple:
        return (self.fmt, self.header)


class NeedsAlone(Exception):
    """A file of the window must be ingested alone (``position`` in the window)."""

    def __init__(self, position: int):
        super().__init__(position)
        self.position = position


def prepare_file(path: Path, config: StudyConfig, delimiter: str = "auto",
                 encoding: str = "utf-8") -> WindowFile | None:
    """The pre-pass: a :class:`WindowFile` for a file a window can take, else None (ingest it alone).

    A window reads plain UTF-8, comma-separated CSV and Parquet only; a file that the
    sniffer (:func:`~takeup.pipeline.ingest.sniff.sniff_source`) would read otherwise --
    gzip, another encoding or delimiter, a spreadsheet or binary file -- goes alone, where
    it is decoded or refused with its own message.
    """
    if delimiter not in ("auto", ","):
        return None
    try:
        if check_encoding_name(encoding) != check_encoding_name("utf-8"):
            return None
    except ValueError:
        return None
    try:
        if not path.is_file():
            return None
        size = path.stat().st_size
        if size == 0 or size > SMALL_FILE_BYTES:
            return None
        fmt = _file_format(path)
        if fmt == "csv":
            with open(path, "rb") as fh:
                if fh.read(2) == b"\x1f\x8b":          # gzip: decoded alone
                    return None
            known = _all_known(config)
            plan = sniff_source(path, known, max_columns=len(known), delimiter=delimiter, encoding="utf-8")
            if plan.temporary:
                plan.cleanup()
                return None
            if plan.delimiter != "," or plan.note:
                return None
        sha, blanks = _read_pass(path, scan_lines=(fmt == "csv"))
    except (OSError, IngestError, ValueError):
        return None
    if blanks:
        return None
    if fmt == "csv":
        try:
            if b"\n" not in path.read_bytes().strip(b"\r\n"):
                return None            # a header and no records: refused alone, with its message
        except OSError:
            return None
        names = _csv_header(path)
        try:
            _check_header_names(names, path.name, config)
        except IngestError:
            return None
        header = tuple(names)
    else:
        try:
            import pyarrow.parquet as pq
            schema = pq.read_schema(path)
            if pq.read_metadata(path).num_rows == 0:
                return None            # no records: refused alone, with its message
        except Exception:       # noqa: BLE001 - anything unreadable is left to ingest_file's messages
            return None
        header = tuple((n, str(t)) for n, t in zip(schema.names, schema.types))
    return WindowFile(path=path, fmt=fmt, sha=sha, size=size, header=header)


# ----------------------------------------------------------------------------- staging
def _stage_layout(con, files: list[WindowFile]) -> None:
    """Temp table ``_stage`` of every row of ``files`` (one layout) with ``_file`` and ``_row``."""
    con.execute("CREATE OR REPLACE TEMP TABLE _gpaths AS SELECT unnest($p::VARCHAR[]) AS _src, "
                "unnest($i::BIGINT[]) AS _file", {"p": [str(f.path.resolve()) for f in files],
                                                  "i": [f.idx for f in files]})
    srcs = [literal_path(f.path) for f in files]
    if files[0].fmt == "parquet":
        con.execute("CREATE OR REPLACE TEMP TABLE _stage AS SELECT g._file, s.file_row_number + 1 AS _row, "
                    "s.* EXCLUDE (file_row_number, _src) FROM read_parquet($p, file_row_number = true, "
                    "filename = '_src') s JOIN _gpaths g USING (_src)", {"p": srcs})
        return
    con.execute("DROP TABLE IF EXISTS _stage_rej")
    con.execute("DROP TABLE IF EXISTS _stage_rej_scan")
    con.execute(
        "CREATE OR REPLACE TEMP TABLE _gstage AS SELECT row_number() OVER () AS _g, * FROM read_csv($p, "
        "header = true, all_varchar = true, delim = ',', quote = '\"', escape = '\"', null_padding = false, "
        "store_rejects = true, rejects_table = '_stage_rej', rejects_scan = '_stage_rej_scan', strict_mode = true, "
        "filename = '_src')", {"p": srcs})
    bad = con.execute("SELECT DISTINCT g._file FROM _stage_rej r JOIN _stage_rej_scan s USING (scan_id, file_id) "
                      "JOIN _gpaths g ON g._src = s.file_path ORDER BY 1").fetchall()
    n_rej = con.execute("SELECT count(*) FROM _stage_rej").fetchone()[0]
    if n_rej:
        pos = {f.idx: i for i, f in enumerate(files)}
        if bad:
            raise NeedsAlone(min(pos[b[0]] for b in bad))
        raise NeedsAlone(0)
    con.execute("CREATE OR REPLACE TEMP TABLE _stage AS SELECT g._file, s._g - m._g0 + 2 AS _row, "
                "s.* EXCLUDE (_g, _src) FROM _gstage s JOIN (SELECT _src, min(_g) AS _g0 FROM _gstage GROUP BY _src) m "
                "USING (_src) JOIN _gpaths g USING (_src)")
    con.execute("DROP TABLE _gstage")


def _find_unreadable(con, files: list[WindowFile]) -> int:
    """Position of the first file of ``files`` that cannot be read alone (after a failed scan of them all)."""
    for i, f in enumerate(files):
        try:
            if f.fmt == "parquet":
                con.execute("SELECT count(*) FROM read_parquet($p)", {"p": literal_path(f.path)}).fetchone()
            else:
                con.execute("SELECT count(*) FROM read_csv($p, header = true, all_varchar = true, delim = ',', "
                            "quote = '\"', escape = '\"', null_padding = false, strict_mode = true)",
                            {"p": literal_path(f.path)}).fetchone()
        except duckdb.Error:
            return i
    return 0


def _stage_columns(con) -> dict[str, str]:
    cols = con.execute("SELECT column_name, data_type FROM duckdb_columns() "
                       "WHERE table_name = '_stage' AND database_name = 'temp' ORDER BY column_index").fetchall()
    out: dict[str, str] = {}
    for name, dtype in cols:
        if name in ("_file", "_row"):
            continue
        norm = unicodedata.normalize("NFC", name).strip().lower()
        out[norm] = dtype
        if norm != name:
            con.execute(f"ALTER TABLE _stage RENAME COLUMN {_q(name)} TO {_q(norm)}")
    return out


# ----------------------------------------------------------------------------- the window
@dataclass
class _Layout:
    files: list[WindowFile]
    kind: str = ""
    plan: ParsePlan | None = None
    columns: dict[str, str] = field(default_factory=dict)
    table: str = ""


def _plan_layout(con, lay: _Layout, key: PseudonymKey, config: StudyConfig, kind: str | None,
                 rejected: dict[int, str]) -> None:
    """Columns, kind and parse plan of one layout; files whose header the checks refuse go to ``rejected``."""
    columns = _stage_columns(con)
    names = list(columns)
    ok = []
    for f in lay.files:
        try:
            _check_header_names(names, f.name, config)
            file_kind = kind or detect_kind(names, f.name)
            covariates = _check_columns(file_kind, columns, config, f.name)
        except IngestError as exc:
            rejected[f.idx] = str(exc)
            continue
        ok.append(f)
    if not ok:
        return
    lay.kind, lay.columns = file_kind, columns
    also = ("cluster_id",) if file_kind == "assignment" and config.randomisation_unit == "cluster" else ()
    lay.plan = build_parse_plan(file_kind, columns, covariates, key.sql_expr, also_required=also,
                                passthrough=("_file",))


def _parse_layout(con, lay: _Layout, n: int, key: PseudonymKey, config: StudyConfig, today: date,
                  rejected: dict[int, str]) -> None:
    plan = lay.plan
    lay.table = f"_gparsed{n}"
    flags = [f"({c.failed_sql}) IS TRUE AS _f{i}" for i, c in enumerate(plan.checks)]
    any_failed = " OR ".join(f"_f{i}" for i in range(len(plan.checks))) or "FALSE"
    sql = (f"CREATE OR REPLACE TEMP TABLE {lay.table} AS SELECT *, {any_failed} AS _bad FROM "
           f"(SELECT *, {', '.join(flags)} FROM ({plan.select_sql}) WHERE _file NOT IN "
           f"(SELECT unnest($rejected::BIGINT[])))")
    con.execute(sql, {**_params(sql, key, config, today), "rejected": sorted(rejected)})
    con.execute("DROP TABLE _stage")          # raw identifiers go no further
    if not config.sites:
        by_file = {f.idx: f for f in lay.files}
        for fid, n_sites, n_rows in con.execute(
                f"SELECT _file, count(DISTINCT site_id), count(*) FROM {lay.table} WHERE NOT _bad GROUP BY _file"
        ).fetchall():
            if n_sites > MAX_UNREGISTERED_SITES_PER_FILE and 2 * n_sites > n_rows:
                pos = list(lay.columns).index("site_id") + 1
                rejected[fid] = (f"{by_file[fid].name}: column {pos} (site_id) has {n_sites} different values in "
                                 f"{n_rows} rows; that looks like participant identifiers, not sites (shifted "
                                 "columns?). Check the column order, or list the sites under [[sites]] in the study "
                                 "configuration")
    # quarantine rows of the checks (phase 0), in file and row order at the final insert
    parts = [f"SELECT _file, _row, '{c.field}' AS field, '{c.reason}' AS reason, {c.offending_sql} AS v "
             f"FROM {lay.table} WHERE _f{i}" for i, c in enumerate(plan.checks)]
    if parts:
        con.execute(f"INSERT INTO _gq SELECT _file, 0, _row, field, reason, v FROM ({' UNION ALL '.join(parts)})")


def _classify(con, kind: str, layouts: list[_Layout], rejected: list[int]) -> list[str]:
    """Temp table ``_gv`` of the distinct valid rows of ``kind`` with ``_dup``, ``_conflict``, ``_insert``.

    Sequential semantics over the window (file order ``_file``): for a natural key with a
    stored row, a row identical to it is a duplicate and any other a conflict; without one,
    the first file holding exactly one distinct row for the key stores it, earlier files
    (several distinct rows each) have conflicts, later files a duplicate when identical to
    the stored row and a conflict otherwise — what loading the files one by one gives.
    Returns the covariate columns (``_cov_*``) of the union.
    """
    plan0 = layouts[0].plan
    value_cols = list(plan0.value_columns)
    covs = sorted({c for lay in layouts for c in lay.plan.covariates})
    cov_cols = [f"_cov_{c}" for c in covs]
    union = []
    for lay in layouts:
        have = set(lay.plan.covariates)
        sel = ", ".join([_q(c) for c in value_cols]
                        + [_q(f"_cov_{c}") if c in have else f"CAST(NULL AS DOUBLE) AS {_q('_cov_' + c)}" for c in covs])
        union.append(f"SELECT _file, _row, {sel} FROM {lay.table} WHERE NOT _bad")
    cols = value_cols + cov_cols
    qcols = ", ".join(_q(c) for c in cols)
    key = NATURAL_KEYS[kind]
    qkey = ", ".join(_q(c) for c in key)
    table = KIND_TABLE[kind]

    def on(a: str, b: str) -> str:
        return " AND ".join(f"{a}.{_q(c)} = {b}.{_q(c)}" for c in key)

    def same(a: str, b: str) -> str:
        return " AND ".join(f"{a}.{_q(c)} IS NOT DISTINCT FROM {b}.{_q(c)}" for c in value_cols if c not in key) or "TRUE"

    con.execute(f"""
        CREATE OR REPLACE TEMP TABLE _gd AS
        SELECT _file, min(_row) AS _row, count(*) - 1 AS _extra, {qcols}
        FROM ({' UNION ALL '.join(union)}) WHERE _file NOT IN (SELECT unnest($rej::BIGINT[]))
        GROUP BY _file, {qcols}
    """, {"rej": rejected})
    con.execute(f"""
        CREATE OR REPLACE TEMP TABLE _gv AS
        WITH kc AS (
            SELECT _file, {qkey}, count(*) AS _n FROM _gd GROUP BY _file, {qkey}
        ), f1 AS (
            SELECT {qkey}, min(_file) AS _f1 FROM kc WHERE _n = 1 GROUP BY {qkey}
        ), fr AS (
            SELECT d.* FROM _gd d JOIN f1 ON {on('d', 'f1')} AND d._file = f1._f1
        ), st AS (
            SELECT v._file, v._row, bool_or({same('t', 'v')}) AS _same
            FROM _gd v JOIN {_q(table)} t ON {on('t', 'v')} GROUP BY v._file, v._row
        ), c AS (
            SELECT d.*, kc._n, st._row IS NOT NULL AS _stored, coalesce(st._same, FALSE) AS _same_stored,
                   fr._file AS _f1, fr._file IS NOT NULL AND ({same('fr', 'd')}) AS _same_first
            FROM _gd d JOIN kc ON {on('kc', 'd')} AND kc._file = d._file
            LEFT JOIN st ON st._file = d._file AND st._row = d._row
            LEFT JOIN fr ON {on('fr', 'd')}
        ), e AS (
            SELECT *, CASE WHEN _stored THEN _same_stored
                           WHEN _f1 IS NOT NULL AND _file > _f1 THEN _same_first ELSE FALSE END AS _dup
            FROM c
        )
        SELECT * EXCLUDE (_n, _stored, _same_stored, _f1, _same_first),
               NOT _dup AND (_stored OR _n > 1 OR (_f1 IS NOT NULL AND _file > _f1)) AS _conflict
        FROM e
    """)
    return cov_cols


def ingest_window(con: duckdb.DuckDBPyConnection, files: list[WindowFile], key: PseudonymKey, config: StudyConfig,
                  kind: str | None = None) -> list[BatchReport]:
    """Ingest ``files`` (prepared by :func:`prepare_file`, in order) as one window; see the module doc.

    Raises :class:`NeedsAlone` (nothing written) when a file must go alone; any other
    error leaves the warehouse as it was.
    """
    now = datetime.now(timezone.utc).replace(tzinfo=None)
    for i, f in enumerate(files):
        f.idx = i
        f.received = now + timedelta(microseconds=i)
    today = now.date()
    con.execute("BEGIN TRANSACTION")
    try:
        reports = _window(con, files, key, config, kind, today)
        con.execute("COMMIT")
    except BaseException:
        con.execute("ROLLBACK")
        raise
    finally:
        for t in ("_stage", "_gstage", "_gpaths", "_stage_rej", "_stage_rej_scan", "_gq", "_gd", "_gv", "_gfiles",
                  "_gpend", *(f"_gparsed{i}" for i in range(len(files)))):
            con.execute(f"DROP TABLE IF EXISTS {t}")
    return reports


def _window(con, files: list[WindowFile], key: PseudonymKey, config: StudyConfig, kind: str | None,
            today: date) -> list[BatchReport]:
    layouts: dict[tuple, _Layout] = {}
    for f in files:
        layouts.setdefault(f.layout, _Layout(files=[])).files.append(f)
    rejected: dict[int, str] = {}
    con.execute("CREATE OR REPLACE TEMP TABLE _gq (_file BIGINT, phase INTEGER, _row BIGINT, field VARCHAR, "
                "reason VARCHAR, v VARCHAR)")
    rows_read: dict[int, int] = {}
    planned: list[_Layout] = []
    for n, lay in enumerate(layouts.values()):
        try:
            _stage_layout(con, lay.files)
        except duckdb.Error as exc:
            if infrastructure_problem(exc):
                raise
            pos = _find_unreadable(con, lay.files)
            raise NeedsAlone(files.index(lay.files[pos])) from None
        except NeedsAlone as exc:
            raise NeedsAlone(files.index(lay.files[exc.position])) from None
        rows_read.update(dict(con.execute("SELECT _file, count(*) FROM _stage GROUP BY _file").fetchall()))
        _plan_layout(con, lay, key, config, kind, rejected)
        if lay.plan is None:
            con.execute("DROP TABLE _stage")
            continue
        _parse_layout(con, lay, n, key, config, today, rejected)
        planned.append(lay)
    con.execute("CREATE OR REPLACE TEMP TABLE _gfiles AS SELECT unnest($i::BIGINT[]) AS _file, "
                "unnest($b::VARCHAR[]) AS batch_id, unnest($n::VARCHAR[]) AS name",
                {"i": [f.idx for f in files], "b": [f.batch_id for f in files], "n": [f.name for f in files]})
    stats: dict[int, dict] = {}
    kinds_of: dict[int, str] = {}
    by_kind: dict[str, list[_Layout]] = {}
    for lay in planned:
        by_kind.setdefault(lay.kind, []).append(lay)
        for f in lay.files:
            kinds_of[f.idx] = lay.kind
    rej = sorted(rejected)
    pending: dict[int, int] = {}
    for k in RECORD_KINDS:     # assignments first: pending rows count the window's earlier assignments
        lays = by_kind.get(k)
        if not lays:
            continue
        for lay in lays:
            for fid, n_bad in con.execute(f"SELECT _file, count(*) FILTER (WHERE _bad) FROM {lay.table} "
                                          "GROUP BY _file").fetchall():
                stats.setdefault(fid, {})["bad"] = n_bad
        cov_cols = _classify(con, k, lays, rej)
        for fid, n_dup, n_conf, n_ok, sites in con.execute(
                "SELECT _file, coalesce(sum(_extra), 0) + count(*) FILTER (WHERE _dup), count(*) FILTER (WHERE _conflict), "
                "count(*) FILTER (WHERE NOT _dup AND NOT _conflict), "
                "string_agg(DISTINCT site_id, ',' ORDER BY site_id) FILTER (WHERE NOT _dup AND NOT _conflict) "
                "FROM _gv GROUP BY _file").fetchall():
            stats.setdefault(fid, {}).update(dup=int(n_dup), conf=n_conf, ok=n_ok, sites=sites)
        con.execute("INSERT INTO _gq SELECT _file, 2, _row, NULL, $reason, NULL FROM _gv WHERE _conflict",
                    {"reason": _CONFLICT_REASON[k]})
        if k == "assignment":
            con.execute("CREATE OR REPLACE TEMP TABLE _gpend AS SELECT _file, site_id, participant_key FROM _gv "
                        "WHERE NOT _dup AND NOT _conflict")
        else:
            window_assign = ("OR EXISTS (SELECT 1 FROM _gpend a WHERE a.site_id = v.site_id AND "
                             "a.participant_key = v.participant_key AND a._file < v._file)"
                             if "assignment" in by_kind else "")
            pending.update(dict(con.execute(
                "SELECT _file, count(*) FROM _gv v WHERE NOT _dup AND NOT _conflict AND NOT (EXISTS "
                "(SELECT 1 FROM assignments a WHERE a.site_id = v.site_id AND a.participant_key = v.participant_key "
                "AND a.batch_id NOT IN (SELECT batch_id FROM _gfiles)) "
                f"{window_assign}) GROUP BY _file").fetchall()))
        _insert(con, k, cov_cols, [lay for lay in lays])
    # quarantine in the order loading the files one by one gives: by file, checks (by row) then conflicts
    con.execute("INSERT INTO quarantine SELECT f.batch_id, f.name, q._row, q.field, q.reason, q.v "
                "FROM _gq q JOIN _gfiles f USING (_file) "
                "WHERE q._file NOT IN (SELECT unnest($rej::BIGINT[])) ORDER BY q._file, q.phase, q._row",
                {"rej": rej})
    reasons: dict[int, dict[str, int]] = {}
    for fid, reason, n in con.execute(
            "SELECT _file, reason, count(DISTINCT _row) FROM _gq WHERE _file NOT IN (SELECT unnest($rej::BIGINT[])) "
            "GROUP BY _file, reason ORDER BY _file, reason", {"rej": rej}).fetchall():
        reasons.setdefault(fid, {})[reason] = n
    batch_rows, reports = [], []
    for f in files:
        if f.idx in rejected:
            msg = rejected[f.idx]
            batch_rows.append((f.batch_id, f.name, f.sha, kind, None, f.received, 0, 0, 0, 0, "rejected", msg))
            reports.append(BatchReport(file=str(f.path), status="rejected", batch_id=f.batch_id, kind=kind,
                                       message=msg))
            continue
        s = stats.get(f.idx, {})
        n_read = rows_read.get(f.idx, 0)
        n_ok, n_dup = s.get("ok", 0), s.get("dup", 0)
        quarantined = s.get("bad", 0) + s.get("conf", 0)
        if n_ok + quarantined + n_dup != n_read:  # pragma: no cover - invariant guard
            raise RuntimeError(f"{f.name}: row accounting does not add up "
                               f"({n_read} read, {n_ok} loaded, {quarantined} quarantined, {n_dup} duplicate)")
        fk = kinds_of[f.idx]
        batch_rows.append((f.batch_id, f.name, f.sha, fk, s.get("sites"), f.received, n_read, n_ok, quarantined,
                           n_dup, "loaded", None))
        reports.append(BatchReport(file=str(f.path), status="loaded", batch_id=f.batch_id, kind=fk,
                                   rows_read=n_read, rows_loaded=n_ok, rows_quarantined=quarantined,
                                   rows_duplicate=n_dup, rows_pending=pending.get(f.idx, 0) if fk != "assignment" else 0,
                                   reasons=reasons.get(f.idx, {}) if quarantined else {}))
    cols = list(zip(*batch_rows))
    con.execute("INSERT INTO batches SELECT * FROM (SELECT unnest($b::VARCHAR[]), unnest($f::VARCHAR[]), "
                "unnest($s::VARCHAR[]), unnest($k::VARCHAR[]), unnest($sites::VARCHAR[]), unnest($t::TIMESTAMP[]), "
                "unnest($n::BIGINT[]), unnest($l::BIGINT[]), unnest($q::BIGINT[]), unnest($d::BIGINT[]), "
                "unnest($st::VARCHAR[]), unnest($m::VARCHAR[]))",
                dict(zip(("b", "f", "s", "k", "sites", "t", "n", "l", "q", "d", "st", "m"), map(list, cols))))
    return reports


def _insert(con, kind: str, cov_cols: list[str], layouts: list[_Layout]) -> None:
    table = KIND_TABLE[kind]
    stored = [c.name for c in columns_of(STORED_MODELS[kind])]
    exprs = ["f.batch_id" if c == "batch_id" else "v._row" if c == "source_row" else f"v.{_q(c)}" for c in stored]
    con.execute(f"INSERT INTO {_q(table)} ({', '.join(_q(c) for c in stored)}) "
                f"SELECT {', '.join(exprs)} FROM _gv v JOIN _gfiles f USING (_file) "
                "WHERE NOT v._dup AND NOT v._conflict ORDER BY v._file, v._row")
    for col in cov_cols:
        cov = col.removeprefix("_cov_")
        files = sorted({f.idx for lay in layouts if cov in lay.plan.covariates for f in lay.files})
        con.execute(f"INSERT INTO assignment_covariates SELECT f.batch_id, v.site_id, v.participant_key, $cov, "
                    f"v.{_q(col)} FROM _gv v JOIN _gfiles f USING (_file) WHERE NOT v._dup AND NOT v._conflict "
                    "AND list_contains($files, v._file) ORDER BY v._file, v._row", {"cov": cov, "files": files})
