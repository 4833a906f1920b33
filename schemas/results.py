"""Result tables: the dashboard contract.

Every result table is append-only and carries ``run_id``; the
``latest_*`` views show the most recent finished run.  Column names here
are the contract dashboards read, so renaming one is a breaking change.
The README's result-table section is generated from these descriptions
(``python -m takeup.schemas.contract``).
"""

from __future__ import annotations

from datetime import date, datetime
from typing import Literal, Optional

from pydantic import BaseModel, ConfigDict, Field

__all__ = [
    "RunRow", "SiteEstimateRow", "ComplierProfileRow", "PooledEstimateRow", "SubgroupTestRow",
    "SiteInfluenceRow", "UptakeTrendRow", "AlertRow", "PrecisionForecastRow", "RESULT_TABLES", "LATEST_VIEWS", "create_views_sql",
]

F = Optional[float]


class _Result(BaseModel):
    model_config = ConfigDict(extra="forbid", frozen=True)


class RunRow(_Result):
    """Table `runs`: one row per monitoring run."""

    run_id: str = Field(description="Run identifier (sortable: UTC start time + random suffix).")
    flow_run_id: Optional[str] = Field(default=None, description="Prefect flow-run id (null for in-process runs).")
    mode: str = Field(description="`in_process` or `orchestrated`.")
    as_of: date = Field(description="Cutoff date: data observed on or before it are used.")
    started_at: datetime = Field(description="UTC start time.")
    finished_at: Optional[datetime] = Field(default=None, description="UTC end time.")
    status: Literal["running", "ok", "partial", "failed", "abandoned"] = Field(
        description="Outcome of the run (`abandoned`: its process ended before the run finished, e.g. killed; "
                    "marked by the next run; it has no result rows).")
    code_version: str = Field(description="takeup version that computed the run.")
    config_hash: str = Field(description="SHA-256 of the study configuration used.")
    input_fingerprint: str = Field(description="SHA-256 over the loaded batches' content hashes (the input state).")
    n_batches: int = Field(description="Loaded batches the run read.")
    n_sites: int = Field(description="Sites with at least one assignment as of the cutoff.")
    timings_json: Optional[str] = Field(default=None, description="Seconds per stage, JSON (while the run is "
                                        "`running`: the process that owns it).")
    message: Optional[str] = Field(default=None, description="Errors or warnings of the run.")
    moments_sources: Optional[str] = Field(
        default=None, description="Runs pooled from moments packages or shards: JSON list of the sources, each with "
                                  "its package SHA-256 (or shard path), input fingerprint and sites; null otherwise.")


