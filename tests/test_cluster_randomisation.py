"""Cluster randomisation: tests on the randomised unit.

* Sample-ratio check: known-truth simulation (fixed seed) of clean cluster-randomised sites,
  10-20 clusters each (every cluster assigned by a fair coin), cluster sizes gamma with
  coefficient of variation 0.5 (mean 25).  Counting clusters, the false-alert rate is at most
  its level (checked at the default 0.001 and at 0.05, where the test has enough events to show
  miscalibration; tolerance 3 Monte Carlo SEs); counting participants, as before, it is far above.
* The cluster-level two-proportion and first-stage-change tests have exactly the standard errors
  of statsmodels ``OLS(...).fit(cov_type="cluster")`` (reference library) on participant rows.
"""

from __future__ import annotations

from datetime import date, timedelta

import numpy as np
import pandas as pd
import pytest
import statsmodels.api as sm

from takeup.pipeline.run.alert_rules import compute_alerts
from takeup.pipeline.run.inputs import RunContext, RunInputs
from takeup.pipeline.run.trend_rows import detect_drift
from takeup.pipeline.stats.significance import (clustered_first_stage_change, clustered_two_proportion_test,
                                                sample_ratio_test)
from takeup.schemas.config import StudyConfig

AS_OF = date(2026, 6, 30)
START = date(2026, 1, 5)


