"""The alert rules with anytime-valid p-values (the default ``[sequential] alert_tests``).

Each rule's statistic is computed from an outside reference (scipy, statsmodels) and turned into
the anytime-valid p-value independently of the project's closed forms: the normal mixtures by
scipy's numerical integration of the mixture martingale (Howard et al. 2021), the sample-ratio
Bayes factor by scipy.stats.betabinom / binom (Lindon & Malek 2022), the moving-window test by
the spending share 1/(2 x 52) at the first look (on the decline z with each arm's rate pooled
over the two windows, statsmodels' pooled two-proportion variance); then Benjamini-Hochberg by statsmodels'
multipletests.  The hand-built inputs come from tests/test_alerts_rules.py.
"""

from __future__ import annotations

import numpy as np
import pytest
from scipy import integrate, stats
from scipy.special import lambertw
from statsmodels.stats.multitest import multipletests
from statsmodels.stats.proportion import proportions_ztest

from tests.test_alerts_rules import balanced_counts, by_rule, make_config, run, site_row

ANYTIME = {"alert_tests": "anytime_valid"}
HORIZON = 1000.0


def rho2(alpha: float) -> float:
    # the tuning's defining equation v = log(v + 1) - 2 log(alpha), solved here by scipy's Lambert W
    return float(-lambertw(-alpha**2 / np.e, k=-1).real - 1.0) / HORIZON


def mixture_p(z: float, t: float, alpha: float, one_sided: bool = False) -> float:
    """1 / (normal-mixture martingale) by numerical integration (half-normal mixture when one-sided)."""
    r = np.sqrt(rho2(alpha))
    s = z * np.sqrt(t)
    lower = 0.0 if one_sided else -np.inf
    weight = 2.0 if one_sided else 1.0
    m, _ = integrate.quad(lambda lam: np.exp(lam * s - lam**2 * t / 2) * weight * stats.norm.pdf(lam, scale=r),
                          lower, np.inf, epsabs=0, epsrel=1e-11, limit=200)
    return min(1.0, 1.0 / m)


def test_default_is_anytime_valid():
    assert make_config(sequential={}).sequential.alert_tests == "anytime_valid"


def test_sample_ratio_uses_the_beta_binomial_mixture():
    rows = balanced_counts(["A", "B"])
    rows += [("M", 1, p, 35, 35, 20) for p in range(8)] + [("M", 0, p, 15, 15, 1) for p in range(8)]
    rows += [("D", 1, p, 40, 40, 20) for p in range(8)] + [("D", 0, p, 20, 20, 1) for p in range(8)]
    rows += [("E", 1, p, 30, 30, 20) for p in range(8)] + [("E", 0, p, 30, 30, 1) for p in range(8)]
    # a milder mismatch (192 vs 128) the per-run chi-square flags (p = 0.00035) but the sequential test
    # does not yet (p = 0.011)
    rows += [("W", 1, p, 24, 24, 15) for p in range(8)] + [("W", 0, p, 16, 16, 1) for p in range(8)]
    two_to_one = {"treatment": 2 / 3, "control": 1 / 3}
    sites = ["A", "B", "M", {"site_id": "D", "allocation": two_to_one}, {"site_id": "E", "allocation": two_to_one},
             "W"]
    out = by_rule(run(rows, config=make_config(sites=sites, sequential=ANYTIME)), "sample_ratio_mismatch")
    per_run = by_rule(run(rows, config=make_config(sites=sites)), "sample_ratio_mismatch")
    assert set(out) == {"M", "E"} and set(per_run) == {"M", "E", "W"}
    c = 1.0 / rho2(0.001)                    # concentration matched to the normal mixture at the horizon
    for site, (n_t, n_c, share) in {"M": (280, 120, 0.5), "E": (240, 240, 2 / 3)}.items():
        n = n_t + n_c
        bf = stats.betabinom.pmf(n_t, n, c * share, c * (1 - share)) / stats.binom.pmf(n_t, n, share)
        # scipy's pmfs are accurate to about 1e-13 relative here; the ratio of two: 1e-9
        assert out[site]["p_value"] == pytest.approx(min(1.0, 1.0 / bf), rel=1e-9)
        assert "anytime-valid" in out[site]["message"] and "beta-binomial" in out[site]["message"]
        assert out[site]["p_value"] > per_run[site]["p_value"]      # the price of looking every week


def test_differential_missing_uses_the_normal_mixture_then_bh():
    specs = {"A": (100, 96, 100, 95), "B": (100, 95, 100, 60), "C": (80, 70, 80, 62), "D": (120, 110, 118, 96),
             "E": (60, 58, 60, 57), "F": (90, 88, 90, 70)}
    site_rows = [site_row(s, nta=a, nt=o, nca=ac, nc=oc) for s, (a, o, ac, oc) in specs.items()]
    out = by_rule(run(balanced_counts(list(specs)), site_rows, config=make_config(sequential=ANYTIME)),
                  "differential_missing_outcomes")
    raw = []
    for a, o, ac, oc in specs.values():
        z, _ = proportions_ztest([a - o, ac - oc], [a, ac])          # statsmodels pooled z
        raw.append(mixture_p(z, a + ac, 0.05))                       # intrinsic time: participants due
    reject, adj, _, _ = multipletests(raw, alpha=0.05, method="fdr_bh")
    assert set(out) == {s for s, r in zip(specs, reject) if r} and "B" in out
    per_run = by_rule(run(balanced_counts(list(specs)), site_rows), "differential_missing_outcomes")
    assert set(out) <= set(per_run)
    for s, p in zip(specs, adj):
        if s in out:
            # quad to 1e-11 against the closed form: 1e-7 relative
            assert out[s]["p_value"] == pytest.approx(p, rel=1e-7)
            assert "anytime-valid" in out[s]["message"]


