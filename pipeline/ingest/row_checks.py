"""Vectorised row checks generated from the record models.

For a staged file (a DuckDB table of raw columns) this module builds one
``SELECT`` that parses every field and evaluates every check as a boolean
column.  The checks are derived from :mod:`takeup.schemas.records` (types,
``Literal`` values, required/optional, the ``json_schema_extra`` markers)
and from the study configuration (site registry, declared outcomes and
covariates): nothing about a field is written here by hand.

Reason codes (the ``quarantine.reason`` column):

=====================  =====================================================
``missing_id``         participant identifier empty
``missing_value``      a required field empty
``too_long``           text longer than the model allows
``unknown_<field>``    a value outside the accepted list (e.g. ``unknown_arm``)
``invalid_boolean``    not one of 1/0, true/false, yes/no
``invalid_date``       not ``YYYY-MM-DD``, impossible calendar date, or before 1900
``implausible_date``   a real date before the study's plausible window (``[dates]``)
``future_date``        after the ingestion date
``not_a_number``       not a plain decimal number (``1_000``, ``1,5``, ``12 kg`` are not)
``not_finite``         NaN or infinite
``out_of_range``       a number outside the field's open interval (``assignment_probability``: 0 < p < 1)
``control_character``  a site or participant identifier holds a control character
``unknown_site``       site not in the study's site registry
``unknown_outcome``    outcome not declared in the study configuration
``malformed_row``      the CSV reader could not split the line into the header's columns
``conflicting_*``      differs from an already stored (or same-file) record with the same key
``conflicting_probability``  an ``assignment_probability`` that differs from the one already given (stored or
                       in the same file) for the same site x stratum
=====================  =====================================================

Identifiers (``site_id``, ``participant_id``, ``cluster_id``, ``stratum``) are
normalised before anything else: Unicode NFC, then leading and trailing
white space (blanks, tabs, line breaks) removed; every other field loses
leading and trailing blanks.  Values that may be identifiers in the wrong column
are never copied to ``quarantine.offending_value``: a site not in the
registry, a number that does not parse, a text that is too long, and every
identifier.
"""

from __future__ import annotations

from dataclasses import dataclass

from takeup.schemas.ddl import ColumnSpec, columns_of
from takeup.schemas.records import INPUT_MODELS

__all__ = ["Check", "ParsePlan", "build_parse_plan", "required_columns", "known_columns"]


@dataclass(frozen=True)
class Check:
    field: str
    reason: str
    failed_sql: str          # boolean SQL over the parsed table's columns
    offending_sql: str       # VARCHAR SQL for the offending value ('NULL' for identifiers)


@dataclass(frozen=True)
class ParsePlan:
    """The parse ``SELECT`` and the checks for one staged file."""

    kind: str
    select_sql: str                  # SELECT over the stage, yields parsed columns + raw copies
    checks: tuple[Check, ...]
    value_columns: tuple[str, ...]   # stored columns taken from the parsed table
    covariates: tuple[str, ...]      # declared covariates present in the file


def _q(name: str) -> str:
    return '"' + name.replace('"', '""') + '"'


def required_columns(kind: str) -> set[str]:
    return {c.name for c in columns_of(INPUT_MODELS[kind]) if c.required}


def known_columns(kind: str) -> set[str]:
    return {c.name for c in columns_of(INPUT_MODELS[kind])}


#: text columns normalised as identifiers (NFC + trim) and checked for control characters
ID_COLUMNS: tuple[str, ...] = ("site_id", "participant_id", "cluster_id", "stratum")
#: columns whose control characters quarantine the row (the pseudonym's inputs)
CONTROL_CHECKED: tuple[str, ...] = ("site_id", "participant_id")
#: white space trimmed from both ends of every text value
_SPACE = "' ' || chr(9) || chr(10) || chr(11) || chr(12) || chr(13)"
#: a plain ISO 8601 calendar date; nothing else is read as a date
ISO_DATE_RE = "[0-9]{4}-[0-9]{2}-[0-9]{2}"
#: a plain decimal number (optional sign, digits, point, exponent) or an infinity / NaN token
NUMBER_RE = r"[+-]?([0-9]+([.][0-9]*)?|[.][0-9]+)([eE][+-]?[0-9]+)?|(?i:[+-]?(inf|infinity|nan))"
_NUMERIC_TYPES = ("TINYINT", "SMALLINT", "INTEGER", "BIGINT", "HUGEINT", "UTINYINT", "USMALLINT", "UINTEGER",
                  "UBIGINT", "UHUGEINT", "FLOAT", "DOUBLE")


def is_numeric_type(dtype: str) -> bool:
    return dtype in _NUMERIC_TYPES or dtype.startswith("DECIMAL")


