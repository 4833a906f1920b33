"""Who are the compliers?  Complier outcome means and covariate profiles.

* :func:`complier_outcome_means` - mean outcome of compliers with and
  without the programme (Imbens & Rubin 1997), from the arm moments.
* :func:`kappa_complier_means` - complier means of covariates with Abadie's
  (2003) kappa weights, from per site x (Z, D) cell sums, next to the mean in
  the whole site sample and the always- / never-taker means, for a profile
  table.
* :func:`complier_cells_from_arrays` - numpy aggregation of participant rows
  into those cell sums (tests, simulations).

All functions are vectorised over sites (and covariates) and need a binary
uptake ``D``.  Randomisation is within site with a fixed probability, so
``P(Z = 1 | X)`` in the kappa weights is the site's treated share.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from takeup.pipeline.stats.estimators.moments import SiteMoments
from takeup.pipeline.stats.estimators.wald import status_and_note
from takeup.pipeline.stats.readonly import readonly_array as _ro

__all__ = [
    "ComplierOutcomeMeans",
    "complier_outcome_means",
    "KappaComplierMeans",
    "kappa_complier_means",
    "complier_cells_from_arrays",
]

_EPS8 = 8 * np.finfo(float).eps


@dataclass(frozen=True)
class ComplierOutcomeMeans:
    """Per-site mean outcomes by compliance type (binary uptake).

    Attributes
    ----------
    complier_treated, complier_control : ndarray
        :math:`E[Y(1) | complier]` and :math:`E[Y(0) | complier]`.
    difference : ndarray
        Their difference, identical to the Wald estimate ITT / first stage.
    always_taker_treated : ndarray
        Mean outcome of takers in the control arm, :math:`E[Y(1) | always-taker]`.
    never_taker_control : ndarray
        Mean outcome of non-takers in the treatment arm,
        :math:`E[Y(0) | never-taker]`.
    status, note : ndarray of object
    """

    complier_treated: np.ndarray
    complier_control: np.ndarray
    difference: np.ndarray
    always_taker_treated: np.ndarray
    never_taker_control: np.ndarray
    status: np.ndarray
    note: np.ndarray


def _binary_uptake(arm) -> np.ndarray:
    """Necessary check of binary D from sums: sum(D^2) = sum(D), 0 <= sum(D) <= n."""
    tol = 1e-9 * np.maximum(1.0, np.abs(arm.sum_d))
    return (np.abs(arm.sum_dd - arm.sum_d) <= tol) & (arm.sum_d >= -tol) & (arm.sum_d <= arm.n + tol)


def complier_outcome_means(m: SiteMoments) -> ComplierOutcomeMeans:
    r"""Complier mean outcomes under treatment and under control, per site.

    Parameters
    ----------
    m : SiteMoments
        Arm moments; uptake must be binary.

    Returns
    -------
    ComplierOutcomeMeans

    Notes
    -----
    With :math:`\bar D_z` the uptake rate of arm :math:`z`, :math:`\hat\pi =
    \bar D_1 - \bar D_0` and :math:`\Sigma_z` sums over arm :math:`z` of size
    :math:`n_z` (Imbens & Rubin 1997, eq. 7, written with the arm sums):

    .. math::

       \bar Y_{c1} = \frac{\Sigma_1 DY / n_1 - \Sigma_0 DY / n_0}{\hat\pi},
       \qquad
       \bar Y_{c0} = \frac{\Sigma_0 (1-D)Y / n_0 - \Sigma_1 (1-D)Y / n_1}{\hat\pi},

    and :math:`\bar Y_{c1} - \bar Y_{c0} = (\bar Y_1 - \bar Y_0)/\hat\pi`, the
    Wald estimate.  Undefined (NaN) for an empty arm, a zero first stage or
    non-binary uptake (checked through :math:`\sum D^2 = \sum D`).  A negative
    first stage is computed but flagged: the formulas assume monotonicity.
    Always-taker / never-taker means are NaN when the control arm has no
    takers / the treatment arm has no non-takers.

    References
    ----------
    .. [1] Imbens, G. W. and Rubin, D. B. (1997). Estimating outcome
       distributions for compliers in instrumental variables models. Review
       of Economic Studies, 64(4), 555-574.
    """
    t, c = m.treated, m.control
    k = m.n_sites
    n1, n0 = t.n, c.n
    nan = np.nan
    with np.errstate(all="ignore"):
        finite = np.ones(k, dtype=bool)
        for arm in (t, c):
            for name in ("n", "sum_d", "sum_y", "sum_dd", "sum_dy"):
                finite &= np.isfinite(getattr(arm, name))
        no_t = finite & (n1 <= 0)
        no_c = finite & (n0 <= 0)
        both = finite & ~no_t & ~no_c
        binary = _binary_uptake(t) & _binary_uptake(c)
        nonbinary = both & ~binary
        d1 = t.sum_d / n1
        d0 = c.sum_d / n0
        pi = d1 - d0
        zero_fs = both & binary & (np.abs(pi) <= _EPS8 * np.maximum(np.abs(d1), np.abs(d0)))
        neg_fs = both & binary & ~zero_fs & (pi < 0)
        ok = both & binary & ~zero_fs
        safe_pi = np.where(ok, pi, 1.0)
        yc1 = (t.sum_dy / n1 - c.sum_dy / n0) / safe_pi
        yc0 = ((c.sum_y - c.sum_dy) / n0 - (t.sum_y - t.sum_dy) / n1) / safe_pi
        yc1 = np.where(ok, yc1, nan)
        yc0 = np.where(ok, yc0, nan)
        at_ok = finite & binary & (c.sum_d > 0)
        nt_ok = finite & binary & (n1 - t.sum_d > 0)
        y_at = np.where(at_ok, c.sum_dy / np.where(at_ok, c.sum_d, 1.0), nan)
        y_nt = np.where(nt_ok, (t.sum_y - t.sum_dy) / np.where(nt_ok, n1 - t.sum_d, 1.0), nan)
    flags = [
        (~finite, "invalid_moments", "moments are not finite: complier means undefined"),
        (no_t, "no_treated", "no participants in the treatment arm: complier means undefined"),
        (no_c, "no_controls", "no participants in the control arm: complier means undefined"),
        (nonbinary, "non_binary_uptake", "uptake is not binary: complier means undefined"),
        (zero_fs, "zero_first_stage", "first stage is zero: complier means undefined"),
        (neg_fs, "negative_first_stage", "negative first stage: complier means assume "
                                         "monotonicity and are suspect"),
    ]
    status, note = status_and_note(flags, k)
    return ComplierOutcomeMeans(
        complier_treated=_ro(yc1), complier_control=_ro(yc0), difference=_ro(yc1 - yc0),
        always_taker_treated=_ro(y_at), never_taker_control=_ro(y_nt),
        status=status, note=note,
    )


@dataclass(frozen=True)
class KappaComplierMeans:
    """Covariate means by compliance type, per site and covariate.

    Attributes
    ----------
    complier_mean : ndarray, shape (n_sites, n_covariates)
        Abadie kappa-weighted complier mean :math:`E[\\kappa X] / E[\\kappa]`.
    overall_mean : ndarray, shape (n_sites, n_covariates)
        Mean over all participants of the site.
    always_taker_mean, never_taker_mean : ndarray, shape (n_sites, n_covariates)
        Mean among control-arm takers and among treatment-arm non-takers.
    complier_share : ndarray, shape (n_sites,)
        :math:`E[\\kappa]`, equal to the first stage.
    status, note : ndarray of object, shape (n_sites,)

    With a 3-d ``sum_x_cells`` input (one covariate) the mean arrays have
    shape ``(n_sites,)``.
    """

    complier_mean: np.ndarray
    overall_mean: np.ndarray
    always_taker_mean: np.ndarray
    never_taker_mean: np.ndarray
    complier_share: np.ndarray
    status: np.ndarray
    note: np.ndarray


def kappa_complier_means(n_cells, sum_x_cells) -> KappaComplierMeans:
    r"""Abadie (2003) kappa-weighted complier covariate means from cell sums.

    Parameters
    ----------
    n_cells : array_like, shape (n_sites, 2, 2)
        Participant counts per site and cell ``[z, d]`` (``z``, ``d`` in {0, 1}).
    sum_x_cells : array_like, shape (n_sites, 2, 2, n_covariates) or (n_sites, 2, 2)
        Sums of each covariate per site and cell (complete cases).

    Returns
    -------
    KappaComplierMeans

    Notes
    -----
    :math:`\kappa = 1 - D(1-Z)/P(Z=0) - (1-D)Z/P(Z=1)`, with
    :math:`P(Z=1) = n_{1\cdot}/n` the site's treated share, is constant within
    a cell: 1 in cells (0, 0) and (1, 1), :math:`1 - n/n_{0\cdot}` in (0, 1)
    and :math:`1 - n/n_{1\cdot}` in (1, 0).  So
    :math:`E[\kappa X] = \sum_{zd}\kappa_{zd} S^x_{zd}/n` and
    :math:`E[\kappa] = \bar D_1 - \bar D_0`; the complier mean is their ratio
    (Theorem 3.1).  NaN (with a note) for an empty arm or a zero first
    stage; a negative first stage is computed but flagged.

    References
    ----------
    .. [1] Abadie, A. (2003). Semiparametric instrumental variable estimation
       of treatment response models. Journal of Econometrics, 113(2), 231-263.
    """
    nc = np.asarray(n_cells, dtype=float)
    sx = np.asarray(sum_x_cells, dtype=float)
    if nc.ndim != 3 or nc.shape[1:] != (2, 2):
        raise ValueError(f"n_cells must have shape (n_sites, 2, 2), got {nc.shape}")
    single = sx.ndim == 3
    if single:
        sx = sx[..., None]
    if sx.ndim != 4 or sx.shape[:3] != nc.shape:
        raise ValueError(f"sum_x_cells must have shape {nc.shape} + (n_covariates,), got {sx.shape}")
    k = nc.shape[0]
    nan = np.nan
    with np.errstate(all="ignore"):
        n_z = nc.sum(axis=2)                       # (k, 2): arm sizes [n0, n1]
        n = n_z.sum(axis=1)                         # (k,)
        finite = np.isfinite(nc).all(axis=(1, 2))
        no_c = finite & (n_z[:, 0] <= 0)
        no_t = finite & (n_z[:, 1] <= 0)
        both = finite & ~no_c & ~no_t
        safe_n0 = np.where(both, n_z[:, 0], 1.0)
        safe_n1 = np.where(both, n_z[:, 1], 1.0)
        kappa = np.ones((k, 2, 2))
        kappa[:, 0, 1] = 1.0 - n / safe_n0
        kappa[:, 1, 0] = 1.0 - n / safe_n1
        safe_n = np.where(n > 0, n, 1.0)
        share = (kappa * nc).sum(axis=(1, 2)) / safe_n
        d1 = nc[:, 1, 1] / safe_n1
        d0 = nc[:, 0, 1] / safe_n0
        zero_fs = both & (np.abs(share) <= _EPS8 * np.maximum(np.abs(d1), np.abs(d0)) * 4)
        neg_fs = both & ~zero_fs & (share < 0)
        ok = both & ~zero_fs
        e_kx = (kappa[..., None] * sx).sum(axis=(1, 2)) / safe_n[:, None]
        comp = np.where(ok[:, None], e_kx / np.where(ok, share, 1.0)[:, None], nan)
        share = np.where(both, share, nan)
        overall = np.where((n > 0)[:, None], sx.sum(axis=(1, 2)) / safe_n[:, None], nan)
        n01, n10 = nc[:, 0, 1], nc[:, 1, 0]
        at = np.where((n01 > 0)[:, None], sx[:, 0, 1, :] / np.where(n01 > 0, n01, 1.0)[:, None], nan)
        nt = np.where((n10 > 0)[:, None], sx[:, 1, 0, :] / np.where(n10 > 0, n10, 1.0)[:, None], nan)
    flags = [
        (~finite, "invalid_cells", "cell counts are not finite: complier means undefined"),
        (no_t, "no_treated", "no participants in the treatment arm: complier means undefined"),
        (no_c, "no_controls", "no participants in the control arm: complier means undefined"),
        (zero_fs, "zero_first_stage", "first stage is zero (kappa weights sum to zero): "
                                      "complier means undefined"),
        (neg_fs, "negative_first_stage", "negative first stage: kappa weights assume "
                                         "monotonicity; complier means suspect"),
    ]
    status, note = status_and_note(flags, k)
    if single:
        comp, overall, at, nt = comp[:, 0], overall[:, 0], at[:, 0], nt[:, 0]
    return KappaComplierMeans(
        complier_mean=_ro(comp), overall_mean=_ro(overall), always_taker_mean=_ro(at),
        never_taker_mean=_ro(nt), complier_share=_ro(share), status=status, note=note,
    )


def complier_cells_from_arrays(site_index, z, d, x, n_sites: int | None = None
                               ) -> tuple[np.ndarray, np.ndarray]:
    """Aggregate participant rows into the cell sums of :func:`kappa_complier_means`.

    Parameters
    ----------
    site_index : array_like of int
        Site position (0 .. n_sites - 1) of each participant.
    z, d : array_like of {0, 1}
        Assignment and (binary) uptake.
    x : array_like, shape (n,) or (n, n_covariates)
        Covariates (complete cases).
    n_sites : int, optional
        Number of sites (default ``max(site_index) + 1``).

    Returns
    -------
    n_cells : ndarray, shape (n_sites, 2, 2)
    sum_x_cells : ndarray, shape (n_sites, 2, 2, n_covariates) (or (n_sites, 2, 2)
        for 1-d ``x``)
    """
    s = np.asarray(site_index, dtype=np.int64)
    z = np.asarray(z)
    d = np.asarray(d)
    if not (np.isin(z, (0, 1)).all() and np.isin(d, (0, 1)).all()):
        raise ValueError("z and d must be 0 or 1")
    x = np.asarray(x, dtype=float)
    single = x.ndim == 1
    x2 = x[:, None] if single else x
    k = int(s.max()) + 1 if n_sites is None else int(n_sites)
    cell = s * 4 + z.astype(np.int64) * 2 + d.astype(np.int64)
    n_cells = np.bincount(cell, minlength=4 * k).reshape(k, 2, 2).astype(float)
    sums = np.stack([np.bincount(cell, weights=x2[:, j], minlength=4 * k)
                     for j in range(x2.shape[1])], axis=-1).reshape(k, 2, 2, x2.shape[1])
    if single:
        sums = sums[..., 0]
    return n_cells, sums
