"""Site activity from the per-batch summary against the same query over the record tables.

The reference is the direct aggregation over every stored record (``site_activity_from_records``,
the query the run used before the summary existed).  Checked on the demo warehouse at cutoffs
after, inside and before the data (so that batches straddle the cutoff), with a data cutoff that
leaves batches out, and for a warehouse whose summary is missing (older warehouse: filled on the
next refresh; until then the records are read).
"""

from __future__ import annotations

import shutil
from datetime import datetime, timedelta

import pandas as pd
import pytest

from takeup.pipeline.batch_activity import missing_batches, site_activity, site_activity_from_records
from takeup.pipeline.demo import demo_as_of
from takeup.pipeline.participant_state import basis_for, refresh_state
from takeup.pipeline.warehouse import connect, stored_config


@pytest.fixture
def demo_copy(demo_warehouse, tmp_path, key_env):
    path = tmp_path / "demo.duckdb"
    shutil.copy(demo_warehouse["path"], path)
    return path


@pytest.mark.parametrize("days_back", [0, 10, 45, 120, 400])
def test_summary_equals_the_records(demo_copy, days_back):
    con = connect(demo_copy)
    try:
        assert missing_batches(con) == []                  # ingestion summarised every batch
        as_of = demo_as_of() - timedelta(days=days_back)
        straddling = con.execute("SELECT count(*) FROM batch_activity WHERE first_on <= $d AND last_on > $d",
                                 {"d": as_of}).fetchall()[0][0]
        if days_back in (10, 45):
            assert straddling > 0                          # the case read from the records is exercised
        received = sorted(r[0] for r in con.execute("SELECT received_at FROM batches").fetchall())
        for cutoff in (datetime(2100, 1, 1), received[len(received) // 2]):
            a = site_activity(con, as_of, cutoff)
            b = site_activity_from_records(con, as_of, cutoff)
            pd.testing.assert_frame_equal(a, b)
    finally:
        con.close()


def test_an_older_warehouse_is_summarised_on_its_next_refresh(demo_copy):
    con = connect(demo_copy)
    try:
        reference = site_activity_from_records(con, demo_as_of(), datetime(2100, 1, 1))
        con.execute("DELETE FROM batch_activity")
        assert missing_batches(con)
        pd.testing.assert_frame_equal(site_activity(con, demo_as_of(), datetime(2100, 1, 1)), reference)
        assert refresh_state(con, basis_for(con, stored_config(con))) == "current"
        assert missing_batches(con) == []
        pd.testing.assert_frame_equal(site_activity(con, demo_as_of(), datetime(2100, 1, 1)), reference)
    finally:
        con.close()