def _raw_text(col: str, dtype: str) -> str:
    """Raw column as trimmed text with '' turned into NULL.

    Identifiers are NFC-normalised and trimmed of every white-space character (they are
    hashed: a stray tab would make another participant); other fields lose blanks only
    (trimming the whole set costs 3x as much, and a tab in a date or number is reported).
    """
    text = _q(col) if dtype == "VARCHAR" else f"CAST({_q(col)} AS VARCHAR)"
    if col in ID_COLUMNS:
        return f"NULLIF(trim(nfc_normalize({text}), {_SPACE}), '')"
    return f"NULLIF(trim({text}), '')"


def _parse_expr(spec: ColumnSpec, raw: str, dtype: str) -> str:
    t = spec.python_type
    col = _q(spec.name)
    if spec.sql_type == "DATE":
        if dtype == "DATE":
            return col
        if dtype == "TIMESTAMP WITH TIME ZONE":       # the calendar date in UTC, whatever the host's zone
            return f"CAST(timezone('UTC', {col}) AS DATE)"
        if dtype.startswith("TIMESTAMP"):
            return f"CAST({col} AS DATE)"
        return f"CASE WHEN regexp_full_match({raw}, '{ISO_DATE_RE}') THEN TRY_CAST({raw} AS DATE) END"
    if spec.sql_type == "DOUBLE":
        if is_numeric_type(dtype):
            return f"CAST({col} AS DOUBLE)"
        return f"CASE WHEN regexp_full_match({raw}, '{NUMBER_RE}') THEN TRY_CAST({raw} AS DOUBLE) END"
    if spec.sql_type == "BOOLEAN":
        if dtype == "BOOLEAN":
            return col
        if is_numeric_type(dtype):                  # 1/0 stored as numbers (pandas writes 1.0/0.0 next to a NaN)
            return f"CASE WHEN {col} = 1 THEN TRUE WHEN {col} = 0 THEN FALSE END"
        true = ", ".join(f"'{v}'" for v in spec.extra.get("true_tokens", ("true",)))
        false = ", ".join(f"'{v}'" for v in spec.extra.get("false_tokens", ("false",)))
        return (f"CASE WHEN lower({raw}) IN ({true}) THEN TRUE "
                f"WHEN lower({raw}) IN ({false}) THEN FALSE END")
    if spec.allowed is not None:
        return f"lower({raw})"
    assert t is str, spec
    return raw


