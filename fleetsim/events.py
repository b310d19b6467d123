"""Columnar event log: one row per device participation and one per round.

The engine appends whole arrays per round (never a Python object per event); the log
concatenates its chunks into DataFrames once, at the end of a run, and labels the coded
columns there (pandas Categorical of the names in docs/metrics.md), so that a frame reads
``parts.query("outcome == 'dropout'")``; ``column.cat.codes`` gives the codes back.
"""

from __future__ import annotations

from collections import defaultdict
from collections.abc import Mapping
from typing import Any

import numpy as np
import pandas as pd

from .client import CAUSES, PHASES

__all__ = ["OUTCOMES", "WASTE_CAUSES", "ROUND_STATUS", "EventLog"]

OUTCOMES = ("reported", "late", "stopped", "dropout")
"""What became of an accepted device: its report arrived before close, after close, it was
told to stop at close, or it dropped out."""

WASTE_CAUSES = (
    "used",
    "late",
    "stopped-at-close",
    "signal:idle",
    "signal:charging",
    "signal:unmetered",
    "battery",
    "os-limit",
    "crash",
    "failed-round",
    "abandoned-round",
    "server-outage",
)
"""Why a participation's work was not used by a committed round ("used": it was)."""

ROUND_STATUS = ("committed", "failed", "abandoned", "outage")

PARTICIPATION_COLUMNS = {
    "round": np.int32,
    "device": np.int64,
    "device_type": np.int16,
    "region": np.int16,
    "accepted_s": np.float64,
    "ended_s": np.float64,
    "download_s": np.float64,
    "train_s": np.float64,
    "upload_s": np.float64,
    "outcome": np.int8,
    "cause": np.int8,
    "phase": np.int8,
    "waste_cause": np.int8,
    "used": np.bool_,
    "compute_s": np.float64,
    "bytes_down": np.float64,
    "bytes_up": np.float64,
    "energy_wh": np.float64,
    "battery_start_pct": np.float64,
    "battery_used_pct": np.float64,
    "samples": np.int32,
}

ROUND_COLUMNS = {
    "round": np.int32,
    "opened_s": np.float64,
    "selected_s": np.float64,
    "closed_s": np.float64,
    "accepted": np.int32,
    "reports": np.int32,
    "status": np.int8,
    "checkins": np.int64,
}


class EventLog:
    """Chunks of columns; :meth:`participations` and :meth:`rounds` build the DataFrames."""

    def __init__(self) -> None:
        self._parts: dict[str, list[np.ndarray]] = defaultdict(list)
        self._rounds: dict[str, list[np.ndarray]] = defaultdict(list)

    def add_participations(self, **columns: np.ndarray) -> None:
        missing = set(PARTICIPATION_COLUMNS) - set(columns)
        if missing:
            raise KeyError(f"participation chunk lacks {sorted(missing)}")
        for key, dtype in PARTICIPATION_COLUMNS.items():
            self._parts[key].append(np.asarray(columns[key], dtype=dtype))

    def add_round(self, **values: float) -> None:
        for key, dtype in ROUND_COLUMNS.items():
            self._rounds[key].append(np.asarray([values[key]], dtype=dtype))

    @staticmethod
    def _frame(chunks: dict[str, list[np.ndarray]], schema: Mapping[str, Any]) -> pd.DataFrame:
        return pd.DataFrame(
            {
                key: np.concatenate(chunks[key]) if chunks[key] else np.empty(0, dtype=dtype)
                for key, dtype in schema.items()
            }
        )

    def participations(self, type_names: tuple[str, ...], region_names: tuple[str, ...]) -> pd.DataFrame:
        """One row per participation; device type, region, outcome, cause, phase and waste
        cause as labels (Categorical; the categories are all the names, in code order)."""
        frame = self._frame(self._parts, PARTICIPATION_COLUMNS)
        labels = {
            "device_type": type_names,
            "region": region_names,
            "outcome": OUTCOMES,
            "cause": CAUSES,
            "phase": PHASES,
            "waste_cause": WASTE_CAUSES,
        }
        for column, names in labels.items():
            frame[column] = pd.Categorical.from_codes(frame[column].to_numpy(), list(names))
        return frame

    def rounds(self) -> pd.DataFrame:
        """One row per round; ``status`` as a label (Categorical of ROUND_STATUS)."""
        frame = self._frame(self._rounds, ROUND_COLUMNS)
        frame["status"] = pd.Categorical.from_codes(frame["status"].to_numpy(), list(ROUND_STATUS))
        return frame
