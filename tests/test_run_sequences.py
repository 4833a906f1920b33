"""Anytime-valid columns and precision forecasts through the whole path (ingest -> run -> tables -> reproduce).

Two weekly looks on simulated sites: the second look's sequences never widen, every look's
sequence equals estimate +- m_t * SE at the first look (the closed form checked in
tests/test_stats_sequential.py), and it contains the conventional 95% interval (m_t >= 1.96
for every t: the mixture boundary is wider than a fixed-sample one). The MDE multiplier
2.801585 is from shared/reference/published-values.md (Bloom 1995; computed there).
"""

from __future__ import annotations

from datetime import date

import duckdb
import numpy as np
import pandas as pd
import pytest

from takeup.pipeline.ingest.many_files import ingest_paths
from takeup.pipeline.run.reproduce import reproduce_run
from takeup.pipeline.run.stages import run_monitoring
from takeup.pipeline.stats.sequential import mixture_multiplier, mixture_rho2
from takeup.pipeline.warehouse import init_warehouse
from takeup.schemas.config import parse_config
from tests.test_run_sql_path import _files, _simulate


@pytest.fixture()
def two_looks(tmp_path, key_env):
    rng = np.random.default_rng(77)
    df = _simulate(rng, clustered=False)
    first = df.groupby("site").head(120)
    config = parse_config({"study_id": "seq", "outcomes": [{"name": "y", "primary": True}],
                           "follow_up": {"min_days": 0, "max_days": 400},
                           "planning": {"target_mde": 0.5}})
    wh = tmp_path / "w.duckdb"
    init_warehouse(wh, config)
    (tmp_path / "a").mkdir()
    (tmp_path / "b").mkdir()
    ingest_paths(wh, _files(first, tmp_path / "a", clustered=False), config=config)
    r1 = run_monitoring(wh, as_of=date(2026, 6, 1), config=config)
    ingest_paths(wh, _files(df, tmp_path / "b", clustered=False), config=config)
    r2 = run_monitoring(wh, as_of=date(2026, 6, 8), config=config)
    con = duckdb.connect(str(wh), read_only=True)
    site = {r: con.execute("SELECT * FROM site_estimates WHERE run_id = $r AND spec = 'unadjusted' "
                           "ORDER BY site_id", {"r": r}).df() for r in (r1.run_id, r2.run_id)}
    pooled = {r: con.execute("SELECT * FROM pooled_estimates WHERE run_id = $r AND method = 'fixed' "
                             "AND group_field IS NULL ORDER BY quantity", {"r": r}).df()
              for r in (r1.run_id, r2.run_id)}
    prec = con.execute("SELECT * FROM precision_forecasts WHERE run_id = $r ORDER BY scope, site_id",
                       {"r": r2.run_id}).df()
    con.close()
    return dict(wh=wh, r1=r1.run_id, r2=r2.run_id, site=site, pooled=pooled, prec=prec, config=config)


def test_looks_count_and_sequences_never_widen(two_looks):
    s1, s2 = two_looks["site"][two_looks["r1"]], two_looks["site"][two_looks["r2"]]
    assert (s1.look == 1).all() and (s2.look == 2).all()
    assert (s2.information > s1.information).all()
    for lo, hi in (("cs_itt_low", "cs_itt_high"), ("cs_complier_share_low", "cs_complier_share_high")):
        assert (s2[lo] >= s1[lo] - 1e-12).all() and (s2[hi] <= s1[hi] + 1e-12).all()
    p1, p2 = two_looks["pooled"][two_looks["r1"]], two_looks["pooled"][two_looks["r2"]]
    assert list(p1.look) == [1, 1, 1] and list(p2.look) == [2, 2, 2]
    assert (p2.cs_low >= p1.cs_low - 1e-12).all() and (p2.cs_high <= p1.cs_high + 1e-12).all()


def test_first_look_is_the_closed_form_and_contains_the_fixed_interval(two_looks):
    s1 = two_looks["site"][two_looks["r1"]]
    seq = two_looks["config"].sequential
    m = mixture_multiplier(s1.information.to_numpy(), seq.alpha, mixture_rho2(seq.horizon_participants, seq.alpha))
    np.testing.assert_allclose(s1.cs_itt_high - s1.itt, m * s1.itt_se, rtol=1e-9)
    np.testing.assert_allclose(s1.complier_share - s1.cs_complier_share_low, m * s1.complier_share_se, rtol=1e-9)
    assert (s1.cs_itt_low <= s1.itt - 1.96 * s1.itt_se).all()
    assert (s1.cs_alpha == seq.alpha).all()
    # every anytime-valid CACE set contains the Wald estimate (where the AR contrast is 0)
    inside = np.where(s1.cs_cace_set == "interval", (s1.cs_cace_low <= s1.cace) & (s1.cace <= s1.cs_cace_high),
                      np.where(s1.cs_cace_set == "two_rays", (s1.cace <= s1.cs_cace_low) | (s1.cace >= s1.cs_cace_high),
                               s1.cs_cace_set == "real_line"))
    assert inside.all()
    # and is wider than the fixed-sample AR set at the same look
    both = (s1.cs_cace_set == "interval") & (s1.ar_set == "interval")
    assert both.any()
    assert ((s1.cs_cace_low[both] <= s1.ar_ci_low[both]) & (s1.cs_cace_high[both] >= s1.ar_ci_high[both])).all()


def test_precision_forecasts(two_looks):
    prec, s2 = two_looks["prec"], two_looks["site"][two_looks["r2"]]
    sites = prec[prec.scope == "site"].set_index("site_id")
    assert list(sites.index) == list(s2.site_id) and (prec.scope == "pooled").sum() == 1
    s = s2.set_index("site_id")
    np.testing.assert_allclose(sites.mde_itt, 2.801585 * s.itt_se, rtol=1e-6)
    np.testing.assert_allclose(sites.mde_cace, sites.mde_itt / s.complier_share, rtol=1e-12)
    # the second drop assigned everyone on the same day, before the recent weeks: no accrual, so "never"
    assert (sites.accrual_per_week == 0).all()
    reached = sites.mde_cace <= 0.5
    assert sites.forecast_date[~reached].isna().all()
    assert sites.note[~reached].str.contains("never at the current accrual").all()


def test_reproduce_uses_the_stored_previous_run(two_looks):
    for run in (two_looks["r1"], two_looks["r2"]):
        r = reproduce_run(two_looks["wh"], run)
        assert r.identical, (r.max_abs_diff, r.mismatched)
