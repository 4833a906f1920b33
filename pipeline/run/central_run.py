"""A central run from moments packages: ``takeup run --warehouse CENTRAL --from-moments FILE|DIR ...``.

The packages (one per regional warehouse, each site in exactly one) are read and verified, stored in
the central warehouse's ``moments_packages`` table, pooled, and run through the same stages and writer
as any run; the central warehouse supplies the configuration and the earlier runs (alert lifecycle,
sequence state).  The ``runs`` row records the packages' hashes (``moments_sources``).
"""

from __future__ import annotations

from datetime import date
from pathlib import Path
from typing import Sequence

from takeup.pipeline.run.inputs import new_run_context
from takeup.pipeline.run.moments_package import PackageError, merge_packages, package_paths, read_package
from takeup.pipeline.run.pooled_inputs import pool, record_sources, refuse_local_records, sources_of, store_package
from takeup.pipeline.run.stages import compute_all, resolve_config, timed
from takeup.pipeline.run.writer import RunSummary, finish_run, start_run, summarise, write_results
from takeup.pipeline.warehouse import connect
from takeup.schemas.config import StudyConfig

__all__ = ["run_from_packages"]


def run_from_packages(warehouse: Path | str, paths: Sequence[Path | str], as_of: date | None = None,
                      config: StudyConfig | None = None) -> RunSummary:
    """Compute one run from moments packages and write it to ``warehouse`` (in process)."""
    files = package_paths([Path(p) for p in paths])
    contents = [(f.name, f.read_bytes()) for f in files]
    packages = [read_package(data, name) for name, data in contents]
    con = connect(warehouse)
    try:
        config = resolve_config(con, config)
        if config.shards:
            raise PackageError(f"warehouse {warehouse} is configured with shards; a run from moments packages "
                               "reads packages only (remove [[shards]], or run without --from-moments)")
        refuse_local_records(con, warehouse, "a run from moments packages")
        _, pkg_as_of = merge_packages(packages, config, as_of)     # every check before anything is written
        ctx = new_run_context(config, as_of=pkg_as_of)
        timings: dict = {}
        start_run(con, ctx)
        inputs = None
        try:
            with timed(timings, "collect_inputs"):
                for pkg, (_, data) in zip(packages, contents):
                    store_package(con, pkg, data)
                record_sources(con, ctx, sources_of(packages, shards=False))
                inputs = pool(con, ctx, packages)
            results = compute_all(inputs, ctx, timings)
            with timed(timings, "write"):
                counts = write_results(con, ctx, results)
        except BaseException as exc:
            finish_run(con, ctx, "failed", inputs, timings, f"{type(exc).__name__}: {exc}")
            raise
        finish_run(con, ctx, "ok", inputs, timings, None)
        return summarise(ctx, "ok", inputs, counts, results.alerts, timings, None)
    finally:
        con.close()
