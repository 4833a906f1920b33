"""``takeup serve``: ingestion, then monitoring, on the study's cron schedule.

With ``--incoming``, the scheduled deployment ``<study>-monitor`` runs
:func:`ingest_then_monitor_flow`: the week's files are loaded first (the
ingest flow as a subflow) and the monitoring run starts only after the load
finished, so the two never race for DuckDB's single writer and a run never
misses files that arrived for it.  The incoming folder is a drop folder: each file
moves to ``processed/`` or ``rejected/`` once its batch is committed, and files still
being written wait for the next run (:mod:`takeup.pipeline.ingest.drop_folder`).
The deployment ``<study>-ingest`` is also registered, for loading on demand (``prefect deployment run``); its copy of
the schedule is registered *inactive* so it never fires at the same instant.

Against the local ephemeral API by default; set ``PREFECT_API_URL`` to an
existing Prefect server's API (e.g. ``http://prefect.internal:4200/api``) to
register the deployments there; the serving process then polls that server
and runs the scheduled flow runs here, next to the warehouse (the single
DuckDB writer stays on this machine).
"""

from __future__ import annotations

from pathlib import Path

import takeup.flows  # noqa: F401  (Prefect defaults)
from prefect import flow
from prefect.schedules import Cron

from takeup.flows.ingest import ingest_flow
from takeup.flows.monitor import monitor_flow
from takeup.schemas.config import StudyConfig

__all__ = ["build_deployments", "serve_deployments", "ingest_then_monitor_flow"]


@flow(name="takeup-ingest-then-monitor")
def ingest_then_monitor_flow(paths: list[str], warehouse: str, drop: dict | None = None) -> dict:
    """Load the files under ``paths`` (drop folders when ``drop`` is given), then compute the monitoring run."""
    loaded = ingest_flow(paths, warehouse, drop=drop)
    summary = monitor_flow(warehouse)
    return {"ingest": loaded, "run_id": getattr(summary, "run_id", None)}


def build_deployments(warehouse: Path, config: StudyConfig, incoming: Path | None = None,
                      drop: dict | None = None) -> list:
    schedule = Cron(config.schedule.cron, timezone=config.schedule.timezone)
    wh = str(Path(warehouse).resolve())
    tags = ["takeup", config.study_id]
    if incoming is None:
        return [monitor_flow.to_deployment(
            name=f"{config.study_id}-monitor", schedules=[schedule], parameters={"warehouse": wh},
            description=f"Weekly monitoring run of study {config.study_id} (as of the run date).", tags=tags)]
    paths = [str(Path(incoming).resolve())]
    if drop is not None:
        drop = {**drop, **{k: str(Path(drop[k]).resolve()) for k in ("processed", "rejected") if drop.get(k)}}
    return [
        ingest_then_monitor_flow.to_deployment(
            name=f"{config.study_id}-monitor", schedules=[schedule],
            parameters={"paths": paths, "warehouse": wh, "drop": drop},
            description=f"Load new files of study {config.study_id} from {incoming}, then the monitoring run "
                        "(as of the run date).", tags=tags),
        ingest_flow.to_deployment(
            name=f"{config.study_id}-ingest",
            schedules=[Cron(config.schedule.cron, timezone=config.schedule.timezone, active=False)],
            parameters={"paths": paths, "warehouse": wh, "drop": drop},
            description=f"Load new site files of study {config.study_id} from {incoming} on demand (the scheduled "
                        f"load runs inside {config.study_id}-monitor, before the monitoring).", tags=tags),
    ]


def serve_deployments(warehouse: Path, config: StudyConfig, config_path: Path, incoming: Path | None = None,
                      once: bool = False, drop: dict | None = None) -> list[str]:
    """Register the deployments; serve them until interrupted unless ``once``. Returns deployment ids.

    ``drop`` (``processed``, ``rejected``, ``settle``): the incoming folder is a drop folder.
    The flow runs wait up to ``$TAKEUP_LOCK_WAIT`` seconds for the warehouse (900 under
    ``takeup serve``), inherited by the processes that run them.
    """
    deps = build_deployments(warehouse, config, incoming, drop)
    if once:
        ids = [str(d.apply()) for d in deps]
        for d, i in zip(deps, ids):
            print(f"registered deployment {d.flow_name}/{d.name} ({i}) on schedule '{config.schedule.cron}' "
                  f"({config.schedule.timezone})")
        return ids
    from prefect import serve
    what = "ingestion, then monitoring," if incoming is not None else "monitoring"
    print(f"serving {what} on schedule '{config.schedule.cron}' ({config.schedule.timezone}); Ctrl-C to stop")
    serve(*deps)
    return []
