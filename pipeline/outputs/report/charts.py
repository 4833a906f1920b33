"""Charts of the HTML report, drawn with matplotlib and returned as inline SVG.

No pyplot: figures are built with :class:`matplotlib.figure.Figure` and
written by matplotlib's SVG backend (``savefig(format="svg")``), so no
display is needed and the process-wide backend (which an interactive
session may have chosen) is left alone.  Text stays text in the SVG (``svg.fonttype = 'none'``); matplotlib
escapes it as XML.  Element ids are made unique per chart so that several
charts can live in one HTML page.

Colours are from the Okabe & Ito (2008) colour-blind-safe palette, and
every distinction drawn in colour is also drawn in line style or marker
shape.

References
----------
Okabe, M. and Ito, K. (2008). Color Universal Design (CUD): How to make
figures and presentations that are friendly to colorblind people.
https://jfly.uni-koeln.de/color/
"""

from __future__ import annotations

import html
import io
import math
import re
import textwrap
from typing import Any, Mapping, Sequence

import matplotlib
import numpy as np
import pandas as pd
from matplotlib import dates as mdates
from matplotlib.figure import Figure
from matplotlib.lines import Line2D
from matplotlib.patches import Patch, Polygon
from matplotlib.ticker import PercentFormatter

__all__ = ["OKABE_ITO", "forest_figure", "funnel_figure", "uptake_figure", "figure_svg", "format_number", "plain_text"]

#: Okabe-Ito palette
OKABE_ITO: dict[str, str] = {
    "black": "#000000", "orange": "#E69F00", "sky_blue": "#56B4E9", "green": "#009E73",
    "yellow": "#F0E442", "blue": "#0072B2", "vermillion": "#D55E00", "purple": "#CC79A7",
}
_GREY = "#6E6E6E"
_METHOD_LABELS = {"reml": "REML", "dl": "DerSimonian-Laird", "fixed": "fixed effect", "pm": "Paule-Mandel"}


def plain_text(value: Any) -> str:
    """Text for a matplotlib label: dollar signs escaped so they never start mathtext."""
    return str(value).replace("$", r"\$")


def format_number(x: Any, digits: int = 2) -> str:
    """Fixed-point text of a number; '-inf'/'inf' for infinite, 'n/a' for missing."""
    if x is None:
        return "n/a"
    try:
        v = float(x)
    except (TypeError, ValueError):
        return "n/a"
    if math.isnan(v):
        return "n/a"
    if math.isinf(v):
        return "inf" if v > 0 else "-inf"
    return f"{v:.{digits}f}".replace("-", "\u2212")


def _col(df: pd.DataFrame, name: str) -> np.ndarray:
    """A numeric column as float array (null -> NaN)."""
    return pd.to_numeric(df[name], errors="coerce").to_numpy(dtype=float, na_value=np.nan)


def robust_intervals(sites: pd.DataFrame, weak_f: float) -> dict[str, np.ndarray]:
    """Intervals drawn for weak-first-stage sites, vectorised over sites.

    For sites with first-stage F below ``weak_f``: the tF interval when it
    is bounded, else the Anderson-Rubin set (an interval, two rays, or the
    whole line).  Rays are represented by infinite ends.

    Returns
    -------
    dict
        ``weak`` (bool), ``kind`` ('tF', 'AR', 'AR two rays', 'AR whole line',
        'AR empty', '' ), and the segments ``a_low``, ``a_high`` (first
        piece) and ``b_low``, ``b_high`` (second piece of a two-ray set;
        NaN otherwise).
    """
    f = _col(sites, "first_stage_f")
    weak = np.isfinite(f) & (f < weak_f)
    tf_lo, tf_hi = _col(sites, "tf_ci_low"), _col(sites, "tf_ci_high")
    ar_lo, ar_hi = _col(sites, "ar_ci_low"), _col(sites, "ar_ci_high")
    ar_set = sites["ar_set"].fillna("").astype(str).to_numpy()
    tf_ok = np.isfinite(tf_lo) & np.isfinite(tf_hi)
    ar_int = (ar_set == "interval") & np.isfinite(ar_lo) & np.isfinite(ar_hi)
    rays = (ar_set == "two_rays") & np.isfinite(ar_lo) & np.isfinite(ar_hi)
    line = ar_set == "real_line"
    conds = [weak & tf_ok, weak & ~tf_ok & ar_int, weak & ~tf_ok & rays, weak & ~tf_ok & line,
             weak & ~tf_ok & (ar_set == "empty")]
    kind = np.select(conds, ["tF", "AR", "AR two rays", "AR whole line", "AR empty"], default="")
    nan = np.full(len(sites), np.nan)
    a_low = np.select(conds[:4], [tf_lo, ar_lo, np.full_like(nan, -np.inf), np.full_like(nan, -np.inf)], nan)
    a_high = np.select(conds[:4], [tf_hi, ar_hi, ar_lo, np.full_like(nan, np.inf)], nan)
    b_low = np.where(conds[2], ar_hi, np.nan)
    b_high = np.where(conds[2], np.inf, np.nan)
    return {"weak": weak, "kind": kind, "a_low": a_low, "a_high": a_high, "b_low": b_low, "b_high": b_high}


