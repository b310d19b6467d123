"""Time in each local hour: interval logs cut at the 15-minute UTC grid and mapped by zoneinfo.

Every zone offset in use is a multiple of 15 minutes, so each step of the grid the engine uses
(:data:`fleetsim.signals.STEP_S`, points at whole quarter hours UTC) lies within one local
hour and one local day, daylight-saving changes included; a step's local hour and weekday
come from :func:`fleetsim.signals.local_calendar`. The time covered in each step is summed
over all intervals at once from their sorted starts and ends.
"""

from __future__ import annotations

from datetime import datetime, timezone

import numpy as np
import pandas as pd

from ..signals import STEP_S, local_calendar

__all__ = ["time_by_local_hour", "HOUR_COLUMNS"]

HOUR_COLUMNS = ["timezone", "signal", "step_s", "hour", "weekday", "seconds"]
"""Columns of :func:`time_by_local_hour`."""


def _covered(start: np.ndarray, end: np.ndarray, grid: np.ndarray) -> np.ndarray:
    """Total time the intervals cover in each step between consecutive ``grid`` points.

    F(t) = sum over intervals of the part of [start, end) before t
         = sum_{start < t} (t - start) - sum_{end < t} (t - end), from prefix sums."""
    base = grid[0]
    s, e, t = np.sort(start) - base, np.sort(end) - base, grid - base
    cs, ce = np.concatenate([[0.0], np.cumsum(s)]), np.concatenate([[0.0], np.cumsum(e)])
    ns, ne = np.searchsorted(s, t, side="left"), np.searchsorted(e, t, side="left")
    before = (ns * t - cs[ns]) - (ne * t - ce[ne])
    return np.diff(before)


def time_by_local_hour(intervals: pd.DataFrame) -> pd.DataFrame:
    """Seconds of each signal (``observed`` included) in each 15-minute UTC step, summed over
    devices, per time zone: :data:`HOUR_COLUMNS`, ``step_s`` the step's start (Unix s),
    ``hour`` its local hour (0-23) and ``weekday`` its local ISO weekday (1 Monday ... 7 Sunday).

    Divide a signal's seconds by the ``observed`` seconds of the same steps for its on-fraction.
    """
    parts = []
    for (zone, signal), part in intervals.groupby(["timezone", "signal"], observed=True, sort=True):
        start, end = part["start_s"].to_numpy(float), part["end_s"].to_numpy(float)
        k0, k1 = int(np.floor(start.min() / STEP_S)), int(np.ceil(end.max() / STEP_S))
        grid = np.arange(k0, max(k1, k0 + 1) + 1) * STEP_S
        hours, days = local_calendar(str(zone), datetime.fromtimestamp(grid[0], tz=timezone.utc), grid.size - 1)
        parts.append(pd.DataFrame({"timezone": zone, "signal": str(signal), "step_s": grid[:-1],
                                   "hour": hours.astype(np.int64), "weekday": days.astype(np.int64),
                                   "seconds": _covered(start, end, grid)}))
    if not parts:
        return pd.DataFrame({c: pd.Series([], dtype=object if c in ("timezone", "signal") else float)
                             for c in HOUR_COLUMNS})
    return pd.concat(parts, ignore_index=True)[HOUR_COLUMNS]
