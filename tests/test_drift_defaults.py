"""The default drift design of the study config: its in-control ARL and detection delay.

Documented in the README (alert section): odds ratio 3, target in-control ARL 2000
participants; at the demo's typical levels p0 = 0.08 (control, upward chart) and
p0 = 0.70 (treatment, downward chart).  The exact values come from the Markov chain
(:func:`arl_bernoulli`) and are checked here against simulation (no published table of
Bernoulli CUSUM ARLs exists for these parameters).
"""

from __future__ import annotations

import numpy as np
import pytest

from takeup.pipeline.stats.drift.chart import bernoulli_cusum, shifted_rate
from takeup.pipeline.stats.drift.design import design_cusum
from takeup.pipeline.stats.drift.run_length import arl_bernoulli, arl_bernoulli_simulated
from takeup.schemas.config import AlertThresholds

A = AlertThresholds()
# (p0, odds ratio, documented h, ARL0 per participant, ARL1 per participant) -- computed by the chain, README
DOCUMENTED = [
    (0.08, A.drift_odds_ratio, 4.4258, 2001.6, 49.19),
    (0.70, 1.0 / A.drift_odds_ratio, 5.1942, 2003.6, 31.60),
]


def test_defaults_are_the_documented_design():
    assert A.drift_odds_ratio == 3.0 and A.drift_arl0 == 2000.0


@pytest.mark.parametrize("p0,orr,h_doc,arl0_doc,arl1_doc", DOCUMENTED)
def test_design_reproduces_documented_h_and_arls(p0, orr, h_doc, arl0_doc, arl1_doc):
    d = design_cusum(np.array([p0]), shift_odds_ratio=np.array([orr]), target_arl0=A.drift_arl0, rel_tol=1e-5)
    h = float(np.asarray(d.h)[0])
    p1 = float(shifted_rate(np.array([p0]), np.array([orr]))[0])
    assert h == pytest.approx(h_doc, abs=5e-4)                       # printed to 4 decimals
    assert float(np.asarray(arl_bernoulli(p0, p1, h).arl)[0]) == pytest.approx(arl0_doc, abs=0.6)
    assert float(np.asarray(arl_bernoulli(p0, p1, h, p_true=p1).arl)[0]) == pytest.approx(arl1_doc, abs=0.06)


@pytest.mark.parametrize("p0,orr,h_doc,arl0_doc,arl1_doc", DOCUMENTED)
def test_simulated_arls_agree_with_the_chain(p0, orr, h_doc, arl0_doc, arl1_doc):
    rng = np.random.default_rng(20261202)
    p1 = float(shifted_rate(np.array([p0]), np.array([orr]))[0])
    sim0 = arl_bernoulli_simulated(p0, p1, h_doc, p0, rng, n_reps=600)
    sim1 = arl_bernoulli_simulated(p0, p1, h_doc, p1, rng, n_reps=2000)
    # Monte Carlo check: within 4 simulation standard errors (false failure rate < 1e-4)
    assert abs(float(sim0.arl) - arl0_doc) < 4 * float(sim0.se)
    assert abs(float(sim1.arl) - arl1_doc) < 4 * float(sim1.se)


def test_planted_shift_detected_within_documented_delay():
    """Weekly cohorts of 25 controls, uptake 8%, jumping to 20.7% (odds x 3) after 8 weeks."""
    rng = np.random.default_rng(7)
    reps, weeks, n = 2000, 40, 25
    p0, orr, h = 0.08, 3.0, 4.4258
    p1 = float(shifted_rate(np.array([p0]), np.array([orr]))[0])
    rate = np.where(np.arange(weeks) < 8, p0, p1)
    x = rng.binomial(n, rate, size=(reps, weeks)).astype(float)
    res = bernoulli_cusum(x, np.full((reps, weeks), float(n)), np.full(reps, p0), np.full(reps, p1),
                          np.full(reps, h))
    first = np.asarray(res.first_signal)
    after = first[first >= 8]
    # delay in participants after the change; the chain's per-participant ARL1 is 49.2 (a floor for
    # cohort data, which can only signal at the end of a cohort): allow one cohort on top
    delay = (after - 8 + 1) * n
    assert (first >= 0).mean() > 0.99
    assert delay.mean() < 49.2 + 2 * n


def test_readme_design_table_is_the_pipelines_computation():
    """The README's drift design table is regenerated from the run's own design path (rounded level,
    cached design, exact chain ARLs) and must appear verbatim."""
    from pathlib import Path

    from takeup.pipeline.run.trend_rows import drift_design_markdown
    readme = (Path(__file__).resolve().parents[1] / "README.md").read_text()
    lines = [ln.strip() for ln in readme.splitlines()]
    for line in drift_design_markdown(A.drift_odds_ratio, A.drift_arl0).splitlines():
        assert line in lines, f"README drift design table out of date: {line}"
