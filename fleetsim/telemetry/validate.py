"""The Table Schema checks of one file, driven by the shipped descriptors.

:func:`check_header` compares a file's columns with the schema's fields (``fieldsMatch:
superset``: every column must be a field, and every required or key field must be a column);
:func:`check_cells` runs each field's type and constraints (``required``, ``enum``,
``minLength``, ``minimum``, ``maximum``, ``exclusiveMinimum``, ``exclusiveMaximum``) over
whole columns at once. Keys (``unique``, ``primaryKey``) span rows, and files, so they are
checked with the format's rules (:mod:`.rules`). A problem is a :class:`Block`: the rows it
refuses, the column, and the reason.
"""

from __future__ import annotations

from collections.abc import Sequence
from dataclasses import dataclass
from typing import Any

import numpy as np

from .cells import Column

__all__ = ["Block", "check_header", "check_cells", "shown", "required_fields"]


@dataclass
class Block:
    """Rows refused for one reason: ``rows`` (row indices), ``column`` ('' for the row as a
    whole) and ``reasons`` (one text for all, or one per row)."""

    rows: np.ndarray
    column: str
    reasons: str | list[str]

    def reason_at(self, i: int) -> str:
        return self.reasons if isinstance(self.reasons, str) else self.reasons[i]


def shown(text: Any, limit: int = 60) -> str:
    """A cell as error lines show it: its repr, cut short."""
    out = repr(text)
    return out if len(out) <= limit else out[: limit - 3] + "..."


def required_fields(descriptor: dict[str, Any]) -> list[str]:
    """Fields every file of the format must have as columns: the required ones and the key's."""
    key = descriptor.get("primaryKey") or []
    return [f["name"] for f in descriptor["fields"]
            if f.get("constraints", {}).get("required") or f["name"] in key]


def check_header(names: Sequence[str], descriptor: dict[str, Any]) -> list[tuple[str, str]]:
    """(column, reason) for each column the schema does not allow and each field it requires that is missing."""
    known = [f["name"] for f in descriptor["fields"]]
    problems = []
    seen: set[str] = set()
    for name in names:
        if name in seen:
            problems.append((name, "column given twice"))
        seen.add(name)
        if name not in known:
            problems.append((name, f"unknown column; expected some of {', '.join(known)}"))
    for name in required_fields(descriptor):
        if name not in seen:
            problems.append((name, "missing column (required)"))
    return problems


_BOUNDS = (
    ("minimum", np.less, "at least"),
    ("maximum", np.greater, "at most"),
    ("exclusiveMinimum", np.less_equal, "more than"),
    ("exclusiveMaximum", np.greater_equal, "less than"),
)


def _with_values(column: Column, rows: np.ndarray, template: str) -> list[str]:
    return [template.format(shown(v)) for v in column.shown(rows)]


def _field_blocks(column: Column, field: dict[str, Any], live: np.ndarray) -> list[Block]:
    """The blocks of one column's type and constraints (rows in ``live`` only)."""
    constraints = field.get("constraints", {})
    name = field["name"]
    blocks = []
    if constraints.get("required"):
        rows = np.flatnonzero(column.missing & live)
        if rows.size:
            blocks.append(Block(rows, name, "missing (required)"))
    rows = np.flatnonzero(column.bad & live)
    if rows.size:
        blocks.append(Block(rows, name, _with_values(column, rows, f"expected {column.expected()} (got {{}})")))
    present = live & ~column.missing & ~column.bad
    if column.categories is not None:
        if "enum" in constraints:
            allowed = np.isin(column.categories, constraints["enum"])
            rows = np.flatnonzero(present & ~allowed[column.values])
            if rows.size:
                choices = ", ".join(constraints["enum"])
                blocks.append(Block(rows, name, _with_values(column, rows, f"expected one of {choices} (got {{}})")))
        if "minLength" in constraints:
            short = np.array([len(c) < constraints["minLength"] for c in column.categories], dtype=bool)
            rows = np.flatnonzero(present & short[column.values])
            if rows.size:
                blocks.append(Block(rows, name, f"expected at least {constraints['minLength']} character(s)"))
        return blocks
    if column.type in ("number", "integer"):
        for key, outside, words in _BOUNDS:
            if key in constraints:
                rows = np.flatnonzero(present & outside(column.values, constraints[key]))
                if rows.size:
                    blocks.append(Block(rows, name, _with_values(column, rows, f"expected {words} "
                                                                 f"{constraints[key]:g} (got {{}})")))
    return blocks


def check_cells(columns: dict[str, Column], descriptor: dict[str, Any], size: int) -> tuple[list[Block], np.ndarray]:
    """Problems of one file's cells by the schema, and the mask of the rows they refuse.

    A row whose cells are all missing is one ``blank row`` problem and nothing else.
    """
    blank = np.ones(size, dtype=bool) if columns else np.zeros(size, dtype=bool)
    for present in columns.values():
        blank &= present.missing
    blocks = [Block(np.flatnonzero(blank), "", "blank row")] if blank.any() else []
    live = ~blank
    for field in descriptor["fields"]:
        column = columns.get(field["name"])
        if column is not None:
            blocks += _field_blocks(column, field, live)
    refused = blank.copy()
    for block in blocks:
        refused[block.rows] = True
    return blocks, refused