class SiteEstimateRow(_Result):
    """Table `site_estimates`: one row per run x site x outcome x specification."""

    run_id: str = Field(description="Run.")
    site_id: str = Field(description="Site.")
    outcome: str = Field(description="Outcome name.")
    spec: str = Field(description="`unadjusted` (moment path; sites without strata), `stratified` (sites with two or more randomisation strata: stratum-weighted ITT, complier share and CACE; pooled), `unstratified` (the same sites' unadjusted estimate, for comparison; not pooled) or `covariate_adjusted` (IV2SLS with declared covariates).")
    n_treatment: int = Field(description="Treatment-arm participants in the analysis sample (complete case: outcome observed and, under uptake_missing = complete_case, uptake reported).")
    n_control: int = Field(description="Control-arm participants in the analysis sample.")
    n_treatment_assigned: int = Field(description="Treatment-arm participants assigned by the cutoff.")
    n_control_assigned: int = Field(description="Control-arm participants assigned by the cutoff.")
    due_treatment: Optional[int] = Field(default=None, description="Treatment-arm participants due an outcome (assigned at least follow_up.min_days before the cutoff).")
    due_control: Optional[int] = Field(default=None, description="Control-arm participants due an outcome.")
    missing_outcome_treatment: int = Field(description="Treatment-arm participants due an outcome without one in the window.")
    missing_outcome_control: int = Field(description="Control-arm participants due an outcome without one in the window.")
    uptake_missing_treatment: Optional[int] = Field(default=None, description="Assigned treatment-arm participants with no uptake report by the cutoff.")
    uptake_missing_control: Optional[int] = Field(default=None, description="Assigned control-arm participants with no uptake report by the cutoff.")
    uptake_treatment: F = Field(default=None, description="Uptake share among the treated (analysis sample).")
    uptake_control: F = Field(default=None, description="Uptake share among controls.")
    complier_share: F = Field(default=None, description="First stage: uptake_treatment - uptake_control.")
    complier_share_se: F = Field(default=None, description="Its standard error (se_type).")
    complier_share_ci_low: F = Field(default=None, description="Confidence interval for the complier share, lower end (normal; t with G-1 df under CR1).")
    complier_share_ci_high: F = Field(default=None, description="Its upper end.")
    complier_share_bound_low: F = Field(default=None, description="Worst-case lower bound on the complier share over all assigned: missing uptake reports = not taken up (treated), taken up (controls) (Manski 1990).")
    complier_share_bound_high: F = Field(default=None, description="Worst-case upper bound: missing reports = taken up (treated), not taken up (controls).")
    always_taker_share: F = Field(default=None, description="= uptake_control (monotonicity).")
    never_taker_share: F = Field(default=None, description="= 1 - uptake_treatment.")
    itt: F = Field(default=None, description="Intent-to-treat effect: difference in mean outcome between arms.")
    itt_se: F = Field(default=None, description="Its standard error.")
    itt_ci_low: F = Field(default=None, description="Confidence interval for the ITT, lower end (normal; t with G-1 df under CR1).")
    itt_ci_high: F = Field(default=None, description="Its upper end.")
    cace: F = Field(default=None, description="Complier average causal effect = itt / complier_share (Wald = 2SLS).")
    cace_se: F = Field(default=None, description="Its standard error (conventional).")
    cace_ci_low: F = Field(default=None, description="Conventional Wald interval, lower end (normal; t with G-1 df under CR1).")
    cace_ci_high: F = Field(default=None, description="Conventional Wald interval, upper end.")
    first_stage_f: F = Field(default=None, description="First-stage F (robust or cluster-robust, = t^2).")
    ar_set: Optional[str] = Field(default=None, description="Anderson-Rubin set shape: interval, two_rays, real_line, empty.")
    ar_ci_low: F = Field(default=None, description="AR bound (interval: lower end; two_rays: end of the lower ray).")
    ar_ci_high: F = Field(default=None, description="AR bound (interval: upper end; two_rays: start of the upper ray).")
    tf_ci_low: F = Field(default=None, description="tF interval (Lee et al. 2022), lower end; null when unbounded.")
    tf_ci_high: F = Field(default=None, description="tF interval, upper end.")
    tf_se: F = Field(default=None, description="tF-adjusted standard error = cace_se * c(F) / 1.96.")
    se_type: Optional[str] = Field(default=None, description="HC1, CR1, HC1-adjusted or CR1-adjusted.")
    n_clusters: Optional[int] = Field(default=None, description="Clusters (cluster randomisation only).")
    ci_df: Optional[int] = Field(default=None, description="Degrees of freedom of the t reference of the ITT, complier-share, CACE and AR intervals (G-1 under CR1); null: normal reference.")
    complier_mean_treated: F = Field(default=None, description="Complier mean outcome under treatment (Imbens & Rubin 1997).")
    complier_mean_untreated: F = Field(default=None, description="Complier mean outcome without treatment.")
    included_in_pool: bool = Field(default=False, description="Whether the site enters the pooled CACE.")
    pool_exclusion_reason: Optional[str] = Field(default=None, description="Why not, when it does not.")
    status: str = Field(description="ok, or a code saying why some values are null (see README).")
    note: Optional[str] = Field(default=None, description="Plain-language explanation of the status.")
    look: Optional[int] = Field(default=None, description="Runs of this site x outcome x spec so far, this one included.")
    information: F = Field(default=None, description="Intrinsic time of the sequences: participants in the analysis (clusters under cluster randomisation).")
    cs_itt_low: F = Field(default=None, description="Anytime-valid confidence sequence for the ITT (running intersection over looks), lower end.")
    cs_itt_high: F = Field(default=None, description="Its upper end.")
    cs_complier_share_low: F = Field(default=None, description="Anytime-valid confidence sequence for the complier share, lower end.")
    cs_complier_share_high: F = Field(default=None, description="Its upper end.")
    cs_cace_set: Optional[str] = Field(default=None, description="Anytime-valid Anderson-Rubin-type set for the CACE: interval, two_rays, real_line or empty.")
    cs_cace_low: F = Field(default=None, description="Its bound (interval: lower end; two_rays: end of the lower ray).")
    cs_cace_high: F = Field(default=None, description="Its bound (interval: upper end; two_rays: start of the upper ray).")
    cs_alpha: F = Field(default=None, description="Level of the sequences ([sequential] alpha).")
    n_strata: Optional[int] = Field(default=None, description="Randomisation strata used by a `stratified` row.")
    n_strata_dropped: Optional[int] = Field(default=None, description="Strata left out of a `stratified` row (one arm only, or fewer than two participants in an arm; the note says how many participants).")


