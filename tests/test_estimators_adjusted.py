"""Covariate-adjusted IV from moments (takeup.pipeline.stats.estimators.adjusted) against linearmodels.

References:
* ``linearmodels.iv.IV2SLS(...).fit(cov_type="robust" | "clustered", debiased=True)`` per site, the
  reference library; tolerances 1e-9 relative on estimates (rounding of sums in two orders) and 1e-6 on
  standard errors and F (as for the unadjusted moment estimators).
* Card (1995) as in Wooldridge, Introductory Econometrics, Example 15.4, shipped as
  ``linearmodels.datasets.card``: lwage on educ instrumented by nearc4, exogenous exper, expersq, black,
  smsa, south, smsa66, reg662-reg669; n = 3010.  Published (rounded) values: first stage nearc4 0.3199,
  2SLS educ 0.1315; HC1 SE 0.0541 and robust first-stage F 14.14 recomputed from the open data [C].
* statsmodels OLS with HC1 / cluster covariance for the first stage.
"""

from __future__ import annotations

import numpy as np
import pandas as pd
import pytest
import statsmodels.api as sm
from linearmodels.datasets import card
from linearmodels.iv import IV2SLS

from takeup.pipeline.stats.estimators.adjusted import (adjusted_coefficients, adjusted_estimates,
                                                       cross_moments_from_arrays, score_moments_from_arrays)

COVARIATES = ["exper", "expersq", "black", "smsa", "south", "smsa66"] + [f"reg66{i}" for i in range(2, 10)]


def fit_moments(site, z, d, y, x, cluster=None, level=0.95):
    sites, cm = cross_moments_from_arrays(site, z, d, y, x)
    beta, gamma, _ = adjusted_coefficients(cm)
    sm_ = score_moments_from_arrays(site, z, d, y, x, beta, gamma, sites, cluster=cluster)
    return sites, adjusted_estimates(cm, sm_, level=level)


def linearmodels_fit(y, d, z, x, clusters=None):
    exog = pd.DataFrame(np.column_stack([np.ones(len(y)), x]) if x.size else np.ones((len(y), 1)))
    exog.columns = ["const"] + [f"x{j}" for j in range(exog.shape[1] - 1)]
    kw = {"cov_type": "clustered", "clusters": clusters} if clusters is not None else {"cov_type": "robust"}
    res = IV2SLS(pd.Series(y, name="y"), exog, pd.Series(d, name="d"), pd.Series(z, name="z")).fit(debiased=True, **kw)
    fs = res.first_stage.individual["d"]
    return res, fs


@pytest.fixture(scope="module")
def card_data():
    cols = ["lwage", "educ", "nearc4"] + COVARIATES + ["reg661"]
    return card.load()[cols].copy()


def _card(data, cluster=None):
    n = len(data)
    return fit_moments(np.zeros(n), data.nearc4, data.educ, data.lwage, data[COVARIATES].to_numpy(), cluster)


def test_card_hc1_reproduces_wooldridge_example_15_4(card_data):
    _, fit = _card(card_data)
    assert fit.status[0] == "ok" and fit.se_type == "HC1-adjusted" and fit.note[0] == ""
    assert fit.n[0] == 3010
    # Tolerance: half a unit in the last published digit (4 decimals; F 2 decimals).
    assert abs(fit.cace[0] - 0.1315) <= 0.00005
    assert abs(fit.cace_se[0] - 0.0541) <= 0.00005
    assert abs(fit.first_stage_coef[0] - 0.3199) <= 0.00005
    assert abs(fit.first_stage_f[0] - 14.14) <= 0.005
    res, _ = linearmodels_fit(card_data.lwage.to_numpy(), card_data.educ.to_numpy(), card_data.nearc4.to_numpy(),
                              card_data[COVARIATES].to_numpy())
    ci = res.conf_int(level=0.95).loc["d"]
    assert fit.ci_low[0] == pytest.approx(ci["lower"], rel=1e-6)
    assert fit.ci_high[0] == pytest.approx(ci["upper"], rel=1e-6)


def test_card_first_stage_matches_statsmodels_hc1_and_cr1(card_data):
    _, fit = _card(card_data)
    x = sm.add_constant(card_data[COVARIATES + ["nearc4"]])
    ols = sm.OLS(card_data["educ"], x).fit(cov_type="HC1")
    assert fit.first_stage_coef[0] == pytest.approx(ols.params["nearc4"], rel=1e-9)
    assert fit.first_stage_se[0] == pytest.approx(ols.bse["nearc4"], rel=1e-6)
    regions = card_data[[f"reg66{i}" for i in range(1, 10)]].to_numpy().argmax(axis=1)
    _, fit_c = _card(card_data, cluster=regions)
    ols_c = sm.OLS(card_data["educ"], x).fit(cov_type="cluster", cov_kwds={"groups": regions})
    assert fit_c.se_type == "CR1-adjusted"
    assert fit_c.first_stage_se[0] == pytest.approx(ols_c.bse["nearc4"], rel=1e-6)
    assert abs(fit_c.cace[0] - 0.1315) <= 0.00005
    assert "rank deficient" in fit_c.note[0]        # 9 clusters < 16 parameters