def _x_range(est: np.ndarray, lo: np.ndarray, hi: np.ndarray, strong: np.ndarray,
             headline: Mapping[str, Any] | None) -> tuple[float, float]:
    """Plot range: strong sites' intervals, all point estimates, the pooled CI/PI, and zero."""
    pool = []
    if headline is not None:
        pool = [headline.get(k) for k in ("estimate", "ci_low", "ci_high", "pi_low", "pi_high")]
    pool_arr = np.array([np.nan if v is None else float(v) for v in pool], dtype=float)
    vals = np.concatenate([est, lo[strong], hi[strong], pool_arr, [0.0]])
    vals = vals[np.isfinite(vals)]
    if vals.size <= 1:  # only zero: nothing estimated; fall back to every finite interval end
        vals = np.concatenate([lo, hi, [0.0]])
        vals = vals[np.isfinite(vals)]
    low, high = float(vals.min()), float(vals.max())
    span = high - low if high > low else 1.0
    return low - 0.08 * span, high + 0.08 * span


def _segments(ax, y: np.ndarray, low: np.ndarray, high: np.ndarray, xlim: tuple[float, float],
              color: str, style: str, width: float) -> None:
    """Horizontal segments clipped to the plot range; an arrow marks each clipped or unbounded end."""
    ok = ~np.isnan(low) & ~np.isnan(high)
    y, low, high = y[ok], low[ok], high[ok]
    lo_c, hi_c = np.clip(low, *xlim), np.clip(high, *xlim)
    ax.hlines(y, lo_c, hi_c, colors=color, linestyles=style, linewidths=width, zorder=2)
    left, right = low < xlim[0], high > xlim[1]
    inset = 0.012 * (xlim[1] - xlim[0])  # keep the arrowheads inside the axes, clear of the labels
    ax.plot(np.full(left.sum(), xlim[0] + inset), y[left], linestyle="none", marker="<", color=color,
            markersize=7, zorder=3)
    ax.plot(np.full(right.sum(), xlim[1] - inset), y[right], linestyle="none", marker=">", color=color,
            markersize=7, zorder=3)


