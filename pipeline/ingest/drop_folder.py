"""Drop folders: move each file out of the incoming folder only after its batch is committed.

``takeup ingest --processed DIR --rejected DIR incoming/`` (and ``takeup serve --incoming``)
reads the files of the incoming folder and then

* leaves a file that is still being written (its size or modification time changed
  within the last ``settle`` seconds) for the next pass;
* moves a loaded file, or one whose content was already loaded, to ``processed/``;
* moves a rejected file to ``rejected/``, with ``<name>.reason.txt`` beside it.

A file is moved only after :func:`~takeup.pipeline.ingest.batch.ingest_file` has
returned, i.e. after its batch was committed (or recorded as rejected).  A crash
between the commit and the move leaves the file in the incoming folder; the next pass
finds its content already loaded (same SHA-256: a no-op) and moves it then.  Files are
kept under their path relative to the incoming folder; a name taken in the destination
gets a numbered suffix, nothing is overwritten.
"""

from __future__ import annotations

import os
import shutil
import time
from dataclasses import dataclass
from pathlib import Path

from typing import Sequence

from takeup.pipeline.ingest.batch import BatchReport
from takeup.pipeline.ingest.many_files import expand_paths, ingest_paths

__all__ = ["DropFolders", "DEFAULT_SETTLE_SECONDS", "unsettled", "move_after_commit", "ingest_drop_folder"]

#: a file whose size or modification time changed within this many seconds is still being written
DEFAULT_SETTLE_SECONDS = 10.0


@dataclass(frozen=True)
class DropFolders:
    """Where finished files go; ``roots`` are the incoming folders (for the relative paths)."""

    processed: Path | None
    rejected: Path | None
    roots: tuple[Path, ...] = ()
    settle: float = DEFAULT_SETTLE_SECONDS

    @property
    def excluded(self) -> list[Path]:
        return [p for p in (self.processed, self.rejected) if p is not None]


def unsettled(path: Path, settle: float, now: float | None = None) -> str | None:
    """Why ``path`` is still being written ("changed 3 s ago"), else None.

    Looks twice, a short moment apart, so a writer that keeps the modification time
    (copies preserving it) is still caught growing.
    """
    try:
        first = path.stat()
    except FileNotFoundError:
        return "gone before it was read"
    now = time.time() if now is None else now
    age = now - first.st_mtime
    if age < settle:
        return f"changed {max(age, 0):.0f} s ago, less than {settle:g} s"
    time.sleep(0.05)
    try:
        second = path.stat()
    except FileNotFoundError:
        return "gone before it was read"
    if (second.st_size, second.st_mtime_ns) != (first.st_size, first.st_mtime_ns):
        return "its size is still changing"
    return None


def _relative(path: Path, roots: tuple[Path, ...]) -> Path:
    rp = path.resolve()
    for root in roots:
        r = root.resolve()
        if r.is_dir() and rp.is_relative_to(r):
            return rp.relative_to(r)
    return Path(path.name)


def _free_name(target: Path) -> Path:
    if not target.exists():
        return target
    name = target.name
    stem, dot, ext = name.partition(".")
    for i in range(1, 100000):
        candidate = target.with_name(f"{stem}-{i}{dot}{ext}")
        if not candidate.exists():
            return candidate
    raise FileExistsError(target)


def _move(src: Path, target: Path) -> Path:
    """Rename when on the same file system; else copy under a temporary name, rename, remove the source."""
    target.parent.mkdir(parents=True, exist_ok=True)
    target = _free_name(target)
    try:
        os.rename(src, target)
        return target
    except OSError as exc:
        if exc.errno != 18:            # EXDEV: another file system
            raise
    tmp = target.with_name(f".{target.name}.moving")
    shutil.copy2(src, tmp)
    os.replace(tmp, target)
    os.unlink(src)
    return target


def move_after_commit(path: Path, report: BatchReport, folders: DropFolders) -> Path | None:
    """Move ``path`` after its batch: loaded or already loaded -> processed, rejected -> rejected.

    Returns the new path, or None when the file stays (no destination given, or the
    file was never recorded, e.g. it vanished).  Called only after the commit.
    """
    if report.status in ("loaded", "duplicate_batch"):
        dest = folders.processed
    elif report.status == "rejected" and report.batch_id is not None:
        dest = folders.rejected
    else:
        return None
    if dest is None or not path.exists():
        return None
    moved = _move(path, dest / _relative(path, folders.roots))
    if report.status == "rejected":
        reason = moved.with_name(moved.name + ".reason.txt")
        tmp = reason.with_name("." + reason.name + ".tmp")
        tmp.write_text(f"{report.message}\nbatch {report.batch_id}\n", encoding="utf-8")
        os.replace(tmp, reason)
    return moved


def ingest_drop_folder(warehouse: Path | str, paths: Sequence[Path | str], folders: DropFolders,
                       kind: str | None = None, progress: bool = False, **source) -> list[BatchReport]:
    """One pass over a drop folder: ingest the settled files, move each after its commit.

    Files still being written come back as reports with status ``deferred`` (not a batch,
    nothing recorded) and stay where they are.  ``source``: ``delimiter`` / ``encoding``.
    """
    files = expand_paths([Path(p) for p in paths], exclude=folders.excluded)
    ready, reports = [], []
    for f in files:
        why = unsettled(f, folders.settle)
        if why is None:
            ready.append(f)
        else:
            reports.append(BatchReport(file=str(f), status="deferred",
                                       message=f"still being written ({why}); left for the next pass"))
    loaded = ingest_paths(warehouse, ready, kind=kind, progress=progress,
                          after_commit=lambda path, report: move_after_commit(path, report, folders), **source)
    return loaded + reports
