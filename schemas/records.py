"""Record contracts: what sites send, and what the warehouse stores.

These pydantic models are the single source of truth for the record
fields.  The warehouse DDL (:mod:`takeup.schemas.ddl`) and the vectorised row
checks run at ingestion (:mod:`takeup.pipeline.ingest.row_checks`) are both generated
from the annotations and the ``json_schema_extra`` markers below, so a
field is declared exactly once.

Markers understood by the generators (``Field(json_schema_extra=...)``):

``identifier``
    The raw value is pseudonymised at ingestion and never stored; the
    stored model carries ``participant_key`` instead.
``not_future``
    A date that may not lie after the ingestion date.
``true_tokens`` / ``false_tokens``
    Accepted spellings of a boolean (compared case-insensitively).
``registry``
    The value must be a site of the study's site registry (when the
    registry is not empty).
``declared``
    The value must be one of the names declared in the study config
    (``"outcomes"``).
"""

from __future__ import annotations

from datetime import date, datetime
from typing import Literal, Optional

from pydantic import BaseModel, ConfigDict, Field

__all__ = [
    "RecordKind", "RECORD_KINDS", "ARMS",
    "AssignmentInput", "UptakeInput", "OutcomeInput",
    "AssignmentRow", "AssignmentCovariateRow", "UptakeRow", "OutcomeRow",
    "BatchRow", "QuarantineRow", "StudyConfigRow", "WarehouseMetaRow", "ParticipantStateRow", "StateBatchRow",
    "MomentsPackageRow", "DriftLimitRow", "BatchActivityRow",
    "INPUT_MODELS", "STORED_MODELS", "STORAGE_TABLES",
]

RecordKind = Literal["assignment", "uptake", "outcome"]
RECORD_KINDS: tuple[str, ...] = ("assignment", "uptake", "outcome")
ARMS: tuple[str, ...] = ("treatment", "control")

_TRUE = ("1", "true", "yes", "y", "t")
_FALSE = ("0", "false", "no", "n", "f")


class _Strict(BaseModel):
    model_config = ConfigDict(extra="forbid", frozen=True, allow_inf_nan=False)


# --------------------------------------------------------------------------
# Fields shared between what a site sends and what is stored
# --------------------------------------------------------------------------
class _SiteField(_Strict):
    site_id: str = Field(min_length=1, max_length=200, description="Site identifier as in the study's site registry.",
                         json_schema_extra={"registry": True})


class _AssignmentFields(_SiteField):
    arm: Literal["treatment", "control"] = Field(description="Randomised arm: `treatment` (offered) or `control`.")
    assigned_on: date = Field(description="Date of the lottery / assignment (ISO 8601).",
                              json_schema_extra={"not_future": True})
    cluster_id: Optional[str] = Field(default=None, max_length=200,
                                      description="Randomisation cluster (required when randomisation is by cluster).")
    stratum: Optional[str] = Field(default=None, max_length=200,
                                   description="Randomisation stratum, if any (a lottery run separately, such as one "
                                               "week's draw or one group's; see the README on strata).")
    assignment_probability: Optional[float] = Field(
        default=None, gt=0, lt=1,
        description="Probability of the treatment arm that the lottery used for this participant's stratum "
                    "(0 < p < 1; optional).  Constant within a site x stratum: a value that differs from the "
                    "one already given is quarantined as `conflicting_probability`.")


class _UptakeFields(_SiteField):
    observed_on: date = Field(description="Date the uptake status was observed (ISO 8601).",
                              json_schema_extra={"not_future": True})
    took_up: bool = Field(description="Whether the participant had taken up the offer by `observed_on` "
                                      "(1/0, true/false, yes/no).",
                          json_schema_extra={"true_tokens": _TRUE, "false_tokens": _FALSE})


class _OutcomeFields(_SiteField):
    outcome: str = Field(min_length=1, max_length=200, description="Outcome name as declared in the study config.",
                         json_schema_extra={"declared": "outcomes"})
    measured_on: date = Field(description="Date of measurement (ISO 8601).", json_schema_extra={"not_future": True})
    value: float = Field(description="Measured value (finite number).")


class _RawId(_Strict):
    participant_id: str = Field(min_length=1, max_length=200,
                                description="Participant identifier at the site; pseudonymised on arrival.",
                                json_schema_extra={"identifier": True})


# --------------------------------------------------------------------------
# Input records (one CSV / Parquet row each)
# --------------------------------------------------------------------------
class AssignmentInput(_AssignmentFields, _RawId):
    """One row of an assignment file. Extra columns named as declared covariates are allowed."""


class UptakeInput(_UptakeFields, _RawId):
    """One row of an uptake file."""


class OutcomeInput(_OutcomeFields, _RawId):
    """One row of an outcome file."""


