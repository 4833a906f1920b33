"""``takeup serve``: both flows as deployments on the study's cron schedule.

Against the local ephemeral API by default; set ``PREFECT_API_URL`` to an
existing Prefect server's API (e.g. ``http://prefect.internal:4200/api``) to
register the deployments there; the serving process then polls that server
and runs the scheduled flow runs here, next to the warehouse (the single
DuckDB writer stays on this machine).
"""

from __future__ import annotations

from pathlib import Path

import takeup.flows  # noqa: F401  (Prefect defaults)
from prefect.schedules import Cron

from takeup.flows.ingest import ingest_flow
from takeup.flows.monitor import monitor_flow
from takeup.schemas.config import StudyConfig

__all__ = ["build_deployments", "serve_deployments"]


def build_deployments(warehouse: Path, config: StudyConfig, incoming: Path | None = None) -> list:
    schedule = Cron(config.schedule.cron, timezone=config.schedule.timezone)
    wh = str(Path(warehouse).resolve())
    deps = [monitor_flow.to_deployment(
        name=f"{config.study_id}-monitor", schedules=[schedule], parameters={"warehouse": wh},
        description=f"Weekly monitoring run of study {config.study_id} (as of the run date).",
        tags=["takeup", config.study_id])]
    if incoming is not None:
        deps.append(ingest_flow.to_deployment(
            name=f"{config.study_id}-ingest", schedules=[schedule],
            parameters={"paths": [str(Path(incoming).resolve())], "warehouse": wh},
            description=f"Load new site files of study {config.study_id} from {incoming}.",
            tags=["takeup", config.study_id]))
    return deps


def serve_deployments(warehouse: Path, config: StudyConfig, config_path: Path, incoming: Path | None = None,
                      once: bool = False) -> list[str]:
    """Register the deployments; serve them until interrupted unless ``once``. Returns deployment ids."""
    deps = build_deployments(warehouse, config, incoming)
    if once:
        ids = [str(d.apply()) for d in deps]
        for d, i in zip(deps, ids):
            print(f"registered deployment {d.flow_name}/{d.name} ({i}) on schedule '{config.schedule.cron}' "
                  f"({config.schedule.timezone})")
        return ids
    from prefect import serve
    print(f"serving {len(deps)} deployment(s) on schedule '{config.schedule.cron}' ({config.schedule.timezone}); "
          "Ctrl-C to stop")
    serve(*deps)
    return []