def forest_figure(sites: pd.DataFrame, headline: Mapping[str, Any] | None, weak_f: float = 10.0,
                  outcome: str | None = None, level: float = 0.95) -> Figure:
    """Forest plot of site CACEs with the pooled estimate.

    Parameters
    ----------
    sites : pandas.DataFrame
        ``site_estimates`` rows of one outcome and specification (columns of
        :class:`takeup.schemas.results.SiteEstimateRow`), one per site.
    headline : mapping or None
        The pooled CACE row (columns of :class:`takeup.schemas.results.PooledEstimateRow`)
        drawn as a diamond (CI) with a line (prediction interval).
    weak_f : float
        Sites with first-stage F below it are marked weak and get the tF
        interval, or the Anderson-Rubin set when tF is unbounded, drawn
        dashed next to the conventional interval.
    outcome : str, optional
        Outcome name for the axis label.
    level : float
        Confidence level, for labels.

    Returns
    -------
    matplotlib.figure.Figure

    References
    ----------
    Lee, D. S., McCrary, J., Moreira, M. J. and Porter, J. (2022). Valid
    t-ratio inference for IV. American Economic Review 112(10), 3260-3290.

    Anderson, T. W. and Rubin, H. (1949). Estimation of the parameters of a
    single equation in a complete system of stochastic equations. Annals of
    Mathematical Statistics 20(1), 46-63.

    Staiger, D. and Stock, J. H. (1997). Instrumental variables regression
    with weak instruments. Econometrica 65(3), 557-586.
    """
    n = len(sites)
    pct = f"{level:.0%}"
    est = _col(sites, "cace")
    lo, hi = _col(sites, "cace_ci_low"), _col(sites, "cace_ci_high")
    rob = robust_intervals(sites, weak_f)
    weak = rob["weak"]
    xlim = _x_range(est, lo, hi, ~weak, headline)
    y = np.arange(n, dtype=float)[::-1] + 2.0          # first site on top; pooled row at y = 0
    pooled_y = 0.0
    height = 1.6 + 0.48 * (n + 1)
    fig = Figure(figsize=(10.5, height), layout="constrained")
    ax = fig.add_subplot()
    ax.set_xlim(*xlim)
    ax.set_ylim(-0.8, n + 1.6)
    ax.axvline(0.0, color=_GREY, linestyle=":", linewidth=1, zorder=1)
    ax.axhline(1.0, color=_GREY, linewidth=0.6, zorder=1)

    # conventional intervals: black for sites with a strong first stage, grey for weak ones
    _segments(ax, y[~weak], lo[~weak], hi[~weak], xlim, OKABE_ITO["black"], "solid", 1.6)
    _segments(ax, y[weak], lo[weak], hi[weak], xlim, _GREY, "solid", 1.2)
    ax.plot(est[~weak], y[~weak], "s", color=OKABE_ITO["black"], markersize=6, zorder=4, linestyle="none")
    ax.plot(est[weak], y[weak], "o", markerfacecolor="white", markeredgecolor=OKABE_ITO["vermillion"],
            markeredgewidth=1.6, markersize=7, zorder=4, linestyle="none")
    # weak-first-stage sites: the tF / AR interval, dashed, just below the conventional one
    yr = y - 0.28
    _segments(ax, yr, rob["a_low"], rob["a_high"], xlim, OKABE_ITO["vermillion"], "dashed", 1.8)
    _segments(ax, yr, rob["b_low"], rob["b_high"], xlim, OKABE_ITO["vermillion"], "dashed", 1.8)
    # the anytime-valid CACE set (valid at every weekly look), thin sky blue with bar ends, just above
    seq = anytime_intervals(sites)
    ya = y + 0.26
    for lo_k, hi_k in (("a_low", "a_high"), ("b_low", "b_high")):
        _segments(ax, ya, seq[lo_k], seq[hi_k], xlim, OKABE_ITO["sky_blue"], "solid", 1.4)
        for ends in (seq[lo_k], seq[hi_k]):
            inside = np.isfinite(ends) & (ends >= xlim[0]) & (ends <= xlim[1])
            ax.plot(ends[inside], ya[inside], linestyle="none", marker="|", color=OKABE_ITO["sky_blue"],
                    markersize=7, markeredgewidth=1.6, zorder=3)

    right_labels = _site_labels(sites, est, lo, hi, rob)
    left_labels = [plain_text(s) + ("\nweak first stage" if w else "")
                   for s, w in zip(sites["site_id"].astype(str), weak)]

    pooled_label, pooled_right = "no pooled estimate", ""
    if headline is not None and headline.get("estimate") is not None and np.isfinite(float(headline["estimate"])):
        e = float(headline["estimate"])
        cl = float(headline["ci_low"]) if headline.get("ci_low") is not None else np.nan
        ch = float(headline["ci_high"]) if headline.get("ci_high") is not None else np.nan
        pl = float(headline["pi_low"]) if headline.get("pi_low") is not None else np.nan
        ph = float(headline["pi_high"]) if headline.get("pi_high") is not None else np.nan
        _segments(ax, np.array([pooled_y]), np.array([pl]), np.array([ph]), xlim, OKABE_ITO["orange"],
                  "solid", 3.0)
        if np.isfinite(cl) and np.isfinite(ch):
            ax.add_patch(Polygon([[cl, pooled_y], [e, pooled_y + 0.32], [ch, pooled_y], [e, pooled_y - 0.32]],
                                 closed=True, facecolor=OKABE_ITO["blue"], edgecolor=OKABE_ITO["blue"],
                                 zorder=5, gid="pooled-diamond"))
        else:
            ax.plot([e], [pooled_y], "D", color=OKABE_ITO["blue"], zorder=5)
        method = str(headline.get("method", ""))
        pooled_label = f"Pooled ({_METHOD_LABELS.get(method, plain_text(method))}, {int(headline.get('n_sites') or 0)} sites)"
        pooled_right = f"{format_number(e)} [{format_number(cl)}, {format_number(ch)}]"
        if np.isfinite(pl) and np.isfinite(ph):
            pooled_right += f"   PI [{format_number(pl)}, {format_number(ph)}]"

    ax.set_yticks(np.concatenate([y, [pooled_y]]), left_labels + [pooled_label])
    ax.tick_params(axis="y", length=0)
    for lab, w in zip(ax.get_yticklabels()[:n], weak):  # colour the weak sites' names (n labels, cheap)
        if w:
            lab.set_color(OKABE_ITO["vermillion"])
    ax.get_yticklabels()[-1].set_fontweight("bold")
    ax2 = ax.twinx()
    ax2.set_ylim(ax.get_ylim())
    ax2.set_yticks(np.concatenate([y, [pooled_y]]), right_labels + [pooled_right])
    ax2.tick_params(axis="y", length=0, labelsize=9)
    ax2.set_ylabel("")
    for spine in ("top", "right", "left"):
        ax.spines[spine].set_visible(False)
        ax2.spines[spine].set_visible(False)
    ax2.spines["bottom"].set_visible(False)
    ax.text(1.0, 1.0, f"CACE [{pct} CI]", transform=ax.transAxes, ha="left", va="bottom",
            fontsize=9, fontweight="bold")
    what = plain_text(outcome) if outcome else "outcome"
    ax.set_xlabel(f"Complier average causal effect on {what} (outcome units)")
    handles = [
        Line2D([], [], color=OKABE_ITO["black"], marker="s", label=f"site CACE, conventional {pct} CI"),
        Line2D([], [], color=OKABE_ITO["vermillion"], linestyle="--", marker="o", markerfacecolor="white",
               label=f"weak first stage (F < {weak_f:g}): tF or Anderson-Rubin interval"),
        Line2D([], [], color=OKABE_ITO["sky_blue"], marker="|", markersize=8, markeredgewidth=1.6,
               label="anytime-valid set (holds at every weekly look)"),
        Line2D([], [], color=_GREY, linestyle="none", marker=">", label="interval continues beyond the plot"),
        Patch(facecolor=OKABE_ITO["blue"], label=f"pooled CACE, {pct} CI"),
        Line2D([], [], color=OKABE_ITO["orange"], linewidth=3, label="prediction interval for a new site"),
    ]
    fig.legend(handles=handles, loc="outside lower center", ncol=3, frameon=False, fontsize=9)
    return fig


