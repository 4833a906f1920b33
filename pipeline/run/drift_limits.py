"""Decision limits of the drift charts: computed once per design, kept in the warehouse.

A drift chart's limit ``h`` depends only on its design -- the in-control level (rounded on the
logit scale), the odds ratio to detect, the in-control ARL and, for a level that is itself an
estimate, the rounded spread of that estimate -- and on the algorithm computing it (Markov-chain
ARLs inside a root search, tens of milliseconds to a few tenths of a second per design).  A run of
a thousand sites meets a hundred or more distinct designs; weekly runs meet the same ones again,
because a chart's level and spread are fixed once its baseline periods have closed.

So a run reads the limits already in ``drift_limits`` (table model
:class:`takeup.schemas.records.DriftLimitRow`) whose ``algorithm`` equals :data:`LIMIT_ALGORITHM`
(:func:`load_limits`), computes only the missing ones through a :class:`LimitBook`, and writes those
in the same transaction as its results (:func:`store_limits`).  A stored limit is the value the
computation returns for that key, bit for bit (DOUBLE round trip), so a run with a warm table
writes the same results as one with an empty table (tested).  Any change to the computation or its
tolerances must change :data:`LIMIT_ALGORITHM`; limits of other algorithms are then ignored (and
kept, so older runs can still be inspected).

Within one process the computations are also memoised (``functools.lru_cache``), which serves
tests and benchmarks that run many studies without a warehouse.
"""

from __future__ import annotations

import functools
from dataclasses import dataclass, field
from datetime import datetime, timezone

import duckdb
import numpy as np
import pandas as pd

from takeup.pipeline.stats.drift.chart import shifted_rate
from takeup.pipeline.stats.drift.design import calibrate_for_estimated_level, design_cusum

__all__ = ["DESIGN_REL_TOL", "CALIBRATION_REL_TOL", "LIMIT_ALGORITHM", "LimitBook", "load_limits",
           "store_limits", "design_limit", "calibrated_limit", "LIMIT_COLUMNS"]

#: Discretisation tolerance passed to :func:`design_cusum`.  The module default
#: (1e-7) costs about 1 s per chart; 1e-5 costs about 0.1 s and, for the
#: default shift (odds ratio 3, ARL0 2000) at p0 in 0.02-0.12, moved h by less
#: than 1e-3 and left the in-control ARL unchanged to 5 digits (checked when
#: this module was written).  The chain error bound is ``k * rel_tol * max(u, d)``
#: after ``k`` large steps (see the run-length module), far below any practical h.
DESIGN_REL_TOL = 1e-4   # rational approximation of the score grid; designs stay at or above the target ARL0

#: discretisation tolerance of the Markov chains behind the calibration for an estimated level:
#: coarser than the design's (the calibration averages over an uncertain level whose spread is
#: itself rounded); it moves the calibrated limit by about 0.2% and makes the calibration about
#: three times faster
CALIBRATION_REL_TOL = 1e-3

#: identifies the computation behind a stored limit; change it whenever the design search, the
#: calibration or any tolerance above changes (stored limits of another algorithm are not used)
LIMIT_ALGORITHM = (f"bernoulli-cusum/3 design rel_tol={DESIGN_REL_TOL:g}; estimated level: 7 Gauss-Hermite nodes, "
                   f"rel_tol={CALIBRATION_REL_TOL:g}, h_tol=1e-3, regula falsi")

#: columns of ``drift_limits`` a run reads and writes (besides ``algorithm``, ``computed_at``, ``run_id``)
LIMIT_COLUMNS = ("calibration", "p0", "odds_ratio", "target_arl0", "logit_sd", "h", "note")


@functools.lru_cache(maxsize=4096)
def design_limit(p0: float, odds_ratio: float, target_arl0: float) -> tuple[float, str]:
    """Limit for a known in-control level ``p0`` (and the design's note: "" or why there is none)."""
    d = design_cusum(np.array([p0]), shift_odds_ratio=np.array([odds_ratio]), target_arl0=float(target_arl0),
                     rel_tol=DESIGN_REL_TOL)
    return float(np.asarray(d.h)[0]), d.notes[0]


@functools.lru_cache(maxsize=4096)
def calibrated_limit(p0: float, odds_ratio: float, target_arl0: float, logit_sd: float, h_known: float) -> float:
    """Limit raised for a level estimated with spread ``logit_sd`` (:func:`calibrate_for_estimated_level`)."""
    if not np.isfinite(h_known):
        return h_known
    p1 = float(shifted_rate(np.array([p0]), np.array([odds_ratio]))[0])
    return calibrate_for_estimated_level(p0, p1, h_known, target_arl0, logit_sd, rel_tol=CALIBRATION_REL_TOL)


def _key(calibration: str, p0: float, odds_ratio: float, target_arl0: float, logit_sd: float) -> tuple:
    return (calibration, float(p0), float(odds_ratio), float(target_arl0), float(logit_sd))


