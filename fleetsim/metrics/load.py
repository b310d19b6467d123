"""The hourly view: eligible devices (census), check-ins, acceptances and devices working."""

from __future__ import annotations

from datetime import datetime, timedelta

import numpy as np
import pandas as pd

from ..analysis import concurrency
from ..events import json_key
from ..units import format_instant

__all__ = ["hourly_table"]


def _eligible_by_hour(census: pd.DataFrame, hour_index: np.ndarray,
                     region_names: list[str]) -> tuple[pd.DataFrame, pd.DataFrame]:
    """Mean eligible devices per hour in all, its standard error and devices drawn; and the
    same mean by region as a long table (hour, region, eligible)."""
    census_h = census.assign(hour=np.floor(census["time_s"].to_numpy() / 3600.0).astype(np.int64))
    per_region = census_h.groupby(["hour", "region"], observed=False)["eligible_est"].sum().unstack("region")
    samples_per_hour = census_h.groupby("hour")["time_s"].nunique()
    per_region = per_region.div(samples_per_hour, axis=0).reindex(hour_index).fillna(0.0)
    by_region = pd.DataFrame({
        "hour": np.repeat(hour_index, len(region_names)),
        "region": pd.Categorical(np.tile(region_names, hour_index.size), categories=region_names),
        "eligible": per_region[region_names].to_numpy().reshape(-1),
    })
    out = pd.DataFrame(index=range(hour_index.size))
    out["eligible"] = per_region.sum(axis=1).to_numpy()
    # Mean of independent counts: variance = sum of the counts' variances / counts^2.
    per_hour_var = census_h.assign(v=census_h["eligible_se"] ** 2).groupby("hour")["v"].sum()
    per_hour_var = per_hour_var.div(samples_per_hour ** 2).reindex(hour_index).fillna(0.0)
    out["eligible_se"] = np.sqrt(per_hour_var.to_numpy())
    per_hour_drawn = census_h.groupby("hour")["sampled"].sum().div(samples_per_hour)
    out["eligible_drawn"] = per_hour_drawn.reindex(hour_index).fillna(0.0).to_numpy()
    return out, by_region


def hourly_table(
    start: datetime,
    n_hours: int,
    closed: dict[str, np.ndarray],
    census: pd.DataFrame,
    parts: pd.DataFrame,
    region_names: list[str],
    checkin_every: float,
) -> tuple[pd.DataFrame, pd.DataFrame, int]:
    """The ``hourly`` table, ``hourly_eligible_by_region`` and the peak number of devices
    working at once over the run.

    ``closed``: rounds closed per hour by status; ``checkin_every`` (s): the check-in
    interval, so check-ins per second = mean eligible devices / interval.
    """
    hour_index = np.arange(n_hours)
    hourly = pd.DataFrame({"hour": hour_index})
    hourly["hour_utc"] = [format_instant(start + timedelta(hours=int(h))) for h in hour_index]
    for status, counts in closed.items():
        hourly[json_key(status)] = counts
    eligible, by_region = _eligible_by_hour(census, hour_index, region_names)
    hourly = pd.concat([hourly, eligible], axis=1)
    by_region.insert(1, "hour_utc", hourly["hour_utc"].to_numpy()[by_region["hour"].to_numpy()])
    hourly["checkins_per_s"] = hourly["eligible"] / checkin_every
    accept_hour = np.floor(parts["accepted_s"].to_numpy() / 3600.0).astype(np.int64)
    ok = accept_hour < n_hours
    hourly["accepted"] = np.bincount(accept_hour[ok], minlength=n_hours)[:n_hours]
    # Devices in training at once: sweep over task starts and ends.
    peak, hourly_peak = concurrency(parts["accepted_s"].to_numpy(), parts["ended_s"].to_numpy(), n_hours)
    hourly["peak_working"] = hourly_peak
    return hourly, by_region, peak
