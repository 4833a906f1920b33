"""Error types the CLI turns into exit codes, in one light module (no heavy imports)."""

from __future__ import annotations

__all__ = ["WarehouseError", "IngestError", "ExportError", "ReportError", "ReproduceError", "RunnerError"]


class WarehouseError(RuntimeError):
    """A warehouse that cannot be used as asked (missing, wrong key, locked)."""


class IngestError(ValueError):
    """A file that cannot be ingested at all (nothing of it is stored)."""


class ExportError(RuntimeError):
    """The export cannot be made as asked (no finished run, unknown run)."""


class ReportError(RuntimeError):
    """The report cannot be produced (no run yet, unknown run)."""


class ReproduceError(RuntimeError):
    """The run cannot be reproduced (unknown run, configuration missing, inputs changed)."""


class RunnerError(ValueError):
    """Bad task-runner options (usage error)."""
