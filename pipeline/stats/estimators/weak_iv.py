"""Weak-instrument-robust inference for the per-site CACE (one instrument).

Two tools, both vectorised over sites:

* the Anderson-Rubin confidence set, in closed form (Fieller's
  construction) from the ITT, the first stage and their joint
  (robust or cluster-robust) covariance;
* the tF procedure of Lee, McCrary, Moreira & Porter (2022): the usual
  t-ratio with a critical value that depends on the first-stage F.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
from scipy import stats

from takeup.pipeline.stats.estimators.wald import status_and_note
from takeup.pipeline.stats.readonly import readonly_array as _ro

__all__ = [
    "ARSet",
    "anderson_rubin_statistic",
    "anderson_rubin_set",
    "TFCriticalValue",
    "TFInterval",
    "tf_critical_value",
    "tf_interval",
    "TF_SQRT_F",
    "TF_CRITICAL",
    "TF_F_MIN",
    "TF_F_STANDARD",
]


def _broadcast_inputs(*xs):
    arrs = np.broadcast_arrays(*[np.atleast_1d(np.asarray(x, dtype=float)) for x in xs])
    return [np.array(a, dtype=float) for a in arrs]


# ---------------------------------------------------------------------------
# Anderson-Rubin
# ---------------------------------------------------------------------------

@dataclass(frozen=True)
class ARSet:
    """Anderson-Rubin confidence sets, one per site.

    Attributes
    ----------
    kind : ndarray of object
        ``"interval"`` ([low, high]), ``"two_rays"`` ((-inf, low] U [high, inf)),
        ``"real_line"`` (low, high NaN), ``"empty"`` (low, high NaN; impossible
        with a valid covariance in the just-identified case), or
        ``"undefined"`` (missing or invalid inputs; low, high NaN).
    low, high : ndarray
        Finite ends as described for ``kind``; ``low <= high``.
    level : float
    note : ndarray of object
        Explanation for unbounded, empty or undefined sets, else None.
    """

    kind: np.ndarray
    low: np.ndarray
    high: np.ndarray
    level: float
    note: np.ndarray


def anderson_rubin_statistic(beta0, itt, fs, var_itt, var_fs, cov) -> np.ndarray:
    r"""Anderson-Rubin statistic for :math:`H_0: \beta = \beta_0`.

    .. math:: AR(\beta_0) = \frac{(\hat\gamma - \beta_0\hat\pi)^2}
              {V_\gamma - 2\beta_0 C + \beta_0^2 V_\pi}

    i.e. the squared t-ratio of ``Z`` in the regression of
    ``Y - beta0 * D`` on ``(1, Z)`` (same covariance estimator); compare with
    the chi-square(1) quantile.  NaN where the denominator is not positive.

    References
    ----------
    .. [1] Anderson, T. W. and Rubin, H. (1949). Estimation of the parameters
       of a single equation in a complete system of stochastic equations.
       Annals of Mathematical Statistics, 20(1), 46-63.
    """
    b, g, p, vg, vp, c = _broadcast_inputs(beta0, itt, fs, var_itt, var_fs, cov)
    with np.errstate(all="ignore"):
        den = vg - 2 * b * c + b**2 * vp
        out = np.where(den > 0, (g - b * p) ** 2 / np.where(den > 0, den, 1.0), np.nan)
    return _ro(out)


def anderson_rubin_set(itt, fs, var_itt, var_fs, cov, level: float = 0.95, critical=None, df=None) -> ARSet:
    r"""Closed-form Anderson-Rubin confidence set for the CACE, per site.

    Parameters
    ----------
    itt, fs : array_like
        ITT :math:`\hat\gamma` and first stage :math:`\hat\pi`, one per site.
    var_itt, var_fs, cov : array_like
        :math:`V_\gamma`, :math:`V_\pi` and :math:`C = \mathrm{Cov}(\hat\gamma,
        \hat\pi)` from one joint (robust or cluster-robust) estimator, e.g.
        ``itt_se**2``, ``complier_share_se**2`` and ``cov_itt_fs`` of
        :class:`~takeup.pipeline.stats.estimators.wald.WaldEstimates`.
    level : float
        Confidence level; the critical value is the chi-square(1) quantile
        :math:`q`.
    critical : array_like, optional
        Critical value(s) :math:`q` to use instead, one per site or one for all
        (for example the squared multiplier of an anytime-valid confidence
        sequence, :mod:`takeup.pipeline.stats.sequential`); ``level`` is then
        only recorded.
    df : array_like, optional
        Degrees of freedom of a t reference, one per site (NaN: none).  Where
        given, :math:`q` is the ``level`` quantile of :math:`F(1, df)` (the
        square of the t(df) critical value) instead of chi-square(1): with
        cluster-robust variances and few clusters, the reference that matches
        the t(G - 1) Wald intervals (Cameron & Miller 2015, section VI).
        Ignored when ``critical`` is given.

    Returns
    -------
    ARSet

    Notes
    -----
    The set :math:`\{\beta_0 : AR(\beta_0) \le q\}` is where
    :math:`a\beta_0^2 + b\beta_0 + c \le 0` with :math:`a = \hat\pi^2 - qV_\pi`,
    :math:`b = -2(\hat\gamma\hat\pi - qC)`, :math:`c = \hat\gamma^2 - qV_\gamma`
    and :math:`\Delta = b^2 - 4ac`:

    * :math:`a > 0` (first-stage :math:`t^2 > q`): the bounded interval between
      the roots (an empty set if :math:`\Delta < 0`, which needs a covariance
      that is not positive semi-definite; a tiny negative :math:`\Delta` from
      rounding is treated as 0);
    * :math:`a < 0`, :math:`\Delta > 0`: two rays outside the roots;
    * :math:`a < 0`, :math:`\Delta \le 0`: the whole real line;
    * :math:`a = 0` (up to rounding, :math:`|a| \le 8\epsilon(\hat\pi^2 +
      qV_\pi)`, where the sign of :math:`a` cannot be resolved): the exact
      set is the half-line :math:`\{b\beta_0 + c \le 0\}` (or the line or
      empty if :math:`b = 0`), the common limit of the interval and the
      two-ray cases.  It cannot be written with finite ends in the kinds
      above, so the conservative superset ``"real_line"`` is returned, with a
      note giving the half-line.

    In the just-identified case the set always contains the Wald estimate
    :math:`\hat\gamma/\hat\pi` (where :math:`AR = 0`) and is never empty.
    Roots use the cancellation-free form :math:`r = c / Q, Q / a` with
    :math:`Q = -(b + \mathrm{sign}(b)\sqrt\Delta)/2`.
    Missing (NaN) or invalid (negative variance) inputs give
    ``"undefined"``.

    References
    ----------
    .. [1] Anderson, T. W. and Rubin, H. (1949). Estimation of the parameters
       of a single equation in a complete system of stochastic equations.
       Annals of Mathematical Statistics, 20(1), 46-63.
    .. [2] Fieller, E. C. (1954). Some problems in interval estimation. Journal
       of the Royal Statistical Society, Series B, 16(2), 175-185.
    .. [3] Andrews, I., Stock, J. H. and Sun, L. (2019). Weak instruments in
       instrumental variables regression: theory and practice. Annual Review
       of Economics, 11, 727-753.
    .. [4] Cameron, A. C. and Miller, D. L. (2015). A practitioner's guide to
       cluster-robust inference. Journal of Human Resources, 50(2), 317-372.
    """
    if not (0.0 < level < 1.0):
        raise ValueError(f"level must be strictly between 0 and 1, got {level!r}")
    if critical is None:
        g, p, vg, vp, cv = _broadcast_inputs(itt, fs, var_itt, var_fs, cov)
        q = stats.chi2.ppf(level, 1)
    else:
        g, p, vg, vp, cv, q = _broadcast_inputs(itt, fs, var_itt, var_fs, cov, critical)
    n = g.shape[0]
    if critical is None and df is not None:
        q = np.full(n, stats.chi2.ppf(level, 1))
        dfa = np.broadcast_to(np.asarray(df, dtype=float), (n,))
        has_df = np.isfinite(dfa) & (dfa > 0)
        q = np.where(has_df, stats.f.ppf(level, 1, np.where(has_df, dfa, 1.0)), q)
    nan = np.nan
    eps = np.finfo(float).eps
    with np.errstate(all="ignore"):
        bad = ~(np.isfinite(g) & np.isfinite(p) & np.isfinite(vg) & np.isfinite(vp)
                & np.isfinite(cv) & np.isfinite(q) & (q > 0)) | (vg < 0) | (vp < 0)
        a = p**2 - q * vp
        b = -2.0 * (g * p - q * cv)
        c = g**2 - q * vg
        disc = b**2 - 4 * a * c
        disc_tol = 8 * eps * (b**2 + 4 * np.abs(a * c))
        disc = np.where(np.abs(disc) <= disc_tol, 0.0, disc)
        a_zero = ~bad & (np.abs(a) <= 8 * eps * (p**2 + q * vp))
        pos = ~bad & ~a_zero & (a > 0)
        negative = ~bad & ~a_zero & (a < 0)

        sq = np.sqrt(np.maximum(disc, 0.0))
        sgn = np.where(b >= 0, 1.0, -1.0)
        big_q = -0.5 * (b + sgn * sq)
        safe_a = np.where(a == 0, 1.0, a)
        safe_q = np.where(big_q == 0, 1.0, big_q)
        r_a = big_q / safe_a
        # If Q = 0 then b = 0 and disc = 0, so both roots are 0 (c = 0).
        r_b = np.where(big_q == 0, 0.0, c / safe_q)
        r_lo = np.minimum(r_a, r_b)
        r_hi = np.maximum(r_a, r_b)

        interval = pos & (disc >= 0)
        empty = pos & (disc < 0)
        rays = negative & (disc > 0)
        line = (negative & (disc <= 0)) | a_zero

        low = np.where(interval | rays, r_lo, nan)
        high = np.where(interval | rays, r_hi, nan)
        # Half-line end for the a = 0 note.
        half_end = np.where(b != 0, -c / np.where(b == 0, 1.0, b), nan)

    kind = np.full(n, "undefined", dtype=object)
    kind[interval] = "interval"
    kind[rays] = "two_rays"
    kind[line] = "real_line"
    kind[empty] = "empty"

    flags = [
        (bad, "undefined", "ITT, first stage or their variances missing or invalid: "
                           "Anderson-Rubin set undefined"),
        (empty, "empty", "Anderson-Rubin set is empty: the covariance of ITT and first "
                         "stage is not positive semi-definite"),
        (rays, "two_rays", "first stage too weak (t^2 <= chi-square quantile): the "
                           "Anderson-Rubin set is unbounded (two rays)"),
        (negative & (disc <= 0), "real_line",
         "first stage too weak: the Anderson-Rubin set is the whole real line, the "
         "data are uninformative about the CACE"),
    ]
    _, note = status_and_note(flags, n)
    note = np.array(note, dtype=object)
    for i in np.flatnonzero(a_zero):  # measure-zero boundary case, message only
        end = half_end[i]
        if np.isnan(end):
            msg = ("first-stage t^2 equals the chi-square quantile and b = 0: "
                   "Anderson-Rubin set reported as the whole real line")
        else:
            side = f"(-inf, {end:.6g}]" if b[i] > 0 else f"[{end:.6g}, inf)"
            msg = ("first-stage t^2 equals the chi-square quantile: the exact "
                   f"Anderson-Rubin set is the half-line {side}; reported as the whole "
                   "real line (conservative)")
        note[i] = msg
    note.setflags(write=False)
    kind.setflags(write=False)
    return ARSet(kind=kind, low=_ro(low), high=_ro(high), level=float(level), note=note)


# ---------------------------------------------------------------------------
# tF (Lee, McCrary, Moreira & Porter 2022)
# ---------------------------------------------------------------------------

#: sqrt(F) grid of Table 3 of Lee, McCrary, Moreira & Porter (2022),
#: "Valid t-ratio Inference for IV", American Economic Review 112(10),
#: 3260-3290 (working paper arXiv:2010.05058): 2.0, 2.1, ..., 9.9.
TF_SQRT_F = np.round(np.arange(20, 100) / 10.0, 1)
TF_SQRT_F.setflags(write=False)

#: 5% critical values c(F) of the same Table 3 (rounded up to 2 decimals by
#: the authors), one per entry of ``TF_SQRT_F``.
TF_CRITICAL = np.array([
    18.66, 9.74, 7.37, 6.18, 5.43, 4.92, 4.54, 4.25, 4.01, 3.82,   # 2.0-2.9
    3.65, 3.51, 3.39, 3.29, 3.19, 3.11, 3.03, 2.97, 2.91, 2.85,    # 3.0-3.9
    2.80, 2.75, 2.71, 2.67, 2.63, 2.60, 2.57, 2.54, 2.51, 2.48,    # 4.0-4.9
    2.46, 2.43, 2.41, 2.39, 2.37, 2.35, 2.33, 2.32, 2.30, 2.29,    # 5.0-5.9
    2.27, 2.26, 2.24, 2.23, 2.22, 2.21, 2.20, 2.19, 2.17, 2.16,    # 6.0-6.9
    2.16, 2.15, 2.14, 2.13, 2.12, 2.11, 2.10, 2.10, 2.09, 2.08,    # 7.0-7.9
    2.08, 2.07, 2.06, 2.06, 2.05, 2.04, 2.04, 2.03, 2.03, 2.02,    # 8.0-8.9
    2.02, 2.01, 2.01, 2.00, 2.00, 1.99, 1.99, 1.99, 1.98, 1.98,    # 9.0-9.9
])
TF_CRITICAL.setflags(write=False)

#: Below this F (= 1.96**2) the tF critical value is infinite.
TF_F_MIN = 1.96**2
#: From this F on the tF critical value is the usual 1.96.
TF_F_STANDARD = 104.7
# Beyond sqrt(F) = 9.9 the paper gives 1.97 up to sqrt(F) of about 10.2 and
# 1.96 from F = 104.7; we reach 1.97 at sqrt(F) = 10.0 by linear
# interpolation from the last table entry and hold it until F = 104.7.
_TF_BEYOND_SQRT_F = 10.0
_TF_BEYOND_C = 1.97
_Z975 = 1.96


@dataclass(frozen=True)
class TFCriticalValue:
    """tF critical values (NaN where unbounded) with explanations."""

    value: np.ndarray
    note: np.ndarray


@dataclass(frozen=True)
class TFInterval:
    """tF 95% intervals: ``beta -/+ c(F) * se``; NaN ends when unbounded.

    Attributes
    ----------
    critical_value, low, high : ndarray
    se : ndarray
        The "tF standard error" ``se * c(F) / 1.96``, whose normal 95%
        interval is the tF interval.
    note : ndarray of object
    """

    critical_value: np.ndarray
    low: np.ndarray
    high: np.ndarray
    se: np.ndarray
    note: np.ndarray


def tf_critical_value(f) -> TFCriticalValue:
    r"""5% tF critical value :math:`c(F)` for the t-ratio, per site.

    Parameters
    ----------
    f : array_like
        First-stage F (with one instrument, the squared first-stage t-ratio
        under the same covariance estimator as the second stage).

    Returns
    -------
    TFCriticalValue
        ``value`` and ``note`` arrays.

    Notes
    -----
    * :math:`F < 1.96^2 = 3.8416`: :math:`c = \infty`, the tF interval is
      unbounded; NaN with note "unbounded".
    * :math:`3.8416 \le F < 4` (:math:`1.96 \le \sqrt F < 2.0`): not tabulated
      (the table starts at :math:`c(4) = 18.66` and :math:`c \to \infty` as
      :math:`F \downarrow 3.8416`); treated conservatively as unbounded (NaN).
    * :math:`2.0 \le \sqrt F \le 9.9`: linear interpolation in :math:`\sqrt F`
      in Table 3, which the authors endorse (slightly conservative).
    * :math:`9.9 < \sqrt F < \sqrt{104.7}`: the paper gives 1.97 up to
      :math:`\sqrt F \approx 10.2`; we interpolate linearly from 1.98 at 9.9 to
      1.97 at 10.0 and hold 1.97 until F = 104.7 (never below the published
      1.97).
    * :math:`F \ge 104.7`: 1.96.

    Only the 5% level is tabulated, so there is no ``level`` argument.
    NaN or negative F gives NaN with a note.

    References
    ----------
    .. [1] Lee, D. S., McCrary, J., Moreira, M. J. and Porter, J. (2022).
       Valid t-ratio inference for IV. American Economic Review, 112(10),
       3260-3290.
    """
    f = np.atleast_1d(np.asarray(f, dtype=float)).copy()
    with np.errstate(all="ignore"):
        bad = ~np.isfinite(f) | (f < 0)
        root = np.sqrt(np.where(bad, 0.0, f))
        unbounded = ~bad & (f < 4.0)  # includes the untabulated 3.8416 <= F < 4
        grid_x = np.append(TF_SQRT_F, _TF_BEYOND_SQRT_F)
        grid_c = np.append(TF_CRITICAL, _TF_BEYOND_C)
        c = np.interp(root, grid_x, grid_c)  # holds 1.97 beyond sqrt(F) = 10
        c = np.where(f >= TF_F_STANDARD, _Z975, c)
        c = np.where(bad | unbounded, np.nan, c)
    n = f.shape[0]
    flags = [
        (bad, "invalid", "first-stage F missing or invalid: tF critical value undefined"),
        (~bad & (f < TF_F_MIN), "unbounded", "unbounded: first-stage F below 3.8416, the tF "
                                             "critical value is infinite"),
        (~bad & (f >= TF_F_MIN) & (f < 4.0), "unbounded",
         "unbounded: first-stage F between 3.8416 and 4 is not tabulated; treated "
         "conservatively as an infinite tF critical value"),
    ]
    _, note = status_and_note(flags, n)
    return TFCriticalValue(value=_ro(c), note=note)


def tf_interval(beta, se, f) -> TFInterval:
    r"""tF 95% interval and tF standard error, per site.

    Parameters
    ----------
    beta, se : array_like
        2SLS (Wald) estimate and its standard error.
    f : array_like
        First-stage F under the same covariance estimator.

    Returns
    -------
    TFInterval
        ``low, high = beta -/+ c(F) * se`` and ``se * c(F) / 1.96``; NaN when
        the critical value is unbounded or an input is missing.

    References
    ----------
    .. [1] Lee, D. S., McCrary, J., Moreira, M. J. and Porter, J. (2022).
       Valid t-ratio inference for IV. American Economic Review, 112(10),
       3260-3290.
    """
    b, s, fv = _broadcast_inputs(beta, se, f)
    crit = tf_critical_value(fv)
    c = crit.value
    with np.errstate(all="ignore"):
        missing = ~np.isfinite(b) | ~np.isfinite(s) | (s < 0)
        low = np.where(missing, np.nan, b - c * s)
        high = np.where(missing, np.nan, b + c * s)
        se_tf = np.where(missing, np.nan, s * c / _Z975)
    note = np.array(crit.note, dtype=object)
    for i in np.flatnonzero(missing & ~np.isnan(c)):
        note[i] = "estimate or standard error missing: tF interval undefined"
    note.setflags(write=False)
    return TFInterval(critical_value=c, low=_ro(low), high=_ro(high), se=_ro(se_tf), note=note)