def anytime_intervals(sites: pd.DataFrame) -> dict[str, np.ndarray]:
    """The anytime-valid CACE set per site as up to two segments (``a_*``, ``b_*``; NaN = none).

    ``interval`` -> one segment; ``two_rays`` -> (-inf, low] and [high, inf); ``real_line`` ->
    (-inf, inf); ``empty`` or missing -> nothing.  Infinite ends are drawn as arrows.
    """
    n = len(sites)
    out = {k: np.full(n, np.nan) for k in ("a_low", "a_high", "b_low", "b_high")}
    if "cs_cace_set" not in sites.columns:
        return out
    kind = sites["cs_cace_set"].astype(object).to_numpy()
    lo, hi = _col(sites, "cs_cace_low"), _col(sites, "cs_cace_high")
    for i in range(n):          # one small branch per site (set shapes), no computation
        if kind[i] == "interval":
            out["a_low"][i], out["a_high"][i] = lo[i], hi[i]
        elif kind[i] == "two_rays":
            out["a_low"][i], out["a_high"][i] = -np.inf, lo[i]
            out["b_low"][i], out["b_high"][i] = hi[i], np.inf
        elif kind[i] == "real_line":
            out["a_low"][i], out["a_high"][i] = -np.inf, np.inf
    return out


def _site_labels(sites: pd.DataFrame, est: np.ndarray, lo: np.ndarray, hi: np.ndarray,
                 rob: Mapping[str, np.ndarray]) -> list[str]:
    """Right-hand text per site: estimate, CI, and for weak sites the robust interval."""
    f = _col(sites, "first_stage_f")
    pooled = sites["included_in_pool"].fillna(False).astype(bool).to_numpy()
    notes = sites["note"].fillna("").astype(str).to_numpy()
    out = []
    # building one label per site is string formatting only (no computation)
    for i in range(len(sites)):
        if not np.isfinite(est[i]):
            reason = notes[i] or str(sites["status"].iloc[i])
            text = "CACE not estimable: " + (reason[:60] + "\u2026" if len(reason) > 60 else reason)
        else:
            text = f"{format_number(est[i])} [{format_number(lo[i])}, {format_number(hi[i])}]"
        kind = rob["kind"][i]
        if not pooled[i]:
            text += "  \u00b7 not pooled"
        if rob["weak"][i]:
            text += f"\nweak: F = {format_number(f[i], 1)}"
            if kind in ("tF", "AR"):
                text += f", {kind} [{format_number(rob['a_low'][i])}, {format_number(rob['a_high'][i])}]"
            elif kind == "AR two rays":
                text += (f", AR (\u2212inf, {format_number(rob['a_high'][i])}] \u222a "
                         f"[{format_number(rob['b_low'][i])}, inf)")
            elif kind == "AR whole line":
                text += ", AR set unbounded (whole line)"
            elif kind == "AR empty":
                text += ", AR set empty"
        out.append(plain_text(text))
    return out


