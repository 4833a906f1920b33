"""Random-effects meta-analysis of one effect per site.

:func:`combine` pools per-site estimates (ITT, CACE, ...) given their
sampling variances.  The between-site variance ``tau2`` can be estimated by
DerSimonian-Laird, restricted maximum likelihood or Paule-Mandel, or assumed
to be zero (inverse-variance fixed effect).  Besides the pooled estimate the
result carries Cochran's Q, I², H², a Q-profile interval for ``tau2``,
Hartung-Knapp-Sidik-Jonkman intervals and a prediction interval for the
effect at a new site.

Undefined quantities are NaN and the reason is written to ``note``; no
result field is ever infinite and no numerical warning escapes.
"""

from __future__ import annotations

import difflib
from dataclasses import dataclass, replace

import numpy as np
from scipy import optimize, special, stats

__all__ = [
    "MetaResult", "combine", "resolve_method", "clean_inputs", "generalised_q", "reml_score",
    "METHODS", "PI_METHODS",
]

#: Accepted values of ``method``.
METHODS: tuple[str, ...] = ("fixed", "dl", "reml", "pm")
#: Accepted values of ``pi_method``.
PI_METHODS: tuple[str, ...] = ("t", "hksj", "z")

_METHOD_LABELS = {
    "fixed": "inverse-variance fixed effect",
    "dl": "DerSimonian-Laird",
    "reml": "REML",
    "pm": "Paule-Mandel",
}

# Iteration controls of the REML Newton iteration.  The step is declared
# converged when it is below _REML_RTOL times (tau2 + mean within variance),
# i.e. relative to the scale of the total variance, so the criterion does not
# depend on the units of the effect.
_REML_MAXITER = 200
_REML_RTOL = 1e-12


@dataclass(frozen=True)
class MetaResult:
    """Pooled estimate across sites (read-only).

    Attributes
    ----------
    method : str
        ``"fixed"``, ``"dl"``, ``"reml"`` or ``"pm"``.
    estimate, se : float
        Pooled effect and its standard error ``1 / sqrt(sum w)`` with
        ``w = 1 / (v + tau2)``.
    ci_low, ci_high : float
        Normal (z) confidence interval at ``level``.
    hksj_se, hksj_ci_low, hksj_ci_high : float
        Hartung-Knapp-Sidik-Jonkman standard error and t interval with
        ``k - 1`` degrees of freedom (see :func:`combine` for truncation).
    pi_low, pi_high : float
        Prediction interval for the true effect at a new site.
    tau2, tau2_ci_low, tau2_ci_high : float
        Between-site variance and its Q-profile interval.
    q, q_df, q_pvalue : float
        Cochran's Q (fixed-effect weights), degrees of freedom ``k - 1`` and
        the chi-square p-value of the homogeneity test.
    i2, h2 : float
        I² (a proportion in [0, 1], not a percentage) and H².
    n_sites : int
        Number of sites used (after dropping invalid inputs).
    converged : bool
        Whether the tau2 estimator converged (always True for the closed-form
        ``fixed`` and ``dl``; False when nothing could be estimated).
    level : float
        Confidence level of every interval.
    pi_method : str
        How the prediction interval was formed.
    note : str
        Human-readable reasons for anything dropped, NaN or unusual; ``""``
        when there is nothing to report.
    """

    method: str
    estimate: float
    se: float
    ci_low: float
    ci_high: float
    hksj_se: float
    hksj_ci_low: float
    hksj_ci_high: float
    pi_low: float
    pi_high: float
    tau2: float
    tau2_ci_low: float
    tau2_ci_high: float
    q: float
    q_df: float
    q_pvalue: float
    i2: float
    h2: float
    n_sites: int
    converged: bool
    level: float
    pi_method: str
    note: str


