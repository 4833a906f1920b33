"""Per-participant state kept up to date at ingestion (table ``participant_state``).

A run needs, per assigned participant, the arm, the assignment date, the
summary of the uptake reports and the outcome value inside the follow-up
window.  Computing that from the record tables means joining every stored
record on 128-bit pseudonyms at every run.  Instead the state holds it, one
row per assigned participant x outcome, with two more columns that make a
cutoff safe:

* ``last_event_on``: the latest date among all the participant's records;
* ``last_received_at``: the latest receipt time among their batches.

A row is *exact* for a run with cutoff ``as_of`` and data cutoff
``data_cutoff`` when ``last_event_on <= as_of`` and ``last_received_at <=
data_cutoff``: every record of that participant is then inside the run's
view of the data, so the state row equals what the join would give.  The run
recomputes from the record tables only the other participants (none for a run
of today; possibly many when reproducing an old run).

The outcome value depends on the study's follow-up window and rule and on the
list of outcomes: together they are the state's *basis*, stored as JSON in
``warehouse_meta.state_basis``.  A run whose basis differs does not use the
state (and the run command rebuilds it for the new basis).

The state is a cache of the record tables: ``participant_state_batches`` lists
the batches it reflects.  :func:`refresh_state` applies the loaded batches not
yet listed — recomputing the rows of the participants they touch, or rebuilding
everything when they touch a large share — in one transaction.  Ingestion calls
it once at the end of a set of files; the run command calls it before reading.
Uptake and outcome rows that arrive before their assignment ("pending") are
stored in the record tables as before and enter the state when the assignment
arrives (the assignment's batch touches that participant).
"""

from __future__ import annotations

import json
from dataclasses import dataclass
from datetime import datetime, timezone

import duckdb

from takeup.pipeline.batch_activity import missing_batches, summarise_batches
from takeup.schemas.ddl import create_table_sql
from takeup.schemas.records import ParticipantStateRow

__all__ = ["StateBasis", "basis_for", "refresh_state", "state_is_current", "stored_basis", "state_rows_sql",
           "STATE_REBUILD_SHARE", "STATE_PART_PARTICIPANTS"]

#: rebuild the whole state (instead of replacing the touched participants' rows) when the new
#: batches touch more than this share of the participants already in the state
STATE_REBUILD_SHARE = 0.3

_AGG = {"last": "arg_max(t.value, t.measured_on)", "first": "arg_min(t.value, t.measured_on)",
        "mean": "avg(t.value)"}


@dataclass(frozen=True)
class StateBasis:
    """What the outcome values of the state depend on: the follow-up window and rule, the outcomes."""

    min_days: int
    max_days: int
    rule: str
    outcomes: tuple[str, ...]

    def to_json(self) -> str:
        return json.dumps({"min_days": self.min_days, "max_days": self.max_days, "rule": self.rule,
                           "outcomes": list(self.outcomes)}, sort_keys=True)


def basis_for(con: duckdb.DuckDBPyConnection, config) -> StateBasis:
    """The basis a run of ``config`` needs: its follow-up settings and outcome list.

    The outcome list is the declared outcomes or, without a declaration, every outcome
    name present in the warehouse (as the run itself uses).
    """
    if config.outcomes:
        outcomes = tuple(o.name for o in config.outcomes)
    else:
        outcomes = tuple(r[0] for r in con.execute(
            "SELECT DISTINCT outcome FROM outcome_measurements ORDER BY 1").fetchall())
    return StateBasis(config.follow_up.min_days, config.follow_up.max_days, config.follow_up.rule, outcomes)


def stored_basis(con: duckdb.DuckDBPyConnection) -> str | None:
    row = con.execute("SELECT value FROM warehouse_meta WHERE key = 'state_basis'").fetchone()
    return row[0] if row else None


def _pending_batches(con: duckdb.DuckDBPyConnection) -> list[str]:
    return [r[0] for r in con.execute(
        "SELECT batch_id FROM batches b WHERE status = 'loaded' AND NOT EXISTS "
        "(SELECT 1 FROM participant_state_batches s WHERE s.batch_id = b.batch_id) ORDER BY received_at").fetchall()]


