"""Rounds: their phases and durations, and how many closed in each hour (docs/metrics.md)."""

from __future__ import annotations

from datetime import datetime

import numpy as np
import pandas as pd

from ..events import ROUND_STATUS

__all__ = ["round_frame", "closed_per_hour"]


def round_frame(rounds: pd.DataFrame, start: datetime) -> pd.DataFrame:
    """The rounds with ``selection_s``, ``report_s``, ``duration_s`` (s) and ``opened_utc``
    (ISO 8601 with ``Z``) added."""
    out = rounds.copy()
    out["selection_s"] = out["selected_s"] - out["opened_s"]
    out["report_s"] = out["closed_s"] - out["selected_s"]
    out["duration_s"] = out["closed_s"] - out["opened_s"]
    opened = pd.Timestamp(start) + pd.to_timedelta(out["opened_s"], unit="s")
    # ISO 8601 UTC with a trailing Z, to the millisecond.
    out["opened_utc"] = opened.dt.tz_convert("UTC").dt.strftime("%Y-%m-%dT%H:%M:%S.%f").str[:-3] + "Z"
    return out


def closed_per_hour(rounds: pd.DataFrame, n_hours: int) -> dict[str, np.ndarray]:
    """Rounds closing in each hour of the horizon, per status (every status of ROUND_STATUS).

    A round that opened before the horizon ended but closed after it counts in the last hour.
    """
    closed_hour = np.minimum(np.floor(rounds["closed_s"].to_numpy() / 3600.0).astype(np.int64),
                             max(n_hours - 1, 0))
    out = {}
    for status in ROUND_STATUS:
        mask = (rounds["status"] == status).to_numpy() & (closed_hour < n_hours)
        out[status] = np.bincount(closed_hour[mask], minlength=n_hours)[:n_hours]
    return out
