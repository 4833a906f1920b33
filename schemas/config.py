"""Study configuration (TOML), validated by pydantic.

Load with :func:`load_config` (a path) or :func:`parse_config` (a dict);
both raise :class:`ConfigError` whose message names the field, the bad
value and what is accepted, and suggests the nearest valid key for a
mistyped one.  ``StudyConfig()`` with no arguments is the default study:
two arms, designed treatment share 0.5, individual randomisation, the
default alert thresholds.
"""

from __future__ import annotations

import difflib
import hashlib
import json
import re
import tomllib
from datetime import date, timedelta
from pathlib import Path
from typing import Any, Literal, Optional

from pydantic import BaseModel, ConfigDict, Field, ValidationError, field_validator, model_validator

from takeup.schemas.records import ARMS

__all__ = [
    "ConfigError", "StudyConfig", "OutcomeSpec", "SiteSpec", "FollowUp", "AlertThresholds",
    "EstimationSettings", "TrendSettings", "ScheduleSettings", "ExecutionSettings", "DateWindow", "PublishSettings",
    "ShardSpec",
    "load_config", "parse_config", "nearest_name",
]


class ConfigError(ValueError):
    """An invalid study configuration (the CLI exits with code 2)."""


class _Cfg(BaseModel):
    model_config = ConfigDict(extra="forbid", frozen=True, allow_inf_nan=False)


def _check_allocation(value: dict[str, float] | None) -> dict[str, float] | None:
    if value is None:
        return None
    unknown = [k for k in value if k not in ARMS]
    if unknown:
        raise ValueError(f"unknown arm {unknown[0]!r}; accepted arms: {', '.join(ARMS)}")
    missing = [a for a in ARMS if a not in value]
    if missing:
        raise ValueError(f"allocation must give a share for every arm; missing {', '.join(missing)}")
    if any(not (0.0 < v < 1.0) for v in value.values()):
        raise ValueError("each arm's designed share must lie strictly between 0 and 1")
    if abs(sum(value.values()) - 1.0) > 1e-9:
        raise ValueError(f"designed shares must add up to 1 (they add up to {sum(value.values()):g})")
    return dict(value)


class OutcomeSpec(_Cfg):
    """One outcome measured on participants."""

    name: str = Field(min_length=1, pattern=r"^[A-Za-z][A-Za-z0-9_]*$",
                      description="Outcome name as it appears in outcome files.")
    primary: bool = Field(default=False, description="Primary outcome (alerts and pooled headline use it).")
    unit: str = Field(default="", description="Unit of measurement, for labels.")
    direction: Literal["higher_is_better", "lower_is_better", "neutral"] = Field(
        default="higher_is_better", description="Which direction is an improvement.")


class SiteSpec(_Cfg):
    """One site of the registry."""

    site_id: str = Field(min_length=1, max_length=200)
    name: str = Field(default="", description="Display name.")
    group: Optional[str] = Field(default=None, description="Site group, such as a region (for subgroup pooling).")
    allocation: Optional[dict[str, float]] = Field(default=None, description="Designed arm shares for this site.")

    strata: Optional[dict[str, float]] = Field(
        default=None, description="Designed probability of the treatment arm per stratum of this site (0 < p < 1), "
                                  "e.g. `strata = { \"week-01\" = 0.5, \"week-07\" = 0.8 }`; strata not listed "
                                  "have no design (left out of the sample-ratio check).  Without it every stratum "
                                  "has the site's allocation; a stratum's `assignment_probability` in the "
                                  "assignment records takes precedence.")

    _alloc = field_validator("allocation")(classmethod(lambda cls, v: _check_allocation(v)))

    @field_validator("strata")
    @classmethod
    def _strata(cls, v: dict[str, float] | None) -> dict[str, float] | None:
        if v is None:
            return None
        for name, p in v.items():
            if not name.strip():
                raise ValueError("a stratum name must not be empty")
            if not (0.0 < p < 1.0):
                raise ValueError(f"stratum {name!r}: the designed probability of the treatment arm must lie "
                                 f"strictly between 0 and 1")
        return dict(v)

    @field_validator("site_id")
    @classmethod
    def _nfc(cls, v: str) -> str:
        import unicodedata
        return unicodedata.normalize("NFC", v)   # as ingestion normalises the site ids of files


