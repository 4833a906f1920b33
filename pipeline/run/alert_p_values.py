"""The p-values of the test-based alert rules, anytime-valid across weekly runs.

Each test rule of :mod:`takeup.pipeline.run.alert_rules` first computes its
fixed-sample p-value for this run (valid for one look).  The functions here turn
it into the p-value the rule compares with its level, according to
``[sequential] alert_tests``:

* ``anytime_valid`` (default) -- a p-value valid over all runs at once
  (:mod:`takeup.pipeline.stats.anytime_tests`), so that a clean site raises a
  given rule in *any* weekly run at most with the rule's level:

  ==================================  ===============================================================
  rule                                anytime-valid p-value
  ==================================  ===============================================================
  ``negative_first_stage``            one-sided normal mixture on the complier share's z; intrinsic
                                      time = the row's ``information`` (participants, or clusters)
  ``differential_missing_outcomes``   two-sided normal mixture on the two-proportion z; time =
                                      participants due an outcome (clusters under cluster
                                      randomisation)
  ``missing_uptake_reports`` (test)   the same, on participants due an uptake report (clusters)
  ``sample_ratio_mismatch``           beta-binomial mixture Bayes factor of the arm counts against
                                      the designed share (Lindon & Malek 2022), tuned at the horizon
  ``first_stage_decline``             moving window: the level spent over the site's looks
                                      (``planned_looks``; union bound), on the decline z with
                                      each arm's rate pooled over the two windows
  ==================================  ===============================================================

  The normal mixtures are tuned with ``[sequential] horizon_participants`` and
  the rule's own level (``fdr_q``, or ``srm_p_value``).  A test that uses a t
  reference (cluster-robust variances) enters through the normal z with the
  same fixed-sample p-value (:func:`~takeup.pipeline.stats.anytime_tests.z_from_p_value`).
* ``per_run`` -- the fixed-sample p-value unchanged (valid for one look only;
  kept so the two can be compared, as ``benchmarks/weekly_false_alerts.py`` does).

Every function returns the p-values (one per site, NaN where untested) and a
short phrase for the alert message.
"""

from __future__ import annotations

import numpy as np

from takeup.pipeline.run.inputs import RunContext
from takeup.pipeline.stats import anytime_tests

__all__ = ["anytime_valid", "negative_first_stage_p", "two_sided_p", "sample_ratio_p",
           "stratified_sample_ratio_p", "decline_p",
           "decline_variance"]

_MIXTURE = "anytime-valid over weekly runs"


def anytime_valid(ctx: RunContext) -> bool:
    """Whether the run's alert tests use anytime-valid p-values."""
    return ctx.config.sequential.alert_tests == "anytime_valid"


def _info(information) -> np.ndarray:
    t = np.asarray(information, dtype=float)
    return np.where(np.isfinite(t) & (t > 0), t, np.nan)


def negative_first_stage_p(p_lower, information, ctx: RunContext) -> tuple[np.ndarray, str]:
    """P-values of "complier share < 0" from the fixed-sample lower-tail p-values."""
    p_lower = np.asarray(p_lower, dtype=float)
    if not anytime_valid(ctx):
        return p_lower, ""
    z = anytime_tests.z_from_p_value(p_lower, two_sided=False)   # large when the share is very negative
    p = anytime_tests.one_sided_mixture_p_value(z, _info(information), ctx.config.alerts.fdr_q,
                                                ctx.config.sequential.horizon_participants, "larger")
    return np.where(np.isfinite(p_lower), p, np.nan), _MIXTURE + ": one-sided normal mixture"


def two_sided_p(p_fixed, information, ctx: RunContext) -> tuple[np.ndarray, str]:
    """Two-sided p-values of an arm comparison on cumulative counts (missing outcomes, missing reports)."""
    p_fixed = np.asarray(p_fixed, dtype=float)
    if not anytime_valid(ctx):
        return p_fixed, ""
    z = anytime_tests.z_from_p_value(p_fixed, two_sided=True)
    p = anytime_tests.two_sided_mixture_p_value(z, _info(information), ctx.config.alerts.fdr_q,
                                                ctx.config.sequential.horizon_participants)
    return np.where(np.isfinite(p_fixed), p, np.nan), _MIXTURE + ": normal mixture"


def sample_ratio_p(units_t, units_c, share, p_fixed, ctx: RunContext) -> tuple[np.ndarray, str]:
    """P-values of "the arm counts follow the designed share"."""
    p_fixed = np.asarray(p_fixed, dtype=float)
    if not anytime_valid(ctx):
        return p_fixed, ""
    c = anytime_tests.ratio_concentration(ctx.config.alerts.srm_p_value, ctx.config.sequential.horizon_participants)
    p = anytime_tests.ratio_mixture_p_value(units_t, units_c, share, c)
    return p, _MIXTURE + ": beta-binomial mixture"


def stratified_sample_ratio_p(site_index, units_t, units_c, design, p_fixed, ctx: RunContext
                              ) -> tuple[np.ndarray, str]:
    """P-values of "every stratum's arm counts follow its design" for sites with strata.

    Anytime-valid: the product over a site's strata of the beta-binomial mixture factors
    (a martingale under the design, see
    :func:`~takeup.pipeline.stats.anytime_tests.ratio_mixture_log_bayes_factor`).
    """
    p_fixed = np.asarray(p_fixed, dtype=float)
    if not anytime_valid(ctx):
        return p_fixed, ""
    c = anytime_tests.ratio_concentration(ctx.config.alerts.srm_p_value, ctx.config.sequential.horizon_participants)
    log_bf = anytime_tests.ratio_mixture_log_bayes_factor(units_t, units_c, design, c)
    total = np.bincount(np.asarray(site_index, dtype=np.int64), weights=log_bf, minlength=len(p_fixed))
    p = np.minimum(1.0, np.exp(-total))
    return np.where(np.isfinite(p_fixed), p, np.nan), _MIXTURE + ": beta-binomial mixture over the strata"


def decline_variance(ctx: RunContext) -> str:
    """Variance of the decline test: pooled by arm (under "no change") with anytime-valid tests.

    The per-run test keeps its unpooled Wald variance; with a small early window whose cells are
    all 0 or all 1 that variance collapses and the test rejects clean sites far too often, which
    no spending over looks can repair (``benchmarks/weekly_false_alerts.py`` measures both).
    """
    return "pooled_by_arm" if anytime_valid(ctx) else "unpooled"


def decline_p(p_fixed, look, ctx: RunContext) -> tuple[np.ndarray, str]:
    """P-values of the moving-window decline test, the level spent over the site's looks."""
    p_fixed = np.asarray(p_fixed, dtype=float)
    if not anytime_valid(ctx):
        return p_fixed, ""
    k = ctx.config.sequential.planned_looks
    p = anytime_tests.spent_p_value(p_fixed, look, k)
    return p, f"{_MIXTURE}: level spent over looks, {k} planned"