class ComplierProfileRow(_Result):
    """Table `complier_profile`: declared covariate means of compliers (Abadie 2003 kappa weights)."""

    run_id: str = Field(description="Run.")
    site_id: str = Field(description="Site.")
    covariate: str = Field(description="Declared covariate.")
    n: int = Field(description="Assigned participants with the covariate reported.")
    mean_all: F = Field(default=None, description="Mean among all assigned.")
    mean_compliers: F = Field(default=None, description="Kappa-weighted complier mean.")
    mean_always_takers: F = Field(default=None, description="Mean among controls who took up.")
    mean_never_takers: F = Field(default=None, description="Mean among treated who did not take up.")
    note: Optional[str] = Field(default=None, description="Why a mean is null.")


class PooledEstimateRow(_Result):
    """Table `pooled_estimates`: one row per run x outcome x quantity x method x group."""

    run_id: str = Field(description="Run.")
    outcome: str = Field(description="Outcome name.")
    quantity: str = Field(description="cace, itt or complier_share.")
    method: str = Field(description="fixed, dl, reml, pm, <method>_hksj, or pooled_2sls.")
    group_field: Optional[str] = Field(default=None, description="Registry field used for grouping (null: all sites).")
    group: Optional[str] = Field(default=None, description="Group value (null: all sites).")
    estimate: F = Field(default=None, description="Pooled estimate.")
    se: F = Field(default=None, description="Its standard error.")
    ci_low: F = Field(default=None, description="Confidence interval, lower end (z; t for *_hksj).")
    ci_high: F = Field(default=None, description="Confidence interval, upper end.")
    pi_low: F = Field(default=None, description="Prediction interval for a new site: t (k-2 df) with sqrt(tau2 + se^2), se the conventional SE of the method (also on *_hksj rows); on fixed rows (tau2 = 0) a t confidence interval, as the note says. Lower end.")
    pi_high: F = Field(default=None, description="Prediction interval, upper end.")
    tau2: F = Field(default=None, description="Between-site variance (clipped at 0).")
    tau2_ci_low: F = Field(default=None, description="Q-profile interval for tau2, lower end.")
    tau2_ci_high: F = Field(default=None, description="Q-profile interval for tau2, upper end.")
    q: F = Field(default=None, description="Cochran's Q (pooled_2sls: Hansen J).")
    q_df: Optional[int] = Field(default=None, description="Its degrees of freedom.")
    q_pvalue: F = Field(default=None, description="Its p-value.")
    i2: F = Field(default=None, description="I^2 (share of variation due to heterogeneity, 0-1).")
    h2: F = Field(default=None, description="H^2.")
    n_sites: int = Field(description="Sites pooled.")
    note: Optional[str] = Field(default=None, description="Caveats, sites left out.")
    look: Optional[int] = Field(default=None, description="fixed rows of all sites: runs of this outcome x quantity so far, this one included.")
    information: F = Field(default=None, description="fixed rows of all sites: participants (clusters) in the pooled sites.")
    cs_low: F = Field(default=None, description="fixed rows of all sites: anytime-valid confidence sequence (running intersection), lower end; for cace it rests on the delta-method SE of sites with F >= the pooling floor.")
    cs_high: F = Field(default=None, description="Its upper end.")
    cs_alpha: F = Field(default=None, description="Level of the sequence.")


class SubgroupTestRow(_Result):
    """Table `subgroup_tests`: between-group heterogeneity per grouping field."""

    run_id: str = Field(description="Run.")
    outcome: str = Field(description="Outcome name.")
    quantity: str = Field(description="cace, itt or complier_share.")
    method: str = Field(description="Pooling method within groups.")
    group_field: str = Field(description="Registry field.")
    n_groups: int = Field(description="Groups with at least one site.")
    q_between: F = Field(default=None, description="Between-group Q.")
    q_between_df: Optional[int] = Field(default=None, description="Degrees of freedom (groups - 1).")
    q_between_pvalue: F = Field(default=None, description="p-value.")
    note: Optional[str] = Field(default=None, description="Caveats.")


class SiteInfluenceRow(_Result):
    """Table `site_influence`: leave-one-out and shrinkage diagnostics per pooled site."""

    run_id: str = Field(description="Run.")
    outcome: str = Field(description="Outcome name.")
    quantity: str = Field(description="cace, itt or complier_share.")
    method: str = Field(description="Random-effects method used.")
    site_id: str = Field(description="Site.")
    estimate: F = Field(default=None, description="Site estimate entering the pool.")
    se: F = Field(default=None, description="Its standard error.")
    loo_estimate: F = Field(default=None, description="Pooled estimate without this site.")
    loo_se: F = Field(default=None, description="Its standard error.")
    loo_tau2: F = Field(default=None, description="tau2 without this site.")
    std_residual: F = Field(default=None, description="Standardised residual (see README).")
    eb_estimate: F = Field(default=None, description="Empirical-Bayes (shrunken) site estimate.")
    eb_se: F = Field(default=None, description="Its standard error.")