class FollowUp(_Cfg):
    """Which outcome measurement counts: days after assignment, inclusive."""

    min_days: int = Field(default=0, ge=0)
    max_days: int = Field(default=365, ge=0)
    rule: Literal["last", "first", "mean"] = Field(
        default="last", description="When a participant has several measurements in the window: "
                                    "the last one (default), the first one, or their mean.")

    @model_validator(mode="after")
    def _ordered(self) -> "FollowUp":
        if self.max_days < self.min_days:
            raise ValueError(f"max_days ({self.max_days}) must not be below min_days ({self.min_days})")
        return self


class AlertThresholds(_Cfg):
    """Alert thresholds; each default's source is in the README's alert section."""

    weak_first_stage_f: float = Field(default=10.0, gt=0, description="Staiger & Stock (1997) rule of thumb.")
    tf_valid_f: float = Field(default=104.7, gt=0, description="Lee et al. (2022): F above which t-ratio 5% tests are valid.")
    negative_first_stage_min_f: float = Field(
        default=0.0, ge=0, description="Only sites with a first-stage F at least this large are tested for a negative "
                                       "first stage (a gate on the tested family, never a way around BH); 0 = all.")
    first_stage_decline_periods: int = Field(default=4, ge=1, description="Recent assignment periods compared with earlier ones.")
    drift_baseline_periods: int = Field(default=4, ge=1, description="Periods whose uptake sets the in-control level.")
    drift_baseline: Literal["shrunk", "site"] = Field(
        default="shrunk", description="In-control level: each site's baseline shrunk toward the study-wide baseline "
                                      "of the arm (empirical Bayes), or the site's own baseline.")
    drift_calibration: Literal["estimated_level", "known_level"] = Field(
        default="estimated_level", description="Decision limit of the drift charts: calibrated so that the expected "
                                               "false-alarm rate, allowing for the estimation error of the in-control "
                                               "level, is 1/drift_arl0 (default); or designed as if the level were known.")
    drift_odds_ratio: float = Field(default=3.0, gt=1.0, description="Shift in the odds of uptake the CUSUM is tuned to detect.")
    drift_arl0: float = Field(default=2000.0, gt=10.0, description="In-control average run length, in participants.")
    srm_p_value: float = Field(default=0.001, gt=0, lt=1, description="Sample-ratio mismatch alarm level (common practice).")
    fdr_q: float = Field(default=0.05, gt=0, lt=1, description="Benjamini-Hochberg false discovery rate across sites.")
    stale_days: int = Field(default=14, ge=1, description="Days without a batch before a site is stale.")
    outlier_std_residual: Optional[float] = Field(
        default=None, gt=0, description="Optional floor: an outlier must also have |externally standardised residual| "
                                        "above this (off by default; the rule is the BH-adjusted residual test).")
    min_arm_size: int = Field(default=2, ge=1, description="Per-site arm-comparison tests (missing outcomes, missing "
                                                          "uptake reports, first-stage decline, negative first stage) "
                                                          "run only where each arm has at least this many participants.")
    missing_uptake_share: float = Field(default=0.10, gt=0, lt=1, description="Share of participants due an uptake "
                                                                             "report without one, in either arm, above "
                                                                             "which missing_uptake_reports is raised.")

    @model_validator(mode="before")
    @classmethod
    def _removed_fields(cls, data: Any) -> Any:
        # ``test_alpha`` was accepted but never used; configurations stored by earlier versions carry its
        # default (0.05), which is dropped.  Any other value is refused: per-site tests are controlled by fdr_q.
        if isinstance(data, dict) and "test_alpha" in data:
            if data["test_alpha"] != 0.05:
                raise ValueError("test_alpha was removed (it was never used): per-site tests are controlled by "
                                 "Benjamini-Hochberg at fdr_q")
            data = {k: v for k, v in data.items() if k != "test_alpha"}
        return data


