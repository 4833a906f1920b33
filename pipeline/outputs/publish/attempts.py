"""Publishing runs to every target, recording each attempt in the warehouse's `publications` table.

:func:`publish_warehouse` is what ``takeup publish`` and the automatic publication
after a finished run call.  For each target it publishes the runs not yet
published there (or the one run asked for): snapshot targets (Parquet folder,
DuckDB file) get one new version holding every finished run up to the newest,
PostgreSQL gets each missing run appended in its own transaction.  A failure is
recorded (status ``failed``, the message without passwords) and never raised
for a target: the runs stay as they are, and the next publication retries the
runs that are not yet published to that target.
"""

from __future__ import annotations

from dataclasses import dataclass, replace
from datetime import datetime, timezone
from pathlib import Path

import duckdb

from takeup.pipeline.errors import PublishError, infrastructure_problem
from takeup.pipeline.outputs.publish.duckdb_snapshot import publish_duckdb
from takeup.pipeline.outputs.publish.parquet_folder import publish_parquet
from takeup.pipeline.outputs.publish.postgres_target import publish_postgres
from takeup.pipeline.outputs.publish.published_rows import finished_runs
from takeup.pipeline.outputs.publish.targets import Target, configured_targets
from takeup.pipeline.warehouse import SCHEMA_VERSION, connect, stored_config, transaction
from takeup.schemas.config import PublishSettings, StudyConfig, nearest_name

__all__ = ["Attempt", "PublishOutcome", "publish_warehouse", "pending_runs", "attempts_since", "NoTargetError"]


class NoTargetError(PublishError):
    """Nothing to publish to: no target on the command line nor in the study's [publish] section."""


@dataclass(frozen=True)
class Attempt:
    """One row of `publications`."""

    run_id: str
    target: str
    status: str
    started_at: datetime
    finished_at: datetime
    rows: int | None
    message: str | None


@dataclass(frozen=True)
class PublishOutcome:
    attempts: tuple[Attempt, ...]
    targets: tuple[str, ...]

    @property
    def failed(self) -> tuple[Attempt, ...]:
        return tuple(a for a in self.attempts if a.status == "failed")


def _now() -> datetime:
    return datetime.now(timezone.utc).replace(tzinfo=None)


def pending_runs(con: duckdb.DuckDBPyConnection, target: str) -> list[str]:
    """Finished runs without a successful publication to ``target`` (its redacted name), oldest first."""
    return [r[0] for r in con.execute(
        "SELECT run_id FROM runs WHERE status IN ('ok', 'partial') AND run_id NOT IN "
        "(SELECT run_id FROM publications WHERE target = $t AND status IN ('ok', 'unchanged')) "
        "ORDER BY started_at, run_id", {"t": target}).fetchall()]


def _resolve_run(con: duckdb.DuckDBPyConnection, run_id: str) -> str:
    rows = con.execute("SELECT status FROM runs WHERE run_id = $r", {"r": run_id}).fetchall()
    if not rows:
        near = nearest_name(run_id, finished_runs(con)[-200:])
        raise PublishError(f"unknown run {run_id!r}" + (f"; did you mean {near!r}?" if near else ""))
    if rows[0][0] not in ("ok", "partial"):
        raise PublishError(f"run {run_id} has status {rows[0][0]}; only finished runs (ok, partial) are published")
    return run_id


def _message(target: Target, exc: BaseException) -> str:
    problem = infrastructure_problem(exc)
    text = str(exc).strip().splitlines()[0] if str(exc).strip() else ""
    if isinstance(exc, PublishError):
        msg = text
    elif problem:
        msg = f"{problem} ({type(exc).__name__})"
    else:
        msg = f"{type(exc).__name__}: {text}"
    return target.scrub(msg)[:800]


