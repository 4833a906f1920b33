"""Recompute a stored run from its ``run_id`` and compare with what was written.

A run is determined by its as-of date, its study configuration (stored in
``study_configs`` under the run's ``config_hash``), the batches received
before it started (``runs.started_at`` is the data cutoff; the batch
fingerprint must match) and the previous finished run (for the alert
lifecycle).  :func:`reproduce_run` rebuilds exactly that context, recomputes
every result table in memory and reports the largest difference per table.
"""

from __future__ import annotations

from takeup.pipeline.errors import ReproduceError  # noqa: F401  (re-exported)

import json
import math
from dataclasses import dataclass
from pathlib import Path

import pandas as pd

from takeup.pipeline.run.stages import compute_all
from takeup.pipeline.run.inputs import RunContext, collect_inputs, input_fingerprint
from takeup.pipeline.run.pooled_inputs import reproduce_pooled_inputs
from takeup.pipeline.warehouse import connect
from takeup.schemas.config import parse_config

__all__ = ["Reproduction", "ReproduceError", "reproduce_run"]

_TABLES = ("site_estimates", "complier_profile", "pooled_estimates", "subgroup_tests", "site_influence",
           "uptake_trends", "alerts", "precision_forecasts")




@dataclass(frozen=True)
class Reproduction:
    run_id: str
    identical: bool
    max_abs_diff: dict          # table -> largest absolute difference of numeric cells (0.0 = identical)
    mismatched: dict            # table -> description of non-numeric / row-count differences


def _compare(stored: pd.DataFrame, fresh: pd.DataFrame) -> tuple[float, str | None]:
    if len(stored) != len(fresh):
        return math.inf, f"{len(stored)} stored rows vs {len(fresh)} recomputed"
    if not len(stored):
        return 0.0, None
    keys = [c for c in stored.columns if stored[c].dtype == object or str(stored[c].dtype).startswith("str")]
    a = stored.sort_values(keys or list(stored.columns)).reset_index(drop=True)
    b = fresh[stored.columns].sort_values(keys or list(stored.columns)).reset_index(drop=True)
    worst, problem = 0.0, None
    for c in stored.columns:
        x, y = a[c], b[c]
        if pd.api.types.is_numeric_dtype(x) and not pd.api.types.is_bool_dtype(x):
            xn, yn = pd.to_numeric(x, errors="coerce"), pd.to_numeric(y, errors="coerce")
            if not (xn.isna() == yn.isna()).all():
                problem = f"column {c}: null pattern differs"
                continue
            d = (xn - yn).abs().max()
            if pd.notna(d):
                worst = max(worst, float(d))
        else:
            xs = x.astype(str).where(x.notna(), None)
            ys = y.astype(str).where(y.notna(), None)
            if not xs.equals(ys):
                problem = f"column {c} differs"
    return worst, problem


def reproduce_run(warehouse: Path | str, run_id: str, tolerance: float = 1e-9) -> Reproduction:
    """Recompute ``run_id`` without writing anything and compare it with the stored tables."""
    con = connect(warehouse, read_only=True)
    try:
        # moments_sources is absent from a warehouse last written by an older version
        pooled = con.execute("SELECT count(*) FROM information_schema.columns WHERE table_name = 'runs' "
                             "AND column_name = 'moments_sources'").fetchone()[0]
        row = con.execute("SELECT as_of, started_at, config_hash, input_fingerprint, mode, flow_run_id, status, "
                          f"{'moments_sources' if pooled else 'NULL'} FROM runs WHERE run_id = $r",
                          {"r": run_id}).fetchall()
        if not row:
            raise ReproduceError(f"no run {run_id!r} in {warehouse}")
        as_of, started, cfg_hash, fingerprint, mode, flow_run_id, status, sources = row[0]
        if status not in ("ok", "partial"):
            raise ReproduceError(f"run {run_id} has status {status!r}; only finished runs can be reproduced")
        cfg_row = con.execute("SELECT config_json FROM study_configs WHERE config_hash = $h LIMIT 1",
                              {"h": cfg_hash}).fetchall()
        if not cfg_row:
            raise ReproduceError(f"the configuration {cfg_hash[:12]} of run {run_id} is not stored")
        config = parse_config(json.loads(cfg_row[0][0]), "the run's stored configuration")
        ctx = RunContext(run_id=run_id, as_of=as_of, started_at=started, data_cutoff=started, config=config,
                         mode=mode, flow_run_id=flow_run_id)
        if sources is not None:          # pooled from stored moments packages or from shards
            inputs = reproduce_pooled_inputs(con, ctx, warehouse, json.loads(sources), fingerprint)
        else:
            fp, _ = input_fingerprint(con, started)
            if fp != fingerprint:
                raise ReproduceError(f"the batches received before run {run_id} started have changed "
                                     "(fingerprint mismatch): the input cannot be rebuilt")
            inputs = collect_inputs(con, ctx)
        results = compute_all(inputs, ctx, {})
        diffs, problems = {}, {}
        for table in _TABLES:
            stored = con.execute(f'SELECT * FROM "{table}" WHERE run_id = $r', {"r": run_id}).df()
            fresh = pd.DataFrame(getattr(results, table), columns=list(stored.columns))
            for col in ("period_start", "forecast_date"):
                if col in stored.columns:
                    fresh[col] = pd.to_datetime(fresh[col])
                    stored[col] = pd.to_datetime(stored[col])
            worst, problem = _compare(stored, fresh)
            diffs[table] = worst
            if problem:
                problems[table] = problem
    finally:
        con.close()
    identical = not problems and all(v <= tolerance for v in diffs.values())
    return Reproduction(run_id=run_id, identical=identical, max_abs_diff=diffs, mismatched=problems)