class EstimationSettings(_Cfg):
    level: float = Field(default=0.95, gt=0.5, lt=1.0, description="Confidence level of intervals.")
    pool_min_first_stage_f: float = Field(default=10.0, ge=0, description="A site enters the CACE pool only above this first-stage F.")
    adjust_covariates: bool = Field(default=False, description="Also fit the covariate-adjusted IV per site.")
    pool_methods: tuple[Literal["fixed", "dl", "reml", "pm"], ...] = ("fixed", "dl", "reml", "pm")
    min_clusters_per_arm: int = Field(
        default=3, ge=2, description="Under cluster randomisation, a site with fewer clusters than this in an arm gets "
                                     "status too_few_clusters (no cluster-robust SEs, intervals or F); see the README "
                                     "for the coverage measured at 6-40 clusters.")


class TrendSettings(_Cfg):
    period_days: int = Field(default=7, ge=1, le=366, description="Length of a trend period in days (7 = weekly).")
    uptake_window_days: int = Field(
        default=14, ge=0, le=366, description="Days after assignment by which an uptake report is expected.  Trend and "
                                              "decline rules use only cohorts whose window has closed by the cutoff, "
                                              "and missing_uptake_reports counts only participants due a report.")


_CRON_FIELDS = (("minute", 0, 59), ("hour", 0, 23), ("day of month", 1, 31), ("month", 1, 12), ("day of week", 0, 7))
_CRON_NAMES = {3: ["jan", "feb", "mar", "apr", "may", "jun", "jul", "aug", "sep", "oct", "nov", "dec"],
               4: ["sun", "mon", "tue", "wed", "thu", "fri", "sat"]}
_CRON_MACROS = ("@yearly", "@annually", "@monthly", "@weekly", "@daily", "@midnight", "@hourly")


def _cron_value(text: str, i: int) -> int:
    names = _CRON_NAMES.get(i)
    if names and text.lower() in names:
        return names.index(text.lower()) + (1 if i == 3 else 0)
    if not text.isdigit():
        raise ValueError(f"{text!r} is not a number")
    return int(text)


def check_cron(expr: str) -> str:
    """Validate a five-field cron expression (minute hour day-of-month month day-of-week) or a macro."""
    text = expr.strip()
    if text.lower() in _CRON_MACROS:
        return text
    parts = text.split()
    if len(parts) != 5:
        raise ValueError(f"a cron schedule has 5 fields (minute hour day-of-month month day-of-week), "
                         f"got {len(parts)}; e.g. '0 6 * * 1' is Mondays at 06:00")
    for i, (part, (label, lo, hi)) in enumerate(zip(parts, _CRON_FIELDS)):
        for item in part.split(","):
            m = re.fullmatch(r"(\*|[A-Za-z0-9]+(?:-[A-Za-z0-9]+)?)(?:/(\d+))?", item)
            try:
                if not m or (m.group(2) is not None and int(m.group(2)) < 1):
                    raise ValueError(f"{item!r} is not a value, range, list or step")
                if m.group(1) != "*":
                    for v in m.group(1).split("-"):
                        if not lo <= _cron_value(v, i) <= hi:
                            raise ValueError(f"{v!r} is outside {lo}-{hi}")
            except ValueError as exc:
                raise ValueError(f"cron field {i + 1} ({label}) in {expr!r}: {exc}") from None
    return text


class ScheduleSettings(_Cfg):
    cron: str = Field(default="0 6 * * 1", description="When `takeup serve` runs ingestion and then the monitoring "
                                                       "(cron syntax: minute hour day-of-month month day-of-week).")
    timezone: str = Field(default="UTC", description="IANA time zone of the cron schedule, e.g. Europe/Berlin.")

    @field_validator("cron")
    @classmethod
    def _cron(cls, v: str) -> str:
        return check_cron(v)

    @field_validator("timezone")
    @classmethod
    def _zone(cls, v: str) -> str:
        from zoneinfo import ZoneInfo, ZoneInfoNotFoundError
        try:
            ZoneInfo(v)
        except (ZoneInfoNotFoundError, ValueError):
            raise ValueError(f"unknown time zone {v!r}; use an IANA name such as 'UTC' or 'Europe/Berlin'") from None
        return v


