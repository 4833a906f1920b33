"""Drift charts under cluster randomisation: cluster-level cohort summaries with design effects.

* The pooled one-way ANOVA intra-cluster correlation equals the one built from statsmodels'
  ``anova_lm`` sums of squares (reference library; clusters nested in sites, 1e-10), and
  recovers a known beta-binomial correlation (simulation, fixed seed, tolerance 4 Monte Carlo SEs).
* Known-truth season simulation (fixed seed): clean cluster-randomised sites, 10-20 clusters
  each (a fair coin per cluster), cluster sizes gamma with coefficient of variation 0.5 (mean 25),
  each cluster entering in a random week of a 26-week season and enrolling over 1-4 weeks,
  uptake logit-normal within arm with a cluster effect of SD 1.0 on the logit scale (ICC 0.23 on
  the latent scale; about 0.08 / 0.17 on the observed scale at 8% / 70% uptake).  The share of
  site x arm charts with a false alarm in the season is at most the documented bound
  ``1 - exp(-N_eff / 2000)`` (N_eff = effective participants monitored, Rao & Scott) plus 3 Monte
  Carlo SEs; the participant-level chart on the same data (the rule before) is more than twice
  its own documented bound.
* A planted shift (control odds x 3 from week 20 of 52, sites of 40 clusters) is detected at more
  than 90% of sites, with a mean delay in effective participants within the documented ARL1 of
  each chart's (calibrated) limit plus one entry cohort and 2 Monte Carlo SEs.

The full table (more studies) is printed by ``benchmarks/calibration.py`` and in the README.
"""

from __future__ import annotations

from datetime import date, timedelta

import numpy as np
import pandas as pd
import pytest
import statsmodels.api as sm
import statsmodels.formula.api as smf

from takeup.pipeline.run.trend_rows import cluster_drift_counts, detect_cluster_drift, detect_drift
from takeup.pipeline.stats.drift.clustering import design_effects, icc_anova
from takeup.pipeline.stats.drift.run_length import arl_bernoulli

START = date(2026, 1, 5)
CLUSTER_SD = 1.0


def cluster_season(rng, n_sites: int, weeks: int = 26, cluster_sd: float = CLUSTER_SD, shift_week: int | None = None,
                   shift_or: float = 3.0, clusters=(10, 20), mean_size: float = 25.0, max_span: int = 4,
                   levels=(0.08, 0.70)) -> pd.DataFrame:
    """Counts per site x arm x week x cluster of cluster-randomised sites (control odds x ``shift_or``
    for participants assigned from ``shift_week`` on)."""
    rows = []
    for s in range(n_sites):
        g = int(rng.integers(clusters[0], clusters[1] + 1))
        sizes = np.maximum(1, np.round(rng.gamma(4.0, mean_size / 4.0, g))).astype(int)   # CV 0.5
        z = (rng.random(g) < 0.5).astype(int)
        entry = rng.integers(0, weeks, g)
        span = rng.integers(1, max_span + 1, g)
        logit = np.log(np.array(levels) / (1 - np.array(levels)))[z] + rng.normal(0, cluster_sd, g)
        for c in range(g):       # a few hundred clusters per study: per-cluster draws, vectorised over people
            wk = np.minimum(entry[c] + rng.integers(0, span[c], sizes[c]), weeks - 1)
            w_u, m = np.unique(wk, return_counts=True)
            shifted = (shift_week is not None) & (z[c] == 0) & (w_u >= (shift_week or 0))
            p = 1 / (1 + np.exp(-(logit[c] + np.where(shifted, np.log(shift_or), 0.0))))
            x = rng.binomial(m, p)
            for w, mi, xi in zip(w_u, m, x):
                rows.append((f"S{s:03d}", int(z[c]), pd.Timestamp(START + timedelta(weeks=int(w))), f"K{c}",
                             int(mi), int(mi), int(xi)))
    return pd.DataFrame(rows, columns=["site_id", "z", "period_start", "cluster_id", "n_assigned", "n_observed",
                                       "n_taken_up"])


