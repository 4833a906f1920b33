"""Task runner selection: local threads, or an existing Dask cluster via prefect-dask."""

from __future__ import annotations

from takeup.pipeline.errors import RunnerError  # noqa: F401  (re-exported)

from takeup.schemas.config import StudyConfig

__all__ = ["make_task_runner", "RunnerError"]




def make_task_runner(config: StudyConfig | None, runner: str | None = None, dask_address: str | None = None):
    """The task runner for the flows.

    ``runner`` / ``dask_address`` override the study's ``[execution]`` settings.
    ``dask`` without an address is refused: the flows run on a cluster the
    organisation already operates; without one, local threads are the right choice.
    """
    from prefect.task_runners import ThreadPoolTaskRunner
    execution = config.execution if config is not None else None
    name = runner or (execution.runner if execution else "local")
    address = dask_address or (execution.dask_address if execution else None)
    if name == "local":
        if dask_address:
            raise RunnerError("--dask-address needs --runner dask")
        return ThreadPoolTaskRunner(max_workers=2)
    if name == "dask":
        if not address:
            raise RunnerError("--runner dask needs --dask-address tcp://HOST:PORT (or [execution] dask_address)")
        from prefect_dask import DaskTaskRunner
        return DaskTaskRunner(address=address)
    raise RunnerError(f"unknown runner {name!r}; accepted: local, dask")