class DateWindow(_Cfg):
    """Dates a record may plausibly carry; earlier ones are quarantined as ``implausible_date``."""

    earliest: Optional[date] = Field(default=None, description="Earliest plausible record date, e.g. the study "
                                                               "start minus a year (YYYY-MM-DD).")
    max_age_years: int = Field(default=10, ge=1, le=120, description="Without `earliest`: records dated more than "
                                                                     "this many years before the ingestion day.")

    def earliest_on(self, today: date) -> date:
        if self.earliest is not None:
            return self.earliest
        return today - timedelta(days=round(365.25 * self.max_age_years))


class ExecutionSettings(_Cfg):
    runner: Literal["local", "dask"] = "local"
    dask_address: Optional[str] = Field(default=None, description="tcp://HOST:PORT of an existing Dask scheduler.")


class ShardSpec(_Cfg):
    """One shard warehouse of a study whose sites are spread over several warehouses."""

    path: str = Field(min_length=1, description="Path of the shard's warehouse file, on a filesystem every worker "
                                                "can read; a relative path is taken from the directory of the "
                                                "warehouse that stores the results.")
    name: Optional[str] = Field(default=None, description="Label in messages (default: the path).")


class SequentialSettings(_Cfg):
    """Anytime-valid intervals across weekly looks (Waudby-Smith et al. 2024; Howard et al. 2021)."""

    alpha: float = Field(default=0.05, gt=0, lt=1,
                         description="Level of the confidence sequences: they cover at every look at once with "
                                     "probability at least 1 - alpha.")
    horizon_participants: float = Field(default=1000.0, gt=0,
                                        description="Planned participants per site (clusters under cluster "
                                                    "randomisation) at which a site's sequence is tightest; the "
                                                    "pooled sequence uses the sum over the pooled sites. Valid at "
                                                    "every look whatever its value.")
    alert_tests: Literal["anytime_valid", "per_run"] = Field(
        default="anytime_valid",
        description="P-values of the test-based alert rules: anytime-valid (a clean site raises a rule over all "
                    "weekly runs together at most with the rule's level), or per_run (fixed-sample, valid for one "
                    "look only; kept to compare).")
    planned_looks: int = Field(default=52, ge=1,
                               description="Runs over which the moving-window test (first_stage_decline) spends its "
                                           "level evenly (52 = a year of weekly runs); later runs get a decreasing "
                                           "share, so the bound holds for any number of runs.")


class PlanningSettings(_Cfg):
    """Minimum detectable effects and when a target precision is reached (Bloom 1995)."""

    power: float = Field(default=0.8, gt=0, lt=1, description="Power of the minimum detectable effect.")
    accrual_weeks: int = Field(default=4, ge=1, description="Recent weeks whose assignments set the accrual rate.")
    target_mde: Optional[float] = Field(default=None, gt=0,
                                        description="Target minimum detectable CACE in outcome units (primary "
                                                    "outcome); no forecast date without it.")


class PublishSettings(_Cfg):
    """Published copies for dashboards (``takeup publish``, and after every finished run)."""

    parquet_dir: Optional[str] = Field(default=None, description="Folder of Parquet versions (relative paths: "
                                                                 "to the warehouse's folder).")
    duckdb_file: Optional[str] = Field(default=None, description="DuckDB snapshot file (relative paths: to the "
                                                                 "warehouse's folder).")
    postgres_url: Optional[str] = Field(default=None, description="postgresql://USER@HOST:PORT/DB, without a "
                                                                  "password (from PGPASSWORD or ~/.pgpass; or the "
                                                                  "whole URL in TAKEUP_PUBLISH_URL).")
    postgres_schema: str = Field(default="takeup", pattern=r"^[a-z_][a-z0-9_]{0,62}$",
                                 description="PostgreSQL schema of the published tables.")
    keep_versions: int = Field(default=5, ge=1, description="Parquet versions kept.")
    min_cell_count: int = Field(default=5, ge=1, description="Counts from 1 to min_cell_count - 1 are published as "
                                                             "null (common practice in statistical disclosure "
                                                             "control; 1 turns suppression off).")

    @field_validator("postgres_url")
    @classmethod
    def _no_password(cls, v: Optional[str]) -> Optional[str]:
        if v is None:
            return v
        from urllib.parse import urlsplit
        parts = urlsplit(v)
        if parts.scheme not in ("postgresql", "postgres"):
            raise ValueError("postgres_url must be a postgresql://USER@HOST:PORT/DB URL")
        if parts.password is not None or "password=" in parts.query.lower():
            raise ValueError("postgres_url must not hold a password (the configuration is stored in the "
                             "warehouse); give it in PGPASSWORD or ~/.pgpass, or the whole URL in TAKEUP_PUBLISH_URL")
        return v