@dataclass
class LimitBook:
    """The limits one run knows: read from the warehouse, plus those it computes.

    Lookups are by exact key (the keys are already rounded by the caller); a miss computes the limit
    (:func:`design_limit`, :func:`calibrated_limit`) and records it in :attr:`computed`, which the
    writer stores (:func:`store_limits`).

    Parameters
    ----------
    stored : dict
        ``(calibration, p0, odds_ratio, target_arl0, logit_sd) -> (h, note)`` as read by
        :func:`load_limits` (``logit_sd`` is 0 for ``known_level``).
    """

    stored: dict = field(default_factory=dict)
    computed: dict = field(default_factory=dict)

    @classmethod
    def from_frame(cls, frame: pd.DataFrame | None) -> "LimitBook":
        """A book from rows of ``drift_limits`` (the :data:`LIMIT_COLUMNS`); None or empty: no limits."""
        if frame is None or len(frame) == 0:
            return cls()
        stored = {}
        for c, p0, orr, arl0, sd, h, note in frame[list(LIMIT_COLUMNS)].itertuples(index=False):
            stored[_key(c, p0, orr, arl0, sd)] = (float("nan") if h is None or pd.isna(h) else float(h),
                                                  "" if note is None else str(note))
        return cls(stored=stored)

    def _get(self, key: tuple, compute) -> tuple[float, str]:
        found = self.stored.get(key)
        if found is None:
            found = self.computed.get(key)
        if found is None:
            found = compute()
            self.computed[key] = found
        return found

    def design(self, p0: float, odds_ratio: float, target_arl0: float) -> tuple[float, str]:
        """``(h, note)`` of the chart designed for a known level."""
        return self._get(_key("known_level", p0, odds_ratio, target_arl0, 0.0),
                         lambda: design_limit(p0, odds_ratio, target_arl0))

    def calibrated(self, p0: float, odds_ratio: float, target_arl0: float, logit_sd: float) -> float:
        """``h`` raised for an estimated level with (rounded) logit spread ``logit_sd``."""
        def compute():
            h_known, _ = self.design(p0, odds_ratio, target_arl0)
            return calibrated_limit(p0, odds_ratio, target_arl0, logit_sd, h_known), ""
        return self._get(_key("estimated_level", p0, odds_ratio, target_arl0, logit_sd), compute)[0]

    def computed_rows(self) -> tuple[dict, ...]:
        """The limits computed (not read) by this book, as dicts of :data:`LIMIT_COLUMNS`."""
        return tuple({"calibration": k[0], "p0": k[1], "odds_ratio": k[2], "target_arl0": k[3], "logit_sd": k[4],
                      "h": v[0] if np.isfinite(v[0]) else None, "note": v[1]}
                     for k, v in sorted(self.computed.items()))


def load_limits(con: duckdb.DuckDBPyConnection) -> pd.DataFrame:
    """Rows of ``drift_limits`` computed by :data:`LIMIT_ALGORITHM` (the :data:`LIMIT_COLUMNS`)."""
    cols = ", ".join(LIMIT_COLUMNS)
    return con.execute(f"SELECT {cols} FROM drift_limits WHERE algorithm = $a", {"a": LIMIT_ALGORITHM}).df()


def store_limits(con: duckdb.DuckDBPyConnection, rows, run_id: str) -> int:
    """Add ``rows`` (dicts of :data:`LIMIT_COLUMNS`) not yet stored for :data:`LIMIT_ALGORITHM`; returns how many.

    Called inside the run's write transaction, so the limits land with the run's results or not at all.
    """
    rows = list(rows)
    if not rows:
        return 0
    frame = pd.DataFrame(rows, columns=list(LIMIT_COLUMNS))
    frame["h"] = frame["h"].astype("float64")
    con.register("_new_limits", frame)
    try:
        before = con.execute("SELECT count(*) FROM drift_limits").fetchall()[0][0]
        con.execute("""
            INSERT INTO drift_limits (algorithm, calibration, p0, odds_ratio, target_arl0, logit_sd, h, note,
                                      computed_at, run_id)
            SELECT $a, n.calibration, n.p0, n.odds_ratio, n.target_arl0, n.logit_sd, n.h, n.note, $t, $r
            FROM _new_limits n
            WHERE NOT EXISTS (SELECT 1 FROM drift_limits d
                              WHERE d.algorithm = $a AND d.calibration = n.calibration AND d.p0 = n.p0
                                AND d.odds_ratio = n.odds_ratio AND d.target_arl0 = n.target_arl0
                                AND d.logit_sd = n.logit_sd)
        """, {"a": LIMIT_ALGORITHM, "t": datetime.now(timezone.utc).replace(tzinfo=None), "r": run_id}).fetchall()
        return con.execute("SELECT count(*) FROM drift_limits").fetchall()[0][0] - before
    finally:
        con.unregister("_new_limits")
