r"""Anytime-valid p-values for the alert tests that run at every weekly look.

An alert test recomputed every week on accumulating data is a repeated
significance test: with fixed-sample p-values a clean site crosses the level at
*some* look far more often than the level says (Armitage, McPherson & Rowe
1969).  The p-values here are *anytime-valid*: under the null,
:math:`P(\exists\, t: p_t \le a) \le a` for every :math:`a`, over all looks at
once, so a rule that alerts when :math:`p_t \le a` raises a false alert on a
clean site at most with probability :math:`a` over any number of runs.  Each is
the reciprocal of a nonnegative (super)martingale under the null with initial
value 1, and Ville's inequality gives the guarantee.

Three constructions, chosen by the kind of statistic:

* **Cumulative z statistics** (a difference of shares or a complier share
  estimated from everyone so far): the normal-mixture martingale of Howard et
  al. (2021) in the asymptotic form of Waudby-Smith et al. (2024), as in
  :mod:`takeup.pipeline.stats.sequential`.  Two-sided: mixing distribution
  :math:`N(0, \rho^2)` (:func:`~takeup.pipeline.stats.sequential.mixture_p_value`).
  One-sided (:func:`one_sided_mixture_p_value`): the half-normal mixture over
  :math:`\lambda \ge 0`, which integrates in closed form to

  .. math:: M_t = \frac{2}{\sqrt{1 + v}}\,
            \exp\Bigl(\frac{z_t^2 v}{2(1 + v)}\Bigr)\,
            \Phi\Bigl(z_t \sqrt{\tfrac{v}{1 + v}}\Bigr),
            \qquad v = t\rho^2,

  for the alternative "larger" (use :math:`-z_t` for "smaller"): the one-sided
  normal mixture of Howard et al. (2021) (derived here by completing the square;
  the tests check it against numerical integration).  :math:`t` is the intrinsic time (participants, or
  clusters under cluster randomisation) and :math:`\rho^2` the tuning of
  :func:`~takeup.pipeline.stats.sequential.mixture_rho2`.

* **Arm counts** (sample-ratio mismatch): the Bayes factor of a
  beta-binomial mixture against the designed share :math:`\pi_0`,

  .. math:: BF_n = \frac{B(a + n_T,\, b + n_C) / B(a, b)}{\pi_0^{n_T} (1 - \pi_0)^{n_C}},
            \qquad a = c\,\pi_0,\; b = c\,(1 - \pi_0),

  the two-arm case of the Dirichlet-multinomial sequential test of Lindon &
  Malek (2022) (a mixture likelihood ratio, Robbins 1970).  It is a
  martingale under the design whatever the stopping rule, and exact for small
  counts (no normal approximation).  The concentration :math:`c` matches the
  normal mixture's tuning: :math:`c = 1/\rho^2` (prior standard deviation of
  the share about :math:`\rho\sqrt{\pi_0(1 - \pi_0)}`).

* **Moving-window statistics** (the first stage of the latest cohorts against
  earlier ones): the window moves, so successive statistics are not a
  cumulative sum and no martingale is at hand.  Such tests spend the level over
  looks instead (a union bound, valid under any dependence between looks: the
  error-spending idea of Jennison & Turnbull 2000, chapter 7 (chapter from
  memory), with Bonferroni's inequality in place of the joint normal law):
  look :math:`k` of a site is tested at level :math:`a\,\gamma_k` with

  .. math:: \gamma_k = \frac{1}{2H}\ (k \le H), \qquad
            \gamma_k = \frac{H}{2k(k + 1)}\ (k > H),

  flat over the planned :math:`H` looks (a year of weekly runs by default) and
  decreasing after them, so :math:`\sum_k \gamma_k \le 1` over unboundedly many
  looks.  :func:`spent_p_value` returns :math:`\min(1, p_k / \gamma_k)`.

Benjamini-Hochberg across sites is applied to these p-values unchanged: an
adjusted p-value is never below the raw one, so each site's chance of ever
raising a rule stays at most the rule's level.

References
----------
.. [1] Howard, S. R., Ramdas, A., McAuliffe, J. and Sekhon, J. (2021).
   Time-uniform, nonparametric, nonasymptotic confidence sequences.
   *Annals of Statistics* 49(2), 1055-1080.
.. [2] Waudby-Smith, I., Arbour, D., Sinha, R., Kennedy, E. H. and Ramdas, A.
   (2024). Time-uniform central limit theory and asymptotic confidence
   sequences. *Annals of Statistics* 52(6), 2613-2640.
.. [3] Lindon, M. and Malek, A. (2022). Anytime-valid inference for
   multinomial count data. *Advances in Neural Information Processing
   Systems* 35.
.. [4] Robbins, H. (1970). Statistical methods related to the law of the
   iterated logarithm. *Annals of Mathematical Statistics* 41(5), 1397-1409.
.. [5] Ville, J. (1939). *Etude critique de la notion de collectif*.
   Gauthier-Villars, Paris.
.. [6] Jennison, C. and Turnbull, B. W. (2000). *Group Sequential Methods with
   Applications to Clinical Trials*. Chapman & Hall/CRC.
.. [7] Armitage, P., McPherson, C. K. and Rowe, B. C. (1969). Repeated
   significance tests on accumulating data. *Journal of the Royal Statistical
   Society, Series A* 132(2), 235-244.
"""