def participant_cohorts(frame: pd.DataFrame) -> pd.DataFrame:
    return frame.groupby(["site_id", "z", "period_start"], as_index=False)[
        ["n_assigned", "n_observed", "n_taken_up"]].sum()


def season_rates(seed: int, n_studies: int, n_sites: int = 30) -> dict:
    """Per arm (control, treatment): false-alarm share and mean documented bound, for both charts."""
    rng = np.random.default_rng(seed)
    out = {u: {"alarm": [], "bound": []} for u in ("cluster", "participant")}
    for _ in range(n_studies):
        frame = cluster_season(rng, n_sites)
        for unit, d in (("cluster", detect_cluster_drift(frame, 4, 3.0, 2000.0)),
                        ("participant", detect_drift(participant_cohorts(frame), 4, 3.0, 2000.0))):
            arm = np.array(d.arm)
            sig = np.asarray(d.signalled, dtype=float)
            b = 1 - np.exp(-np.asarray(d.n_monitored) / 2000.0)
            out[unit]["alarm"].append([sig[arm == a].mean() for a in ("control", "treatment")])
            out[unit]["bound"].append([b[arm == a].mean() for a in ("control", "treatment")])
    return {u: {k: np.mean(v, axis=0) for k, v in r.items()} for u, r in out.items()}


# ----------------------------------------------------------------------------- ICC estimator
def test_icc_equals_statsmodels_anova_sums_of_squares():
    rng = np.random.default_rng(5)
    rows = []
    for s in range(6):
        for c in range(int(rng.integers(2, 7))):
            m = int(rng.integers(3, 30))
            p = 1 / (1 + np.exp(-(-0.5 + 0.3 * s + rng.normal(0, 0.8))))
            rows += [(f"S{s}", f"S{s}K{c}", int(v)) for v in rng.random(m) < p]
    df = pd.DataFrame(rows, columns=["site", "cluster", "y"])
    # reference: nested-model ANOVA, sites only vs clusters (nested in sites): the added sum of
    # squares is between clusters within sites, the full model's residual is within clusters
    table = sm.stats.anova_lm(smf.ols("y ~ C(site)", data=df).fit(), smf.ols("y ~ C(cluster)", data=df).fit())
    df_b, df_w = table.loc[1, "df_diff"], table.loc[1, "df_resid"]
    msb = table.loc[1, "ss_diff"] / df_b
    msw = table.loc[1, "ssr"] / df_w
    cl = df.groupby(["site", "cluster"]).y.agg(["sum", "count"]).reset_index()
    n_site = cl.groupby("site")["count"].transform("sum")
    n0 = (cl["count"].sum() - (cl["count"] ** 2 / n_site).sum()) / df_b
    expected = (msb - msw) / (msb + (n0 - 1) * msw)
    got = icc_anova(cl["sum"], cl["count"], cl["site"])
    assert got.raw == pytest.approx(expected, abs=1e-10)
    assert got.df_between == df_b


def test_icc_recovers_a_beta_binomial_correlation():
    rng = np.random.default_rng(11)
    p, rho = 0.3, 0.1                        # beta-binomial: rho = 1 / (a + b + 1)
    a = p * (1 / rho - 1)
    b = (1 - p) * (1 / rho - 1)
    k = 3000
    n = np.maximum(1, np.round(rng.gamma(4.0, 25 / 4.0, k))).astype(int)
    x = rng.binomial(n, rng.beta(a, b, k))
    groups = np.arange(k) % 50
    est = icc_anova(x, n, groups)
    reps = [icc_anova(*(lambda nn: (rng.binomial(nn, rng.beta(a, b, 300)), nn))(n[:300]), groups[:300]).rho
            for _ in range(40)]
    se = np.std(reps) / np.sqrt(k / 300)     # Monte Carlo SE at k clusters, from 40 smaller studies
    assert abs(est.rho - rho) <= 4 * se, (est.rho, se)


