"""Sufficient statistics for the per-site estimators.

Everything the site estimators need is a handful of sums per site x arm
(and per site x cluster x arm when randomisation is by cluster).  The SQL
that fills these containers lives in :mod:`pipeline.moments_sql`; the
arithmetic that turns them into estimates lives beside this module.  The
containers are plain read-only arrays so that the same estimator code runs
on moments aggregated by DuckDB, on moments computed with numpy in tests,
and on one site or on a thousand at once (every array has one entry per
site, in the same site order).

Notation: ``Z`` is assignment (1 = offered / treatment arm, 0 = control),
``D`` is uptake (1 = took up by the cutoff; any numeric treatment works),
``Y`` is the outcome.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

__all__ = ["ArmMoments", "SiteMoments", "ClusterMoments", "arm_moments_from_arrays"]


def _as_float_array(x) -> np.ndarray:
    arr = np.asarray(x, dtype=float)
    if arr.ndim == 0:
        arr = arr.reshape(1)
    arr = arr.copy()
    arr.setflags(write=False)
    return arr


@dataclass(frozen=True)
class ArmMoments:
    """Sums over the participants of one arm, one entry per site.

    Attributes
    ----------
    n : ndarray
        Number of participants in the arm (analysis sample).
    sum_d, sum_y : ndarray
        Sums of uptake ``D`` and outcome ``Y``.
    sum_dd, sum_yy, sum_dy : ndarray
        Sums of ``D**2``, ``Y**2`` and ``D*Y``.
    """

    n: np.ndarray
    sum_d: np.ndarray
    sum_y: np.ndarray
    sum_dd: np.ndarray
    sum_yy: np.ndarray
    sum_dy: np.ndarray

    def __post_init__(self) -> None:
        shape = None
        for name in ("n", "sum_d", "sum_y", "sum_dd", "sum_yy", "sum_dy"):
            arr = _as_float_array(getattr(self, name))
            object.__setattr__(self, name, arr)
            if shape is None:
                shape = arr.shape
            elif arr.shape != shape:
                raise ValueError(f"ArmMoments.{name} has shape {arr.shape}, expected {shape}")

    @property
    def n_sites(self) -> int:
        return int(self.n.shape[0])


@dataclass(frozen=True)
class SiteMoments:
    """Moments of both arms of each site (same site order in both)."""

    treated: ArmMoments
    control: ArmMoments

    def __post_init__(self) -> None:
        if self.treated.n.shape != self.control.n.shape:
            raise ValueError("treated and control moments cover a different number of sites")

    @property
    def n_sites(self) -> int:
        return self.treated.n_sites


@dataclass(frozen=True)
class ClusterMoments:
    """Sums per site x cluster x arm cell, for cluster-robust (CR1) variances.

    One entry per cell.  ``site_index`` maps each cell to its site's
    position in the corresponding :class:`SiteMoments`; ``cluster_index``
    numbers the clusters within the whole data (a cluster that appears in
    both arms has two cells with the same ``cluster_index``).

    Attributes
    ----------
    site_index, cluster_index : ndarray of int
    z : ndarray
        Arm of the cell (1 treatment, 0 control).
    n, sum_d, sum_y : ndarray
        Participant count and sums of ``D`` and ``Y`` in the cell.
    """

    site_index: np.ndarray
    cluster_index: np.ndarray
    z: np.ndarray
    n: np.ndarray
    sum_d: np.ndarray
    sum_y: np.ndarray

    def __post_init__(self) -> None:
        for name in ("site_index", "cluster_index"):
            arr = np.asarray(getattr(self, name), dtype=np.int64).copy()
            arr.setflags(write=False)
            object.__setattr__(self, name, arr)
        for name in ("z", "n", "sum_d", "sum_y"):
            object.__setattr__(self, name, _as_float_array(getattr(self, name)))
        shape = self.site_index.shape
        for name in ("cluster_index", "z", "n", "sum_d", "sum_y"):
            if getattr(self, name).shape != shape:
                raise ValueError(f"ClusterMoments.{name} has a different length from site_index")


def arm_moments_from_arrays(site: np.ndarray, z: np.ndarray, d: np.ndarray, y: np.ndarray,
                            sites: np.ndarray | None = None) -> SiteMoments:
    """Aggregate participant arrays into :class:`SiteMoments` with numpy.

    This is the in-memory twin of the SQL aggregation, used by tests and by
    simulations.  ``sites`` fixes the site order (default: sorted unique).
    """
    site = np.asarray(site)
    z = np.asarray(z).astype(int)
    d = np.asarray(d, dtype=float)
    y = np.asarray(y, dtype=float)
    if sites is None:
        sites = np.unique(site)
    pos = {s: i for i, s in enumerate(sites.tolist())}
    idx = np.array([pos[s] for s in site.tolist()], dtype=np.int64)
    k = len(sites)

    def arm(mask: np.ndarray) -> ArmMoments:
        def s(v):
            return np.bincount(idx[mask], weights=v[mask], minlength=k)
        ones = np.ones_like(d)
        return ArmMoments(n=s(ones), sum_d=s(d), sum_y=s(y), sum_dd=s(d * d),
                          sum_yy=s(y * y), sum_dy=s(d * y))

    return SiteMoments(treated=arm(z == 1), control=arm(z == 0))
