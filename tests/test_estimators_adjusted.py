"""Covariate-adjusted per-site IV on the Card (1995) college-proximity data.

Reference: Wooldridge, Introductory Econometrics, Example 15.4 (data of
Card, D. (1995), "Using geographic variation in college proximity to
estimate the return to schooling"), shipped as ``linearmodels.datasets.card``:
lwage on educ instrumented by nearc4, exogenous exper, expersq, black, smsa,
south, smsa66, reg662-reg669; n = 3010.  Published values (book's rounded
figures, recomputed from the open data): first stage nearc4 0.3199
(SE 0.0879 homoskedastic), F = 13.26 (HC1-robust 14.14); 2SLS educ 0.1315
(SE 0.0550 homoskedastic; HC1 0.0541).
"""

from __future__ import annotations

import numpy as np
import pandas as pd
import pytest
import statsmodels.api as sm
from linearmodels.datasets import card

from takeup.pipeline.stats.estimators.adjusted import fit_covariate_adjusted

COVARIATES = ["exper", "expersq", "black", "smsa", "south", "smsa66"] + [f"reg66{i}" for i in range(2, 10)]


@pytest.fixture(scope="module")
def card_data():
    cols = ["lwage", "educ", "nearc4"] + COVARIATES + ["reg661"]
    return card.load()[cols].copy()


def test_card_hc1_reproduces_wooldridge_example_15_4(card_data):
    fit = fit_covariate_adjusted(card_data, "lwage", "educ", "nearc4", COVARIATES)
    assert fit.status == "ok" and fit.se_type == "HC1-adjusted" and fit.note == ""
    assert fit.n == 3010                       # Wooldridge Ex. 15.4 / Card (1995) sample
    # Tolerance: half a unit in the last published digit (4 decimals; F 2 decimals).
    assert abs(fit.cace - 0.1315) <= 0.00005              # Wooldridge Ex. 15.4, 2SLS educ
    assert abs(fit.cace_se - 0.0541) <= 0.00005           # HC1 SE, [C] recomputed from Card data
    assert abs(fit.first_stage_coef - 0.3199) <= 0.00005  # Wooldridge Ex. 15.4, first stage nearc4
    assert abs(fit.first_stage_f - 14.14) <= 0.005        # HC1-robust first-stage F, [C] recomputed
    assert fit.ci_low < fit.cace < fit.ci_high


def test_card_first_stage_se_matches_statsmodels_hc1(card_data):
    fit = fit_covariate_adjusted(card_data, "lwage", "educ", "nearc4", COVARIATES)
    x = sm.add_constant(card_data[COVARIATES + ["nearc4"]])
    ols = sm.OLS(card_data["educ"], x).fit(cov_type="HC1")   # statsmodels reference
    # Same estimator in two libraries: rounding only.
    assert fit.first_stage_coef == pytest.approx(ols.params["nearc4"], rel=1e-10)
    assert fit.first_stage_se == pytest.approx(ols.bse["nearc4"], rel=1e-8)
    assert fit.first_stage_f == pytest.approx(ols.tvalues["nearc4"] ** 2, rel=1e-8)


def test_card_clustered_first_stage_matches_statsmodels_cr1(card_data):
    # Cluster by region of residence in 1966 (9 regions): any labelling works
    # for an algebraic check of the CR1 factor G/(G-1) (n-1)/(n-k).
    data = card_data.copy()
    regions = data[[f"reg66{i}" for i in range(1, 10)]].to_numpy().argmax(axis=1)
    data["region"] = np.array(list("ABCDEFGHI"))[regions]
    fit = fit_covariate_adjusted(data, "lwage", "educ", "nearc4", COVARIATES, cluster="region")
    assert fit.status == "ok" and fit.se_type == "CR1-adjusted"
    x = sm.add_constant(data[COVARIATES + ["nearc4"]])
    ols = sm.OLS(data["educ"], x).fit(cov_type="cluster", cov_kwds={"groups": regions})
    # statsmodels' default cluster correction is CR1; rounding-only tolerance.
    assert fit.first_stage_se == pytest.approx(ols.bse["nearc4"], rel=1e-8)
    # Point estimate does not depend on the covariance (Wooldridge Ex. 15.4).
    assert abs(fit.cace - 0.1315) <= 0.00005
    assert "rank deficient" in fit.note      # 9 clusters < 16 parameters