def clean_sites(rng, n_sites: int):
    """Cohort counts per site x arm x period x cluster of clean cluster-randomised sites."""
    rows = []
    for s in range(n_sites):
        g = int(rng.integers(10, 21))
        sizes = np.maximum(1, np.round(rng.gamma(4.0, 25 / 4.0, g))).astype(int)   # CV 0.5
        z = (rng.random(g) < 0.5).astype(int)
        for c in range(g):
            period = START + timedelta(weeks=int(rng.integers(0, 8)))
            rows.append((f"S{s:04d}", int(z[c]), pd.Timestamp(period), f"K{c}", int(sizes[c]), int(sizes[c]),
                         int(sizes[c] // 2)))
    return pd.DataFrame(rows, columns=["site_id", "z", "period_start", "cluster_id", "n_assigned", "n_observed",
                                       "n_taken_up"])


def srm_alerts(cluster_counts: pd.DataFrame, unit: str, srm_p: float, sequential: dict | None = None) -> set:
    """Sites with a sample-ratio alert; per-run tests unless ``sequential`` says otherwise.

    The calibration checks here (and benchmarks/calibration.py) measure one look, so they use
    the per-run chi-square; tests/test_alert_p_values.py covers the anytime-valid version.
    """
    cohort = cluster_counts.groupby(["site_id", "z", "period_start"], as_index=False)[
        ["n_assigned", "n_observed", "n_taken_up"]].sum()
    sites = tuple(sorted(cohort.site_id.unique()))
    act = pd.DataFrame({"site_id": list(sites), "last_record_on": pd.Timestamp(AS_OF),
                        "last_received_at": pd.Timestamp(AS_OF), "n_batches": 1})
    inputs = RunInputs(sites=sites, outcomes=(), moments=pd.DataFrame(), clusters=None,
                       covariate_cells=pd.DataFrame(), cohort_counts=cohort, calendar_counts=cohort,
                       site_activity=act, previous_alerts=pd.DataFrame(), previous_run_id=None, n_batches=1,
                       input_fingerprint="x", cluster_cohort_counts=cluster_counts if unit == "cluster" else None)
    cfg = StudyConfig.model_validate({"randomisation_unit": unit, "alerts": {"srm_p_value": srm_p},
                                      "sequential": sequential or {"alert_tests": "per_run"}})
    now = pd.Timestamp(AS_OF).to_pydatetime()
    ctx = RunContext(run_id="r", as_of=AS_OF, started_at=now, data_cutoff=now, config=cfg)
    out = compute_alerts(inputs, ctx, [], [], [], detect_drift(cohort.iloc[0:0], 4, 3.0, 2000.0))
    return {r["site_id"] for r in out if r["rule"] == "sample_ratio_mismatch"}


@pytest.fixture(scope="module")
def clean():
    return clean_sites(np.random.default_rng(2015), 2000)


@pytest.mark.parametrize("level", [0.001, 0.05])
def test_sample_ratio_false_alert_rate_counting_clusters(clean, level):
    n = clean.site_id.nunique()
    rate = len(srm_alerts(clean, "cluster", level)) / n
    assert rate <= level + 3 * np.sqrt(level * (1 - level) / n)


def test_counting_participants_under_cluster_randomisation_would_alarm(clean):
    n = clean.site_id.nunique()
    # the participant-level chi-square (the rule under individual randomisation) on the same clean sites
    rate = len(srm_alerts(clean, "individual", 0.001)) / n
    assert rate > 0.10


def test_cluster_srm_message_counts_clusters_and_participants():
    rows = [("A", 1, pd.Timestamp(START), f"K{c}", 10, 10, 5) for c in range(18)]
    rows += [("A", 0, pd.Timestamp(START), f"C{c}", 30, 30, 5) for c in range(2)]
    frame = pd.DataFrame(rows, columns=["site_id", "z", "period_start", "cluster_id", "n_assigned", "n_observed",
                                        "n_taken_up"])
    assert srm_alerts(frame, "cluster", 0.001) == {"A"}
    chi2, _, p = sample_ratio_test([[18, 2]], [0.5, 0.5])   # 18 vs 2 clusters: p = 3.5e-4
    assert p[0] < 0.001


def test_cluster_srm_anytime_valid_needs_a_cluster_horizon():
    """The sequential test counts clusters too; its mixture is tuned at the horizon in clusters.

    At the default horizon (1,000, meant for participants) even 20 vs 0 clusters stays above 0.001
    (beta-binomial p = 0.089); with the planned 20 clusters per site, 19 vs 1 is flagged (scipy's
    chi-square p = 6e-5; the mixture's p = 3.1e-4) and 18 vs 2 not yet (mixture p = 0.0036).
    """
    def frame(t, c):
        rows = [("A", 1, pd.Timestamp(START), f"K{i}", 10, 10, 5) for i in range(t)]
        rows += [("A", 0, pd.Timestamp(START), f"C{i}", 30, 30, 5) for i in range(c)]
        return pd.DataFrame(rows, columns=["site_id", "z", "period_start", "cluster_id", "n_assigned",
                                           "n_observed", "n_taken_up"])
    seq = {"alert_tests": "anytime_valid", "horizon_participants": 20}
    assert srm_alerts(frame(19, 1), "cluster", 0.001, seq) == {"A"}
    assert srm_alerts(frame(18, 2), "cluster", 0.001, seq) == set()
    assert srm_alerts(frame(20, 0), "cluster", 0.001, {"alert_tests": "anytime_valid"}) == set()


def _participants(rng, G=14):
    sizes = rng.integers(5, 40, G)
    cl = np.repeat(np.arange(G), sizes)
    z = (np.arange(G) % 2)[cl]
    x = (rng.random(len(cl)) < np.clip(0.2 + rng.normal(0, 0.1, G), 0.01, 0.9)[cl]).astype(float)
    r = (rng.random(len(cl)) < 0.4).astype(float)
    return cl, z, x, r


def test_clustered_two_proportion_se_equals_statsmodels_cluster_ols():
    cl, z, x, _ = _participants(np.random.default_rng(3))
    ref = sm.OLS(x, sm.add_constant(z.astype(float))).fit(cov_type="cluster", cov_kwds={"groups": cl})
    u, inv = np.unique(np.stack([cl, z], 1), axis=0, return_inverse=True)
    inv = inv.reshape(-1)
    res = clustered_two_proportion_test(np.zeros(len(u), int), u[:, 0], u[:, 1], np.bincount(inv, x),
                                        np.bincount(inv), 1)
    assert res.estimate[0] == pytest.approx(ref.params[1], rel=1e-10)
    assert res.se[0] == pytest.approx(ref.bse[1], rel=1e-10)
    assert res.df[0] == 14 - 2


def test_clustered_first_stage_change_se_equals_statsmodels_interaction():
    cl, z, x, r = _participants(np.random.default_rng(4))
    X = np.column_stack([np.ones_like(x), z, r, z * r])
    ref = sm.OLS(x, X).fit(cov_type="cluster", cov_kwds={"groups": cl})
    u, inv = np.unique(np.stack([cl, z, r], 1), axis=0, return_inverse=True)
    inv = inv.reshape(-1)
    res = clustered_first_stage_change(np.zeros(len(u), int), u[:, 0], u[:, 1], u[:, 2], np.bincount(inv, x),
                                       np.bincount(inv), 1)
    assert res.estimate[0] == pytest.approx(-ref.params[3], rel=1e-10)   # early minus recent
    assert res.se[0] == pytest.approx(ref.bse[3], rel=1e-10)
