"""Per-batch, per-site record dates (table ``batch_activity``): when each site last sent data.

The stale-site rule needs, per site, the latest record date on or before the run's cutoff among
the loaded batches received by its data cutoff, the latest receipt time and the number of such
batches.  Read from the record tables, that is a scan of every stored record.  Batches are
immutable once loaded, so their dates are summarised once -- per batch x site: the first and
last record date and the number of records -- when the participant state applies the batch
(:func:`summarise_batches`, called by ``participant_state.refresh_state`` in its transaction),
and a run reads the summary (:func:`site_activity`).  A batch whose dates straddle the cutoff
(records before and after it) is the one case the summary cannot answer; its records are read.

Warehouses created before the table existed are summarised on their first refresh (every loaded
batch missing from the summary is added); until the summary covers every loaded batch, runs read
the record tables (:func:`summary_is_complete`).
"""

from __future__ import annotations

from datetime import date, datetime

import duckdb
import pandas as pd

__all__ = ["summarise_batches", "missing_batches", "summary_is_complete", "site_activity",
           "site_activity_from_records"]

_DATES = (("assignments", "assigned_on"), ("uptake_events", "observed_on"), ("outcome_measurements", "measured_on"))


def missing_batches(con: duckdb.DuckDBPyConnection) -> list[str]:
    """Loaded batches that stored records but have no summary rows yet."""
    return [r[0] for r in con.execute(
        "SELECT batch_id FROM batches b WHERE status = 'loaded' AND rows_loaded > 0 AND NOT EXISTS "
        "(SELECT 1 FROM batch_activity a WHERE a.batch_id = b.batch_id) ORDER BY batch_id").fetchall()]


def summary_is_complete(con: duckdb.DuckDBPyConnection) -> bool:
    return not missing_batches(con)


def summarise_batches(con: duckdb.DuckDBPyConnection, batch_ids: list[str]) -> None:
    """Add the summary rows of ``batch_ids`` (one filtered scan of each record table).

    The caller owns the transaction (``refresh_state``), so the summary lands with the state.
    """
    if not batch_ids:
        return
    con.execute("CREATE OR REPLACE TEMP TABLE _activity_batches AS SELECT unnest($b::VARCHAR[]) AS batch_id",
                {"b": list(batch_ids)})
    try:
        parts = " UNION ALL ".join(
            f"SELECT batch_id, site_id, min({col}) AS first_on, max({col}) AS last_on, count(*) AS n_records "
            f"FROM {table} WHERE batch_id IN (SELECT batch_id FROM _activity_batches) GROUP BY ALL"
            for table, col in _DATES)
        con.execute("DELETE FROM batch_activity WHERE batch_id IN (SELECT batch_id FROM _activity_batches)")
        con.execute(f"INSERT INTO batch_activity (batch_id, site_id, first_on, last_on, n_records) "
                    f"SELECT batch_id, site_id, min(first_on), max(last_on), sum(n_records) FROM ({parts}) GROUP BY ALL")
    finally:
        con.execute("DROP TABLE IF EXISTS _activity_batches")


_COLUMNS = ["site_id", "last_record_on", "last_received_at", "n_batches"]


def site_activity_from_records(con: duckdb.DuckDBPyConnection, as_of: date, data_cutoff: datetime) -> pd.DataFrame:
    """Per site: latest record date <= ``as_of``, latest receipt time and number of batches, from the records."""
    return con.execute("""
        WITH ok AS (SELECT batch_id, received_at FROM batches WHERE status = 'loaded' AND received_at <= $cutoff),
        rec AS (      -- per table, site and batch first (small), then across tables
            SELECT site_id, batch_id, max(assigned_on) AS d FROM assignments WHERE assigned_on <= $as_of GROUP BY ALL
            UNION ALL SELECT site_id, batch_id, max(observed_on) FROM uptake_events WHERE observed_on <= $as_of
            GROUP BY ALL
            UNION ALL SELECT site_id, batch_id, max(measured_on) FROM outcome_measurements
            WHERE measured_on <= $as_of GROUP BY ALL
        )
        SELECT rec.site_id, max(rec.d) AS last_record_on, max(ok.received_at) AS last_received_at,
               count(DISTINCT rec.batch_id) AS n_batches
        FROM rec JOIN ok USING (batch_id) GROUP BY rec.site_id ORDER BY rec.site_id
    """, {"as_of": as_of, "cutoff": data_cutoff}).df()


def site_activity(con: duckdb.DuckDBPyConnection, as_of: date, data_cutoff: datetime) -> pd.DataFrame:
    """As :func:`site_activity_from_records`, from ``batch_activity`` when it covers every loaded batch.

    Batches entirely on or before ``as_of`` contribute their last date; batches entirely after it
    nothing; only batches with records on both sides of ``as_of`` are read from the record tables.
    """
    if not summary_is_complete(con):
        return site_activity_from_records(con, as_of, data_cutoff)
    params = {"as_of": as_of, "cutoff": data_cutoff}
    con.execute("""
        CREATE OR REPLACE TEMP TABLE _straddling AS
        SELECT DISTINCT a.batch_id FROM batch_activity a JOIN batches b USING (batch_id)
        WHERE b.status = 'loaded' AND b.received_at <= $cutoff AND a.first_on <= $as_of AND a.last_on > $as_of
    """, params)
    try:
        partial = ""
        if con.execute("SELECT count(*) FROM _straddling").fetchall()[0][0]:
            partial = "UNION ALL " + " UNION ALL ".join(
                f"SELECT site_id, batch_id, max({col}) FROM {table} "
                f"WHERE batch_id IN (SELECT batch_id FROM _straddling) AND {col} <= $as_of GROUP BY ALL"
                for table, col in _DATES)
        return con.execute(f"""
            WITH ok AS (SELECT batch_id, received_at FROM batches WHERE status = 'loaded' AND received_at <= $cutoff),
            rec AS (
                SELECT site_id, batch_id, last_on AS d FROM batch_activity
                WHERE last_on <= $as_of AND batch_id NOT IN (SELECT batch_id FROM _straddling)
                {partial}
            )
            SELECT rec.site_id, max(rec.d) AS last_record_on, max(ok.received_at) AS last_received_at,
                   count(DISTINCT rec.batch_id) AS n_batches
            FROM rec JOIN ok USING (batch_id) GROUP BY rec.site_id ORDER BY rec.site_id
        """, params).df()
    finally:
        con.execute("DROP TABLE IF EXISTS _straddling")