class StudyConfig(_Cfg):
    """The whole study configuration."""

    study_id: str = Field(default="study", min_length=1)
    randomisation_unit: Literal["individual", "cluster"] = "individual"
    uptake_definition: Literal["ever_by_cutoff"] = Field(
        default="ever_by_cutoff", description="Uptake = took up at least once on or before the cutoff.")
    uptake_missing: Literal["complete_case", "not_taken_up"] = Field(
        default="complete_case", description="Participants with no uptake report by the cutoff: left out of the uptake "
                                             "moments (complete case, default), or counted as not taken up (for "
                                             "programmes that record only positive uptake).")
    allocation: dict[str, float] = Field(default_factory=lambda: {"treatment": 0.5, "control": 0.5})
    outcomes: tuple[OutcomeSpec, ...] = ()
    follow_up: FollowUp = FollowUp()
    covariates: tuple[str, ...] = ()
    sites: tuple[SiteSpec, ...] = ()
    alerts: AlertThresholds = AlertThresholds()
    estimation: EstimationSettings = EstimationSettings()
    trends: TrendSettings = TrendSettings()
    schedule: ScheduleSettings = ScheduleSettings()
    execution: ExecutionSettings = ExecutionSettings()
    sequential: SequentialSettings = SequentialSettings()
    planning: PlanningSettings = PlanningSettings()
    dates: DateWindow = DateWindow()
    publish: PublishSettings = PublishSettings()
    shards: tuple[ShardSpec, ...] = Field(
        default=(), description="Shard warehouses holding the study's records, each site in exactly one; a run "
                                "pools their aggregates (on Dask workers with --runner dask).")

    _alloc = field_validator("allocation")(classmethod(lambda cls, v: _check_allocation(v)))

    @field_validator("covariates")
    @classmethod
    def _covariate_names(cls, v: tuple[str, ...]) -> tuple[str, ...]:
        from takeup.schemas.records import AssignmentInput
        reserved = set(AssignmentInput.model_fields)
        for name in v:
            if not name.isidentifier():
                raise ValueError(f"covariate name {name!r} is not a plain identifier")
            if name in reserved:
                raise ValueError(f"covariate name {name!r} clashes with an assignment field")
        if len(set(v)) != len(v):
            raise ValueError("covariate names must be unique")
        return v

    @model_validator(mode="after")
    def _consistent(self) -> "StudyConfig":
        names = [o.name for o in self.outcomes]
        if len(set(names)) != len(names):
            raise ValueError("outcome names must be unique")
        if sum(o.primary for o in self.outcomes) > 1:
            raise ValueError("at most one outcome may be primary")
        ids = [s.site_id for s in self.sites]
        for sid in ids:
            if re.search(r"[\x00-\x1f\x7f-\x9f]", sid) or sid != sid.strip():
                raise ValueError(f"site id {sid!r} has a control character or white space at an end")
        if len(set(ids)) != len(ids):
            dup = next(i for i in ids if ids.count(i) > 1)
            raise ValueError(f"site {dup!r} appears twice in the registry")
        paths = [s.path for s in self.shards]
        if len(set(paths)) != len(paths):
            dup = next(p for p in paths if paths.count(p) > 1)
            raise ValueError(f"shard path {dup!r} appears twice")
        return self

    # ----------------------------------------------------------------- helpers
    @property
    def primary_outcome(self) -> Optional[str]:
        for o in self.outcomes:
            if o.primary:
                return o.name
        return self.outcomes[0].name if self.outcomes else None

    def treatment_share(self, site_id: str) -> float:
        for s in self.sites:
            if s.site_id == site_id and s.allocation is not None:
                return s.allocation["treatment"]
        return self.allocation["treatment"]

    def stratum_design(self, site_id: str, stratum: str) -> Optional[float]:
        """Designed treatment probability of a site's stratum from the config (None: no design).

        A site with a ``strata`` table designs only the strata it lists; without one, every
        stratum has the site's allocation.
        """
        for s in self.sites:
            if s.site_id == site_id and s.strata is not None:
                return s.strata.get(stratum)
        return self.treatment_share(site_id)

    def site_group(self, site_id: str) -> Optional[str]:
        for s in self.sites:
            if s.site_id == site_id:
                return s.group
        return None

    def canonical_json(self) -> str:
        data = self.model_dump(mode="json")
        for site in data.get("sites", []):
            if site.get("strata") is None:
                site.pop("strata", None)     # keeps the hash of configurations written before strata existed
        return json.dumps(data, sort_keys=True, separators=(",", ":"))

    def config_hash(self) -> str:
        return hashlib.sha256(self.canonical_json().encode()).hexdigest()