def state_is_current(con: duckdb.DuckDBPyConnection, basis: StateBasis) -> bool:
    """The state reflects every loaded batch and was built for ``basis``."""
    return stored_basis(con) == basis.to_json() and not _pending_batches(con)


def state_rows_sql(basis: StateBasis, keys: str | None = None, part: tuple[int, int] | None = None) -> tuple[str, dict]:
    """``SELECT`` of the state rows (all assigned participants, or those whose key is in table ``keys``).

    ``part = (i, n)`` keeps the participants whose key lies in the ``i``-th of ``n`` equal ranges of
    the 128-bit key space (keys are keyed hashes, so the parts are of about equal size; a range
    test costs nothing next to the scan, where a 128-bit modulo made each scan ~300 times slower):
    a large state is written part by part, each part's aggregations and joins within the memory
    budget.

    Returns the SQL and its parameters.  Every record and batch counts: the cutoff is the run's business.
    """
    only = f" AND t.participant_key IN (SELECT participant_key FROM {keys})" if keys else ""
    if part is not None and part[1] > 1:
        i, n = int(part[0]), int(part[1])
        lo, hi = (i << 128) // n, ((i + 1) << 128) // n
        only += f" AND t.participant_key >= {lo}::UHUGEINT"
        if i < n - 1:
            only += f" AND t.participant_key < {hi}::UHUGEINT"
    names = ("SELECT generate_subscripts($outcomes, 1) - 1 AS slot, unnest($outcomes) AS outcome"
             if basis.outcomes else "SELECT 0 AS slot, CAST(NULL AS VARCHAR) AS outcome")
    sql = f"""
        WITH rb AS (SELECT batch_id, received_at FROM batches WHERE status = 'loaded'),
        a AS (
            SELECT t.participant_key, t.site_id, t.cluster_id, t.stratum, t.assigned_on,
                   CASE WHEN t.arm = 'treatment' THEN 1 ELSE 0 END AS z, rb.received_at
            FROM assignments t JOIN rb USING (batch_id) WHERE TRUE{only}
        ), u AS (
            SELECT t.participant_key, bool_or(t.took_up) AS took_up, min(t.observed_on) AS first_obs,
                   min(t.observed_on) FILTER (WHERE t.took_up) AS first_yes, max(t.observed_on) AS last_on,
                   max(rb.received_at) AS last_rec
            FROM uptake_events t JOIN rb USING (batch_id) WHERE TRUE{only} GROUP BY t.participant_key
        ), m AS (
            SELECT t.participant_key, max(t.measured_on) AS last_on, max(rb.received_at) AS last_rec
            FROM outcome_measurements t JOIN rb USING (batch_id) WHERE TRUE{only} GROUP BY t.participant_key
        ), o AS (
            SELECT t.participant_key, t.outcome, {_AGG[basis.rule]} AS y
            FROM outcome_measurements t JOIN rb USING (batch_id) JOIN a USING (participant_key)
            WHERE list_contains($outcomes, t.outcome)
              AND date_diff('day', a.assigned_on, t.measured_on) BETWEEN $min_days AND $max_days{only}
            GROUP BY t.participant_key, t.outcome
        ), names AS ({names})
        SELECT a.participant_key, a.site_id, a.cluster_id, a.stratum, a.assigned_on, a.z,
               u.took_up, u.first_obs, u.first_yes, names.slot, names.outcome, o.y,
               greatest(a.assigned_on, u.last_on, m.last_on) AS last_event_on,
               greatest(a.received_at, u.last_rec, m.last_rec) AS last_received_at
        FROM a LEFT JOIN u USING (participant_key) LEFT JOIN m USING (participant_key)
        CROSS JOIN names LEFT JOIN o ON o.participant_key = a.participant_key AND o.outcome = names.outcome
    """
    return sql, {"outcomes": list(basis.outcomes), "min_days": basis.min_days, "max_days": basis.max_days}


#: participants written per statement when the state is (re)built: the statement's hash aggregates
#: and joins grow with the participants they hold (one statement over 10 million fitted the default
#: 1200 MB budget, one over 30 million ran out of memory), so a large state is written in parts of
#: at most this many; each extra part costs one more scan of the record tables
STATE_PART_PARTICIPANTS = 2_000_000


