"""Rounds: their phases and durations, and how many closed in each hour (docs/metrics.md)."""

from __future__ import annotations

from datetime import datetime
from typing import TYPE_CHECKING

import numpy as np
import pandas as pd

from ..events import ROUND_STATUS

if TYPE_CHECKING:
    from ..config.protocol import SecureAggregation

__all__ = ["round_frame", "closed_per_hour"]


def round_frame(rounds: pd.DataFrame, start: datetime, secure: SecureAggregation | None = None) -> pd.DataFrame:
    """The rounds with ``selection_s``, ``report_s``, ``unmasking_s``, ``duration_s`` (s),
    ``unmask_needed`` and ``opened_utc`` (ISO 8601 with ``Z``) added.

    ``secure``: the run's secure aggregation settings (None: off); ``unmask_needed`` is the
    unmasking answers each round needed, t = ceil(threshold x the round's accepted count), or 0.
    """
    out = rounds.copy()
    out["selection_s"] = out["selected_s"] - out["opened_s"]
    out["report_s"] = out["closed_s"] - out["selected_s"]
    out["unmasking_s"] = out["ended_s"] - out["closed_s"]
    out["duration_s"] = out["ended_s"] - out["opened_s"]
    accepted = out["accepted"].to_numpy()
    needed = {int(n): (secure.needed(int(n)) if secure is not None else 0) for n in np.unique(accepted)}
    out["unmask_needed"] = out["accepted"].map(needed).to_numpy(dtype=np.int32)
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