def build_parse_plan(kind: str, columns: dict[str, str], covariates: tuple[str, ...],
                     id_expr_sql, also_required: tuple[str, ...] = (), passthrough: tuple[str, ...] = ()) -> ParsePlan:
    """Build the parse/check plan for a staged file.

    Parameters
    ----------
    kind : {"assignment", "uptake", "outcome"}
    columns : mapping of model field name -> (staged column name, DuckDB type) encoded as
        ``{"field": "TYPE"}`` where the staged table's columns already carry the field names.
    covariates : declared covariates present in the file (assignment files only).
    id_expr_sql : callable ``(site_sql, id_sql) -> sql`` giving the pseudonym expression.
    also_required : optional fields the study makes required (``cluster_id`` under cluster
        randomisation): an empty value is quarantined as ``missing_value``.
    passthrough : stage columns copied as they are beside ``_row`` (``_file`` when many files
        are staged together).

    The generated SQL binds ``$today`` (DATE), ``$earliest`` (DATE, start of the plausible
    window), ``$registry`` (VARCHAR[]; empty = no registry check) and ``$outcomes``
    (VARCHAR[]; empty = any outcome name).
    """
    specs = columns_of(INPUT_MODELS[kind])
    # inner level: every raw column trimmed once ("__t_<name>"); the outer level parses and checks
    inner = [f"{_raw_text(c, t)} AS {_q('__t_' + c)}" for c, t in columns.items() if c not in passthrough]

    def trimmed(col: str) -> str:
        return _q("__t_" + col) if col in columns else "CAST(NULL AS VARCHAR)"

    select: list[str] = ['"_row"'] + [_q(c) for c in passthrough]
    checks: list[Check] = []
    value_columns: list[str] = []
    for spec in specs:
        name = spec.name
        present = name in columns
        dtype = columns.get(name, "VARCHAR")
        raw = trimmed(name) if present else "CAST(NULL AS VARCHAR)"
        raw_col = f"_raw_{name}"
        select.append(f"{raw} AS {_q(raw_col)}" if not spec.extra.get("identifier") else f"{raw} IS NULL AS {_q(raw_col + '_null')}")
        if spec.extra.get("identifier"):
            # the raw identifier is hashed here and never copied further
            site_raw = trimmed("site_id")
            select.append(f"CASE WHEN {raw} IS NOT NULL AND {site_raw} IS NOT NULL "
                          f"THEN {id_expr_sql(site_raw, raw)} END AS participant_key")
            checks.append(Check(name, "missing_id", f"{_q(raw_col + '_null')}", "NULL"))
            if name in CONTROL_CHECKED:
                select.append(f"regexp_matches({raw}, '[\\x00-\\x1f\\x7f-\\x9f]') AS {_q('_ctl_' + name)}")
                checks.append(Check(name, "control_character", f"coalesce({_q('_ctl_' + name)}, FALSE)", "NULL"))
            max_len = _max_length(spec)
            if max_len:
                select.append(f"length({raw}) > {max_len} AS {_q('_long_' + name)}")
                checks.append(Check(name, "too_long", f"coalesce({_q('_long_' + name)}, FALSE)", "NULL"))
            value_columns.append("participant_key")
            continue
        select.append(f"{_parse_expr(spec, raw, dtype)} AS {_q(name)}")
        value_columns.append(name)
        shown = f"left({_q(raw_col)}, 200)"
        if spec.required or name in also_required:
            checks.append(Check(name, "missing_value", f"{_q(raw_col)} IS NULL", "NULL"))
        if name in CONTROL_CHECKED:
            checks.append(Check(name, "control_character",
                                f"coalesce(regexp_matches({_q(raw_col)}, '[\\x00-\\x1f\\x7f-\\x9f]'), FALSE)", "NULL"))
        notnull = f"{_q(raw_col)} IS NOT NULL"
        if spec.sql_type == "DATE":
            checks.append(Check(name, "invalid_date",
                                f"{notnull} AND ({_q(name)} IS NULL OR {_q(name)} < DATE '1900-01-01')", shown))
            checks.append(Check(name, "implausible_date",
                                f"{_q(name)} >= DATE '1900-01-01' AND {_q(name)} < $earliest", shown))
            if spec.extra.get("not_future"):
                checks.append(Check(name, "future_date", f"{_q(name)} > $today", shown))
        elif spec.sql_type == "DOUBLE":
            # a value that does not parse as a number may be an identifier in the wrong column: not copied
            checks.append(Check(name, "not_a_number", f"{notnull} AND {_q(name)} IS NULL", "NULL"))
            checks.append(Check(name, "not_finite", f"NOT isfinite({_q(name)})", shown))
            bounds = [f"{_q(name)} <= {float(spec.gt)!r}" if spec.gt is not None else "",
                      f"{_q(name)} >= {float(spec.lt)!r}" if spec.lt is not None else ""]
            bounds = [b for b in bounds if b]
            if bounds:
                checks.append(Check(name, "out_of_range",
                                    f"isfinite({_q(name)}) AND ({' OR '.join(bounds)})", shown))
        elif spec.sql_type == "BOOLEAN":
            checks.append(Check(name, "invalid_boolean", f"{notnull} AND {_q(name)} IS NULL", shown))
        elif spec.allowed is not None:
            allowed = ", ".join(f"'{v}'" for v in spec.allowed)
            checks.append(Check(name, f"unknown_{name}", f"{notnull} AND {_q(name)} NOT IN ({allowed})", shown))
        else:
            max_len = _max_length(spec)
            if max_len:
                checks.append(Check(name, "too_long", f"length({_q(name)}) > {max_len}", "NULL"))
        if spec.extra.get("registry"):
            # a site outside the registry may be a participant id in the wrong column: not copied
            checks.append(Check(name, "unknown_site",
                                # list_contains first: DuckDB evaluates it 25x faster than behind IS NOT NULL
                                f"NOT list_contains($registry, {_q(name)}) AND len($registry) > 0", "NULL"))
        if spec.extra.get("declared") == "outcomes":
            checks.append(Check(name, "unknown_outcome",
                                f"NOT list_contains($outcomes, {_q(name)}) AND len($outcomes) > 0", shown))
    for cov in covariates:
        raw = trimmed(cov)
        raw_col = f"_raw_cov_{cov}"
        parsed = f"_cov_{cov}"
        select.append(f"{raw} AS {_q(raw_col)}")
        dtype = columns.get(cov, "VARCHAR")
        number = (f"CAST({_q(cov)} AS DOUBLE)" if is_numeric_type(dtype) else
                  f"CASE WHEN regexp_full_match({raw}, '{NUMBER_RE}') THEN TRY_CAST({raw} AS DOUBLE) END")
        select.append(f"{number} AS {_q(parsed)}")
        shown = f"left({_q(raw_col)}, 200)"
        checks.append(Check(cov, "not_a_number", f"{_q(raw_col)} IS NOT NULL AND {_q(parsed)} IS NULL", "NULL"))
        checks.append(Check(cov, "not_finite", f"NOT isfinite({_q(parsed)})", shown))
    sql = "SELECT " + ", ".join(select) + " FROM (SELECT *, " + ", ".join(inner) + " FROM _stage)"
    return ParsePlan(kind, sql, tuple(checks), tuple(value_columns), tuple(covariates))


def _max_length(spec: ColumnSpec) -> int | None:
    return spec.max_length
