"""Error types the CLI turns into exit codes, in one light module (no heavy imports)."""

from __future__ import annotations

import errno

__all__ = ["WarehouseError", "WarehouseBusyError", "IngestError", "ExportError", "ReportError", "PublishError",
           "ReproduceError", "RunnerError", "OptionError", "PackageError", "InfrastructureError",
           "infrastructure_problem"]


class WarehouseError(RuntimeError):
    """A warehouse that cannot be used as asked (missing, wrong key, locked)."""


class WarehouseBusyError(WarehouseError):
    """The warehouse stayed locked by another process for the whole wait (exit code 1, not a usage error)."""


class IngestError(ValueError):
    """A file that cannot be ingested at all (nothing of it is stored)."""


class ExportError(RuntimeError):
    """The export cannot be made as asked (no finished run, unknown run, output path unusable)."""


class ReportError(RuntimeError):
    """The report cannot be produced (no run yet, unknown run, output path unusable)."""


class PublishError(RuntimeError):
    """A publication target that cannot be written (the run it publishes stays as it is)."""


class ReproduceError(RuntimeError):
    """The run cannot be reproduced (unknown run, configuration missing, inputs changed)."""


class RunnerError(ValueError):
    """Bad task-runner options (usage error)."""


class OptionError(ValueError):
    """A command option with a value outside what is accepted (usage error), e.g. ``--as-of`` out of range."""


class PackageError(OptionError):
    """A moments package or shard that cannot be used: unreadable, altered, or not matching the run (usage error)."""


class InfrastructureError(RuntimeError):
    """The machine refused: out of memory, disk full, permission denied.

    Not a property of the data: an ingested file that meets one is never
    recorded as rejected, and the message says what to change.
    """


_ERRNO_TEXT = {
    errno.ENOSPC: "disk full",
    errno.EDQUOT: "disk quota exceeded",
    errno.EACCES: "permission denied",
    errno.EPERM: "permission denied",
    errno.EROFS: "read-only file system",
    errno.ENOMEM: "out of memory",
    errno.EMFILE: "too many open files",
}


def infrastructure_problem(exc: BaseException) -> str | None:
    """Name the infrastructure problem behind ``exc`` ("out of memory", "disk full", ...), else None.

    Works on DuckDB exceptions without importing DuckDB (by class name and message)
    and on ``OSError`` (by errno).
    """
    if isinstance(exc, MemoryError):
        return "out of memory"
    if isinstance(exc, OSError) and exc.errno in _ERRNO_TEXT:
        return _ERRNO_TEXT[exc.errno]
    name = type(exc).__name__
    text = str(exc).lower()
    if "no space left on device" in text:          # also a failed COMMIT (TransactionException) writing the WAL
        return "disk full"
    if name == "OutOfMemoryException" or "out of memory" in text or "failed to allocate" in text:
        return "out of memory"
    if name in ("IOException", "IOError", "PermissionException") or "io error" in text:
        if "no space left" in text or "disk full" in text:
            return "disk full"
        if "permission denied" in text:
            return "permission denied"
        if "read-only file system" in text:
            return "read-only file system"
    return None