def test_no_covariates_gives_wald_ratio(card_data):
    # With only a constant, 2SLS with a binary instrument is the Wald (1940)
    # ratio of mean differences.
    fit = fit_covariate_adjusted(card_data, "lwage", "educ", "nearc4", [])
    g = card_data.groupby("nearc4")[["lwage", "educ"]].mean()
    wald = (g.loc[1, "lwage"] - g.loc[0, "lwage"]) / (g.loc[1, "educ"] - g.loc[0, "educ"])
    assert fit.cace == pytest.approx(wald, rel=1e-10)   # rounding only


def test_missing_rows_dropped_and_input_not_mutated(card_data):
    data = card_data.copy()
    data.loc[data.index[:7], "lwage"] = np.nan
    data.loc[data.index[5:12], "exper"] = np.nan       # overlaps: 12 incomplete rows
    before = data.copy()
    fit = fit_covariate_adjusted(data, "lwage", "educ", "nearc4", COVARIATES)
    pd.testing.assert_frame_equal(data, before)
    assert fit.n == 3010 - 12
    complete = fit_covariate_adjusted(data.iloc[12:], "lwage", "educ", "nearc4", COVARIATES)
    assert fit.cace == complete.cace and fit.cace_se == complete.cace_se


def _all_nan(fit):
    return np.isnan([fit.cace, fit.cace_se, fit.ci_low, fit.ci_high, fit.first_stage_coef,
                     fit.first_stage_se, fit.first_stage_f]).all()


def test_degenerate_inputs_return_nan_with_status(card_data):
    small = card_data.iloc[:10]
    fit = fit_covariate_adjusted(small, "lwage", "educ", "nearc4", COVARIATES)
    assert fit.status == "too_few_rows" and fit.n == 10 and _all_nan(fit) and fit.note

    const_z = card_data.assign(nearc4=1.0)
    fit = fit_covariate_adjusted(const_z, "lwage", "educ", "nearc4", COVARIATES)
    assert fit.status == "constant_instrument" and _all_nan(fit)

    collinear = card_data.assign(z2=2.0 * card_data["nearc4"])
    fit = fit_covariate_adjusted(collinear, "lwage", "educ", "nearc4", COVARIATES + ["z2"])
    assert fit.status == "singular_design" and _all_nan(fit)

    no_fs = card_data.assign(educ=12.0)
    fit = fit_covariate_adjusted(no_fs, "lwage", "educ", "nearc4", COVARIATES)
    assert fit.status == "zero_first_stage" and _all_nan(fit) and "first stage is zero" in fit.note

    one_cluster = card_data.assign(g="only")
    fit = fit_covariate_adjusted(one_cluster, "lwage", "educ", "nearc4", COVARIATES, cluster="g")
    assert fit.status == "too_few_clusters" and fit.se_type == "CR1-adjusted" and _all_nan(fit)

    fit = fit_covariate_adjusted(card_data, "lwage", "educ", "nearc4", ["not_there"])
    assert fit.status == "missing_column" and _all_nan(fit)

    text = card_data.assign(exper="x")
    fit = fit_covariate_adjusted(text, "lwage", "educ", "nearc4", COVARIATES)
    assert fit.status == "non_numeric_column" and _all_nan(fit)


def test_result_is_read_only(card_data):
    fit = fit_covariate_adjusted(card_data.iloc[:500], "lwage", "educ", "nearc4", COVARIATES)
    with pytest.raises(AttributeError):
        fit.cace = 0.0