def _choose(value: str, accepted: tuple[str, ...], what: str) -> str:
    """Normalise an option string or raise ValueError suggesting the nearest one."""
    if not isinstance(value, str):
        raise ValueError(f"{what} must be a string, one of {', '.join(accepted)}; got {value!r}")
    key = value.strip().lower()
    if key in accepted:
        return key
    # Suggestions also match the long names, e.g. "Paule-Mandel" -> "pm".
    candidates = {a: a for a in accepted}
    candidates.update({long.lower(): a for a, long in _METHOD_LABELS.items() if a in accepted})
    nearest = difflib.get_close_matches(key, list(candidates), n=1, cutoff=0.0)
    nearest = [candidates[n] for n in nearest]
    hint = f" Did you mean {nearest[0]!r}?" if nearest else ""
    raise ValueError(
        f"unknown {what} {value!r}.{hint} Accepted: {', '.join(repr(a) for a in accepted)}."
    )


def resolve_method(method: str) -> str:
    """Canonical name of a tau2 estimator.

    Parameters
    ----------
    method : str
        Case-insensitive name, one of :data:`METHODS`.

    Returns
    -------
    str

    Raises
    ------
    ValueError
        If the name is unknown; the message names the nearest accepted one
        and lists them all.
    """
    return _choose(method, METHODS, "method")


def clean_inputs(effects, variances) -> tuple[np.ndarray, np.ndarray, np.ndarray, list[str]]:
    """Validate and filter per-site inputs.

    Parameters
    ----------
    effects, variances : array_like
        One entry per site.

    Returns
    -------
    y, v : ndarray
        Copies of the usable entries.
    keep : ndarray of bool
        Mask of the usable entries in the original order.
    notes : list of str
        Reasons for dropped entries.

    Raises
    ------
    ValueError
        If the two inputs do not have the same one-dimensional shape.
    """
    y_all = np.atleast_1d(np.asarray(effects, dtype=float))
    v_all = np.atleast_1d(np.asarray(variances, dtype=float))
    if y_all.ndim != 1 or v_all.shape != y_all.shape:
        raise ValueError(
            f"effects and variances must be 1-D of equal length; got shapes "
            f"{y_all.shape} and {v_all.shape}"
        )
    notes: list[str] = []
    nonfinite = ~(np.isfinite(y_all) & np.isfinite(v_all))
    with np.errstate(invalid="ignore"):
        nonpositive = ~nonfinite & ~(v_all > 0)
    if nonfinite.any():
        notes.append(f"{int(nonfinite.sum())} site(s) dropped: missing or non-finite effect or variance")
    if nonpositive.any():
        notes.append(
            f"{int(nonpositive.sum())} site(s) dropped: zero or negative variance "
            "(cannot be inverse-variance weighted)"
        )
    keep = ~(nonfinite | nonpositive)
    return y_all[keep].copy(), v_all[keep].copy(), keep, notes


def _weighted_mean(y: np.ndarray, w: np.ndarray) -> tuple[float, float]:
    """Weighted mean and the sum of weights."""
    sw = float(w.sum())
    return float(np.dot(w, y) / sw), sw


def generalised_q(y: np.ndarray, v: np.ndarray, tau2: float) -> float:
    """Generalised Cochran statistic ``sum (y - mu(tau2))**2 / (v + tau2)``.

    Parameters
    ----------
    y, v : ndarray
        Effects and (positive) within-site variances, ``k >= 1``.
    tau2 : float
        Between-site variance used in the weights.

    Returns
    -------
    float
        The statistic; it equals Cochran's Q at ``tau2 = 0`` and decreases in
        ``tau2``.

    References
    ----------
    DerSimonian, R. and Kacker, R. (2007). Random-effects model for
    meta-analysis of clinical trials: an update. Contemporary Clinical
    Trials, 28, 105-114.
    """
    w = 1.0 / (v + tau2)
    mu, _ = _weighted_mean(y, w)
    return float(np.dot(w, (y - mu) ** 2))