from __future__ import annotations

import numpy as np
from scipy import special

from takeup.pipeline.stats.sequential import mixture_p_value, mixture_rho2
from takeup.pipeline.stats.readonly import readonly_array as _ro

__all__ = ["one_sided_mixture_p_value", "two_sided_mixture_p_value", "z_from_p_value", "ratio_mixture_p_value",
           "ratio_concentration", "look_spending", "spent_p_value"]


def two_sided_mixture_p_value(z, t, alpha: float, horizon: float) -> np.ndarray:
    """Anytime-valid two-sided p-value of ``z`` after intrinsic time ``t`` (normal mixture tuned at ``horizon``).

    References
    ----------
    .. [1] Howard et al. (2021); Waudby-Smith et al. (2024), see the module references.
    """
    z = np.asarray(z, dtype=float)
    # an infinite z (a fixed-sample p-value that underflowed to 0) is a decisive look, not a missing one
    return mixture_p_value(np.where(np.isnan(z), np.nan, np.clip(z, -40.0, 40.0)), t, mixture_rho2(horizon, alpha))


def one_sided_mixture_p_value(z, t, alpha: float, horizon: float, alternative: str = "larger") -> np.ndarray:
    r"""Anytime-valid one-sided p-value (half-normal mixture; see the module notes).

    Parameters
    ----------
    z : array_like
        Standardised statistic (estimate / SE) at this look.
    t : array_like
        Intrinsic time (participants, or clusters), > 0.
    alpha, horizon : float
        Level and planned intrinsic time that set the mixture's tuning
        :math:`\rho^2` (:func:`~takeup.pipeline.stats.sequential.mixture_rho2`).
    alternative : {"larger", "smaller"}
        Direction of the alternative.

    Returns
    -------
    ndarray
        :math:`\min(1, 1/M_t)`; NaN where ``z`` or ``t`` is missing.

    References
    ----------
    .. [1] Howard et al. (2021), see the module references.
    """
    if alternative not in ("larger", "smaller"):
        raise ValueError(f"alternative must be 'larger' or 'smaller', got {alternative!r}")
    rho2 = mixture_rho2(horizon, alpha)
    z = np.asarray(z, dtype=float)
    t = np.asarray(t, dtype=float)
    # |z| beyond 40 changes nothing at double precision (p is 1, or 0 to many digits) and keeps inf out
    s = np.clip(z if alternative == "larger" else -z, -40.0, 40.0)
    with np.errstate(all="ignore"):
        v = t * rho2
        log_m = (np.log(2.0) - 0.5 * np.log1p(v) + s**2 * v / (2.0 * (v + 1.0))
                 + special.log_ndtr(s * np.sqrt(v / (v + 1.0))))
        p = np.minimum(1.0, np.exp(-log_m))
    return _ro(np.where(~np.isnan(z) & np.isfinite(t) & (t > 0), p, np.nan))


def z_from_p_value(p, sign=1.0, two_sided: bool = True) -> np.ndarray:
    """The normal z with the same fixed-sample p-value (to feed a t-based test into a mixture).

    Two-sided: ``sign * Phi^-1(1 - p/2)``; one-sided ("larger"): ``Phi^-1(1 - p)`` (computed
    as ``-Phi^-1(p/2)`` and ``-Phi^-1(p)``, exact for tiny p).  For a normal reference this
    recovers the z statistic itself.
    """
    p = np.asarray(p, dtype=float)
    with np.errstate(all="ignore"):
        z = -special.ndtri(p / 2.0) * np.sign(sign) if two_sided else -special.ndtri(p)
    return _ro(z)