INPUT_MODELS: dict[str, type[_Strict]] = {
    "assignment": AssignmentInput,
    "uptake": UptakeInput,
    "outcome": OutcomeInput,
}


# --------------------------------------------------------------------------
# Stored rows (warehouse tables)
# --------------------------------------------------------------------------
class _Provenance(_Strict):
    batch_id: str = Field(description="Batch (file) the row arrived in; see `batches`.")
    source_row: int = Field(description="Row of the source file (CSV: physical line, header = 1; Parquet: 1-based row).")
    participant_key: int = Field(description="Pseudonym of (site_id, participant_id): the first 128 bits of their "
                                             "HMAC-SHA256 as an unsigned integer.",
                                 json_schema_extra={"sql_type": "UHUGEINT"})


class AssignmentRow(_AssignmentFields, _Provenance):
    """Table `assignments`: one row per (site, participant)."""


class AssignmentCovariateRow(_Strict):
    """Table `assignment_covariates`: declared covariates of assigned participants, long format."""

    batch_id: str = Field(description="Batch the covariate arrived in.")
    site_id: str = Field(description="Site identifier.")
    participant_key: int = Field(description="Participant pseudonym (see `assignments`).",
                                 json_schema_extra={"sql_type": "UHUGEINT"})
    covariate: str = Field(description="Covariate name as declared in the study config.")
    value: Optional[float] = Field(default=None, description="Covariate value (null when not reported).")


class UptakeRow(_UptakeFields, _Provenance):
    """Table `uptake_events`: uptake observations (several per participant over time)."""


class OutcomeRow(_OutcomeFields, _Provenance):
    """Table `outcome_measurements`: outcome measurements."""


class BatchRow(_Strict):
    """Table `batches`: one row per file offered for ingestion."""

    batch_id: str = Field(description="Batch identifier (derived from the content hash and receipt time).")
    file_name: str = Field(description="File name as received (base name).")
    sha256: str = Field(description="SHA-256 of the file content, hex.")
    kind: Optional[str] = Field(default=None, description="Record kind: assignment, uptake or outcome.")
    site_ids: Optional[str] = Field(default=None, description="Comma-separated sites present among the loaded rows.")
    received_at: datetime = Field(description="When the file was ingested (UTC).")
    rows_read: int = Field(description="Data rows read from the file.")
    rows_loaded: int = Field(description="Rows stored in the record tables.")
    rows_quarantined: int = Field(description="Rows sent to `quarantine`.")
    rows_duplicate: int = Field(description="Rows dropped as exact duplicates (in the file or already stored).")
    status: Literal["loaded", "rejected"] = Field(description="`loaded`, or `rejected` when the file could not be read.")
    message: Optional[str] = Field(default=None, description="Why a file was rejected.")


class QuarantineRow(_Strict):
    """Table `quarantine`: one row per failed check of a rejected record (raw identifiers are never copied)."""

    batch_id: str = Field(description="Batch of the rejected row.")
    source_file: str = Field(description="File name of the batch.")
    source_row: Optional[int] = Field(default=None, description="Row in the source file (see `source_row` above).")
    field: Optional[str] = Field(default=None, description="Field that failed, if one field is to blame.")
    reason: str = Field(description="Machine-readable reason code (see README).")
    offending_value: Optional[str] = Field(default=None, description="The rejected value; null for identifiers and "
                                                                     "for values that may be ones (see README).")


class StudyConfigRow(_Strict):
    """Table `study_configs`: every study configuration the warehouse has been given."""

    config_hash: str = Field(description="SHA-256 of the canonical JSON of the configuration.")
    stored_at: datetime = Field(description="When the configuration was stored (UTC).")
    config_json: str = Field(description="The validated configuration as JSON.")


class WarehouseMetaRow(_Strict):
    """Table `warehouse_meta`: key/value facts about the warehouse (schema version, key check, pseudonym encoding)."""

    key: str = Field(description="Fact name.")
    value: str = Field(description="Fact value.")


class ParticipantStateRow(_Strict):
    """Table `participant_state`: one row per assigned participant x outcome, kept up to date at ingestion.

    Derived from the record tables (it can be rebuilt from them at any time): the
    assignment, the summary of every uptake report and the outcome value under the
    follow-up window and rule of the state's basis (`warehouse_meta.state_basis`),
    with the latest record date and batch receipt time of the participant, so that a
    run reads it with one scan and recomputes from the records only the participants
    with records after its cutoff.
    """

    participant_key: int = Field(description="Participant pseudonym (see `assignments`).",
                                 json_schema_extra={"sql_type": "UHUGEINT"})
    site_id: str = Field(description="Site identifier.")
    cluster_id: Optional[str] = Field(default=None, description="Randomisation cluster.")
    stratum: Optional[str] = Field(default=None, description="Randomisation stratum.")
    assigned_on: date = Field(description="Assignment date.")
    z: int = Field(description="1 = assigned to treatment, 0 = control.")
    took_up: Optional[bool] = Field(default=None, description="Any uptake report says taken up; null = no report.")
    first_obs: Optional[date] = Field(default=None, description="Date of the first uptake report.")
    first_yes: Optional[date] = Field(default=None, description="Date of the first report of uptake.")
    slot: int = Field(description="Position of `outcome` in the basis's outcome list (0: first, or no outcome).")
    outcome: Optional[str] = Field(default=None, description="Outcome name (null when the study has none).")
    y: Optional[float] = Field(default=None, description="Outcome value under the basis's follow-up window and rule.")
    last_event_on: date = Field(description="Latest date among the participant's records (any kind).")
    last_received_at: datetime = Field(description="Latest receipt time among the batches of those records.")