def _root_of_q(y: np.ndarray, v: np.ndarray, target: float) -> tuple[float, bool]:
    """Root of ``generalised_q(tau2) = target`` on ``tau2 >= 0``.

    Returns 0 when ``Q(0) <= target``.  Because ``mu(tau2)`` minimises the
    weighted sum of squares, ``Q(tau2) <= sum (y - ybar)**2 / (min v + tau2)``,
    so ``Q(U) <= target`` at ``U = sum (y - ybar)**2 / target - min v``: the
    root is bracketed in ``[0, U]`` and Brent's method is used.
    """
    q0 = generalised_q(y, v, 0.0)
    if not q0 > target:
        return 0.0, True
    upper = float(np.sum((y - y.mean()) ** 2) / target - v.min())
    if not np.isfinite(upper):  # overflow with absurdly spread inputs
        return float("nan"), False
    if not upper > 0.0:  # cannot happen when q0 > target; kept as a guard
        return 0.0, True
    xtol = 1e-15 * (upper + float(v.mean()))
    root, info = optimize.brentq(
        lambda t: generalised_q(y, v, t) - target, 0.0, upper,
        xtol=xtol, rtol=4 * np.finfo(float).eps, maxiter=500, full_output=True, disp=False,
    )
    return float(root), bool(info.converged)


def _tau2_dl(y: np.ndarray, v: np.ndarray, q: float) -> float:
    w = 1.0 / v
    sw = w.sum()
    c = sw - np.dot(w, w) / sw
    return max(0.0, float((q - (y.size - 1)) / c))


def reml_score(y: np.ndarray, v: np.ndarray, tau2: float) -> tuple[float, float, float]:
    """Score and information of the restricted log-likelihood in ``tau2``.

    Parameters
    ----------
    y, v : ndarray
        Effects and within-site variances (``k >= 2``).
    tau2 : float
        Between-site variance.

    Returns
    -------
    score : float
        ``0.5 * (sum w² r² - tr P)``, the derivative of the restricted
        log-likelihood, with ``w = 1 / (v + tau2)``, ``r = y - mu(tau2)`` and
        ``P = W - w wᵀ / sum w``.
    fisher_information : float
        ``0.5 * tr(P²)`` (always positive for ``k >= 2``).
    observed_information : float
        Minus the second derivative,
        ``sum w³ r² - (sum w² r)² / sum w - fisher_information``.

    References
    ----------
    Harville, D. A. (1977). Maximum likelihood approaches to variance
    component estimation and to related problems. JASA, 72, 320-338.
    Viechtbauer, W. (2005). Bias and efficiency of meta-analytic variance
    estimators in the random-effects model. J. Educ. Behav. Stat., 30,
    261-293.
    """
    w = 1.0 / (v + tau2)
    mu, sw = _weighted_mean(y, w)
    r = y - mu
    w2 = w * w
    w3 = w2 * w
    s2 = float(w2.sum())
    tr_p = sw - s2 / sw
    fisher = 0.5 * (s2 - 2.0 * float(w3.sum()) / sw + (s2 / sw) ** 2)
    score = 0.5 * (float(np.dot(w2, r * r)) - tr_p)
    observed = float(np.dot(w3, r * r)) - float(np.dot(w2, r)) ** 2 / sw - fisher
    return score, fisher, observed


def _tau2_reml(y: np.ndarray, v: np.ndarray, start: float) -> tuple[float, bool, int]:
    """REML tau2 by safeguarded Newton-Raphson on the restricted score.

    The Newton step uses the observed information when it is positive and
    the Fisher information otherwise (a Fisher-scoring step).  Points with a
    positive / negative score are kept as a bracket ``[lo, hi]`` of the root;
    a step that leaves the bracket is replaced by bisection, so the
    iteration cannot cycle or leave ``tau2 >= 0``.  If the score at 0 is
    ``<= 0`` the maximum over ``tau2 >= 0`` is on the boundary and 0 is
    returned (this assumes the usual single-peaked restricted likelihood).

    Iterations (not sites) are looped over; each step is vectorised over
    sites.  Returns ``(tau2, converged, iterations)``.
    """
    scale = float(v.mean())
    if reml_score(y, v, 0.0)[0] <= 0.0:
        return 0.0, True, 1
    lo, hi = 0.0, np.inf
    tau2 = max(0.0, float(start))
    for it in range(1, _REML_MAXITER + 1):
        score, fisher, observed = reml_score(y, v, tau2)
        if score == 0.0:
            return tau2, True, it
        if score > 0.0:
            lo = max(lo, tau2)
        else:
            hi = min(hi, tau2)
        new = tau2 + score / (observed if observed > 0.0 else fisher)
        if not lo < new < hi:
            new = 0.5 * (lo + hi)
        if abs(new - tau2) <= _REML_RTOL * (new + scale) or hi - lo <= _REML_RTOL * (lo + scale):
            return new, True, it
        tau2 = new
    return tau2, False, _REML_MAXITER