def ratio_concentration(alpha: float, horizon: float) -> float:
    r"""Beta-mixture concentration :math:`c = 1/\rho^2` matched to the normal mixture at ``horizon``."""
    return 1.0 / mixture_rho2(horizon, alpha)


def ratio_mixture_p_value(n_treated, n_control, share, concentration: float) -> np.ndarray:
    r"""Anytime-valid p-value of "arm counts follow the designed share" (beta-binomial mixture).

    Parameters
    ----------
    n_treated, n_control : array_like
        Cumulative units assigned to each arm (participants, or clusters).
    share : array_like
        Designed treated share :math:`\pi_0` in (0, 1).
    concentration : float
        :math:`c > 0` of the Beta(:math:`c\pi_0`, :math:`c(1-\pi_0)`) mixing distribution.

    Returns
    -------
    ndarray
        :math:`\min(1, 1/BF_n)`; NaN where the counts or the share are invalid.

    References
    ----------
    .. [1] Lindon and Malek (2022); Robbins (1970); Ville (1939), see the module references.
    """
    if not (np.isfinite(concentration) and concentration > 0):
        raise ValueError(f"concentration must be a positive number, got {concentration!r}")
    nt = np.asarray(n_treated, dtype=float)
    nc = np.asarray(n_control, dtype=float)
    p0 = np.asarray(share, dtype=float)
    ok = np.isfinite(nt) & np.isfinite(nc) & (nt >= 0) & (nc >= 0) & np.isfinite(p0) & (p0 > 0) & (p0 < 1)
    log_bf = ratio_mixture_log_bayes_factor(nt, nc, p0, concentration)
    p = np.minimum(1.0, np.exp(-log_bf))
    return _ro(np.where(ok, p, np.nan))


def ratio_mixture_log_bayes_factor(n_treated, n_control, share, concentration: float) -> np.ndarray:
    r"""Log of the beta-binomial mixture Bayes factor behind :func:`ratio_mixture_p_value`.

    Returns 0 (a factor of 1: no evidence) where the counts or the share are invalid, so that
    log factors of independent strata can be added: the product of the strata's factors is
    again a nonnegative martingale under the design (each new unit moves one stratum's factor
    only, with conditional mean one), which makes ``min(1, exp(-sum))`` anytime-valid for the
    site as a whole.

    References
    ----------
    .. [1] Lindon and Malek (2022); Ville (1939), see the module references.
    """
    nt = np.asarray(n_treated, dtype=float)
    nc = np.asarray(n_control, dtype=float)
    p0 = np.asarray(share, dtype=float)
    ok = np.isfinite(nt) & np.isfinite(nc) & (nt >= 0) & (nc >= 0) & np.isfinite(p0) & (p0 > 0) & (p0 < 1)
    p0s = np.where(ok, p0, 0.5)
    a, b = concentration * p0s, concentration * (1.0 - p0s)
    nts, ncs = np.where(ok, nt, 0.0), np.where(ok, nc, 0.0)
    log_bf = (special.betaln(a + nts, b + ncs) - special.betaln(a, b)
              - nts * np.log(p0s) - ncs * np.log1p(-p0s))
    return _ro(np.where(ok, log_bf, 0.0))


def look_spending(look, planned_looks: int) -> np.ndarray:
    r"""Share :math:`\gamma_k` of the level spent at look ``k`` (see the module notes); sums to at most 1."""
    if int(planned_looks) < 1:
        raise ValueError(f"planned_looks must be at least 1, got {planned_looks!r}")
    h = float(planned_looks)
    k = np.asarray(look, dtype=float)
    with np.errstate(all="ignore"):
        g = np.where(k <= h, 1.0 / (2.0 * h), h / (2.0 * k * (k + 1.0)))
    return _ro(np.where(np.isfinite(k) & (k >= 1), g, np.nan))


def spent_p_value(p, look, planned_looks: int) -> np.ndarray:
    """Anytime-valid p-value of a per-look test by spending over looks: ``min(1, p / gamma_k)``.

    References
    ----------
    .. [1] Jennison and Turnbull (2000), error spending; see the module notes.
    """
    p = np.asarray(p, dtype=float)
    g = look_spending(look, planned_looks)
    with np.errstate(all="ignore"):
        return _ro(np.minimum(1.0, p / g))
