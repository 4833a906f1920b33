"""The ``outlier_site`` rule: externally standardised residual, two-sided p, Benjamini-Hochberg.

External references, named beside each check: the leave-one-out definitions of
Viechtbauer & Cheung (2010, Research Synthesis Methods 1(2), 112-125; the
residual is already checked against direct refits in tests/test_pooling_influence.py),
scipy.stats.norm (two-sided normal p-value), statsmodels multipletests(method="fdr_bh")
(Benjamini & Hochberg 1995).  Site estimates are simulated with known truth (fixed
seeds, numpy default_rng).
"""

from __future__ import annotations

import numpy as np
import pytest
from scipy import stats
from statsmodels.stats.multitest import multipletests

from takeup.pipeline.run.alert_rules import compute_alerts
from takeup.pipeline.run.trend_rows import detect_drift
from takeup.pipeline.stats.meta_analysis.influence import outlier_test, site_influence
from tests.test_alerts_rules import OUTCOME, balanced_counts, counts_frame, make_config, make_ctx, make_inputs, \
    site_row


def influence_rows(sites, y, v) -> list[dict]:
    """``site_influence`` rows as pipeline/run/pooled_rows.py writes them (REML)."""
    inf = site_influence(y, v, method="reml")
    return [{"outcome": OUTCOME, "quantity": "cace", "method": "reml", "site_id": s, "estimate": float(y[i]),
             "se": float(np.sqrt(v[i])), "loo_estimate": float(inf.loo_estimate[i]), "loo_se": float(inf.loo_se[i]),
             "loo_tau2": float(inf.loo_tau2[i]), "std_residual": float(inf.std_residual[i])}
            for i, s in enumerate(sites)]


def outliers(y, v, pooled=None, config=None) -> tuple[dict, list[dict]]:
    sites = [f"S{i:03d}" for i in range(len(y))]
    pooled = pooled if pooled is not None else [True] * len(y)
    rows = [site_row(s, cace=float(y[i]), cace_se=float(np.sqrt(v[i])), pooled=pooled[i])
            for i, s in enumerate(sites)]
    inf = influence_rows([s for s, p in zip(sites, pooled) if p], y[np.array(pooled)], v[np.array(pooled)])
    cohort = counts_frame(balanced_counts(sites[:1]))
    out = compute_alerts(make_inputs(cohort), make_ctx(config or make_config()), rows, [], inf,
                         detect_drift(cohort.iloc[0:0], 4, 3.0, 2000.0))
    return {r["site_id"]: r for r in out if r["rule"] == "outlier_site"}, inf


def test_value_is_the_loo_residual_and_p_is_bh_of_the_two_sided_normal_p():
    rng = np.random.default_rng(11)          # tau = 0.8 around 6; two planted outliers
    k = 25
    v = rng.uniform(0.5, 3.0, k)
    y = 6.0 + rng.normal(0, 0.8, k) + rng.normal(0, np.sqrt(v))
    y[3] += 9.0
    y[17] -= 8.0
    got, inf = outliers(y, v)
    # the residual of the leave-one-out definitions (Viechtbauer & Cheung 2010, eq. for the
    # studentized deleted residual): (y_i - mu_(-i)) / sqrt(v_i + tau2_(-i) + se(mu_(-i))^2)
    r = np.array([(row["estimate"] - row["loo_estimate"]) / np.sqrt(row["se"] ** 2 + row["loo_tau2"]
                                                                      + row["loo_se"] ** 2) for row in inf])
    np.testing.assert_allclose(r, [row["std_residual"] for row in inf], rtol=1e-12)
    p_raw = 2 * stats.norm.sf(np.abs(r))                              # scipy: two-sided normal p
    reject, p_adj, _, _ = multipletests(p_raw, alpha=0.05, method="fdr_bh")   # statsmodels BH
    expected = {f"S{i:03d}" for i in np.flatnonzero(reject)}
    assert {"S003", "S017"} <= expected
    assert set(got) == expected
    for i, s in enumerate(f"S{j:03d}" for j in range(k)):
        if s in got:
            assert got[s]["value"] == pytest.approx(r[i], rel=1e-12)
            assert got[s]["p_value"] == pytest.approx(p_adj[i], rel=1e-9)   # same formula: rounding only
            assert got[s]["threshold"] == 0.05 and got[s]["severity"] == "info"
    # the message carries the evidence: estimate, its SE, the reference range and the adjusted p
    msg = got["S003"]["message"]
    row = inf[3]
    sd = np.sqrt(row["se"] ** 2 + row["loo_tau2"] + row["loo_se"] ** 2)
    lo, hi = row["loo_estimate"] - 1.959964 * sd, row["loo_estimate"] + 1.959964 * sd
    for text in (f"{y[3]:.2f}", f"SE {np.sqrt(v[3]):.2f}", f"[{lo:.2f}, {hi:.2f}]", "BH-adjusted p"):
        assert text in msg, (text, msg)


