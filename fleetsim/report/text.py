"""Small formatters the sections share: numbers and durations as words, table columns as arrays.

Nothing here computes a figure; each function only reads or formats a value it is given.
"""

from __future__ import annotations

import math
from collections.abc import Sequence
from datetime import datetime, timezone
from typing import Any

import numpy as np
import pandas as pd

from .model import Column, format_value

__all__ = ["num", "opt", "pct", "seconds", "hour_text", "instant", "column", "records", "p_text",
           "STATUSES", "STATUS_WORDS", "OPTIONAL_STATUSES", "GROUPING_LABELS", "BASIS_WORDS", "status_counts"]

STATUSES = ("committed", "selection_timeout", "report_deadline", "server_outage", "unmasking_failed")
"""Round statuses as the hourly and daily tables name their columns (``-`` written ``_``)."""
STATUS_WORDS = {"committed": "committed", "selection_timeout": "ended by the selection timeout",
                "report_deadline": "ended by the report deadline", "server_outage": "cut by a server outage",
                "unmasking_failed": "ended by a failed unmasking"}
OPTIONAL_STATUSES = ("server_outage", "unmasking_failed")
"""Statuses the figures and tables over time show only when some round had them."""


def status_counts(rounds: dict[str, Any]) -> dict[str, int]:
    """Rounds by status (keys of STATUSES) from summary.json's ``rounds`` part."""
    return {"committed": int(rounds["committed"]), **{k: int(v) for k, v in rounds["ended_by"].items()}}


BASIS_WORDS = {"estimated": "estimated from the census"}
"""How the check-in figures were obtained (summary.json ``server_load.basis``), in words."""

GROUPING_LABELS = {"device_type": "device type", "region": "region", "data_quartile": "data-size quartile"}


def num(value: Any) -> float:
    """A JSON/CSV number as float (None -> NaN)."""
    return float("nan") if value is None else float(value)


def opt(value: float) -> float | None:
    """A float for a table cell: None when it is NaN or infinite (shown as n/a)."""
    return float(value) if math.isfinite(value) else None


def pct(value: Any) -> str:
    """A fraction as a percentage for reading (see :func:`fleetsim.report.model.format_value`)."""
    return format_value(value, "pct")


def seconds(value: Any) -> str:
    """A duration for reading: '95 s', '6 min', '12 h', '7 d'; 'n/a' for None, 'none' for infinity."""
    if value is None:
        return "n/a"
    v = float(value)
    if not math.isfinite(v):
        return "none"
    if v < 60 or (v < 600 and v % 60):
        return f"{v:.0f} s"
    if v < 7200:
        return f"{v / 60:.3g} min"
    if v < 172800:
        return f"{v / 3600:.3g} h"
    return f"{v / 86400:.3g} d"


def instant(text: str) -> datetime:
    """An ISO 8601 instant ('...Z' or with an offset; naive taken as UTC) as an aware datetime."""
    moment = datetime.fromisoformat(text.replace("Z", "+00:00"))
    return moment if moment.tzinfo else moment.replace(tzinfo=timezone.utc)


def hour_text(text: str) -> str:
    """'2026-03-02T05:00:00Z' -> '2026-03-02 05:00 UTC'."""
    return instant(text).strftime("%Y-%m-%d %H:%M UTC")


def p_text(p: float | None) -> str:
    """A p-value in words: 'p = 0.012', 'p < 1e-300' (underflow) or 'p n/a'."""
    if p is None:
        return "p n/a"
    return "p < 1e-300" if p < 1e-300 else f"p = {p:.2g}"


def column(table: pd.DataFrame, key: str) -> np.ndarray:
    """A table column as a float array."""
    return table[key].to_numpy(dtype=float)


def records(table: pd.DataFrame, columns: Sequence[Column]) -> list[list[Any]]:
    """Rows of ``table`` for a report table with ``columns`` (text as str, missing numbers as None)."""
    rows = []
    for record in table.to_dict("records"):
        row: list[Any] = []
        for c in columns:
            v = record[c.key]
            if c.kind == "text":
                row.append(str(v))
            elif c.kind == "int":
                row.append(None if pd.isna(v) else int(v))
            else:
                row.append(None if pd.isna(v) else float(v))
        rows.append(row)
    return rows