def test_design_effects_and_missing_icc():
    assert np.allclose(design_effects([1, 2, 26], 0.1), [1.0, 1.1, 3.5])
    one = icc_anova([1, 2], [5, 5], ["A", "B"])          # one cluster per group: no degrees of freedom
    assert np.isnan(one.rho) and "not estimable" in one.note


# ----------------------------------------------------------------------------- season false alarms
@pytest.fixture(scope="module")
def rates():
    return season_rates(2015, 8)                         # 240 charts per arm and unit


def test_cluster_summaries_keep_the_documented_false_alarm_rate(rates):
    r = rates["cluster"]
    tol = 3 * np.sqrt(r["bound"] * (1 - r["bound"]) / 240)           # 3 Monte Carlo SEs per arm
    assert np.all(r["alarm"] <= r["bound"] + tol), r


def test_participant_level_chart_is_far_above_its_documented_rate(rates):
    r = rates["participant"]
    # pooled over arms (480 charts), the chart that treats participants as independent
    assert r["alarm"].mean() > 2 * r["bound"].mean(), r


def shift_delays(seed: int, n_sites: int) -> dict:
    """Planted control-arm shift (odds x 3 from week 20 of 52) at sites of 40 clusters (mean 40, cluster logit SD
    0.5): detection share, delays in effective participants and each chart's documented ARL1."""
    frame = cluster_season(np.random.default_rng(seed), n_sites, weeks=52, cluster_sd=0.5, shift_week=20,
                           clusters=(40, 40), mean_size=40)
    d = detect_cluster_drift(frame, 4, 3.0, 2000.0)
    eff = cluster_drift_counts(frame, 4).counts
    ctrl = np.flatnonzero((np.array(d.arm) == "control") & np.isfinite(np.asarray(d.h)))
    sig = np.asarray(d.signalled)[ctrl]
    change = pd.Timestamp(START + timedelta(weeks=20))
    delays, documented, cohort = [], [], []
    for i in ctrl[sig]:                          # a few dozen charts
        first = pd.Timestamp(d.first_signal_period[i])
        if first < change:
            continue                             # signalled before the change: a false alarm, not a detection
        e = eff[(eff.site_id == d.site_id[i]) & (eff.z == 0)]
        ps = pd.to_datetime(e.period_start)
        delays.append(float(e.n_observed[(ps >= change) & (ps <= first)].sum()))
        g = max(1, int(round(float(e.n_observed.mean()))))
        cohort.append(float(e.n_observed.mean()))
        # documented delay: the chart's zero-state ARL at the shifted level with its own (calibrated) limit,
        # for entry cohorts of the chart's mean effective size (Markov chain, in effective participants)
        documented.append(float(arl_bernoulli(d.p0[i], d.p1[i], d.h[i], p_true=d.p1[i], group_size=g).arl[0]))
    return {"detected": float(sig.mean()), "delays": np.array(delays), "documented": np.array(documented),
            "cohort": np.array(cohort)}


def test_planted_shift_detected_within_the_documented_delay():
    r = shift_delays(8, 40)
    assert r["detected"] > 0.9, r["detected"]
    delays = r["delays"]
    se = delays.std(ddof=1) / np.sqrt(delays.size)
    # clusters enter whole, so the signal comes at the end of an entry cohort: up to one cohort after the
    # chart's ARL1 (which counts whole groups from the change on); plus 2 Monte Carlo SEs
    assert delays.mean() <= r["documented"].mean() + r["cohort"].mean() + 2 * se, \
        (delays.mean(), r["documented"].mean(), r["cohort"].mean(), se)