class UptakeTrendRow(_Result):
    """Table `uptake_trends`: uptake by site x arm x period, on two time bases."""

    run_id: str = Field(description="Run.")
    site_id: str = Field(description="Site.")
    arm: str = Field(description="treatment or control.")
    basis: str = Field(description="`cohort`: by period of assignment; `calendar`: by period of observation.")
    period_start: date = Field(description="First day of the period.")
    n_assigned: int = Field(description="cohort: assigned in the period; calendar: assigned by the period's end.")
    n_taken_up: int = Field(description="Of them, took up (cohort: by the cutoff; calendar: by the period's end).")
    uptake_share: F = Field(default=None, description="n_taken_up / n_assigned.")
    cumulative_uptake_share: F = Field(default=None, description="Cumulative over periods up to this one.")
    first_stage: F = Field(default=None, description="Uptake difference between arms in this period (same on both arm rows).")
    first_stage_se: F = Field(default=None, description="Its (unpooled binomial) standard error.")
    cusum: F = Field(default=None, description="Drift CUSUM statistic after this period (cohort basis).")
    cusum_limit: F = Field(default=None, description="CUSUM decision limit h.")


class AlertRow(_Result):
    """Table `alerts`: flags for human review, with a lifecycle across runs."""

    run_id: str = Field(description="Run.")
    alert_key: str = Field(description="Stable key of (site, outcome, rule).")
    site_id: Optional[str] = Field(default=None, description="Site (null for study-wide alerts).")
    outcome: Optional[str] = Field(default=None, description="Outcome (null when not outcome-specific).")
    rule: str = Field(description="Rule id (see README).")
    severity: str = Field(description="info, warning or critical.")
    status: str = Field(description="new, ongoing or resolved (against the previous run).")
    value: F = Field(default=None, description="The statistic that triggered the rule.")
    threshold: F = Field(default=None, description="The rule's threshold.")
    p_value: F = Field(default=None, description="p-value (BH-adjusted where the rule uses BH).")
    first_seen_run_id: str = Field(description="Run in which this alert was first raised.")
    last_seen_run_id: str = Field(description="Last run in which its condition held.")
    message: str = Field(description="Plain sentence with the evidence.")


class PrecisionForecastRow(_Result):
    """Table `precision_forecasts`: how precise the primary outcome's estimates are, and when a target is reached."""

    run_id: str = Field(description="Run.")
    scope: Literal["site", "pooled"] = Field(description="`site`, or `pooled` (fixed-effect pool of all sites).")
    site_id: Optional[str] = Field(default=None, description="Site (null when pooled).")
    outcome: str = Field(description="Primary outcome.")
    n: int = Field(description="Participants in the analysis sample now.")
    mde_itt: F = Field(default=None, description="Minimum detectable ITT: (z_(1-a/2) + z_power) x SE (Bloom 1995).")
    mde_cace: F = Field(default=None, description="Minimum detectable CACE = mde_itt / complier share (null when the share's interval includes 0).")
    complier_share: F = Field(default=None, description="Complier share used.")
    accrual_per_week: F = Field(default=None, description="Participants assigned per week over the last [planning] accrual_weeks.")
    target_mde: F = Field(default=None, description="[planning] target_mde.")
    weeks_to_target: F = Field(default=None, description="Weeks until mde_cace reaches the target at the current accrual (0: reached; null: never or undefined).")
    forecast_date: Optional[date] = Field(default=None, description="as_of + weeks_to_target (null when never or undefined).")
    note: Optional[str] = Field(default=None, description="Why a value is null, assumptions.")


RESULT_TABLES: dict[str, type[BaseModel]] = {
    "runs": RunRow,
    "site_estimates": SiteEstimateRow,
    "complier_profile": ComplierProfileRow,
    "pooled_estimates": PooledEstimateRow,
    "subgroup_tests": SubgroupTestRow,
    "site_influence": SiteInfluenceRow,
    "uptake_trends": UptakeTrendRow,
    "alerts": AlertRow,
    "precision_forecasts": PrecisionForecastRow,
}

#: view name -> table it shows for the latest finished run
LATEST_VIEWS: dict[str, str] = {
    "latest_site_estimates": "site_estimates",
    "latest_pooled_estimates": "pooled_estimates",
    "latest_alerts": "alerts",
    "latest_uptake_trends": "uptake_trends",
    "latest_site_influence": "site_influence",
    "latest_precision_forecasts": "precision_forecasts",
}


def create_views_sql() -> list[str]:
    latest = ("(SELECT run_id FROM runs WHERE status IN ('ok', 'partial') "
              "ORDER BY started_at DESC, run_id DESC LIMIT 1)")
    return [f'CREATE OR REPLACE VIEW "{view}" AS SELECT * FROM "{table}" WHERE run_id = {latest}'
            for view, table in LATEST_VIEWS.items()]