def _nan_result(method, level, pi_method, notes, n_sites=0) -> MetaResult:
    nan = float("nan")
    return MetaResult(
        method=method, estimate=nan, se=nan, ci_low=nan, ci_high=nan,
        hksj_se=nan, hksj_ci_low=nan, hksj_ci_high=nan, pi_low=nan, pi_high=nan,
        tau2=nan, tau2_ci_low=nan, tau2_ci_high=nan, q=nan, q_df=nan, q_pvalue=nan,
        i2=nan, h2=nan, n_sites=n_sites, converged=False, level=level,
        pi_method=pi_method, note="; ".join(notes),
    )


def combine(
    effects,
    variances,
    method: str = "reml",
    level: float = 0.95,
    *,
    hksj_truncate: bool = False,
    pi_method: str = "t",
    summaries: bool = True,
) -> MetaResult:
    """Pool per-site effects by inverse-variance weighting with between-site variance.

    Parameters
    ----------
    effects : array_like
        One effect estimate per site.
    variances : array_like
        Their sampling variances (squared standard errors).
    method : {"reml", "dl", "pm", "fixed"}
        Estimator of ``tau2``: restricted maximum likelihood (safeguarded
        Newton-Raphson / Fisher scoring on the restricted score),
        DerSimonian-Laird, Paule-Mandel (root of the generalised Q = k - 1),
        or the fixed-effect model (``tau2 = 0``).  Case-insensitive.
    level : float
        Confidence level of every interval, in (0, 1).
    hksj_truncate : bool, keyword-only
        If False (default) the HKSJ variance is
        ``sum w (y - mu)² / ((k - 1) sum w)`` without truncation, which is
        the ``var_hksj_*`` quantity of ``statsmodels.stats.meta_analysis``.
        If True the scale factor is replaced by ``max(1, q)`` (Knapp &
        Hartung 2003, ad hoc modification), so the HKSJ SE is never below the
        z-based one.
    pi_method : {"t", "hksj", "z"}, keyword-only
        Prediction interval for the effect at a new site,
        ``mu ± c * sqrt(tau2 + s²)``:

        * ``"t"`` (default): ``c`` from t with ``k - 2`` df and ``s = se``
          (Higgins, Thompson & Spiegelhalter 2009); needs ``k >= 3``.
        * ``"hksj"``: ``c`` from t with ``k - 1`` df and ``s = hksj_se``
          (the interval reported alongside Hartung-Knapp inference in
          Viechtbauer 2010); needs ``k >= 2``.
        * ``"z"``: normal quantile and ``s = se``; needs ``k >= 2``.
    summaries : bool, keyword-only
        ``False`` skips the HKSJ, Q-profile and prediction intervals (NaN) --
        for refits that need only the estimate, its SE and tau2 (leave-one-out).

    Returns
    -------
    MetaResult

    Raises
    ------
    ValueError
        Unknown ``method`` / ``pi_method`` (the message names the nearest
        accepted value), ``level`` outside (0, 1), or inputs of different
        shapes.  Data problems never raise: they give NaN and a note.

    Notes
    -----
    Sites with a missing or non-finite effect or variance, or a variance
    ``<= 0``, are dropped (the note counts them).  ``tau2`` is clipped at 0
    for every random-effects method.

    * REML uses Newton-Raphson on the restricted score, falling back to a
      Fisher-scoring step where the observed information is not positive,
      inside a bracket that keeps ``tau2 >= 0``; if the score at 0 is
      ``<= 0`` the estimate is 0.  PM solves ``Q_gen(tau2) = k - 1`` by
      Brent's method on a proven bracket.  ``converged`` reports either.
    * HKSJ uses the weights of the chosen method (``1 / v`` for
      ``"fixed"``); its variance is ``q_hk / sum w`` with
      ``q_hk = sum w (y - mu)² / (k - 1)`` (no truncation by default, as
      ``var_hksj_fe`` / ``var_hksj_re`` in statsmodels).
    * Cochran's ``q`` always uses fixed-effect weights ``1 / v``.
    * For ``"fixed"``: ``i2 = max(0, (q - df) / q)`` and ``h2 = max(1, q / df)``
      (Higgins & Thompson 2002); ``tau2 = 0`` by assumption and its interval
      is NaN.
    * For random-effects methods ``i2 = tau2 / (tau2 + s²)`` with the
      "typical" within-site variance ``s² = (k - 1) sum w / ((sum w)² -
      sum w²)``, ``w = 1 / v``, and ``h2 = (tau2 + s²) / s²``
      (Higgins & Thompson 2002; Viechtbauer 2010).  With DL this
      equals ``(q - df) / q``.
    * The ``tau2`` interval is the Q-profile interval: the values of
      ``tau2`` at which the generalised Q (weights ``1 / (v + tau2)``) equals
      the upper and lower ``(1 - level) / 2`` chi-square(k - 1) quantiles,
      each clipped at 0 (Viechtbauer 2007).  It does not depend on the
      estimator chosen.
    * With one site the estimate is that site's value with its own SE
      (conditional on ``tau2 = 0``); ``tau2``, Q, I², H² and the
      HKSJ/prediction intervals are NaN with a note.

    References
    ----------
    DerSimonian, R. and Laird, N. (1986). Meta-analysis in clinical trials.
    Controlled Clinical Trials, 7, 177-188.
    Paule, R. C. and Mandel, J. (1982). Consensus values and weighting
    factors. J. Res. Natl. Bur. Stand., 87, 377-385.
    DerSimonian, R. and Kacker, R. (2007). Random-effects model for
    meta-analysis of clinical trials: an update. Contemporary Clinical
    Trials, 28, 105-114.
    Harville, D. A. (1977). Maximum likelihood approaches to variance
    component estimation. JASA, 72, 320-338.
    Viechtbauer, W. (2005). Bias and efficiency of meta-analytic variance
    estimators in the random-effects model. J. Educ. Behav. Stat., 30,
    261-293.
    Viechtbauer, W. (2007). Confidence intervals for the amount of
    heterogeneity in meta-analysis. Statistics in Medicine, 26, 37-52.
    Viechtbauer, W. (2010). Conducting meta-analyses in R with the metafor
    package. Journal of Statistical Software, 36(3), 1-48.
    Higgins, J. P. T. and Thompson, S. G. (2002). Quantifying heterogeneity
    in a meta-analysis. Statistics in Medicine, 21, 1539-1558.
    Higgins, J. P. T., Thompson, S. G. and Spiegelhalter, D. J. (2009). A
    re-evaluation of random-effects meta-analysis. JRSS A, 172, 137-159.
    Hartung, J. and Knapp, G. (2001). A refined method for the meta-analysis
    of controlled clinical trials with binary outcome. Statistics in
    Medicine, 20, 3875-3889.
    Sidik, K. and Jonkman, J. N. (2002). A simple confidence interval for
    meta-analysis. Statistics in Medicine, 21, 3153-3159.
    Knapp, G. and Hartung, J. (2003). Improved tests for a random effects
    meta-regression with a single covariate. Statistics in Medicine, 22,
    2693-2710.
    """
    method = resolve_method(method)
    pi_method = _choose(pi_method, PI_METHODS, "pi_method")
    level = float(level)
    if not 0.0 < level < 1.0:
        raise ValueError(f"level must be in (0, 1); got {level!r}")

    y, v, _, notes = clean_inputs(effects, variances)
    k = int(y.size)
    if k == 0:
        notes.append("no usable sites: nothing to pool")
        return _nan_result(method, level, pi_method, notes)
    # Location-scale equivariance: work on (y - c) / s and v / s² with c the
    # median effect and s² the median variance, then map back.  This keeps
    # every intermediate quantity near 1 whatever the units of the effect.
    with np.errstate(all="ignore"):
        shift = float(np.median(y))
        unit = float(np.sqrt(np.median(v)))
        try:
            res = _combine_clean((y - shift) / unit, v / unit**2, method, level,
                                 hksj_truncate, pi_method, notes, summaries)
        except ArithmeticError:  # OverflowError from float ** with absurd inputs
            notes.append("numerical overflow: variances span too many orders of magnitude")
            return _nan_result(method, level, pi_method, notes, n_sites=k)
        return _unscale(res, shift, unit)