def test_negative_first_stage_uses_the_one_sided_mixture():
    shares = {"A": (0.6, 0.05), "B": (-0.25, 0.05), "C": (-0.04, 0.05), "E": (-0.3, 0.12)}
    site_rows = [site_row(s, share=sh, se=se, f=(sh / se) ** 2) for s, (sh, se) in shares.items()]
    out = by_rule(run(balanced_counts(list(shares)), site_rows, config=make_config(sequential=ANYTIME)),
                  "negative_first_stage")
    # no `information` in these rows: the intrinsic time falls back to everyone assigned (50 + 50)
    raw = [mixture_p(-sh / se, 100.0, 0.05, one_sided=True) for sh, se in shares.values()]
    reject, adj, _, _ = multipletests(raw, alpha=0.05, method="fdr_bh")
    assert set(out) == {s for s, r in zip(shares, reject) if r} == {"B"}
    assert out["B"]["p_value"] == pytest.approx(adj[1], rel=1e-7)


def test_first_stage_decline_spends_its_level_over_looks():
    sites = {"A": (14, 2, 14, 2), "B": (14, 2, 6, 2), "C": (14, 2, 12, 3), "D": (15, 1, 8, 4)}
    rows = []
    for s, (te, ce, tr, cr) in sites.items():
        for p in range(8):
            rows += [(s, 1, p, 20, 20, te if p < 4 else tr), (s, 0, p, 20, 20, ce if p < 4 else cr)]
    raw = []
    for te, ce, tr, cr in sites.values():
        # each arm's change between the windows with the pooled two-proportion variance, checked
        # against statsmodels' proportions_ztest (z = difference / sqrt(variance)) where it is defined
        var, diff = 0.0, 0.0
        for sign, (early, recent) in ((1, (te, tr)), (-1, (ce, cr))):
            d = (early - recent) * 4 / 80
            pooled = (early + recent) * 4 / 160
            v = pooled * (1 - pooled) * (1 / 80 + 1 / 80)
            if d != 0:
                z, _ = proportions_ztest([4 * early, 4 * recent], [80, 80])
                assert d / np.sqrt(v) == pytest.approx(z, rel=1e-12)
            var += v
            diff += sign * d
        raw.append(stats.norm.sf(diff / np.sqrt(var)))                # H1: the first stage declined
    for look in (1, 60):
        site_rows = [dict(site_row(s), look=look) for s in sites]
        out = by_rule(run(rows, site_rows, config=make_config(sequential=ANYTIME)), "first_stage_decline")
        share = 1 / 104 if look <= 52 else 52 / (2 * look * (look + 1))     # spending over the 52 planned looks
        spent = [min(1.0, p / share) for p in raw]
        reject, adj, _, _ = multipletests(spent, alpha=0.05, method="fdr_bh")
        assert set(out) == {s for s, r in zip(sites, reject) if r}
        for s, p in zip(sites, adj):
            if s in out:
                assert out[s]["p_value"] == pytest.approx(p, rel=1e-8)
                assert "level spent over looks" in out[s]["message"]
    # B's decline (first stage 0.60 -> 0.20) is found at look 1 and still at look 60
    assert raw[1] / (1 / 104) < 0.05 / 4


def test_stratified_sample_ratio_multiplies_the_strata_factors():
    # two sites: site 0 with strata of designs 0.2 and 0.7 that both fit; site 1 whose second
    # stratum runs off its design.  Reference: each stratum's factor from scipy.stats.betabinom /
    # binom (Lindon & Malek 2022), multiplied over the site's strata.
    from takeup.pipeline.run import alert_p_values
    from tests.test_alerts_rules import make_ctx

    ctx = make_ctx(make_config(sequential=ANYTIME))
    site = np.array([0, 0, 1, 1])
    n_t = np.array([41, 139, 30, 160])
    n_c = np.array([159, 61, 70, 40])
    design = np.array([0.2, 0.7, 0.3, 0.5])
    p, how = alert_p_values.stratified_sample_ratio_p(site, n_t, n_c, design, np.array([0.5, 0.001]), ctx)
    c = 1.0 / rho2(0.001)
    bf = [stats.betabinom.pmf(t, t + k, c * d, c * (1 - d)) / stats.binom.pmf(t, t + k, d)
          for t, k, d in zip(n_t, n_c, design)]
    # ratios of scipy pmfs are accurate to about 1e-12 relative here: 1e-9
    assert p[0] == pytest.approx(min(1.0, 1.0 / (bf[0] * bf[1])), rel=1e-9)
    assert p[1] == pytest.approx(min(1.0, 1.0 / (bf[2] * bf[3])), rel=1e-9)
    assert p[0] > 0.05 and p[1] < 1e-6 and "over the strata" in how
    # per run: the fixed-sample p-values pass through unchanged
    fixed, how = alert_p_values.stratified_sample_ratio_p(site, n_t, n_c, design, np.array([0.5, 0.001]),
                                                          make_ctx(make_config()))
    assert list(fixed) == [0.5, 0.001] and how == ""
