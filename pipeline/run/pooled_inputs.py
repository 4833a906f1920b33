"""A run's inputs pooled from several warehouses: shards of the study, or stored moments packages.

* **Shards** (``[[shards]] path = ...`` in the study configuration): the records live in several
  warehouses, each site in exactly one.  Each shard is opened read-only and its aggregates collected
  (:func:`collect_shard`; on a Dask worker with ``--runner dask``), then pooled here with
  :func:`~takeup.pipeline.run.moments_package.merge_packages`.  The warehouse given with
  ``--warehouse`` holds the configuration, the earlier runs (alert lifecycle, sequence state) and the
  results.
* **Stored packages**: a run from moments packages (``takeup run --from-moments``) stores each package
  in the table ``moments_packages`` so that ``takeup reproduce`` can recompute it.

Either way the ``runs`` row records the sources (``moments_sources``: package hashes or shard paths,
with each source's input fingerprint).
"""

from __future__ import annotations

import json
from datetime import datetime, timezone
from pathlib import Path

import duckdb

from takeup.pipeline.errors import ReproduceError
from takeup.pipeline.run.inputs import RunContext, RunInputs, central_state, collect_inputs, with_central_state
from takeup.pipeline.run.moments_package import (MomentsPackage, PackageError, combined_fingerprint, merge_packages,
                                                 package_from_warehouse, read_package)
from takeup.pipeline.warehouse import connect, stored_config, transaction
from takeup.schemas.config import StudyConfig

__all__ = ["shard_locations", "collect_shard", "gather_inputs", "pool", "sources_of", "record_sources", "write_warehouse_package",
           "store_package", "refuse_local_records", "reproduce_pooled_inputs"]


def shard_locations(config: StudyConfig, warehouse: Path | str) -> list[tuple[str, str]]:
    """(label, absolute path) of every shard; relative paths are taken from ``warehouse``'s directory."""
    base = Path(warehouse).resolve().parent
    out = []
    for s in config.shards:
        p = Path(s.path)
        p = p if p.is_absolute() else base / p
        out.append((s.name or s.path, str(p)))
    return out


def collect_shard(path: str, label: str, ctx: RunContext) -> MomentsPackage:
    """Open one shard read-only and collect its aggregates (what a Dask worker runs)."""
    con = connect(path, read_only=True)
    try:
        cfg = stored_config(con)
        if cfg is not None and cfg.study_id != ctx.config.study_id:
            raise PackageError(f"shard {label} ({path}) holds study {cfg.study_id!r}, not {ctx.config.study_id!r}")
        return package_from_warehouse(con, ctx, label)
    finally:
        con.close()


def refuse_local_records(con: duckdb.DuckDBPyConnection, warehouse: Path | str, what: str) -> None:
    """A warehouse that pools other warehouses' aggregates must not hold records of its own (they would be ignored)."""
    n = con.execute("SELECT count(*) FROM assignments").fetchone()[0]
    if n:
        raise PackageError(f"warehouse {warehouse} holds {n} assignment record(s), but {what} reads only "
                           "the other warehouses' aggregates; ingest those records into a shard (or make a package "
                           "of them with 'takeup moments') instead")


def pool(con: duckdb.DuckDBPyConnection, ctx: RunContext, packages: list[MomentsPackage]) -> RunInputs:
    """The packages' pooled aggregates plus the central state read from ``con``."""
    merged, _ = merge_packages(packages, ctx.config, ctx.as_of)
    return with_central_state(merged, central_state(con, ctx))


def sources_of(packages: list[MomentsPackage], shards: bool) -> list[dict]:
    """What the ``runs`` row records about each source."""
    out = []
    for pkg in packages:
        entry = {"shard": pkg.label} if shards else {"package_sha256": pkg.sha256, "file": pkg.label}
        entry.update(input_fingerprint=pkg.aggregates.input_fingerprint, n_batches=pkg.aggregates.n_batches,
                     sites=list(pkg.aggregates.sites))
        out.append(entry)
    return out


def record_sources(con: duckdb.DuckDBPyConnection, ctx: RunContext, sources: list[dict]) -> None:
    con.execute("UPDATE runs SET moments_sources = $s WHERE run_id = $r",
                {"s": json.dumps(sources, sort_keys=True), "r": ctx.run_id})


