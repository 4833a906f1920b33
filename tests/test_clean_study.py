"""A clean simulated study through the whole pipeline: the outlier rule stays quiet.

Simulation with known truth (benchmarks/clean_study.py, fixed seed): 80 sites with
realistic accrual, compliance, missingness and effect heterogeneity (CACE ~ N(6, 1)),
no planted problem.  Ingested and monitored once at the defaults.  Tolerances: under
the complete null, Benjamini-Hochberg at q = 0.05 flags any site in at most about 5% of
studies (Benjamini & Hochberg 1995), so this fixed seed is expected to flag none; the
bound allows one site (1.25%).  The same bound holds for the other BH-controlled rules.
The full 200- and 1,000-site measurement is benchmarks/false_alarms.py (README).
"""

from __future__ import annotations

import importlib.util
import sys
from pathlib import Path

import duckdb
import numpy as np
import pytest

ROOT = Path(__file__).resolve().parents[1]


def _clean_study_module():
    spec = importlib.util.spec_from_file_location("clean_study", ROOT / "benchmarks" / "clean_study.py")
    mod = importlib.util.module_from_spec(spec)
    sys.modules.setdefault("clean_study", mod)
    spec.loader.exec_module(mod)
    return mod


@pytest.fixture(scope="module")
def clean_run(tmp_path_factory):
    cs = _clean_study_module()
    study = cs.simulate_clean_study(80, seed=20261203)
    with pytest.MonkeyPatch.context() as mp:
        mp.setenv("TAKEUP_ID_KEY", "test-key-not-secret")
        path, summary = cs.build_warehouse(study, tmp_path_factory.mktemp("clean"))
    con = duckdb.connect(str(path), read_only=True)
    yield cs, con, summary, study
    con.close()


def test_outlier_rule_is_quiet_on_a_clean_study(clean_run):
    cs, con, summary, study = clean_run
    shares = cs.alert_shares(con, summary.run_id, study.n_sites)
    assert shares.get("outlier_site", (0, 0.0))[0] <= 1
    for rule in ("negative_first_stage", "differential_missing_outcomes", "first_stage_decline", "stale_site"):
        assert shares.get(rule, (0, 0.0))[0] <= 1, rule


def test_the_prediction_interval_comparison_would_flag_many_of_these_sites(clean_run):
    """The replaced rule (estimate outside the REML prediction interval) on the same run: it
    flags a large share of sites, because each estimate carries its own sampling error."""
    _, con, summary, _ = clean_run
    pi = con.execute("SELECT pi_low, pi_high FROM pooled_estimates WHERE run_id = $r AND quantity = 'cace' "
                     "AND method = 'reml' AND group_field IS NULL", {"r": summary.run_id}).fetchone()
    est = con.execute("SELECT cace FROM site_estimates WHERE run_id = $r AND included_in_pool",
                      {"r": summary.run_id}).df().cace.to_numpy()
    outside = np.mean((est < pi[0]) | (est > pi[1]))
    assert outside > 0.10
