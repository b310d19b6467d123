"""The four telemetry formats: their Table Schema descriptors and the in-memory columns.

Each format has one Table Schema (Frictionless Table Schema v2) shipped as JSON in
``fleetsim/data/telemetry/``: :func:`schema` reads it. The validator in :mod:`.validate` is
driven by these descriptors (types, ``required``, ``enum``, ``minLength``, ``minimum``,
``maximum``, ``exclusiveMinimum``, ``unique``, ``missingValues``, ``primaryKey``,
``fieldsMatch``), so the files and the code cannot drift apart.
"""

from __future__ import annotations

import functools
import json
from pathlib import Path
from typing import Any

from ..config import SIGNALS

__all__ = [
    "KINDS", "SCHEMA_DIR", "SIGNAL_VALUES", "OUTCOMES", "TIME_COLUMNS", "schema", "schema_path", "field_names",
    "memory_name",
]

KINDS = ("intervals", "snapshots", "traits", "tasks")
"""The telemetry formats, by the stem of their file names (``intervals.csv``, ...)."""

SCHEMA_DIR = Path(__file__).resolve().parents[1] / "data" / "telemetry"
"""Folder of the shipped Table Schema descriptors, one ``KIND.json`` per format."""

SIGNAL_VALUES = SIGNALS + ("observed",)
"""Values of the intervals' ``signal`` column, in the order of the in-memory categories."""

OUTCOMES = ("reported", "dropped", "stopped")
"""Values of the tasks' ``outcome`` column, in the order of the in-memory categories."""

TIME_COLUMNS = {"start": "start_s", "end": "end_s", "time": "time_s"}
"""File columns of datetimes and their in-memory names (float Unix seconds, UTC)."""


def schema_path(kind: str) -> Path:
    """Path of the shipped Table Schema JSON of ``kind`` (one of :data:`KINDS`)."""
    if kind not in KINDS:
        raise ValueError(f"unknown telemetry format {kind!r}; expected one of {', '.join(KINDS)}")
    return SCHEMA_DIR / f"{kind}.json"


@functools.cache
def _load(kind: str) -> str:
    return schema_path(kind).read_text(encoding="utf-8")


def schema(kind: str) -> dict[str, Any]:
    """The Table Schema descriptor of ``kind`` as a dict (a fresh copy each call)."""
    return json.loads(_load(kind))


def field_names(kind: str) -> tuple[str, ...]:
    """The columns of ``kind`` in schema order."""
    return tuple(field["name"] for field in schema(kind)["fields"])


def memory_name(column: str) -> str:
    """The in-memory name of a file column (times become ``*_s``; the rest keep their names)."""
    return TIME_COLUMNS.get(column, column)
