"""Drift-chart limits kept in the warehouse (takeup.pipeline.run.drift_limits).

What is checked is an equality, not a statistical claim: a limit read back from ``drift_limits``
is the limit the computation returns (bit for bit), so a run with stored limits writes the same
results as a run that computes them all.  The limits themselves are checked against exact
Markov-chain ARLs and simulation in test_drift_calibration.py and test_monitoring_cusum.py.
"""

from __future__ import annotations

import shutil

import duckdb
import numpy as np
import pandas as pd

from takeup.pipeline.demo import demo_as_of
from takeup.pipeline.run import drift_limits
from takeup.pipeline.run.drift_limits import LIMIT_ALGORITHM, LIMIT_COLUMNS, LimitBook, load_limits, store_limits
from takeup.pipeline.run.stages import run_monitoring
from takeup.pipeline.run.trend_rows import compute_trends
from tests.test_trends import make_ctx, make_inputs, random_counts


def _forbid_computing(monkeypatch):
    """Make any limit computation fail loudly (and forget the in-process memo)."""
    def refuse(*args, **kwargs):
        raise AssertionError(f"limit computed although it was stored: {args}")
    monkeypatch.setattr(drift_limits, "design_limit", refuse)
    monkeypatch.setattr(drift_limits, "calibrated_limit", refuse)


def test_stored_limits_give_the_same_charts_without_computing(monkeypatch):
    counts = random_counts(5, n_sites=4, n_periods=14)
    ctx = make_ctx(drift_baseline_periods=4)
    drift_limits.design_limit.cache_clear()
    drift_limits.calibrated_limit.cache_clear()
    rows_a, drift_a = compute_trends(make_inputs(counts), ctx)
    computed = pd.DataFrame(list(drift_a.computed_limits), columns=list(LIMIT_COLUMNS))
    assert set(computed.calibration) == {"known_level", "estimated_level"}
    _forbid_computing(monkeypatch)
    inputs = make_inputs(counts)
    inputs = type(inputs)(**{**inputs.__dict__, "drift_limits": computed})
    rows_b, drift_b = compute_trends(inputs, ctx)
    assert drift_b.computed_limits == ()
    np.testing.assert_array_equal(np.asarray(drift_a.h), np.asarray(drift_b.h))   # exact: same numbers
    pd.testing.assert_frame_equal(rows_a, rows_b)


def test_book_reads_stored_limits_and_records_only_new_ones(monkeypatch):
    stored = pd.DataFrame([("known_level", 0.1, 3.0, 2000.0, 0.0, 4.5, ""),
                           ("estimated_level", 0.1, 3.0, 2000.0, 0.08, 4.7, "")], columns=list(LIMIT_COLUMNS))
    book = LimitBook.from_frame(stored)
    assert book.design(0.1, 3.0, 2000.0) == (4.5, "")
    assert book.calibrated(0.1, 3.0, 2000.0, 0.08) == 4.7
    assert book.computed_rows() == ()
    monkeypatch.setattr(drift_limits, "calibrated_limit", lambda *a: 5.25)
    assert book.calibrated(0.1, 3.0, 2000.0, 0.12) == 5.25       # a new spread: computed from the stored design
    assert book.computed_rows() == ({"calibration": "estimated_level", "p0": 0.1, "odds_ratio": 3.0,
                                     "target_arl0": 2000.0, "logit_sd": 0.12, "h": 5.25, "note": ""},)


def test_store_adds_missing_limits_once_and_ignores_other_algorithms(warehouse, monkeypatch):
    from takeup.pipeline.warehouse import connect
    row = {"calibration": "known_level", "p0": 0.2, "odds_ratio": 3.0, "target_arl0": 2000.0, "logit_sd": 0.0,
           "h": None, "note": "no limit"}
    con = connect(warehouse)
    try:
        assert store_limits(con, [row], "r1") == 1
        assert store_limits(con, [row, {**row, "p0": 0.3, "h": 4.0, "note": ""}], "r2") == 1
        got = load_limits(con).sort_values("p0").reset_index(drop=True)
        assert got.p0.tolist() == [0.2, 0.3] and np.isnan(got.h[0]) and got.h[1] == 4.0
        assert LimitBook.from_frame(got).design(0.2, 3.0, 2000.0)[1] == "no limit"
        monkeypatch.setattr(drift_limits, "LIMIT_ALGORITHM", LIMIT_ALGORITHM + " (changed)")
        assert len(load_limits(con)) == 0                          # another algorithm's limits are not used
    finally:
        con.close()


def test_runs_store_limits_once_and_reuse_them(demo_warehouse, tmp_path, monkeypatch):
    path = tmp_path / "demo.duckdb"
    shutil.copy(demo_warehouse["path"], path)
    monkeypatch.setenv("TAKEUP_ID_KEY", "test-key-not-secret")
    drift_limits.design_limit.cache_clear()
    drift_limits.calibrated_limit.cache_clear()
    first = run_monitoring(path, as_of=demo_as_of())
    con = duckdb.connect(str(path), read_only=True)
    try:
        stored = con.execute("SELECT run_id, algorithm, count(*) FROM drift_limits GROUP BY ALL").fetchall()
    finally:
        con.close()
    assert [(r, a) for r, a, _ in stored] == [(first.run_id, LIMIT_ALGORITHM)] and stored[0][2] > 0
    _forbid_computing(monkeypatch)                                 # the second run must read every limit
    second = run_monitoring(path, as_of=demo_as_of())
    con = duckdb.connect(str(path), read_only=True)
    try:
        assert con.execute("SELECT count(*) FROM drift_limits").fetchall()[0][0] == stored[0][2]
        lim = con.execute("""SELECT run_id, site_id, arm, period_start, cusum, cusum_limit FROM uptake_trends
                             WHERE basis = 'cohort' AND cusum_limit IS NOT NULL ORDER BY ALL""").df()
    finally:
        con.close()
    a = lim[lim.run_id == first.run_id].drop(columns="run_id").reset_index(drop=True)
    b = lim[lim.run_id == second.run_id].drop(columns="run_id").reset_index(drop=True)
    assert len(a) > 0
    pd.testing.assert_frame_equal(a, b)
    assert first.alerts_by_status.get("new", 0) == second.alerts_by_status.get("ongoing", 0)