def uptake_figure(trends: pd.DataFrame, flagged: Mapping[str, Sequence[str]], ncols: int | None = None) -> Figure:
    """Small multiples of uptake share by assignment period, one panel per site.

    Parameters
    ----------
    trends : pandas.DataFrame
        ``uptake_trends`` rows on the cohort basis (site_id, arm,
        period_start, uptake_share).
    flagged : mapping
        Site -> active uptake / first-stage alert rules.  Flagged panels get
        a thick vermillion frame, the rule in the title and a triangle at
        the latest period of the arm concerned.
    ncols : int, optional
        Panels per row (default 3 up to 9 sites, else 5).

    Returns
    -------
    matplotlib.figure.Figure
    """
    site_ids = sorted(trends["site_id"].astype(str).unique())
    n = len(site_ids)
    ncols = ncols or (min(n, 3) if n <= 9 else 5)
    nrows = math.ceil(n / ncols)
    wrap = 40 if ncols <= 3 else 24
    titles = {site: plain_text(site) + ("\n" + "\n".join(textwrap.wrap(
        "\u25b2 " + plain_text(", ".join(flagged[site])), wrap)) if flagged.get(site) else "") for site in site_ids}
    lines = [titles[site].count("\n") + 1 for site in site_ids]
    title_lines, top_lines = max(lines, default=1), max(lines[:ncols], default=1)
    # fixed margins in inches (a layout engine would cost more time than all the drawing)
    panel, gap = 1.45, 0.32 + 0.16 * title_lines          # axes height; room for tick labels and titles
    width = 10.5
    height = 0.7 + 0.55 + nrows * panel + (nrows - 1) * gap + 0.16 * top_lines
    fig = Figure(figsize=(width, height))
    fig.subplots_adjust(left=0.85 / width, right=1 - 0.15 / width, bottom=0.6 / height,
                        top=1 - (0.62 + 0.16 * top_lines) / height, wspace=0.15, hspace=gap / panel)
    axes = np.atleast_1d(fig.subplots(nrows, ncols, sharex=True, sharey=True, squeeze=False)).ravel()
    data = trends.assign(site_id=trends["site_id"].astype(str),
                         period=pd.to_datetime(trends["period_start"]),
                         share=pd.to_numeric(trends["uptake_share"], errors="coerce"))
    styles = {"treatment": (OKABE_ITO["blue"], "-", "o", "treatment (offered)"),
              "control": (OKABE_ITO["orange"], "--", "s", "control")}
    groups = dict(tuple(data.groupby("site_id", sort=True)))
    # one Axes per site: matplotlib draws panels one at a time, so this loop over sites is unavoidable
    for ax, site in zip(axes, site_ids):
        d = groups[site]
        rules = list(flagged.get(site, ()))
        for arm, (color, ls, marker, _) in styles.items():
            a = d[d["arm"] == arm].sort_values("period")
            ax.plot(mdates.date2num(a["period"].to_numpy()), a["share"].to_numpy(), color=color, linestyle=ls, marker=marker,
                    markersize=3.5, linewidth=1.5)
            if rules and _rule_concerns(rules, arm) and not a.empty:
                last = a.dropna(subset=["share"]).tail(1)
                ax.plot(mdates.date2num(last["period"].to_numpy()), last["share"].to_numpy(), linestyle="none", marker="^",
                        markersize=11, markerfacecolor=OKABE_ITO["vermillion"], markeredgecolor="black", zorder=5)
        title = titles[site]
        if rules:
            for spine in ax.spines.values():
                spine.set_edgecolor(OKABE_ITO["vermillion"])
                spine.set_linewidth(2.5)
        ax.set_title(title, fontsize=9, loc="left", color=OKABE_ITO["vermillion"] if rules else "black",
                     fontweight="bold" if rules else "normal")
        ax.grid(axis="y", color="#DDDDDD", linewidth=0.6)
    for ax in axes[n:]:
        ax.set_visible(False)
    axes[0].set_ylim(-0.03, 1.03)
    axes[0].yaxis.set_major_formatter(PercentFormatter(1.0, decimals=0))
    axes[0].set_yticks([0.0, 0.25, 0.5, 0.75, 1.0])
    # fixed date ticks (at most 3 assignment periods, none on the right edge where a label would run into the
    # next panel): much faster than a date locator on every panel
    periods = np.unique(data["period"].dropna().to_numpy())
    if periods.size:
        last = max(periods.size - 2, 0) if periods.size > 2 else periods.size - 1
        picks = periods[np.unique(np.linspace(0, last, min(3, last + 1)).round().astype(int))]
        axes[0].set_xticks(mdates.date2num(picks), [pd.Timestamp(p).strftime("%d %b") for p in picks])
    for ax in axes[:n]:
        ax.tick_params(labelsize=8)
    handles = [Line2D([], [], color=c, linestyle=ls, marker=m, label=lab) for c, ls, m, lab in styles.values()]
    handles.append(Line2D([], [], linestyle="none", marker="^", markersize=10, markerfacecolor=OKABE_ITO["vermillion"],
                          markeredgecolor="black", label="active uptake / first-stage alert"))
    fig.legend(handles=handles, loc="upper center", bbox_to_anchor=(0.5, 1.0), ncol=3, frameon=False, fontsize=9)
    fig.supxlabel("week of assignment (cohort)", fontsize=9, y=0.08 / height, va="bottom")
    fig.supylabel("share who took up the offer", fontsize=9, x=0.08 / width, ha="left")
    return fig


