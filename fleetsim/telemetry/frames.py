"""The in-memory telemetry: :class:`Telemetry`, its per-file :class:`FileReport`, and the
columns of each format's frame.

Text columns are plain ``str`` (object) columns, the intervals' ``signal`` and the tasks'
``outcome`` are pandas Categoricals of their fixed values, times are float Unix seconds (UTC)
named ``*_s``, numbers are float (NaN where absent) and the snapshots' signals are bool.
"""

from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np
import pandas as pd

from .schemas import OUTCOMES, SIGNAL_VALUES

__all__ = ["Telemetry", "FileReport", "COLUMNS", "SORT", "CATEGORIES", "empty_frame", "PROBLEM_COLUMNS"]

COLUMNS = {
    "intervals": ["device_id", "device_type", "region", "timezone", "signal", "start_s", "end_s"],
    "snapshots": ["device_id", "device_type", "region", "timezone", "time_s", "idle", "charging", "unmetered",
                  "battery", "download_mbps", "upload_mbps"],
    "traits": ["device_id", "device_type", "region", "download_mbps", "upload_mbps", "sample_cost_s", "samples",
               "memory_gb", "battery_wh", "train_power_w"],
    "tasks": ["device_id", "start_s", "end_s", "outcome", "examples", "download_bytes", "upload_bytes"],
}
"""Each format's in-memory columns, in order."""

SORT = {
    "intervals": ["device_id", "signal", "start_s"],
    "snapshots": ["device_id", "time_s"],
    "traits": ["device_id"],
    "tasks": ["device_id", "start_s"],
}
"""The order of each format's rows in memory (a Categorical sorts by its categories' order)."""

CATEGORIES = {"signal": SIGNAL_VALUES, "outcome": OUTCOMES}
"""Columns kept as pandas Categoricals, with their categories in order."""

_TEXT = {"device_id", "device_type", "region", "timezone"}
_BOOL = {"idle", "charging", "unmetered"}

PROBLEM_COLUMNS = ["file", "row", "column", "reason"]
"""Columns of :attr:`FileReport.problems`; ``row`` is <NA> for a problem with the whole file."""


def empty_frame(kind: str) -> pd.DataFrame:
    """A frame of ``kind`` with no rows and the in-memory dtypes (e.g. Dask's ``meta``)."""
    data = {}
    for name in COLUMNS[kind]:
        if name in CATEGORIES:
            data[name] = pd.Categorical([], categories=list(CATEGORIES[name]))
        elif name in _TEXT:
            data[name] = pd.Series([], dtype=object)
        elif name in _BOOL:
            data[name] = pd.Series([], dtype=bool)
        else:
            data[name] = pd.Series([], dtype=np.float64)
    return pd.DataFrame(data)


@dataclass
class FileReport:
    """What reading one file found: rows ``read``, ``kept`` and ``refused``, and ``problems``
    (a frame of :data:`PROBLEM_COLUMNS`, sorted by row)."""

    path: str
    kind: str
    read: int
    kept: int
    refused: int
    problems: pd.DataFrame

    def lines(self, limit: int | None = None) -> list[str]:
        """The problems as error lines: ``FILE: row N: COLUMN: reason``."""
        out = []
        frame = self.problems if limit is None else self.problems.head(limit)
        for row, column, reason in zip(frame["row"], frame["column"], frame["reason"], strict=True):
            parts = [self.path] + ([f"row {int(row)}"] if not pd.isna(row) else []) + ([column] if column else [])
            out.append(": ".join(parts + [reason]))
        return out


@dataclass
class Telemetry:
    """A fleet's telemetry in memory: one frame per format (None where no file was given)
    and the ``report`` of every file read (empty for generated telemetry)."""

    intervals: pd.DataFrame | None = None
    snapshots: pd.DataFrame | None = None
    traits: pd.DataFrame | None = None
    tasks: pd.DataFrame | None = None
    report: list[FileReport] = field(default_factory=list)

    def frame(self, kind: str) -> pd.DataFrame | None:
        return getattr(self, kind)

    @property
    def problems(self) -> pd.DataFrame:
        """Every file's problems in one frame (:data:`PROBLEM_COLUMNS`)."""
        parts = [r.problems for r in self.report if len(r.problems)]
        return pd.concat(parts, ignore_index=True) if parts else pd.DataFrame(columns=PROBLEM_COLUMNS)