_LOCATION_FIELDS = ("estimate", "ci_low", "ci_high", "hksj_ci_low", "hksj_ci_high",
                    "pi_low", "pi_high")
_SCALE_FIELDS = ("se", "hksj_se")
_VARIANCE_FIELDS = ("tau2", "tau2_ci_low", "tau2_ci_high")


def _unscale(res: MetaResult, shift: float, unit: float) -> MetaResult:
    """Map a result on the standardised scale back; replace any inf by NaN."""
    changes: dict[str, float] = {}
    for name in _LOCATION_FIELDS:
        changes[name] = float(np.float64(shift) + np.float64(unit) * getattr(res, name))
    for name in _SCALE_FIELDS:
        changes[name] = float(np.float64(unit) * getattr(res, name))
    for name in _VARIANCE_FIELDS:
        changes[name] = float(np.float64(unit) ** 2 * getattr(res, name))
    for name in ("q", "q_pvalue", "i2", "h2"):
        changes[name] = float(getattr(res, name))
    notes = [res.note] if res.note else []
    infinite = [name for name, val in changes.items() if np.isinf(val)]
    for name in infinite:
        changes[name] = float("nan")
    if infinite:
        notes.append(f"numerical overflow: {', '.join(infinite)} set to NaN")
    elif res.n_sites >= 2:
        core = ("estimate", "se", "q", "q_pvalue", "i2", "h2", "tau2")
        lost = [name for name in core if np.isnan(changes.get(name, getattr(res, name)))]
        if lost:
            notes.append(f"numerical problem (inputs too extreme): {', '.join(lost)} undefined")
    return replace(res, note="; ".join(notes), **changes)


