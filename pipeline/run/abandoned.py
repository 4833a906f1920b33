"""Runs whose process ended before they finished: who owns a run, and marking the dead ones ``abandoned``.

A run writes its ``runs`` row (status ``running``) before the work and its result
rows in one transaction at the end, so a process killed in between leaves a
``running`` row and no result rows.  The row records its owner (host name,
process id and the process's start time, so a reused process id is not taken for
the owner) in ``timings_json`` until the run finishes; the next run marks every
``running`` row whose owner is gone as ``abandoned``.  Rows owned by a process on
another host are left alone: their owner cannot be checked from here.
"""

from __future__ import annotations

import json
import os
import socket
from datetime import datetime, timezone

import duckdb

__all__ = ["process_owner", "owner_alive", "mark_abandoned_runs"]


def _start_ticks(pid: int) -> int | None:
    """The process's start time in clock ticks since boot (Linux /proc), else None."""
    try:
        with open(f"/proc/{pid}/stat", "rb") as fh:
            stat = fh.read().decode("ascii", "replace")
    except OSError:
        return None
    # the command name (field 2) is in parentheses and may hold blanks: split after the last ')'
    fields = stat[stat.rfind(")") + 2:].split()
    try:
        return int(fields[19])          # field 22 of the whole line
    except (IndexError, ValueError):
        return None


def process_owner(pid: int | None = None) -> dict:
    """The identity of process ``pid`` (default: this one): host, pid, start ticks."""
    pid = os.getpid() if pid is None else pid
    return {"host": socket.gethostname(), "pid": pid, "start": _start_ticks(pid)}


def owner_alive(owner: dict) -> bool | None:
    """True / False when the owner can be checked from this host, None when it runs elsewhere."""
    if not isinstance(owner, dict) or owner.get("host") != socket.gethostname():
        return None
    try:
        pid = int(owner["pid"])
    except (KeyError, TypeError, ValueError):
        return None
    try:
        os.kill(pid, 0)
    except ProcessLookupError:
        return False
    except PermissionError:
        pass                              # exists, belongs to someone else
    recorded, now = owner.get("start"), _start_ticks(pid)
    if recorded is not None and now is not None and recorded != now:
        return False                      # the id was reused by a later process
    return True


def mark_abandoned_runs(con: duckdb.DuckDBPyConnection) -> list[str]:
    """Mark ``running`` rows whose owner process is gone as ``abandoned``; returns their run ids.

    Called by a new run inside the warehouse's write lock.  An abandoned run wrote no
    result rows (they are written in one transaction at the end); if one had, the row
    would not be ``running``.
    """
    rows = con.execute("SELECT run_id, timings_json FROM runs WHERE status = 'running'").fetchall()
    dead = []
    for run_id, owner_json in rows:
        try:
            owner = json.loads(owner_json or "{}").get("owner")
        except (ValueError, AttributeError):
            owner = None
        if owner is None:
            continue                      # written by an earlier version: no owner to check
        if owner_alive(owner) is False:
            dead.append((run_id, owner))
    now = datetime.now(timezone.utc).replace(tzinfo=None)
    for run_id, owner in dead:
        con.execute("UPDATE runs SET status = 'abandoned', finished_at = $t, message = $m "
                    "WHERE run_id = $r AND status = 'running'",
                    {"t": now, "r": run_id,
                     "m": f"abandoned: process {owner.get('pid')} on {owner.get('host')} ended before the run "
                          "finished (killed or crashed); no result rows were written. Marked by the next run."})
    return [r for r, _ in dead]