def _publish_target(con: duckdb.DuckDBPyConnection, target: Target, runs: list[str], settings: PublishSettings,
                    reader_role: str | None) -> list[Attempt]:
    started = _now()
    k = settings.min_cell_count
    try:
        if target.kind == "postgres":
            results = publish_postgres(con, target, runs, k, reader_role)
            return [Attempt(r, target.name, s, started, _now(), n, m) for r, s, n, m in results]
        newest = runs[-1]
        if target.kind == "parquet":
            status, rows, msg = publish_parquet(con, Path(target.location), newest, k, settings.keep_versions,
                                                SCHEMA_VERSION)
        else:
            status, rows, msg = publish_duckdb(con, Path(target.location), newest, k, SCHEMA_VERSION)
        done = _now()
        out = [Attempt(r, target.name, status, started, done, None, f"in the version of run {newest}")
               for r in runs[:-1]]
        return out + [Attempt(newest, target.name, status, started, done, rows, msg)]
    except Exception as exc:  # recorded, never raised: a failed publication leaves the runs as they are
        done = _now()
        return [Attempt(r, target.name, "failed", started, done, None, _message(target, exc)) for r in runs]


def _record(con: duckdb.DuckDBPyConnection, attempts: list[Attempt]) -> None:
    if not attempts:
        return
    with transaction(con):
        con.executemany("INSERT INTO publications (run_id, target, status, started_at, finished_at, rows, message) "
                        "VALUES (?, ?, ?, ?, ?, ?, ?)",
                        [[a.run_id, a.target, a.status, a.started_at, a.finished_at, a.rows, a.message]
                         for a in attempts])


def publish_warehouse(warehouse: Path | str, targets: list[Target] | None = None, run_id: str | None = None,
                      reader_role: str | None = None, require_targets: bool = True) -> PublishOutcome:
    """Publish to ``targets`` (default: the study's [publish] targets and TAKEUP_PUBLISH_URL).

    Without ``run_id``, each target gets the finished runs not yet published to
    it (nothing when it is up to date); with ``run_id``, that run.  Every attempt
    is recorded in `publications`.  Raises :class:`NoTargetError` when there is no
    target and ``require_targets``; target failures are returned, not raised.
    """
    con = connect(warehouse)
    try:
        config = stored_config(con) or StudyConfig()
        settings = config.publish
        if targets is None:
            targets = configured_targets(settings, Path(warehouse))
        targets = [replace(t, schema=settings.postgres_schema) if t.kind == "postgres" else t for t in targets]
        if not targets:
            if require_targets:
                raise NoTargetError("no publication target: give --parquet DIR, --duckdb FILE or --postgres URL, "
                                    "set them in the study configuration's [publish] section, or set "
                                    "TAKEUP_PUBLISH_URL")
            return PublishOutcome((), ())
        if run_id is not None:
            _resolve_run(con, run_id)
        elif not finished_runs(con):
            raise PublishError("no finished run to publish yet; compute one with 'takeup run'")
        attempts: list[Attempt] = []
        for target in targets:
            if target.kind == "postgres" and run_id is None:
                runs = pending_runs(con, target.name)
            elif run_id is None:
                runs = pending_runs(con, target.name)
                if runs:
                    newest = finished_runs(con)[-1]
                    runs = [r for r in runs if r != newest] + [newest]
            else:
                runs = [run_id]
            if not runs:
                continue
            done = _publish_target(con, target, runs, settings, reader_role)
            _record(con, done)
            attempts += done
        return PublishOutcome(tuple(attempts), tuple(t.name for t in targets))
    finally:
        con.close()


def attempts_since(warehouse: Path | str, since: datetime) -> PublishOutcome:
    """Attempts recorded at or after ``since`` (naive UTC): what a run's automatic publication did."""
    con = connect(warehouse, read_only=True)
    try:
        rows = con.execute("SELECT run_id, target, status, started_at, finished_at, rows, message FROM publications "
                           "WHERE started_at >= $s ORDER BY started_at, target, run_id", {"s": since}).fetchall()
    except duckdb.CatalogException:
        rows = []
    finally:
        con.close()
    attempts = tuple(Attempt(*r) for r in rows)
    return PublishOutcome(attempts, tuple(dict.fromkeys(a.target for a in attempts)))
