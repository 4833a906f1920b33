"""Writing a run: the ``runs`` row, every result table in one transaction, the summary.

The run's stages (:mod:`takeup.pipeline.run.stages`) compute rows; this module is
the only one that writes them.  A ``runs`` row is written (status ``running``)
before the work and updated at the end (``ok`` or ``failed``; ``partial`` is kept
for runs stored by versions whose per-site tasks could fail on their own; a run whose
process died in between is marked ``abandoned`` by the next one, see
:mod:`takeup.pipeline.run.abandoned`).
"""

from __future__ import annotations

import json
from dataclasses import dataclass, field
from datetime import date, datetime, timezone
from importlib import metadata
from typing import Any

import duckdb
import numpy as np
import pandas as pd
import pyarrow as pa
import pyarrow.compute as pc

from takeup.pipeline.run.abandoned import mark_abandoned_runs, process_owner
from takeup.pipeline.run.drift_limits import store_limits
from takeup.pipeline.run.inputs import RunContext, RunInputs
from takeup.pipeline.warehouse import store_config, transaction
from takeup.schemas.ddl import columns_of
from takeup.schemas.results import RESULT_TABLES

__all__ = ["RunResults", "RunSummary", "write_results", "start_run", "finish_run", "code_version", "summarise"]


def code_version() -> str:
    try:
        return metadata.version("takeup")
    except metadata.PackageNotFoundError:  # pragma: no cover - running from a source tree
        return "0+unknown"


@dataclass
class RunResults:
    """The rows one run writes, per result table."""

    site_estimates: list[dict] = field(default_factory=list)
    complier_profile: list[dict] = field(default_factory=list)
    pooled_estimates: list[dict] = field(default_factory=list)
    subgroup_tests: list[dict] = field(default_factory=list)
    site_influence: list[dict] = field(default_factory=list)
    uptake_trends: list[dict] | pd.DataFrame = field(default_factory=list)   # a frame from the trends stage
    alerts: list[dict] = field(default_factory=list)
    precision_forecasts: list[dict] = field(default_factory=list)
    drift: Any = None   # the trends stage's drift charts: read by the alerts stage; only their computed limits are written


@dataclass(frozen=True)
class RunSummary:
    run_id: str
    mode: str
    as_of: date
    status: str
    n_sites: int
    rows: dict
    alerts_by_status: dict
    timings: dict
    message: str | None
    flow_run_id: str | None = None
    missing_uptake: str | None = None     # one line on participants without an uptake report


_ARROW_TYPES = {"VARCHAR": pa.string(), "BIGINT": pa.int64(), "DOUBLE": pa.float64(), "BOOLEAN": pa.bool_(),
                "DATE": pa.date32(), "TIMESTAMP": pa.timestamp("us")}


def _arrow_table(table: str, rows: list[dict] | pd.DataFrame) -> pa.Table:
    """The rows of one result table as Arrow, typed by the table's model.

    ``rows`` is a list of dicts (None is null; a NaN or infinite float is a bug and refused) or,
    for tables of many rows, a DataFrame whose columns are a subset of the model's (NaN is null;
    an infinite value is refused).  Unknown columns are refused either way.
    """
    model = RESULT_TABLES[table]
    cols = columns_of(model)
    schema = pa.schema([pa.field(c.name, _ARROW_TYPES[c.sql_type]) for c in cols])
    names = [c.name for c in cols]
    if isinstance(rows, pd.DataFrame):
        return _arrow_from_frame(table, rows, cols, schema)
    for r in rows:
        extra = set(r) - set(names)
        if extra:
            raise ValueError(f"{table}: unexpected column(s) {sorted(extra)}")
    data = {n: [r.get(n) for r in rows] for n in names}
    out = pa.Table.from_pydict(data, schema=schema)
    for c in cols:
        if c.sql_type == "DOUBLE":
            col = out.column(c.name)
            if col.null_count < len(col) and not pc.all(pc.is_finite(col.drop_null())).as_py():
                raise ValueError(f"{table}.{c.name}: NaN or infinite value reached the writer")
    return out


def _arrow_from_frame(table: str, frame: pd.DataFrame, cols, schema: pa.Schema) -> pa.Table:
    names = [c.name for c in cols]
    extra = set(frame.columns) - set(names)
    if extra:
        raise ValueError(f"{table}: unexpected column(s) {sorted(extra)}")
    arrays = []
    for c, f in zip(cols, schema):
        if c.name not in frame.columns:
            arrays.append(pa.nulls(len(frame), type=f.type))
            continue
        values = frame[c.name]
        if c.sql_type == "DOUBLE":
            x = values.to_numpy(dtype=float, na_value=np.nan)
            if np.isinf(x).any():
                raise ValueError(f"{table}.{c.name}: infinite value reached the writer")
            arrays.append(pa.array(x, type=f.type, from_pandas=True))
        else:
            arrays.append(pa.array(values.to_numpy(dtype=object), type=f.type, from_pandas=True))
    return pa.Table.from_arrays(arrays, schema=schema)


