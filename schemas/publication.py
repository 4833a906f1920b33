"""Publication: the `publications` table and the columns of the published copies.

Dashboards read *published copies* of the result tables (a Parquet folder, a
DuckDB snapshot file, PostgreSQL tables), never the warehouse.  A published
table has the columns of its result model (:mod:`takeup.schemas.results`) and,
where small cells are suppressed, the flag column :data:`SUPPRESSION_FLAG`.
Which counts are small-cell counts, and which values are computed from them,
is declared here once (:data:`SMALL_CELLS`); the SQL of every target is
generated from it.
"""

from __future__ import annotations

from dataclasses import dataclass, replace
from datetime import datetime
from typing import Literal, Optional

from pydantic import BaseModel, ConfigDict, Field

from takeup.schemas.ddl import ColumnSpec, columns_of
from takeup.schemas.results import RESULT_TABLES

__all__ = ["PublicationRow", "PUBLICATION_TABLES", "CellGroup", "SMALL_CELLS", "SUPPRESSION_FLAG",
           "published_columns", "suppressible_columns"]


class PublicationRow(BaseModel):
    """Table `publications`: one row per attempt to publish a run to a target (copies for dashboards)."""

    model_config = ConfigDict(extra="forbid", frozen=True)

    run_id: str = Field(description="Run published.")
    target: str = Field(description="Where: `parquet:<folder>`, `duckdb:<file>` or a PostgreSQL URL without "
                                    "its password.")
    status: Literal["ok", "unchanged", "failed"] = Field(
        description="`ok` (written), `unchanged` (the target already held this run), `failed` (see message; the "
                    "next `takeup publish` retries it).")
    started_at: datetime = Field(description="UTC start of the attempt.")
    finished_at: Optional[datetime] = Field(default=None, description="UTC end of the attempt.")
    rows: Optional[int] = Field(default=None, description="Result rows of the run written to the target.")
    message: Optional[str] = Field(default=None, description="What was written (version folder), or why it "
                                                             "failed; never a password.")


PUBLICATION_TABLES: dict[str, type[BaseModel]] = {"publications": PublicationRow}

#: flag column of published tables with small-cell suppression
SUPPRESSION_FLAG = "small_cells_suppressed"


@dataclass(frozen=True)
class CellGroup:
    """Counts of one cell of a published row, and the values computed from them.

    When any of ``counts`` lies between 1 and ``min_cell_count - 1``, every
    column of ``counts`` and ``derived`` is published as null.  ``shared``
    columns combine this row's cell with the sibling rows that agree on
    ``partition`` (e.g. the two arm rows of a period); they are nulled on all
    those rows when any of them is suppressed.
    """

    counts: tuple[str, ...]
    derived: tuple[str, ...] = ()
    partition: tuple[str, ...] = ()
    shared: tuple[str, ...] = ()


#: table -> its small-cell groups.  Counts of 0 are shown (a zero identifies nobody);
#: estimates, standard errors and intervals are published as computed.
SMALL_CELLS: dict[str, tuple[CellGroup, ...]] = {
    "uptake_trends": (
        CellGroup(counts=("n_assigned", "n_taken_up"),
                  derived=("uptake_share", "cumulative_uptake_share", "cusum"),
                  partition=("run_id", "site_id", "basis", "period_start"),
                  shared=("first_stage", "first_stage_se")),
    ),
    "site_estimates": (
        CellGroup(counts=("n_treatment", "n_treatment_assigned", "due_treatment", "missing_outcome_treatment",
                          "uptake_missing_treatment"),
                  derived=("uptake_treatment", "never_taker_share")),
        CellGroup(counts=("n_control", "n_control_assigned", "due_control", "missing_outcome_control",
                          "uptake_missing_control"),
                  derived=("uptake_control", "always_taker_share")),
    ),
}


def suppressible_columns(table: str) -> set[str]:
    """Columns of ``table`` that a published copy may null for small cells."""
    out: set[str] = set()
    for g in SMALL_CELLS.get(table, ()):
        out |= set(g.counts) | set(g.derived) | set(g.shared)
    return out


def published_columns(table: str) -> list[ColumnSpec]:
    """Columns of the published copy of result table ``table``, in order.

    The result model's columns (those that may be suppressed become nullable,
    their description says so), then :data:`SUPPRESSION_FLAG` for tables with
    small-cell groups.
    """
    cols = columns_of(RESULT_TABLES[table])
    sup = suppressible_columns(table)
    out = []
    for c in cols:
        if c.name in sup:
            c = replace(c, nullable=True, description=c.description + " Published copies: null when a count of "
                        f"its cell is below min_cell_count (see {SUPPRESSION_FLAG}).")
        out.append(c)
    if sup:
        out.append(ColumnSpec(name=SUPPRESSION_FLAG, python_type=bool, sql_type="BOOLEAN", nullable=False,
                              allowed=None, description="True when counts of this row below [publish] "
                                                        "min_cell_count (and the values computed from them) were "
                                                        "published as null; the warehouse keeps exact values.",
                              extra={}, required=True))
    return out
