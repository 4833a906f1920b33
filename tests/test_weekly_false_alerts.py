"""Clean sites over a year of weekly runs: the alert tests' false-alert rates (smaller version of
``benchmarks/weekly_false_alerts.py``, loaded by path; simulated data with known truth, fixed seeds).

Part 2 of the benchmark (the rules' statistics at 52 weekly looks, each site tested alone, i.e.
without the help of Benjamini-Hochberg across sites): every anytime-valid rule must stay at or
below its level over the whole year, where the per-run tests are several times above it.
Part 1 (the pipeline, run every week) on a small study: the anytime-valid runs raise no more
test-rule alerts than the per-run runs, and the two differ only in the test rules.
"""

from __future__ import annotations

import importlib.util
import sys
from pathlib import Path

import pytest

from tests.conftest import TEST_KEY

BENCH = Path(__file__).resolve().parents[1] / "benchmarks"


def _load(name: str):
    sys.path.insert(0, str(BENCH))
    try:
        spec = importlib.util.spec_from_file_location(name, BENCH / f"{name}.py")
        mod = importlib.util.module_from_spec(spec)
        sys.modules[name] = mod            # dataclasses look their module up while the class is built
        spec.loader.exec_module(mod)
        return mod
    finally:
        sys.path.remove(str(BENCH))


@pytest.fixture(scope="module")
def bench():
    return _load("weekly_false_alerts")


@pytest.fixture(scope="module")
def rates(bench):
    pv = bench.simulate_look_p_values(2000, 52, seed=20261202)
    return bench.ever_rates(pv, study_size=100)


# Monte Carlo tolerance: 2,000 sites; at a true rate of 5% the standard error is 0.49 points, so
# "<= level + 1.5 points" is about 3 SE.  For the sample-ratio check at 0.001 the SE is 0.07 points:
# "<= 0.001 + 0.003" is about 4 SE (a rare-event rate, Poisson-like).
TOL = {"sample_ratio_mismatch": 0.003}


@pytest.mark.parametrize("rule", ["negative_first_stage", "first_stage_decline", "differential_missing_outcomes",
                                  "missing_uptake_reports", "sample_ratio_mismatch"])
def test_each_rule_stays_at_its_level_over_52_looks(rates, rule):
    level = 0.001 if rule == "sample_ratio_mismatch" else 0.05
    alone_per_run, alone_anytime = rates[rule]["per_run"][0], rates[rule]["anytime"][0]
    assert alone_anytime <= level + TOL.get(rule, 0.015), (rule, alone_anytime)
    # BH within studies of 100 sites only lowers it further
    assert rates[rule]["anytime"][1] <= alone_anytime + 1e-12
    # the per-run tests: several times the level over a year (the repeated-looks inflation)
    assert alone_per_run >= 3 * level, (rule, alone_per_run)


def test_pipeline_weekly_runs_small_study(bench, tmp_path, monkeypatch):
    """8 weekly runs of an 8-site clean study in both modes (the benchmark's part 1, small)."""
    monkeypatch.setenv("TAKEUP_ID_KEY", TEST_KEY)
    out = bench.run_pipeline(n_sites=8, looks=8, null_sites=2, seed=5, scratch=tmp_path)
    per_run, anytime = out["per_run"], out["anytime_valid"]
    tests = bench.TEST_RULES
    assert sum(anytime[r] for r in tests) <= sum(per_run[r] for r in tests)
    for rule in bench.OTHER_RULES:           # untouched rules: the same alerts in both modes
        assert anytime[rule] == per_run[rule], rule
    assert out["participants"] > 0 and set(out["seconds"]) == {"per_run", "anytime_valid"}
