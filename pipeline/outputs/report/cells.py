"""Escaped, formatted table cells and tables for the HTML report (shared by its sections)."""

from __future__ import annotations

import html
import math
from typing import Any, Iterable, Sequence

import pandas as pd

from takeup.pipeline.outputs.report.charts import format_number

__all__ = ["esc", "num", "pval", "pct", "integer", "interval", "table", "records", "stratified_remark"]


def esc(value: Any) -> str:
    """Escaped text of a database value ('' for null)."""
    if value is None or (isinstance(value, float) and math.isnan(value)):
        return ""
    try:
        if pd.isna(value):
            return ""
    except (TypeError, ValueError):
        pass
    return html.escape(str(value), quote=True)


def num(value: Any, digits: int = 2) -> str:
    return html.escape(format_number(value, digits))


def pval(value: Any) -> str:
    try:
        v = float(value)
    except (TypeError, ValueError):
        return "n/a"
    if math.isnan(v):
        return "n/a"
    return "&lt;0.001" if v < 0.001 else f"{v:.3f}"


def pct(value: Any, digits: int = 0) -> str:
    try:
        v = float(value)
    except (TypeError, ValueError):
        return "n/a"
    return "n/a" if math.isnan(v) else f"{100 * v:.{digits}f}%"


def integer(value: Any) -> str:
    try:
        v = float(value)
    except (TypeError, ValueError):
        return "n/a"
    return "n/a" if math.isnan(v) else f"{int(v):,}"


def interval(low: Any, high: Any) -> str:
    if format_number(low) == "n/a" and format_number(high) == "n/a":
        return "n/a"
    return f"[{num(low)}, {num(high)}]"


def table(headers: Sequence[tuple[str, bool]], rows: Iterable[Sequence[str]], table_id: str | None = None,
           empty: str | None = None) -> str:
    """HTML table from already-escaped cells; headers are (label, numeric)."""
    attr = f' id="{table_id}"' if table_id else ""
    head = "".join(f'<th class="num">{h}</th>' if num else f"<th>{h}</th>" for h, num in headers)
    # one <tr> per row: string assembly of already-computed values
    body = ["<tr>" + "".join(f'<td class="num">{c}</td>' if num else f"<td>{c}</td>"
                             for c, (_, num) in zip(row, headers)) + "</tr>" for row in rows]
    if not body and empty:
        body = [f'<tr><td colspan="{len(headers)}" class="empty">{empty}</td></tr>']
    return f"<table{attr}><thead><tr>{head}</tr></thead><tbody>{''.join(body)}</tbody></table>"


def records(df: pd.DataFrame) -> list[dict[str, Any]]:
    return [] if df is None or df.empty else df.astype(object).where(df.notna(), None).to_dict("records")


def stratified_remark(rec: dict[str, Any]) -> str:
    """For a stratified row: 'stratified' and how far the unstratified CACE is (escaped HTML; '' otherwise)."""
    if rec.get("spec") != "stratified":
        return ""
    n = rec.get("n_strata")
    strata = f" over {integer(n)} strata" if n is not None and not pd.isna(n) else ""
    u, c = rec.get("unstratified_cace"), rec.get("cace")
    if u is None or c is None or pd.isna(u) or pd.isna(c):
        return f'<br><span class="strat">stratified{strata}; unstratified not available</span>'
    return (f'<br><span class="strat">stratified{strata}; unstratified {num(u)} '
            f"({'+' if u - c >= 0 else '&minus;'}{num(abs(u - c))})</span>")