def _combine_clean(y, v, method, level, hksj_truncate, pi_method, notes, summaries=True) -> MetaResult:
    nan = float("nan")
    k = int(y.size)
    df = k - 1
    alpha = 1.0 - level
    z = float(special.ndtri(1.0 - alpha / 2.0))
    label = _METHOD_LABELS[method]

    # ---- fixed-effect quantities (weights 1/v) --------------------------
    w_fe = 1.0 / v
    mu_fe, sw_fe = _weighted_mean(y, w_fe)
    q = float(np.dot(w_fe, (y - mu_fe) ** 2)) if k > 1 else nan
    q_p = float(special.chdtrc(df, q)) if k > 1 else nan

    # ---- tau2 -------------------------------------------------------------
    converged = True
    if method == "fixed":
        tau2 = 0.0
    elif k == 1:
        tau2 = nan
        notes.append(f"one site: between-site variance tau2 not estimable ({label}); "
                     "SE is that site's own, assuming tau2 = 0")
    elif method == "dl":
        tau2 = _tau2_dl(y, v, q)
    elif method == "pm":
        tau2, converged = _root_of_q(y, v, float(df))
        if not converged:
            notes.append("Paule-Mandel root-finding did not converge; last iterate reported")
    else:  # reml
        tau2, converged, n_iter = _tau2_reml(y, v, _tau2_dl(y, v, q))
        if not converged:
            notes.append(f"REML iteration did not converge in {n_iter} iterations; "
                         "last iterate reported")

    # ---- pooled estimate --------------------------------------------------
    w = 1.0 / (v + (0.0 if np.isnan(tau2) else tau2))
    mu, sw = _weighted_mean(y, w)
    se = float(np.sqrt(1.0 / sw))
    ci = (mu - z * se, mu + z * se)

    # ---- HKSJ ---------------------------------------------------------------
    if k > 1 and not np.isnan(tau2) and summaries:
        scale = float(np.dot(w, (y - mu) ** 2)) / df
        if hksj_truncate:
            scale = max(1.0, scale)
        hksj_se = float(np.sqrt(scale / sw))
        t_crit = float(special.stdtrit(df, 1.0 - alpha / 2.0))
        hksj_ci = (mu - t_crit * hksj_se, mu + t_crit * hksj_se)
        if hksj_se == 0.0:
            notes.append("all site estimates equal the pooled estimate: HKSJ SE is 0")
    else:
        hksj_se, hksj_ci = nan, (nan, nan)
        if k == 1:
            notes.append("one site: HKSJ interval undefined (k - 1 = 0 df)")

    # ---- heterogeneity summaries --------------------------------------------
    if k == 1:
        i2 = h2 = nan
        notes.append("one site: Q, I2 and H2 undefined")
    elif method == "fixed":
        i2 = (q - df) / q if q > df else 0.0
        h2 = q / df if q > df else 1.0
    else:
        s2 = df * sw_fe / (sw_fe * sw_fe - float(np.dot(w_fe, w_fe)))
        i2 = tau2 / (tau2 + s2)
        h2 = (tau2 + s2) / s2

    # ---- Q-profile interval for tau2 ------------------------------------------
    if not summaries:          # leave-one-out refits need only estimate, SE and tau2
        tau2_ci = (nan, nan)
    elif method == "fixed":
        tau2_ci = (nan, nan)
        notes.append("fixed-effect model: tau2 = 0 by assumption, no tau2 interval")
    elif k == 1:
        tau2_ci = (nan, nan)
    else:
        hi_q = float(special.chdtri(df, alpha / 2.0))
        lo_q = float(special.chdtri(df, 1.0 - alpha / 2.0))
        t_lo, ok_lo = _root_of_q(y, v, hi_q)
        t_hi, ok_hi = _root_of_q(y, v, lo_q)
        tau2_ci = (t_lo, t_hi)
        if t_hi == 0.0:
            notes.append("Q-profile: Q below the lower chi-square quantile, tau2 interval is {0}")
        if not (ok_lo and ok_hi):
            notes.append("Q-profile root-finding did not converge; bounds are last iterates")

    # ---- prediction interval ---------------------------------------------------
    pi = (nan, nan)
    if not summaries:
        pass
    elif np.isnan(tau2):
        notes.append("prediction interval undefined: tau2 not estimable")
    elif pi_method == "t":
        if k < 3:
            notes.append(f"prediction interval needs at least 3 sites (t with k - 2 df); k = {k}")
        else:
            c = float(special.stdtrit(k - 2, 1.0 - alpha / 2.0))
            half = c * float(np.sqrt(tau2 + se**2))
            pi = (mu - half, mu + half)
    elif pi_method == "hksj":
        if np.isfinite(hksj_se):
            c = float(special.stdtrit(df, 1.0 - alpha / 2.0))
            half = c * float(np.sqrt(tau2 + hksj_se**2))
            pi = (mu - half, mu + half)
    else:  # "z"
        half = z * float(np.sqrt(tau2 + se**2))
        pi = (mu - half, mu + half)

    return MetaResult(
        method=method, estimate=mu, se=se, ci_low=ci[0], ci_high=ci[1],
        hksj_se=hksj_se, hksj_ci_low=hksj_ci[0], hksj_ci_high=hksj_ci[1],
        pi_low=pi[0], pi_high=pi[1], tau2=tau2,
        tau2_ci_low=tau2_ci[0], tau2_ci_high=tau2_ci[1],
        q=q, q_df=float(df), q_pvalue=q_p, i2=float(i2), h2=float(h2),
        n_sites=k, converged=bool(converged), level=level, pi_method=pi_method,
        note="; ".join(notes),
    )
