"""The report as data: sections holding a question, a one-line answer, figures and tables.

Both renderers (HTML and Markdown) read the same :class:`Section` objects, so the page and
the Markdown carry the same numbers. Text here is plain text; the renderers escape it.
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field
from typing import Any

__all__ = ["Column", "Table", "Chart", "Tile", "Section", "Part", "Cell", "format_value", "raw_value"]


@dataclass(frozen=True)
class Cell:
    """A value with its own format, for tables whose rows hold different kinds of figure."""

    value: Any
    kind: str


@dataclass(frozen=True)
class Column:
    """A table column: ``key`` names it for machines, ``label`` for readers; ``kind`` sets the format.

    kinds: ``text``, ``int``, ``pct`` (a fraction shown as a percentage), ``ratio`` (two
    decimals), ``num`` (a measured quantity, three significant figures or whole numbers),
    ``p`` (a p-value).
    """

    key: str
    label: str
    kind: str = "num"
    group: str = ""
    """Columns sharing a ``group`` are headed together (e.g. one device type's survival and band)."""


@dataclass(frozen=True)
class Table:
    """Rows of raw values; ``detail`` tables are long (HTML folds them; Markdown names their CSV)."""

    id: str
    caption: str
    columns: list[Column]
    rows: list[list[Any]]
    detail: bool = False
    source: str = ""


@dataclass(frozen=True)
class Chart:
    """An inline SVG figure with its text alternative (plain text)."""

    svg: str
    alt: str
    caption: str = ""


@dataclass(frozen=True)
class Tile:
    label: str
    value: str


@dataclass(frozen=True)
class Section:
    id: str
    question: str
    answer: str
    charts: list[Chart] = field(default_factory=list)
    tables: list[Table] = field(default_factory=list)
    tiles: list[Tile] = field(default_factory=list)
    notes: list[str] = field(default_factory=list)


@dataclass(frozen=True)
class Part:
    """One workload's whole report inside the report of a run of several workloads.

    ``id`` is the prefix its sections' ids carry (unique on the page); ``name`` is the
    workload's name from the fleet file; ``intro`` says where its numbers come from.
    """

    id: str
    name: str
    intro: str
    sections: list[Section]


def _missing(value: Any) -> bool:
    return value is None or (isinstance(value, float) and not math.isfinite(value))


def format_value(value: Any, kind: str) -> str:
    """A value as readers see it; missing values (None, NaN, inf) read ``n/a``."""
    if isinstance(value, Cell):
        value, kind = value.value, value.kind
    if kind == "text":
        return "" if value is None else str(value)
    if _missing(value):
        return "n/a"
    v = float(value)
    if kind == "int":
        return f"{round(v):,}"
    if kind == "pct":
        return f"{100 * v:.1f}%" if abs(v) >= 0.001 or v == 0 else f"{100 * v:.2g}%"
    if kind == "ratio":
        return f"{v:.2f}"
    if kind == "p":
        return "< 1e-300" if v < 1e-300 else f"{v:.3g}"
    if abs(v) >= 100:
        return f"{v:,.0f}"
    return f"{v:.3g}"


def raw_value(value: Any) -> str:
    """A value written in full (``repr`` of floats) for the machine-readable data attributes."""
    if isinstance(value, Cell):
        value = value.value
    if value is None:
        return ""
    if isinstance(value, bool):
        return str(value).lower()
    if isinstance(value, float):
        return repr(value) if math.isfinite(value) else ("nan" if math.isnan(value) else repr(value))
    return str(value)