def _rule_concerns(rules: Sequence[str], arm: str) -> bool:
    """Whether any rule is about ``arm`` (rules naming the other arm only are not)."""
    other = "control" if arm == "treatment" else "treatment"
    return any(arm in r or other not in r for r in rules)


_ID = re.compile(r'\bid="([^"]+)"')
_HREF = re.compile(r'href="#([^"]+)"')
_URL = re.compile(r"url\(#([^)]+)\)")


def figure_svg(fig: Figure, prefix: str, label: str) -> str:
    """Inline SVG markup of ``fig`` for an HTML page.

    The XML declaration and DOCTYPE are dropped, element ids get ``prefix``
    (unique within the page), the creation metadata is left out (so the
    output is reproducible) and the ``<svg>`` element gets ``role="img"``
    and an escaped ``aria-label``.
    """
    buf = io.StringIO()
    rc = {"svg.fonttype": "none", "svg.hashsalt": f"takeup-{prefix}"}
    with matplotlib.rc_context(rc):
        fig.savefig(buf, format="svg", metadata={"Date": None, "Creator": None, "Format": None, "Type": None})
    svg = buf.getvalue()
    svg = svg[svg.index("<svg"):]
    svg = _ID.sub(lambda m: f'id="{prefix}-{m.group(1)}"', svg)
    svg = _HREF.sub(lambda m: f'href="#{prefix}-{m.group(1)}"', svg)
    svg = _URL.sub(lambda m: f"url(#{prefix}-{m.group(1)})", svg)
    svg = svg.replace("<svg ", f'<svg role="img" aria-label="{html.escape(label, quote=True)}" ', 1)
    return svg


