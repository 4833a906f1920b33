"""Print the warehouse contract (every table: column, type, meaning) as Markdown.

``python -m takeup.schemas.contract`` writes the tables section of the README, so
the documentation is generated from the same models as the DDL.
"""

from __future__ import annotations

import sys

from takeup.schemas.ddl import columns_of
from takeup.schemas.publication import PUBLICATION_TABLES
from takeup.schemas.records import STORAGE_TABLES
from takeup.schemas.results import LATEST_VIEWS, RESULT_TABLES


def _table_md(name: str, model) -> str:
    lines = [f"#### `{name}`", "", (model.__doc__ or "").strip().split("\n")[0], "",
             "| column | type | meaning |", "|---|---|---|"]
    for c in columns_of(model):
        t = c.sql_type + ("" if c.nullable or c.required else "") + (" (null allowed)" if c.nullable else "")
        if c.allowed:
            t += " ∈ {" + ", ".join(c.allowed) + "}"
        lines.append(f"| `{c.name}` | {t} | {c.description} |")
    return "\n".join(lines) + "\n"


def contract_markdown() -> str:
    parts = ["### Result tables (append-only, one `run_id` per run)", ""]
    parts += [_table_md(n, m) for n, m in RESULT_TABLES.items()]
    parts += ["Views for dashboards: " + ", ".join(f"`{v}`" for v in LATEST_VIEWS)
              + " — the rows of the latest finished run (status `ok` or `partial`).", ""]
    parts += ["### Storage tables", ""]
    parts += [_table_md(n, m) for n, m in STORAGE_TABLES.items()]
    parts += [_table_md(n, m) for n, m in PUBLICATION_TABLES.items()]
    return "\n".join(parts)


if __name__ == "__main__":  # pragma: no cover
    sys.stdout.write(contract_markdown())
