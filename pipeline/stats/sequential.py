r"""Anytime-valid inference for estimates that are recomputed at every weekly look.

A conventional 95 % interval recomputed at each look does not keep its 95 %:
over many looks the chance that it misses the truth at least once grows
without bound (Armitage, McPherson & Rowe 1969).  A *confidence sequence*
:math:`(C_t)` covers the truth at every look at once,
:math:`P(\forall t: \theta \in C_t) \ge 1 - \alpha`.

The asymptotic confidence sequence of Waudby-Smith et al. (2024) for an
asymptotically linear estimate :math:`\hat\theta_t` with influence variance
:math:`\hat\sigma_t^2` after :math:`t` observations, with the Robbins
normal-mixture boundary, is

.. math::

    \hat\theta_t \pm \sqrt{\frac{2(t\hat\sigma_t^2\rho^2 + 1)}{t^2\rho^2}
    \log\frac{\sqrt{t\hat\sigma_t^2\rho^2 + 1}}{\alpha}} .

It is the two-sided normal-mixture boundary of Howard et al. (2021; the
mixture martingale :math:`\int e^{\lambda S_t - \lambda^2 V_t/2}\,dN(0,\rho^2)`
and Ville's inequality) applied to the sum of the influence terms.  Written
with the estimate's standard error :math:`SE_t = \hat\sigma_t/\sqrt t`, and the
mixture scaled to the standardised terms (so that the sequence does not depend
on the outcome's units), the half-width is :math:`m_t \cdot SE_t` with the
multiplier

.. math::

    m_t = \sqrt{\frac{t\rho^2 + 1}{t\rho^2}\,\log\frac{t\rho^2 + 1}{\alpha^2}} ,

a function of the *intrinsic time* :math:`t` (participants, or clusters under
cluster randomisation) alone.  The tuning :math:`\rho` makes the sequence
tightest at a planned horizon :math:`t^\star`.  Setting the derivative of
:math:`m_t^2` in :math:`v = t^\star\rho^2` to zero gives
:math:`v = \log(v + 1) - 2\log\alpha`, solved by the lower branch of the
Lambert W function:

.. math:: \rho^2 = \frac{-W_{-1}(-\alpha^2/e) - 1}{t^\star}

(:math:`\approx (-2\log\alpha + \log(1 - 2\log\alpha))/t^\star`, the
approximation Waudby-Smith et al. give; the tests check the exact root
against a numerical minimisation).

The sequence is valid at every :math:`t`, not only near :math:`t^\star`;
the horizon only decides where it is narrowest.

The same mixture martingale, evaluated at a null value, is an e-process; its
reciprocal is an anytime-valid p-value (Howard et al. 2021, Section 6; Ville's
inequality): with :math:`z_t = \hat\theta_t / SE_t`,

.. math:: p_t = \min\Bigl(1, \sqrt{t\rho^2 + 1}\,
          \exp\Bigl(-\frac{z_t^2\, t\rho^2}{2(t\rho^2 + 1)}\Bigr)\Bigr),

and :math:`P(\exists t: p_t \le \alpha) \le \alpha` under the null.  The
running minimum over looks keeps that guarantee.

For the CACE an Anderson-Rubin-type set is built from the sequence for the
contrast :math:`ITT - \beta\pi`: the :math:`\beta` with
:math:`(ITT - \beta\pi)^2 \le m_t^2\, \mathrm{Var}(ITT - \beta\pi)` — the
closed-form Fieller quadratic of
:func:`~takeup.pipeline.stats.estimators.weak_iv.anderson_rubin_set` with the
critical value :math:`m_t^2` in place of the chi-square quantile.

Intersecting each look's set with the previous look's (the *running
intersection*) is still a confidence sequence and never widens.

References
----------
.. [1] Waudby-Smith, I., Arbour, D., Sinha, R., Kennedy, E. H. and Ramdas, A.
   (2024). Time-uniform central limit theory and asymptotic confidence
   sequences. *Annals of Statistics* 52(6), 2613-2640.
.. [2] Howard, S. R., Ramdas, A., McAuliffe, J. and Sekhon, J. (2021).
   Time-uniform, nonparametric, nonasymptotic confidence sequences.
   *Annals of Statistics* 49(2), 1055-1080.
.. [3] Armitage, P., McPherson, C. K. and Rowe, B. C. (1969). Repeated
   significance tests on accumulating data. *Journal of the Royal Statistical
   Society, Series A* 132(2), 235-244.
.. [4] Ville, J. (1939). *Etude critique de la notion de collectif*.
   Gauthier-Villars, Paris.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
from scipy.special import lambertw

from takeup.pipeline.stats.estimators.weak_iv import ARSet, anderson_rubin_set
from takeup.pipeline.stats.readonly import readonly_array as _ro

__all__ = ["mixture_rho2", "mixture_multiplier", "mixture_p_value", "ConfidenceSequence", "confidence_sequence",
           "running_intersection", "anytime_ar_set", "intersect_sets"]


def _check_alpha(alpha: float) -> None:
    if not (0.0 < alpha < 1.0):
        raise ValueError(f"alpha must be strictly between 0 and 1, got {alpha!r}")


def mixture_rho2(horizon: float, alpha: float) -> float:
    r"""Mixture tuning :math:`\rho^2` that makes the sequence tightest at ``horizon``.

    Parameters
    ----------
    horizon : float
        Planned intrinsic time :math:`t^\star` (participants, or clusters), > 0.
    alpha : float
        Level of the sequence.

    Returns
    -------
    float
        :math:`(-W_{-1}(-\alpha^2/e) - 1) / t^\star`, the minimiser of the
        sequence's width at :math:`t^\star` (see the module notes).

    References
    ----------
    .. [1] Waudby-Smith et al. (2024), see the module references.
    """
    _check_alpha(alpha)
    if not (np.isfinite(horizon) and horizon > 0):
        raise ValueError(f"horizon must be a positive number, got {horizon!r}")
    v = -lambertw(-alpha**2 / np.e, k=-1).real - 1.0
    return float(v / horizon)


def mixture_multiplier(t, alpha: float, rho2: float) -> np.ndarray:
    r"""Half-width of the normal-mixture sequence in standard errors, :math:`m_t`.

    ``NaN`` where ``t`` is not a positive number.

    References
    ----------
    .. [1] Howard et al. (2021) and Waudby-Smith et al. (2024), see the module references.
    """
    _check_alpha(alpha)
    t = np.asarray(t, dtype=float)
    with np.errstate(all="ignore"):
        v = t * rho2
        m = np.sqrt((v + 1.0) / v * np.log((v + 1.0) / alpha**2))
    return _ro(np.where(np.isfinite(t) & (t > 0), m, np.nan))


def mixture_p_value(z, t, rho2: float) -> np.ndarray:
    r"""Anytime-valid two-sided p-value of :math:`H_0: \theta = 0` from ``z = estimate / SE``.

    The reciprocal of the normal-mixture martingale at the null, capped at 1.
    ``NaN`` where ``z`` or ``t`` is missing.

    References
    ----------
    .. [1] Howard et al. (2021), Section 6; Ville (1939).
    """
    z = np.asarray(z, dtype=float)
    t = np.asarray(t, dtype=float)
    with np.errstate(all="ignore"):
        v = t * rho2
        log_p = 0.5 * np.log1p(v) - z**2 * v / (2.0 * (v + 1.0))
        p = np.minimum(1.0, np.exp(log_p))
    return _ro(np.where(np.isfinite(z) & np.isfinite(t) & (t > 0), p, np.nan))


@dataclass(frozen=True)
class ConfidenceSequence:
    """One look of a confidence sequence per row.

    Attributes
    ----------
    estimate, se, information : ndarray
        The estimate, its standard error and the intrinsic time it rests on.
    multiplier : ndarray
        :math:`m_t`; the half-width is ``multiplier * se``.
    low, high : ndarray
        The sequence at this look (``NaN`` where the estimate or its SE is missing).
    alpha, rho2 : float
    """

    estimate: np.ndarray
    se: np.ndarray
    information: np.ndarray
    multiplier: np.ndarray
    low: np.ndarray
    high: np.ndarray
    alpha: float
    rho2: float


def confidence_sequence(estimate, se, information, alpha: float, horizon: float) -> ConfidenceSequence:
    """Asymptotic normal-mixture confidence sequence ``estimate ± m_t * se`` (see the module notes)."""
    rho2 = mixture_rho2(horizon, alpha)
    est = np.asarray(estimate, dtype=float)
    s = np.asarray(se, dtype=float)
    t = np.asarray(information, dtype=float)
    m = mixture_multiplier(t, alpha, rho2)
    ok = np.isfinite(est) & np.isfinite(s) & (s >= 0) & np.isfinite(m)
    with np.errstate(all="ignore"):
        low = np.where(ok, est - m * s, np.nan)
        high = np.where(ok, est + m * s, np.nan)
    return ConfidenceSequence(_ro(est), _ro(s), _ro(t), m, _ro(low), _ro(high), float(alpha), rho2)


def running_intersection(low, high, prev_low, prev_high) -> tuple[np.ndarray, np.ndarray]:
    """Intersect this look's intervals with the previous look's (missing previous ends are ignored).

    A missing current end keeps the previous one: an undefined look does not
    widen the sequence.  An empty intersection comes back with ``low > high``;
    callers report it (it happens with probability at most alpha under the model).
    """
    lo, hi = np.asarray(low, dtype=float), np.asarray(high, dtype=float)
    plo, phi = np.asarray(prev_low, dtype=float), np.asarray(prev_high, dtype=float)
    new_lo = np.where(np.isnan(plo), lo, np.where(np.isnan(lo), plo, np.maximum(lo, plo)))
    new_hi = np.where(np.isnan(phi), hi, np.where(np.isnan(hi), phi, np.minimum(hi, phi)))
    return _ro(new_lo), _ro(new_hi)


def anytime_ar_set(itt, fs, var_itt, var_fs, cov, information, alpha: float, horizon: float) -> ARSet:
    """Anytime-valid Anderson-Rubin-type set for the CACE (critical value ``m_t**2``)."""
    rho2 = mixture_rho2(horizon, alpha)
    m = mixture_multiplier(information, alpha, rho2)
    return anderson_rubin_set(itt, fs, var_itt, var_fs, cov, critical=np.asarray(m) ** 2)


_INF = np.inf


def _pieces(kind: str, low: float, high: float) -> list[tuple[float, float]] | None:
    """A set as closed intervals (None = unknown, i.e. no information)."""
    if kind == "interval":
        return [(low, high)]
    if kind == "two_rays":
        return [(-_INF, low), (high, _INF)]
    if kind == "real_line":
        return [(-_INF, _INF)]
    if kind == "empty":
        return []
    return None


def _as_kind(pieces: list[tuple[float, float]]) -> tuple[str, float, float, str | None]:
    if not pieces:
        return "empty", np.nan, np.nan, None
    if len(pieces) == 1:
        lo, hi = pieces[0]
        if lo == -_INF and hi == _INF:
            return "real_line", np.nan, np.nan, None
        if lo == -_INF or hi == _INF:   # a half-line: not one of the set kinds; keep the conservative line
            return "real_line", np.nan, np.nan, f"intersection is the half-line [{lo:.6g}, {hi:.6g}]"
        return "interval", lo, hi, None
    if len(pieces) == 2 and pieces[0][0] == -_INF and pieces[1][1] == _INF:
        return "two_rays", pieces[0][1], pieces[1][0], None
    lo, hi = pieces[0][0], pieces[-1][1]          # several bounded pieces: keep their hull (a superset)
    note = "intersection has several pieces; their hull is kept"
    if lo == -_INF and hi == _INF:
        return "real_line", np.nan, np.nan, note
    if lo == -_INF or hi == _INF:
        return "real_line", np.nan, np.nan, note
    return "interval", lo, hi, note


def intersect_sets(kind, low, high, prev_kind, prev_low, prev_high
                   ) -> tuple[np.ndarray, np.ndarray, np.ndarray, np.ndarray]:
    """Running intersection of Anderson-Rubin-type sets of the four shapes, row by row.

    Returns ``(kind, low, high, note)``.  Where the exact intersection is not one
    of the shapes (a half-line, or two bounded pieces) the smallest shape that
    contains it is returned with a note, so the result stays a valid
    confidence sequence and never widens.  A previous or current set that is
    ``undefined`` (or missing) is ignored.
    """
    kind = np.asarray(kind, dtype=object)
    n = kind.shape[0]
    out_k = np.empty(n, dtype=object)
    out_lo = np.full(n, np.nan)
    out_hi = np.full(n, np.nan)
    out_note = np.full(n, None, dtype=object)
    for i in range(n):   # one row per site: a handful of intervals, not participant data
        cur = _pieces(kind[i], float(low[i]), float(high[i]))
        prev = _pieces(prev_kind[i], float(prev_low[i]), float(prev_high[i])) if prev_kind[i] else None
        if prev is None:
            out_k[i], out_lo[i], out_hi[i] = kind[i], low[i], high[i]
            continue
        if cur is None:
            cur = [(-_INF, _INF)]
        pieces = []
        for a_lo, a_hi in cur:
            for b_lo, b_hi in prev:
                lo, hi = max(a_lo, b_lo), min(a_hi, b_hi)
                if lo <= hi:
                    pieces.append((lo, hi))
        pieces.sort()
        out_k[i], out_lo[i], out_hi[i], out_note[i] = _as_kind(pieces)
    return out_k, _ro(out_lo), _ro(out_hi), out_note
