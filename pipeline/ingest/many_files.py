"""Ingest many files into a warehouse through one connection (the single writer)."""

from __future__ import annotations

from pathlib import Path
from typing import Iterable, Sequence

from takeup.pipeline.ingest.batch import BatchReport, IngestError, ingest_file, literal_path  # noqa: F401
from takeup.pipeline.pseudonym import load_key
from takeup.pipeline.warehouse import check_key, connect, stored_config
from takeup.schemas.config import StudyConfig

__all__ = ["ingest_paths", "expand_paths"]


def expand_paths(paths: Iterable[Path]) -> list[Path]:
    out: list[Path] = []
    for p in paths:
        p = Path(p)
        if p.is_dir():
            out.extend(sorted(q for q in p.rglob("*") if q.suffix.lower() in (".csv", ".parquet")))
        else:
            out.append(p)
    return out


def ingest_paths(warehouse: Path | str, paths: Sequence[Path | str], kind: str | None = None,
                 progress: bool = False, config: StudyConfig | None = None) -> list[BatchReport]:
    """Ingest ``paths`` (files, or directories searched for .csv/.parquet) in the given order.

    Each file is its own atomic batch; a file that cannot be ingested is reported
    as rejected and the others still load.  An infrastructure failure (out of memory,
    disk full, permission denied) is not the file's fault: it stops here with
    :class:`~takeup.pipeline.errors.InfrastructureError`, the files before it stay loaded.
    """
    warehouse = Path(warehouse)
    files = expand_paths(paths)
    con = connect(warehouse)
    try:
        key = check_key(con, load_key(warehouse), warehouse)   # set to the warehouse's pseudonym encoding
        cfg = config or stored_config(con) or StudyConfig()
        reports: list[BatchReport] = []
        bar = None
        if progress:
            from rich.progress import Progress
            bar = Progress(transient=True)
            bar.start()
            task = bar.add_task("ingesting", total=len(files))
        try:
            for f in files:
                try:
                    reports.append(ingest_file(con, f, key, cfg, kind=kind))
                except IngestError as exc:
                    reports.append(BatchReport(file=str(f), status="rejected", message=str(exc)))
                if bar is not None:
                    bar.advance(task)
        finally:
            if bar is not None:
                bar.stop()
        return reports
    finally:
        con.close()