def _simulate(rng, n_sites, p, clustered):
    rows = []
    for s in range(n_sites):
        n = int(rng.integers(60, 300))
        g = rng.integers(0, int(rng.integers(6, 20)), n)
        z = (rng.random(n) < rng.uniform(0.3, 0.7)).astype(float)
        if clustered:
            z = (g % 2).astype(float)
        x = rng.normal(rng.normal(0, 5, p), rng.uniform(0.5, 3, p), (n, p))
        x[:, :1] = x[:, :1] + 100.0          # a covariate with a large mean (conditioning of raw sums)
        xc = x - x.mean(axis=0)
        d = ((0.2 + 0.5 * z + 0.05 * xc[:, 1:].sum(axis=1) + rng.normal(0, 0.3, n)) > 0.5).astype(float)
        y = 2.0 + 1.5 * d + x @ rng.normal(0, 0.3, p) + rng.normal(0, 1 + 0.5 * z, n)
        rows.append((np.full(n, f"S{s:02d}"), z, d, y, x, np.array([f"S{s}-{c}" for c in g])))
    cat = [np.concatenate([r[i] for r in rows]) for i in range(6)]
    return cat


@pytest.mark.parametrize("p", [1, 3, 5, 8])
@pytest.mark.parametrize("clustered", [False, True], ids=["HC1", "CR1"])
def test_equals_linearmodels_per_site(p, clustered):
    rng = np.random.default_rng(100 + p + 7 * clustered)
    site, z, d, y, x, cl = _simulate(rng, 5, p, clustered)
    sites, fit = fit_moments(site, z, d, y, x, cluster=cl if clustered else None)
    for j, s in enumerate(sites):
        m = site == s
        groups = pd.factorize(cl[m])[0] if clustered else None
        res, fs = linearmodels_fit(y[m], d[m], z[m], x[m], clusters=groups)
        assert fit.status[j] == "ok"
        assert fit.cace[j] == pytest.approx(res.params["d"], rel=1e-9)
        assert fit.cace_se[j] == pytest.approx(res.std_errors["d"], rel=1e-6)
        assert fit.first_stage_coef[j] == pytest.approx(fs.params["z"], rel=1e-9)
        assert fit.first_stage_se[j] == pytest.approx(fs.std_errors["z"], rel=1e-6)
        ci = res.conf_int(level=0.9).loc["d"]
        _, fit90 = fit_moments(site[m], z[m], d[m], y[m], x[m], cluster=cl[m] if clustered else None, level=0.9)
        assert fit90.ci_low[0] == pytest.approx(ci["lower"], rel=1e-6)


def test_no_covariates_gives_wald_ratio(card_data):
    # With only a constant, 2SLS with a binary instrument is the Wald (1940) ratio of mean differences.
    n = len(card_data)
    _, fit = fit_moments(np.zeros(n), card_data.nearc4, card_data.educ, card_data.lwage, None)
    g = card_data.groupby("nearc4")[["lwage", "educ"]].mean()
    wald = (g.loc[1, "lwage"] - g.loc[0, "lwage"]) / (g.loc[1, "educ"] - g.loc[0, "educ"])
    assert fit.cace[0] == pytest.approx(wald, rel=1e-10)


def test_missing_rows_dropped(card_data):
    data = card_data.copy()
    data.loc[data.index[:7], "lwage"] = np.nan
    data.loc[data.index[5:12], "exper"] = np.nan       # overlaps: 12 incomplete rows
    _, fit = _card(data)
    assert fit.n[0] == 3010 - 12
    _, complete = _card(data.iloc[12:])
    assert fit.cace[0] == pytest.approx(complete.cace[0], rel=1e-12)


def test_degenerate_sites_get_status_not_exceptions(card_data):
    data = card_data
    n = len(data)
    x = data[COVARIATES].to_numpy()
    site = np.where(np.arange(n) < 10, "tiny", "ok")
    _, fit = fit_moments(site, data.nearc4, data.educ, data.lwage, x)
    assert list(fit.status) == ["ok", "too_few_rows"] and np.isnan(fit.cace[1]) and "10 complete rows" in fit.note[1]
    _, fit = fit_moments(np.zeros(n), np.ones(n), data.educ, data.lwage, x)
    assert fit.status[0] == "constant_instrument" and np.isnan(fit.cace_se[0])
    _, fit = fit_moments(np.zeros(n), data.nearc4, data.educ, data.lwage,
                         np.column_stack([x, 2.0 * data.nearc4]))
    assert fit.status[0] == "singular_design"
    _, fit = fit_moments(np.zeros(n), data.nearc4, np.full(n, 12.0), data.lwage, x)
    assert fit.status[0] == "zero_first_stage" and "first stage is zero" in fit.note[0]
    _, fit = fit_moments(np.zeros(n), data.nearc4, data.educ, data.lwage, x, cluster=np.zeros(n))
    assert fit.status[0] == "too_few_clusters" and np.isnan(fit.cace[0])


def test_result_is_read_only(card_data):
    _, fit = _card(card_data.iloc[:500])
    with pytest.raises(AttributeError):
        fit.cace = np.zeros(1)
    with pytest.raises(ValueError):
        fit.cace[0] = 0.0
