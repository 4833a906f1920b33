"""The run's one-scan moments (grouped by period and participant flags) against the direct query.

``site_outcome_period_moments`` derives every sum of ``site_outcome_moments`` from counts and
sums of Y per flag group (D binary); both read the same ``_sample``.  The reference is the
direct ``GROUP BY`` with its thirteen aggregates (whose results the SQL-path tests check against
linearmodels).  Counts must be equal; float sums agree to 1e-12 relative (summation order only).
Checked on the demo warehouse, which has missing uptake reports, missing outcomes and several
outcomes, under both rules for missing uptake reports, and at a cutoff in the past (participants
recomputed from the records).
"""

from __future__ import annotations

import shutil
from datetime import timedelta

import numpy as np
import pandas as pd
import pytest

from takeup.pipeline.demo import demo_as_of
from takeup.pipeline.run.inputs import new_run_context
from takeup.pipeline.run.sample_sql import (SampleSpec, build_participants, drop_sample, outcome_names,
                                            site_outcome_moments, site_outcome_period_moments)
from takeup.pipeline.warehouse import connect, stored_config


@pytest.mark.parametrize("rule,days_back", [("complete_case", 0), ("not_taken_up", 0), ("complete_case", 60)])
def test_one_scan_moments_equal_the_direct_query(demo_warehouse, tmp_path, key_env, rule, days_back):
    path = tmp_path / "demo.duckdb"
    shutil.copy(demo_warehouse["path"], path)
    con = connect(path)
    try:
        config = stored_config(con).model_copy(update={"uptake_missing": rule})
        ctx = new_run_context(config, as_of=demo_as_of() - timedelta(days=days_back))
        outcomes = outcome_names(con, config)
        assert len(outcomes) >= 1
        build_participants(con, SampleSpec.from_config(config, ctx.as_of, ctx.data_cutoff), outcomes)
        direct = site_outcome_moments(con)
        origin = con.execute("SELECT min(assigned_on) FROM _participants").fetchall()[0][0]
        moments, periods = site_outcome_period_moments(con, origin, 7)
        cohort = con.execute("""
            SELECT site_id, z, (assigned_on - CAST($o AS DATE)) // 7 AS period_index, count(*) AS n_assigned,
                   count(*) FILTER (WHERE uptake_observed) AS n_uptake_observed, sum(d) AS sum_d_assigned
            FROM _participants GROUP BY ALL ORDER BY ALL""", {"o": origin}).df()
        drop_sample(con)
    finally:
        con.close()
    assert list(moments.columns) == list(direct.columns)
    assert (moments[["site_id", "outcome"]].astype(str).to_numpy() == direct[["site_id", "outcome"]].astype(str)
            .to_numpy()).all()
    for col in direct.columns[2:]:
        a, b = direct[col].to_numpy(dtype=float), moments[col].to_numpy(dtype=float)
        if col.startswith("n") or col == "z":
            np.testing.assert_array_equal(b, a, err_msg=col)
        else:
            np.testing.assert_allclose(b, a, rtol=1e-12, atol=1e-12 * max(1.0, float(np.abs(a).max())), err_msg=col)
    first = periods[periods.outcome == outcomes[0]].sort_values(["site_id", "z", "period_index"])
    got = first[["site_id", "z", "period_index", "n_assigned", "n_uptake_observed", "sum_d_assigned"]]
    pd.testing.assert_frame_equal(got.reset_index(drop=True).astype({"z": "int64", "period_index": "int64"}),
                                  cohort.astype({"z": "int64", "period_index": "int64"}), check_dtype=False)