def test_icc_from_baseline_clusters_and_notes():
    frame = cluster_season(np.random.default_rng(3), 30)
    summary = cluster_drift_counts(frame, 4)
    assert set(summary.icc) == {0, 1}
    assert 0.02 < summary.icc[0].rho < 0.2 and 0.05 < summary.icc[1].rho < 0.35   # observed-scale ICCs
    d = detect_cluster_drift(frame, 4, 3.0, 2000.0)
    assert d.unit == "cluster" and np.all(np.isfinite(d.icc))
    # effective participants never exceed the participants
    assert summary.counts.n_observed.sum() < frame.n_observed.sum()
    lone = frame[frame.site_id == "S000"].drop_duplicates("cluster_id").head(1)
    single = detect_cluster_drift(lone, 4, 3.0, 2000.0)
    assert all("not estimable" in n or "no cluster" in n for n in single.notes)


# ----------------------------------------------------------------------------- end to end from the CLI
def test_cli_run_charts_cluster_summaries(tmp_path, key_env, capsys):
    """Files of a cluster-randomised study -> ``takeup ingest`` -> ``takeup run``: the site with the planted
    control-arm rise (odds x 3 from week 20) gets ``control_uptake_drift``, the two clean sites get no drift
    alert, and the cohort rows carry the cluster-summary chart."""
    import duckdb

    from takeup.pipeline.cli import main
    from takeup.pipeline.warehouse import init_warehouse
    from takeup.schemas.config import parse_config
    rng = np.random.default_rng(21)
    kw = dict(weeks=52, cluster_sd=0.5, clusters=(40, 40), mean_size=40)
    planted = cluster_season(rng, 1, shift_week=20, **kw)
    clean = cluster_season(rng, 2, **kw)
    clean["site_id"] = clean.site_id.map({"S000": "S001", "S001": "S002"})
    counts = pd.concat([planted, clean], ignore_index=True)
    counts["cluster_id"] = counts.site_id + "-" + counts.cluster_id
    counts["period_start"] -= pd.Timedelta(weeks=52)       # a season that ended before today (no future dates)
    rep = counts.loc[counts.index.repeat(counts.n_assigned)].reset_index(drop=True)
    k = rep.groupby(["site_id", "cluster_id", "period_start"]).cumcount()
    took = k < rep.n_taken_up                       # the row's first x participants took up
    pid = rep.cluster_id + "-" + rep.period_start.dt.strftime("%Y%m%d") + "-" + k.astype(str)
    assigned = rep.period_start.dt.date
    pd.DataFrame({"site_id": rep.site_id, "participant_id": pid, "arm": np.where(rep.z == 1, "treatment", "control"),
                  "assigned_on": assigned.astype(str), "cluster_id": rep.cluster_id}).to_csv(tmp_path / "a.csv",
                                                                                           index=False)
    pd.DataFrame({"site_id": rep.site_id, "participant_id": pid,
                  "observed_on": (rep.period_start + pd.Timedelta(days=3)).dt.date.astype(str),
                  "took_up": np.where(took, "yes", "no")}).to_csv(tmp_path / "u.csv", index=False)
    cfg = parse_config({"randomisation_unit": "cluster", "outcomes": [{"name": "y"}],
                        "follow_up": {"min_days": 0, "max_days": 400}})
    wh = tmp_path / "w.duckdb"
    init_warehouse(wh, cfg)
    assert main(["ingest", "--warehouse", str(wh), "--quiet", str(tmp_path / "a.csv"), str(tmp_path / "u.csv")]) == 0
    as_of = (START + timedelta(days=30)).isoformat()
    assert main(["run", "--warehouse", str(wh), "--as-of", as_of, "--quiet"]) in (0, 1)
    capsys.readouterr()
    con = duckdb.connect(str(wh), read_only=True)
    alerts = con.execute("SELECT site_id, rule FROM latest_alerts WHERE rule LIKE '%uptake_drift'").fetchall()
    charted = con.execute("SELECT count(*) FROM latest_uptake_trends WHERE basis = 'cohort' AND cusum IS NOT NULL "
                          "AND cusum_limit IS NOT NULL").fetchone()[0]
    con.close()
    assert ("S000", "control_uptake_drift") in alerts
    assert not [a for a in alerts if a[0] != "S000"], alerts
    assert charted > 0