def write_results(con: duckdb.DuckDBPyConnection, ctx: RunContext, results: RunResults) -> dict:
    """Append every result table of the run, and the drift limits it computed, in one transaction.

    Returns row counts per result table.
    """
    counts = {}
    with transaction(con):
        if results.drift is not None and results.drift.computed_limits:
            store_limits(con, results.drift.computed_limits, ctx.run_id)
        for table in ("site_estimates", "complier_profile", "pooled_estimates", "subgroup_tests",
                      "site_influence", "uptake_trends", "alerts", "precision_forecasts"):
            rows = getattr(results, table)
            counts[table] = len(rows)
            if len(rows) == 0:
                continue
            arrow = _arrow_table(table, rows)
            con.register("_result_rows", arrow)
            try:
                cols = ", ".join(f'"{c}"' for c in arrow.column_names)
                con.execute(f'INSERT INTO "{table}" ({cols}) SELECT {cols} FROM _result_rows')
            finally:
                con.unregister("_result_rows")
    return counts


def start_run(con: duckdb.DuckDBPyConnection, ctx: RunContext, owner: dict | None = None) -> list[str]:
    """Write the run's ``running`` row, owned by ``owner`` (default: this process).

    Earlier runs whose process is gone are marked ``abandoned`` first
    (:func:`~takeup.pipeline.run.abandoned.mark_abandoned_runs`); returns their ids.
    """
    abandoned = mark_abandoned_runs(con)
    store_config(con, ctx.config)
    con.execute("INSERT INTO runs (run_id, flow_run_id, mode, as_of, started_at, finished_at, status, code_version, "
                "config_hash, input_fingerprint, n_batches, n_sites, timings_json, message) "
                "VALUES ($run, $flow, $mode, $as_of, $start, NULL, 'running', $ver, $cfg, '', 0, 0, $owner, NULL)",
                {"run": ctx.run_id, "flow": ctx.flow_run_id, "mode": ctx.mode, "as_of": ctx.as_of,
                 "start": ctx.started_at, "ver": code_version(), "cfg": ctx.config_hash,
                 "owner": json.dumps({"owner": owner or process_owner()})})
    return abandoned


def finish_run(con: duckdb.DuckDBPyConnection, ctx: RunContext, status: str, inputs: RunInputs | None,
               timings: dict, message: str | None) -> None:
    con.execute("UPDATE runs SET finished_at = $end, status = $status, input_fingerprint = $fp, n_batches = $nb, "
                "n_sites = $ns, timings_json = $t, message = $m WHERE run_id = $run",
                {"end": datetime.now(timezone.utc).replace(tzinfo=None), "status": status,
                 "fp": inputs.input_fingerprint if inputs else "", "nb": inputs.n_batches if inputs else 0,
                 "ns": len(inputs.sites) if inputs else 0, "t": json.dumps(timings), "m": message,
                 "run": ctx.run_id})


def summarise(ctx: RunContext, status: str, inputs: RunInputs | None, counts: dict, alerts: list[dict],
              timings: dict, message: str | None) -> RunSummary:
    by_status: dict[str, int] = {}
    for a in alerts:
        by_status[a["status"]] = by_status.get(a["status"], 0) + 1
    return RunSummary(run_id=ctx.run_id, mode=ctx.mode, as_of=ctx.as_of, status=status,
                      n_sites=len(inputs.sites) if inputs else 0, rows=counts, alerts_by_status=by_status,
                      timings=timings, message=message, flow_run_id=ctx.flow_run_id,
                      missing_uptake=_missing_uptake_line(ctx, inputs))


def _missing_uptake_line(ctx: RunContext, inputs: RunInputs | None) -> str | None:
    """'uptake reports missing: ...' from the cohort counts (None when every participant has one)."""
    if inputs is None or inputs.cohort_counts is None or len(inputs.cohort_counts) == 0:
        return None
    f = inputs.cohort_counts
    miss = (f["n_assigned"] - f["n_observed"]).groupby(f["z"]).sum()
    assigned = f["n_assigned"].groupby(f["z"]).sum()
    mt, mc = int(miss.get(1, 0)), int(miss.get(0, 0))
    if mt + mc == 0:
        return None
    n_sites = int(((f["n_assigned"] - f["n_observed"]) > 0).groupby(f["site_id"]).any().sum())
    rule = ("left out of the uptake estimates (complete case)" if ctx.config.uptake_missing == "complete_case"
            else "counted as not taken up")
    return (f"uptake reports missing: {mt} of {int(assigned.get(1, 0))} treated, {mc} of {int(assigned.get(0, 0))} "
            f"controls at {n_sites} site(s), {rule}; worst-case complier-share bounds in site_estimates")