def store_package(con: duckdb.DuckDBPyConnection, pkg: MomentsPackage, content: bytes) -> None:
    """Keep a package (content-addressed by its SHA-256) in ``moments_packages``, once."""
    with transaction(con):
        if con.execute("SELECT 1 FROM moments_packages WHERE package_sha256 = $h",
                       {"h": pkg.sha256}).fetchone() is None:
            con.execute("INSERT INTO moments_packages VALUES ($h, $t, $study, $as_of, $file, $m, $c)",
                        {"h": pkg.sha256, "t": datetime.now(timezone.utc).replace(tzinfo=None),
                         "study": pkg.manifest.get("study_id"), "as_of": pkg.manifest.get("as_of"),
                         "file": pkg.label, "m": json.dumps(pkg.manifest, sort_keys=True), "c": content})


def gather_inputs(con: duckdb.DuckDBPyConnection, ctx: RunContext, warehouse: Path | str
                  ) -> tuple[RunInputs, list[dict] | None]:
    """The run's inputs: from the warehouse itself, or pooled from the study's shards (read one after another).

    Returns the inputs and, for a sharded study, the sources to record in the ``runs`` row.
    """
    if not ctx.config.shards:
        return collect_inputs(con, ctx), None
    refuse_local_records(con, warehouse, "a run of a sharded study")
    packages = [collect_shard(path, label, ctx) for label, path in shard_locations(ctx.config, warehouse)]
    return pool(con, ctx, packages), sources_of(packages, shards=True)


def reproduce_pooled_inputs(con: duckdb.DuckDBPyConnection, ctx: RunContext, warehouse: Path | str,
                            sources: list[dict], fingerprint: str) -> RunInputs:
    """Rebuild the inputs of a pooled run: stored packages from ``moments_packages``, shards re-read."""
    packages = []
    for src in sources:
        if "package_sha256" in src:
            row = con.execute("SELECT content, file_name FROM moments_packages WHERE package_sha256 = $h",
                              {"h": src["package_sha256"]}).fetchone()
            if row is None:
                raise ReproduceError(f"package {src['package_sha256'][:12]} ({src.get('file')}) of run {ctx.run_id} "
                                     "is not stored in this warehouse")
            pkg = read_package(bytes(row[0]), row[1])
            if pkg.sha256 != src["package_sha256"]:
                raise ReproduceError(f"stored package {row[1]} no longer matches its SHA-256")
        else:
            locations = dict(shard_locations(ctx.config, warehouse))
            label = src["shard"]
            if label not in locations:
                raise ReproduceError(f"shard {label} of run {ctx.run_id} is no longer in the configuration")
            pkg = collect_shard(locations[label], label, ctx)
            if pkg.aggregates.input_fingerprint != src["input_fingerprint"]:
                raise ReproduceError(f"the batches of shard {label} received before run {ctx.run_id} started have "
                                     "changed (fingerprint mismatch): the input cannot be rebuilt")
        packages.append(pkg)
    inputs = pool(con, ctx, packages)
    if combined_fingerprint(h for p in packages for h in p.batch_hashes) != fingerprint:
        raise ReproduceError(f"the pooled input of run {ctx.run_id} does not match its recorded fingerprint")
    return inputs


def write_warehouse_package(warehouse: Path | str, as_of, out: Path | str, config: StudyConfig | None = None,
                            mode: int = 0o600, force: bool = False) -> tuple[str, MomentsPackage]:
    """``takeup moments``: the warehouse's aggregates as of ``as_of`` (read only) into the package ``out``.

    Returns the package's SHA-256 and the package.
    """
    from takeup.pipeline.run.inputs import check_as_of, new_run_context
    from takeup.pipeline.run.moments_package import write_package
    out = Path(out)
    if out.exists() and not force:
        raise PackageError(f"{out} exists; pass --force to replace it")
    con = connect(warehouse, read_only=True)
    try:
        config = config or stored_config(con) or StudyConfig()
        check_as_of(con, as_of)
        pkg = package_from_warehouse(con, new_run_context(config, as_of=as_of), out.name)
    finally:
        con.close()
    return write_package(pkg, out, mode=mode, force=force), pkg
