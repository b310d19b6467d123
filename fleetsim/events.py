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

__all__ = [
    "OUTCOMES", "CAUSES", "PHASES", "WASTE_CAUSES", "ROUND_STATUS", "PARTICIPATION_COLUMNS", "ROUND_COLUMNS",
    "EventLog", "round_status", "outcome_codes", "json_key", "waste_codes",
]

OUTCOMES = ("on-time", "late", "stopped", "dropout")
"""What became of an accepted device: its report arrived before the round closed (on time; it
is *used* only if the round then committed), after it closed, it was told to stop at close, or
it dropped out."""

CAUSES = ("none", "idle-ended", "charging-ended", "unmetered-ended", "battery-low", "execution-limit", "crash")
"""Dropout causes by code (0: no dropout): a required signal ended (the device left idle, was
unplugged, left the unmetered network), the battery fell to its floor, the OS execution limit
ended the task, or the app crashed."""

PHASES = ("none", "download", "train", "upload", "key-advertisement", "key-sharing", "unmasking")
"""Task phases by code (0: not applicable). With secure aggregation a task runs download,
key-advertisement, key-sharing, train, upload, then (its report on time) waits for the round's
close and answers the unmasking."""

WASTE_CAUSES = (
    "used",
    "late",
    "stopped",
    "idle-ended",
    "charging-ended",
    "unmetered-ended",
    "battery-low",
    "execution-limit",
    "crash",
    "selection-timeout",
    "report-deadline",
    "server-outage",
    "unmasking-failed",
)
"""Why a participation's work was not used by a committed round ("used": it was)."""

ROUND_STATUS = ("committed", "selection-timeout", "report-deadline", "server-outage", "unmasking-failed")
"""What became of a round, named by what ended it: it committed; the selection timeout passed
before enough devices were accepted; the report deadline passed with too few reports; a
server outage cut it; or, with secure aggregation, too few devices answered the unmasking for
the server to unmask the sum. A round that did not commit wastes its work for the same word."""

_OUT = {name: i for i, name in enumerate(OUTCOMES)}
_WASTE = {name: i for i, name in enumerate(WASTE_CAUSES)}
# A dropout's work is wasted for its dropout cause (the names are shared; code 0 "none" is unused).
_CAUSE_TO_WASTE = np.array([_WASTE["used"]] + [_WASTE[c] for c in CAUSES[1:]], dtype=np.int8)


def json_key(word: str) -> str:
    """A vocabulary word as a summary.json key: ``-`` written ``_`` (``idle-ended`` -> ``idle_ended``)."""
    return word.replace("-", "_")


def round_status(lost: bool, enough: bool, reports: int, required: int, unmasked: bool = True) -> str:
    """A round's status: ``server-outage`` if an outage cut it, ``selection-timeout`` if too few
    devices were accepted (``enough`` false), ``report-deadline`` with fewer than ``required``
    reports, ``unmasking-failed`` if the sum could not be unmasked (``unmasked`` false), else
    ``committed``."""
    if lost:
        return "server-outage"
    if not enough:
        return "selection-timeout"
    if reports < required:
        return "report-deadline"
    return "committed" if unmasked else "unmasking-failed"


def outcome_codes(on_time: np.ndarray, late: np.ndarray, dropout: np.ndarray) -> np.ndarray:
    """Outcome codes (into OUTCOMES) from disjoint masks; a device in none of them was stopped."""
    outcome = np.full(on_time.shape, _OUT["stopped"], dtype=np.int8)
    outcome[on_time] = _OUT["on-time"]
    outcome[late] = _OUT["late"]
    outcome[dropout] = _OUT["dropout"]
    return outcome


def waste_codes(status: str, late: np.ndarray, dropout: np.ndarray, cause: np.ndarray, used: np.ndarray) -> np.ndarray:
    """Why each participation's work was not used, as codes into WASTE_CAUSES.

    ``late``, ``dropout`` and ``used`` are masks over the round's participations, ``cause``
    their dropout cause codes (into CAUSES), ``status`` the round's status. A dropout is
    wasted for its cause; otherwise a round that did not commit wastes the work for the
    round's status word, a late report for being late, and anything else was stopped at close;
    ``used`` (reports of a committed round) overrides all.
    """
    waste = np.full(late.shape, _WASTE["stopped"], dtype=np.int8)
    waste[late] = _WASTE["late"]
    waste[dropout] = _CAUSE_TO_WASTE[cause[dropout]]
    if status != "committed":
        waste[~dropout] = _WASTE[status]
    waste[used] = _WASTE["used"]
    return waste