def _insert_state(con: duckdb.DuckDBPyConnection, basis: StateBasis, keys: str | None, n_participants: int) -> None:
    n_parts = max(1, -(-int(n_participants) // STATE_PART_PARTICIPANTS))
    for i in range(n_parts):
        sql, params = state_rows_sql(basis, keys=keys, part=(i, n_parts))
        con.execute(f"INSERT INTO participant_state ({_columns()}) {sql}", params)


def _columns() -> str:
    from takeup.schemas.ddl import columns_of
    return ", ".join(f'"{c.name}"' for c in columns_of(ParticipantStateRow))


def refresh_state(con: duckdb.DuckDBPyConnection, basis: StateBasis) -> str:
    """Bring ``participant_state`` up to date with the loaded batches and ``basis``, in one transaction.

    Returns ``"current"`` (nothing to do), ``"updated"`` (the participants touched by new
    batches recomputed) or ``"rebuilt"`` (everything recomputed: new basis, or the new
    batches touch more than :data:`STATE_REBUILD_SHARE` of the participants).
    """
    pending = _pending_batches(con)
    same_basis = stored_basis(con) == basis.to_json()
    if same_basis and not pending:
        missing = missing_batches(con)
        if missing:                       # a warehouse from before batch_activity: summarised once
            con.execute("BEGIN TRANSACTION")
            try:
                summarise_batches(con, missing)
                con.execute("COMMIT")
            except BaseException:
                con.execute("ROLLBACK")
                raise
        return "current"
    now = datetime.now(timezone.utc).replace(tzinfo=None)
    con.execute("BEGIN TRANSACTION")
    try:
        mode = "rebuilt"
        if same_basis:
            con.execute("CREATE OR REPLACE TEMP TABLE _state_new_batches AS SELECT unnest($b::VARCHAR[]) AS batch_id",
                        {"b": pending})
            con.execute("""
                CREATE OR REPLACE TEMP TABLE _state_touched AS
                SELECT DISTINCT participant_key FROM (
                    SELECT participant_key FROM assignments WHERE batch_id IN (SELECT batch_id FROM _state_new_batches)
                    UNION ALL SELECT participant_key FROM uptake_events
                    WHERE batch_id IN (SELECT batch_id FROM _state_new_batches)
                    UNION ALL SELECT participant_key FROM outcome_measurements
                    WHERE batch_id IN (SELECT batch_id FROM _state_new_batches))
            """)
            n_touched, n_state = con.execute(
                "SELECT (SELECT count(*) FROM _state_touched), "
                "(SELECT count(*) FROM participant_state WHERE slot = 0)").fetchone()
            if n_touched <= STATE_REBUILD_SHARE * n_state:
                mode = "updated"
                con.execute("DELETE FROM participant_state WHERE participant_key IN "
                            "(SELECT participant_key FROM _state_touched)")
                _insert_state(con, basis, "_state_touched", n_touched)
        if mode == "rebuilt":
            con.execute("DROP TABLE IF EXISTS participant_state")
            con.execute(create_table_sql("participant_state", ParticipantStateRow))
            n_assigned = con.execute("SELECT count(*) FROM assignments").fetchone()[0]
            _insert_state(con, basis, None, n_assigned)
            con.execute("DELETE FROM participant_state_batches")
            pending = [r[0] for r in con.execute("SELECT batch_id FROM batches WHERE status = 'loaded'").fetchall()]
            con.execute("DELETE FROM warehouse_meta WHERE key = 'state_basis'")
            con.execute("INSERT INTO warehouse_meta VALUES ('state_basis', $v)", {"v": basis.to_json()})
        con.execute("INSERT INTO participant_state_batches SELECT unnest($b::VARCHAR[]), $t",
                    {"b": pending, "t": now})
        summarise_batches(con, missing_batches(con))     # the new batches' record dates, for the stale rule
        con.execute("COMMIT")
    except BaseException:
        con.execute("ROLLBACK")
        raise
    finally:
        con.execute("DROP TABLE IF EXISTS _state_touched")
        con.execute("DROP TABLE IF EXISTS _state_new_batches")
    return mode