class StateBatchRow(_Strict):
    """Table `participant_state_batches`: batches whose records `participant_state` reflects."""

    batch_id: str = Field(description="Batch identifier (see `batches`).")
    applied_at: datetime = Field(description="When the batch was applied to the state (UTC).")


class BatchActivityRow(_Strict):
    """Table `batch_activity`: per loaded batch and site, the span of record dates (derived, see below).

    Written when the participant state applies the batch; a run reads it for the stale-site rule
    instead of scanning every record (`pipeline/batch_activity.py`).  It can be rebuilt from the
    record tables at any time.
    """

    batch_id: str = Field(description="Batch identifier (see `batches`).")
    site_id: str = Field(description="Site identifier.")
    first_on: date = Field(description="Earliest record date of the site in the batch.")
    last_on: date = Field(description="Latest record date of the site in the batch.")
    n_records: int = Field(description="Records of the site in the batch.")


class MomentsPackageRow(_Strict):
    """Table `moments_packages`: the moments packages central runs were computed from (for `reproduce`)."""

    package_sha256: str = Field(description="SHA-256 of the package's manifest (which holds every part's hash).")
    stored_at: datetime = Field(description="When the package was stored (UTC).")
    study_id: str = Field(description="Study of the package.")
    as_of: date = Field(description="Cutoff date of the package's aggregates.")
    file_name: str = Field(description="File name the package was read from.")
    manifest_json: str = Field(description="The package's manifest.")
    content: bytes = Field(description="The package file itself (aggregates only; confidential).",
                           json_schema_extra={"sql_type": "BLOB"})


class DriftLimitRow(_Strict):
    """Table `drift_limits`: decision limits of the drift charts, computed once and reused by later runs.

    A limit depends only on the chart's design (in-control level, odds ratio, in-control ARL,
    spread of the level's estimate) and on the algorithm that computed it, never on participant
    records; a run reads the limits of its own algorithm and adds those it had to compute, in the
    same transaction as its results.  Deleting rows only makes the next run slower.
    """

    algorithm: str = Field(description="Algorithm and tolerances that computed the limit (a change computes anew).")
    calibration: Literal["known_level", "estimated_level"] = Field(
        description="known_level: designed as if the level were known; estimated_level: raised for its estimate.")
    p0: float = Field(description="In-control level the chart is designed at (rounded on the logit scale).")
    odds_ratio: float = Field(description="Shift in the odds of uptake the chart is designed to detect.")
    target_arl0: float = Field(description="Designed in-control average run length, in participants.")
    logit_sd: float = Field(description="Spread (logit scale, rounded) of the level's estimate; 0 for known_level.")
    h: Optional[float] = Field(default=None, description="Decision limit; null when no limit could be designed.")
    note: str = Field(description="Empty, or why the design has no limit.")
    computed_at: datetime = Field(description="When the limit was computed (UTC).")
    run_id: str = Field(description="Run that computed it.")


STORED_MODELS: dict[str, type[_Strict]] = {
    "assignment": AssignmentRow,
    "uptake": UptakeRow,
    "outcome": OutcomeRow,
}

#: table name -> model, in creation order
STORAGE_TABLES: dict[str, type[_Strict]] = {
    "warehouse_meta": WarehouseMetaRow,
    "study_configs": StudyConfigRow,
    "batches": BatchRow,
    "quarantine": QuarantineRow,
    "assignments": AssignmentRow,
    "assignment_covariates": AssignmentCovariateRow,
    "uptake_events": UptakeRow,
    "outcome_measurements": OutcomeRow,
    "participant_state": ParticipantStateRow,
    "participant_state_batches": StateBatchRow,
    "batch_activity": BatchActivityRow,
    "moments_packages": MomentsPackageRow,
    "drift_limits": DriftLimitRow,
}

#: record kind -> table name
KIND_TABLE: dict[str, str] = {"assignment": "assignments", "uptake": "uptake_events", "outcome": "outcome_measurements"}
