"""Result rows given to the writer as a DataFrame (the trend rows): nulls, refusals, equality with dicts."""

from __future__ import annotations

from datetime import date

import numpy as np
import pandas as pd
import pytest

from takeup.pipeline.run.trend_rows import trend_records
from takeup.pipeline.run.writer import _arrow_table


def _frame(**over):
    base = {"run_id": ["r1", "r1"], "site_id": ["S1", "S1"], "arm": ["control", "treatment"], "basis": "cohort",
            "period_start": [date(2026, 1, 5), date(2026, 1, 5)], "n_assigned": [10, 12], "n_taken_up": [1, 8],
            "uptake_share": [0.1, np.nan], "cumulative_uptake_share": [0.1, 0.5], "first_stage": [np.nan, np.nan],
            "first_stage_se": [np.nan, np.nan], "cusum": [0.0, np.nan], "cusum_limit": [4.2, np.nan]}
    base.update(over)
    return pd.DataFrame(base)


def test_a_frame_gives_the_same_arrow_table_as_its_records():
    frame = _frame()
    from_frame = _arrow_table("uptake_trends", frame)
    from_records = _arrow_table("uptake_trends", trend_records(frame))
    assert from_frame.equals(from_records)
    assert from_frame.column("uptake_share").null_count == 1          # NaN in a frame is null


def test_infinite_values_and_unknown_columns_are_refused():
    with pytest.raises(ValueError, match="infinite"):
        _arrow_table("uptake_trends", _frame(cusum=[np.inf, 0.0]))
    with pytest.raises(ValueError, match="unexpected column"):
        _arrow_table("uptake_trends", _frame(extra=[1, 2]))