def funnel_figure(sites: pd.DataFrame, headline: Mapping[str, Any] | None, flagged: Sequence[str] = (),
                  outcome: str | None = None, level: float = 0.95) -> Figure:
    """Funnel plot of every pooled site's CACE against its standard error, in one figure.

    Parameters
    ----------
    sites : pandas.DataFrame
        ``site_estimates`` rows (site_id, cace, cace_se, included_in_pool); sites not in
        the pool, or without an estimate and SE, are not drawn.
    headline : mapping or None
        The pooled CACE row (estimate, tau2, method): the vertical line, and the centre of
        the pseudo-confidence region ``estimate -/+ z * sqrt(se² + tau2)``.
    flagged : sequence of str
        Sites drawn as labelled vermillion triangles (the outlier alerts).
    outcome : str, optional
        Outcome name for the axis label.
    level : float
        Coverage of the pseudo-confidence region.

    Returns
    -------
    matplotlib.figure.Figure

    Notes
    -----
    The standard error runs downwards from zero, so precise sites sit at the top
    (Sterne & Egger 2001).  With tau2 = 0 the region is the usual funnel
    ``mu -/+ z * se``; with tau2 > 0 it widens by the between-site variance, which is
    what a site's estimate is expected to vary by under the random-effects model.  One
    scatter call draws all sites (one SVG path reused per point).

    References
    ----------
    Sterne, J. A. C. and Egger, M. (2001). Funnel plots for detecting bias in
    meta-analysis: guidelines on choice of axis. Journal of Clinical Epidemiology
    54(10), 1046-1055.
    """
    est, se = _col(sites, "cace"), _col(sites, "cace_se")
    pooled = sites["included_in_pool"].fillna(False).astype(bool).to_numpy()
    ok = pooled & np.isfinite(est) & np.isfinite(se) & (se > 0)
    ids = sites["site_id"].astype(str).to_numpy()
    hit = ok & np.isin(ids, np.asarray(list(flagged), dtype=object))
    fig = Figure(figsize=(10.5, 5.6), layout="constrained")
    ax = fig.add_subplot()
    z = float(_norm_ppf(0.5 + level / 2.0))
    se_max = float(np.nanmax(se[ok])) * 1.05 if ok.any() else 1.0
    mu = tau2 = None
    if headline is not None and headline.get("estimate") is not None:
        mu = float(headline["estimate"])
        tau2 = float(headline.get("tau2") or 0.0)
        grid = np.linspace(0.0, se_max, 60)
        half = z * np.sqrt(grid**2 + tau2)
        ax.fill_betweenx(grid, mu - half, mu + half, color=OKABE_ITO["sky_blue"], alpha=0.18, linewidth=0)
        ax.plot(mu - half, grid, color=OKABE_ITO["blue"], linestyle="--", linewidth=1.2)
        ax.plot(mu + half, grid, color=OKABE_ITO["blue"], linestyle="--", linewidth=1.2)
        ax.axvline(mu, color=OKABE_ITO["blue"], linewidth=2.0)
    ax.axvline(0.0, color=_GREY, linestyle=":", linewidth=1)
    ax.scatter(est[ok & ~hit], se[ok & ~hit], s=14, color=OKABE_ITO["black"], alpha=0.55, linewidths=0)
    if hit.any():
        ax.scatter(est[hit], se[hit], s=70, marker="^", color=OKABE_ITO["vermillion"], edgecolors="black",
                   linewidths=0.8, zorder=5)
        for x, y, s in zip(est[hit][:25], se[hit][:25], ids[hit][:25]):  # labels for at most 25 sites
            ax.annotate(plain_text(s), (x, y), xytext=(6, 2), textcoords="offset points", fontsize=8,
                        color=OKABE_ITO["vermillion"])
    ax.set_ylim(se_max, 0.0)
    what = plain_text(outcome) if outcome else "outcome"
    ax.set_xlabel(f"Site CACE on {what} (outcome units)")
    ax.set_ylabel("standard error of the site CACE (precise sites at the top)")
    for spine in ("top", "right"):
        ax.spines[spine].set_visible(False)
    pct = f"{level:.0%}"
    handles = [Line2D([], [], color=OKABE_ITO["black"], marker="o", linestyle="none", alpha=0.6,
                      label=f"pooled site ({int(ok.sum()):,})")]
    if hit.any():
        handles.append(Line2D([], [], color=OKABE_ITO["vermillion"], marker="^", linestyle="none",
                              markeredgecolor="black", label=f"outlier alert ({int(hit.sum())})"))
    if mu is not None:
        handles += [Line2D([], [], color=OKABE_ITO["blue"], linewidth=2, label=f"pooled CACE {format_number(mu)}"),
                    Line2D([], [], color=OKABE_ITO["blue"], linestyle="--",
                           label=f"{pct} of site estimates expected inside (\u03c4\u00b2 = {format_number(tau2, 3)})")]
    ax.legend(handles=handles, loc="lower left", frameon=False, fontsize=9)
    return fig


def _norm_ppf(p: float) -> float:
    from scipy import stats
    return float(stats.norm.ppf(p))
