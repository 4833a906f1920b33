"""Generate DuckDB DDL and column metadata from the pydantic models.

Nothing here knows about particular tables: every table's columns come
from a model's annotations, so adding a field to a model adds the column.
"""

from __future__ import annotations

import types
import typing
from dataclasses import dataclass
from datetime import date, datetime
from typing import Any, Literal, Union

from pydantic import BaseModel

__all__ = ["ColumnSpec", "columns_of", "create_table_sql", "sql_type_of"]

_SQL_TYPES: dict[Any, str] = {
    str: "VARCHAR",
    int: "BIGINT",
    float: "DOUBLE",
    bool: "BOOLEAN",
    date: "DATE",
    datetime: "TIMESTAMP",
}


@dataclass(frozen=True)
class ColumnSpec:
    """One column of a table, as read off a model field."""

    name: str
    python_type: Any
    sql_type: str
    nullable: bool
    allowed: tuple[str, ...] | None
    description: str
    extra: dict[str, Any]
    required: bool
    max_length: int | None = None
    gt: float | None = None          # open lower bound (pydantic ``gt``)
    lt: float | None = None          # open upper bound (pydantic ``lt``)

    @property
    def marker(self) -> dict[str, Any]:
        return self.extra


def _unwrap(annotation: Any) -> tuple[Any, bool, tuple[str, ...] | None]:
    """Return (base type, nullable, allowed literal values)."""
    nullable = False
    origin = typing.get_origin(annotation)
    if origin in (Union, types.UnionType):
        args = [a for a in typing.get_args(annotation) if a is not type(None)]
        nullable = len(args) < len(typing.get_args(annotation))
        if len(args) != 1:
            raise TypeError(f"unsupported union annotation {annotation!r}")
        annotation = args[0]
        origin = typing.get_origin(annotation)
    if origin is Literal:
        values = typing.get_args(annotation)
        return type(values[0]), nullable, tuple(str(v) for v in values)
    return annotation, nullable, None


def sql_type_of(python_type: Any) -> str:
    try:
        return _SQL_TYPES[python_type]
    except KeyError:
        raise TypeError(f"no SQL type for {python_type!r}") from None


def columns_of(model: type[BaseModel]) -> list[ColumnSpec]:
    """Columns of ``model`` in declaration order (base classes first)."""
    out: list[ColumnSpec] = []
    for name, info in model.model_fields.items():
        base, nullable, allowed = _unwrap(info.annotation)
        extra = info.json_schema_extra if isinstance(info.json_schema_extra, dict) else {}
        max_length = next((m.max_length for m in info.metadata if hasattr(m, "max_length")), None)
        gt = next((m.gt for m in info.metadata if getattr(m, "gt", None) is not None), None)
        lt = next((m.lt for m in info.metadata if getattr(m, "lt", None) is not None), None)
        out.append(ColumnSpec(
            name=name, python_type=base, sql_type=extra.get("sql_type") or sql_type_of(base), nullable=nullable,
            allowed=allowed, description=info.description or "", extra=dict(extra),
            required=info.is_required(), max_length=max_length, gt=gt, lt=lt,
        ))
    return out


def _quote(identifier: str) -> str:
    return '"' + identifier.replace('"', '""') + '"'


def create_table_sql(table: str, model: type[BaseModel], if_not_exists: bool = True) -> str:
    """``CREATE TABLE`` statement for ``model``, with NOT NULL and value CHECKs."""
    parts = []
    for col in columns_of(model):
        line = f"{_quote(col.name)} {col.sql_type}"
        if not col.nullable:
            line += " NOT NULL"
        if col.allowed is not None:
            values = ", ".join("'" + v.replace("'", "''") + "'" for v in col.allowed)
            line += f" CHECK ({_quote(col.name)} IN ({values}))"
        parts.append(line)
    exists = "IF NOT EXISTS " if if_not_exists else ""
    return f"CREATE TABLE {exists}{_quote(table)} (\n    " + ",\n    ".join(parts) + "\n)"