PARTICIPATION_COLUMNS = {
    "round": np.int32,
    "device": np.int64,
    "device_type": np.int16,
    "region": np.int16,
    "accepted_s": np.float64,
    "started_s": np.float64,
    "ended_s": np.float64,
    "download_s": np.float64,
    "train_s": np.float64,
    "upload_s": np.float64,
    "outcome": np.int8,
    "dropout_cause": np.int8,
    "dropout_phase": np.int8,
    "waste_cause": np.int8,
    "used": np.bool_,
    "compute_s": np.float64,
    "download_bytes": np.float64,
    "upload_bytes": np.float64,
    "energy_wh": np.float64,
    "battery_start_pct": np.float64,
    "battery_used_pct": np.float64,
    "samples": np.int32,
    "examples_processed": np.float64,
    "weight": np.float64,
}

ROUND_COLUMNS = {
    "round": np.int32,
    "opened_s": np.float64,
    "selected_s": np.float64,
    "closed_s": np.float64,
    "ended_s": np.float64,
    "accepted": np.int32,
    "reports": np.int32,
    "status": np.int8,
    "checkins": np.int64,
    "unmask_responses": np.int32,
    "held_s": np.float64,
    "stretch": np.int32,
}


class EventLog:
    """Chunks of columns; :meth:`participations` and :meth:`rounds` build the DataFrames."""

    def __init__(self) -> None:
        self._parts: dict[str, list[np.ndarray]] = defaultdict(list)
        self._rounds: list[tuple[Any, ...]] = []  # one tuple of values per round, in ROUND_COLUMNS order

    def add_participations(self, **columns: np.ndarray) -> None:
        missing = set(PARTICIPATION_COLUMNS) - set(columns)
        if missing:
            raise KeyError(f"participation chunk lacks {sorted(missing)}")
        for key, dtype in PARTICIPATION_COLUMNS.items():
            self._parts[key].append(np.asarray(columns[key], dtype=dtype))

    def add_round(self, **values: float) -> None:
        self._rounds.append(tuple(values[key] for key in ROUND_COLUMNS))

    @staticmethod
    def _frame(chunks: dict[str, list[np.ndarray]], schema: Mapping[str, Any]) -> pd.DataFrame:
        # The joined columns are new arrays no one else holds: the frame takes them as they are
        # (no copy into consolidated blocks; the values, and so every figure, are the same).
        return pd.DataFrame(
            {
                key: np.concatenate(chunks[key]) if chunks[key] else np.empty(0, dtype=dtype)
                for key, dtype in schema.items()
            },
            copy=False,
        )

    def participations(self, type_names: tuple[str, ...], region_names: tuple[str, ...]) -> pd.DataFrame:
        """One row per participation; device type, region, outcome, dropout cause and phase
        and waste cause as labels (Categorical; the categories are all the names, in code order)."""
        frame = self._frame(self._parts, PARTICIPATION_COLUMNS)
        labels = {
            "device_type": type_names,
            "region": region_names,
            "outcome": OUTCOMES,
            "dropout_cause": CAUSES,
            "dropout_phase": PHASES,
            "waste_cause": WASTE_CAUSES,
        }
        for column, names in labels.items():
            frame[column] = pd.Categorical.from_codes(frame[column].to_numpy(), list(names))
        return frame

    def rounds(self) -> pd.DataFrame:
        """One row per round; ``status`` as a label (Categorical of ROUND_STATUS)."""
        columns = list(zip(*self._rounds, strict=True)) if self._rounds else [() for _ in ROUND_COLUMNS]
        frame = pd.DataFrame({key: np.array(values, dtype=dtype)
                              for (key, dtype), values in zip(ROUND_COLUMNS.items(), columns, strict=True)}, copy=False)
        frame["status"] = pd.Categorical.from_codes(frame["status"].to_numpy(), list(ROUND_STATUS))
        return frame
