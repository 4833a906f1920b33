"""What a publication holds: the SELECTs over the warehouse, with small cells suppressed.

Every target reads the same SQL: :func:`published_select` gives the rows of one
result table for one run (``scope="run"``) or for every finished run up to it
(``scope="history"``), with the columns of
:func:`takeup.schemas.publication.published_columns`.  Counts from 1 to
``min_cell_count - 1`` of a cell (:data:`takeup.schemas.publication.SMALL_CELLS`)
are nulled with the values computed from them, and the flag column says so; the
warehouse keeps exact values.  Parameters are bound (``$run``, ``$k``); the only
identifiers in the text come from the models.
"""

from __future__ import annotations

from dataclasses import dataclass
from datetime import date, datetime
from typing import Literal

import duckdb

from takeup.schemas.publication import SMALL_CELLS, SUPPRESSION_FLAG, published_columns
from takeup.schemas.results import RESULT_TABLES

__all__ = ["PublishedRun", "published_select", "published_run", "finished_runs", "RUNS_UP_TO", "run_row_count", "bind"]


def _q(identifier: str) -> str:
    return '"' + identifier.replace('"', '""') + '"'


#: finished runs up to and including $run (by started_at, then run_id), as in the latest_* views
RUNS_UP_TO = ("SELECT r.run_id FROM runs r, (SELECT started_at AS s, run_id AS i FROM runs WHERE run_id = $run) p "
              "WHERE r.status IN ('ok', 'partial') AND (r.started_at < p.s OR (r.started_at = p.s AND r.run_id <= p.i))")


def _small(col: str) -> str:
    return f"coalesce({_q(col)} BETWEEN 1 AND $k - 1, false)"


def published_select(table: str, scope: Literal["run", "history"] = "run") -> str:
    """SELECT of the published copy of ``table``; bind ``$run`` (run id) and ``$k`` (min_cell_count)."""
    if table not in RESULT_TABLES:
        raise KeyError(f"unknown result table {table!r}")
    cols = published_columns(table)
    where = "run_id = $run" if scope == "run" else f"run_id IN ({RUNS_UP_TO})"
    if table == "runs" and scope == "history":
        where = f"run_id IN ({RUNS_UP_TO})"
    groups = SMALL_CELLS.get(table, ())
    if not groups:
        names = ", ".join(_q(c.name) for c in cols)
        return f"SELECT {names} FROM {_q(table)} WHERE {where} ORDER BY ALL"
    flags = [f"({' OR '.join(_small(c) for c in g.counts)}) AS _small{i}" for i, g in enumerate(groups)]
    shared = [f"bool_or(_small{i}) OVER (PARTITION BY {', '.join(_q(p) for p in g.partition)}) AS _shared{i}"
              for i, g in enumerate(groups) if g.shared]
    nulled: dict[str, list[str]] = {}
    for i, g in enumerate(groups):
        for c in (*g.counts, *g.derived):
            nulled.setdefault(c, []).append(f"_small{i}")
        for c in g.shared:
            nulled.setdefault(c, []).append(f"_shared{i}")
    parts = []
    for c in cols:
        if c.name == SUPPRESSION_FLAG:
            conds = [f"_small{i}" for i in range(len(groups))] + [f"_shared{i}" for i, g in enumerate(groups)
                                                                 if g.shared]
            parts.append(f"({' OR '.join(conds)}) AS {_q(c.name)}")
        elif c.name in nulled:
            parts.append(f"CASE WHEN {' OR '.join(nulled[c.name])} THEN NULL ELSE {_q(c.name)} END AS {_q(c.name)}")
        else:
            parts.append(_q(c.name))
    inner = f"SELECT *, {', '.join(flags)} FROM {_q(table)} WHERE {where}"
    if shared:
        inner = f"SELECT *, {', '.join(shared)} FROM ({inner})"
    return f"SELECT {', '.join(parts)} FROM ({inner}) ORDER BY ALL"


def bind(sql: str, run_id: str, min_cell_count: int) -> dict:
    """The parameters ``sql`` (from :func:`published_select`) uses: DuckDB refuses unused ones."""
    params: dict = {"run": run_id}
    if "$k" in sql:
        params["k"] = min_cell_count
    return params


@dataclass(frozen=True)
class PublishedRun:
    """The run a publication shows as latest."""

    run_id: str
    as_of: date
    started_at: datetime
    status: str


def published_run(con: duckdb.DuckDBPyConnection, run_id: str) -> PublishedRun:
    row = con.execute("SELECT run_id, as_of, started_at, status FROM runs WHERE run_id = $r", {"r": run_id}).fetchall()
    if not row:
        raise KeyError(run_id)
    return PublishedRun(*row[0])


def finished_runs(con: duckdb.DuckDBPyConnection) -> list[str]:
    """Finished runs (status ok or partial), oldest first."""
    return [r[0] for r in con.execute("SELECT run_id FROM runs WHERE status IN ('ok', 'partial') "
                                      "ORDER BY started_at, run_id").fetchall()]


def run_row_count(con: duckdb.DuckDBPyConnection, run_id: str) -> int:
    """Result rows of one run across the result tables (its runs row included)."""
    sql = " + ".join(f"(SELECT count(*) FROM {_q(t)} WHERE run_id = $run)" for t in RESULT_TABLES)
    return int(con.execute(f"SELECT {sql}", {"run": run_id}).fetchall()[0][0])