def test_reference_range_contains_the_estimate_exactly_when_p_is_above_alpha():
    rng = np.random.default_rng(5)
    k = 40
    v = rng.uniform(0.2, 2.0, k)
    y = rng.normal(1.0, np.sqrt(v + 0.3))
    inf = site_influence(y, v, "reml")
    t = outlier_test(y, v, inf.loo_estimate, inf.loo_se, inf.loo_tau2, level=0.95)
    inside = (y >= t.ref_low) & (y <= t.ref_high)
    np.testing.assert_array_equal(inside, t.p_value >= 0.05)


def test_homogeneous_sites_are_flagged_near_the_nominal_rate():
    """tau = 0: every site's estimate is sampling noise around one effect.

    Tolerances (simulation, 400 studies of 30 sites, seed 20261202): the raw two-sided
    p-values reject at 5% within 0.05 +- 0.015 (the binomial SD over 12,000 p-values is
    0.002; REML's truncation of tau2 at zero makes the test slightly conservative, by
    about 0.01 here); Benjamini-Hochberg under the complete null controls the chance of
    flagging any site at q = 0.05 (Benjamini & Hochberg 1995, Theorem 1: FDR = FWER when
    every null is true), asserted as <= 0.05 + 0.03 (about 3 binomial SDs over 400 studies);
    and the share of all sites flagged stays below 0.5%.
    """
    rng = np.random.default_rng(20261202)
    n_studies, k = 400, 30
    raw, any_flag, flagged = [], 0, 0
    for _ in range(n_studies):
        v = rng.uniform(0.3, 4.0, k)            # sites of different sizes
        y = 6.0 + rng.normal(0.0, np.sqrt(v))
        inf = site_influence(y, v, "reml")
        t = outlier_test(y, v, inf.loo_estimate, inf.loo_se, inf.loo_tau2)
        raw.append(t.p_value)
        hit = multipletests(t.p_value, alpha=0.05, method="fdr_bh")[0]
        any_flag += bool(hit.any())
        flagged += int(hit.sum())
    raw = np.concatenate(raw)
    assert abs((raw < 0.05).mean() - 0.05) <= 0.015
    assert any_flag / n_studies <= 0.05 + 0.03
    assert flagged / (n_studies * k) <= 0.005
    # and through the alert rule itself, on one study of 200 homogeneous sites
    v = rng.uniform(0.3, 4.0, 200)
    y = 6.0 + rng.normal(0.0, np.sqrt(v))
    got, _ = outliers(y, v)
    assert len(got) <= 2                       # <= 1% of sites (expected 0.05 sites)


def test_many_precise_sites_with_one_common_effect_are_not_outliers():
    """The failure the rule replaces: with k large and tau2 ~ 0 the prediction interval is
    narrow, and comparing estimates (which carry their own SE) with it flagged most sites."""
    rng = np.random.default_rng(3)
    k = 300
    v = rng.uniform(0.05, 0.3, k)
    y = 10.0 + rng.normal(0.0, np.sqrt(v))
    got, _ = outliers(y, v)
    assert len(got) <= 3                       # 1% of sites; expected about 0.05


def test_planted_large_outlier_is_flagged_and_unpooled_sites_are_not():
    rng = np.random.default_rng(8)
    k = 30
    v = rng.uniform(0.5, 2.0, k)
    y = 6.0 + rng.normal(0.0, 0.5, k) + rng.normal(0.0, np.sqrt(v))
    y[12] = 24.0                               # like the demo's planted centre: 24 instead of 6
    y[20] = 40.0                               # far away, but not in the pool (weak first stage)
    pooled = [i != 20 for i in range(k)]
    got, _ = outliers(y, v, pooled=pooled)
    assert set(got) == {"S012"}
    assert got["S012"]["value"] > 5 and "above" in got["S012"]["message"]


def test_optional_residual_floor():
    rng = np.random.default_rng(9)
    k = 8
    v = np.full(k, 1.0)
    y = 5.0 + rng.normal(0.0, 1.0, k)
    y[0] = 5.0 + 3.4                           # |r| about 3: flagged by BH with 8 sites
    got, inf = outliers(y, v)
    r0 = inf[0]["std_residual"]
    assert "S000" in got
    floor = abs(r0) + 0.1                      # a floor above its residual removes it
    got2, _ = outliers(y, v, config=make_config(outlier_std_residual=floor))
    assert "S000" not in got2