# ---------------------------------------------------------------------------
def nearest_name(name: str, candidates: list[str] | tuple[str, ...]) -> Optional[str]:
    """Closest valid name to a mistyped ``name`` (None when nothing is close)."""
    match = difflib.get_close_matches(name, list(candidates), n=1, cutoff=0.6)
    return match[0] if match else None


def _model_at(loc: tuple[Any, ...]) -> Optional[type[BaseModel]]:
    """The model whose field list applies at ``loc`` (for suggestions)."""
    model: Any = StudyConfig
    for part in loc:
        if isinstance(part, int):
            continue
        if not (isinstance(model, type) and issubclass(model, BaseModel)):
            return None
        field = model.model_fields.get(part)
        if field is None:
            return None
        ann = field.annotation
        candidates = [ann, *getattr(ann, "__args__", ())]
        nxt = None
        for c in candidates:
            for cc in [c, *getattr(c, "__args__", ())]:
                if isinstance(cc, type) and issubclass(cc, BaseModel):
                    nxt = cc
        model = nxt
    return model if isinstance(model, type) and issubclass(model, BaseModel) else None


def _format_errors(err: ValidationError, source: str) -> str:
    lines = [f"invalid study configuration in {source}:"]
    for e in err.errors():
        loc = tuple(e["loc"])
        where = ".".join(str(p) if not isinstance(p, int) else f"[{p}]" for p in loc).replace(".[", "[") or "(top level)"
        value = e.get("input")
        if e["type"] == "extra_forbidden":
            parent = _model_at(loc[:-1])
            valid = sorted(parent.model_fields) if parent else []
            hint = nearest_name(str(loc[-1]), valid)
            msg = f"  {where}: unknown key"
            if hint:
                msg += f"; did you mean '{hint}'?"
            if valid:
                msg += f" (accepted keys: {', '.join(valid)})"
            lines.append(msg)
            continue
        text = e["msg"].removeprefix("Value error, ")
        shown = repr(value)
        if len(shown) > 120:
            shown = shown[:117] + "..."
        lines.append(f"  {where}: {text} (got {shown})")
    return "\n".join(lines)


def parse_config(data: dict[str, Any], source: str = "<config>") -> StudyConfig:
    """Validate a config mapping; raise :class:`ConfigError` with a readable message."""
    try:
        return StudyConfig.model_validate(data)
    except ValidationError as err:
        raise ConfigError(_format_errors(err, source)) from None


def load_config(path: str | Path | None) -> StudyConfig:
    """Load a TOML study configuration; ``None`` gives the default study."""
    if path is None:
        return StudyConfig()
    p = Path(path)
    try:
        raw = p.read_bytes()
    except OSError as exc:
        raise ConfigError(f"cannot read study configuration {p}: {exc.strerror}") from None
    try:
        data = tomllib.loads(raw.decode("utf-8"))
    except (UnicodeDecodeError, tomllib.TOMLDecodeError) as exc:
        raise ConfigError(f"study configuration {p} is not valid TOML: {exc}") from None
    return parse_config(data, str(p))
