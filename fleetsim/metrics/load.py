"""The hourly view and the server's load: eligible devices (census), check-ins answered and
turned away (estimated from the census), acceptances, rounds held
and open, and devices working (docs/metrics.md)."""

from __future__ import annotations

from datetime import datetime, timedelta
from typing import Any

import numpy as np
import pandas as pd

from ..analysis import concurrency
from ..events import json_key
from ..units import format_instant

__all__ = ["hourly_table", "hour_seconds", "open_by_hour", "server_load_part", "rounds_open"]

ESTIMATED = "estimated"
"""The basis of the check-in figures: estimated from the census (the engine does not count
check-ins one by one, with or without pacing)."""


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


def hour_seconds(n_hours: int, horizon_s: float) -> np.ndarray:
    """Seconds of the horizon in each hour (the last hour of a horizon that is not a whole
    number of hours is partial)."""
    return np.clip(horizon_s - 3600.0 * np.arange(n_hours), 0.0, 3600.0)


def stretch_at(times: np.ndarray, rounds: pd.DataFrame) -> np.ndarray:
    """The pacing stretch m in force at each time: that of the last round opened at or before it
    (the server sets it as a round opens; a hold keeps the one before); before the first round
    of the horizon, that round's. 1 when the rounds carry no ``stretch``."""
    if "stretch" not in rounds.columns or not len(rounds):
        return np.ones(len(times))
    stretch = rounds["stretch"].to_numpy(dtype=float)
    at = np.searchsorted(rounds["opened_s"].to_numpy(dtype=float), times, side="right") - 1
    return stretch[np.maximum(at, 0)]


def estimated_rates(record: Any, rounds: pd.DataFrame) -> tuple[np.ndarray, np.ndarray]:
    """Census times and the check-ins per second estimated at each: the eligible estimate summed
    over the fleet / (stretch x check-in interval); the stretch is 1 without pacing."""
    per_count = record.census.groupby("time_s")["eligible_est"].sum()
    times = per_count.index.to_numpy(dtype=float)
    paced = record.config.rounds.pacing is not None
    stretch = stretch_at(times, rounds) if paced else np.ones(times.size)
    return times, per_count.to_numpy(dtype=float) / (stretch * float(record.config.rounds.checkin_every))


def _turned_away(accepted: np.ndarray | float, answered: np.ndarray | float) -> Any:
    """1 - accepted / answered; NaN where nothing was answered."""
    a, b = np.asarray(accepted, dtype=float), np.asarray(answered, dtype=float)
    with np.errstate(divide="ignore", invalid="ignore"):
        return np.where(b > 0, 1.0 - a / b, np.nan)


def open_by_hour(starts: np.ndarray, ends: np.ndarray, n_hours: int, horizon_s: float) -> np.ndarray:
    """Time-average number of intervals [start, end) open in each hour of the horizon: the time
    they overlap the hour over the hour's length in the horizon."""
    edges = 3600.0 * np.arange(n_hours + 1)
    out = np.zeros(n_hours)
    for h in range(n_hours):
        lo, hi = edges[h], min(edges[h + 1], horizon_s)
        if hi > lo:
            out[h] = np.clip(np.minimum(ends, hi) - np.maximum(starts, lo), 0.0, None).sum() / (hi - lo)
    return out


def rounds_open(rounds: pd.DataFrame, horizon_s: float) -> tuple[int, float]:
    """Most rounds open at once (from ``opened_s`` to ``ended_s``) and their time-average over
    the horizon."""
    opened, ended = rounds["opened_s"].to_numpy(dtype=float), rounds["ended_s"].to_numpy(dtype=float)
    peak, _ = concurrency(opened, ended, 1)
    inside = np.clip(ended, 0.0, horizon_s) - np.clip(opened, 0.0, horizon_s)
    return int(peak), float(inside.sum() / horizon_s) if horizon_s > 0 else float("nan")


def hourly_table(
    start: datetime,
    horizon_s: float,
    closed: dict[str, np.ndarray],
    record: Any,
    rounds: pd.DataFrame,
    region_names: list[str],
) -> tuple[pd.DataFrame, pd.DataFrame, int]:
    """The ``hourly`` table, ``hourly_eligible_by_region`` and the peak number of devices
    working at once over the run.

    ``closed``: rounds closed per hour by status; ``record``: the run's RunRecord (census,
    participations, the check-in interval); ``rounds``:
    :func:`fleetsim.metrics.rounds.round_frame`'s. Check-ins per second are the hour's mean of
    :func:`estimated_rates`.
    """
    n_hours = int(np.ceil(horizon_s / 3600.0))
    parts = record.participations
    hour_index = np.arange(n_hours)
    hourly = pd.DataFrame({"hour": hour_index})
    hourly["hour_utc"] = [format_instant(start + timedelta(hours=int(h))) for h in hour_index]
    for status, counts in closed.items():
        hourly[json_key(status)] = counts
    eligible, by_region = _eligible_by_hour(record.census, hour_index, region_names)
    hourly = pd.concat([hourly, eligible], axis=1)
    by_region.insert(1, "hour_utc", hourly["hour_utc"].to_numpy()[by_region["hour"].to_numpy()])
    accepted_s = parts["accepted_s"].to_numpy()
    accept_hour = np.floor(accepted_s / 3600.0).astype(np.int64)
    ok = accepted_s < horizon_s  # the last hour of a horizon that is not whole ends with it
    accepted = np.bincount(accept_hour[ok], minlength=n_hours)[:n_hours]
    seconds = hour_seconds(n_hours, horizon_s)
    times, rates = estimated_rates(record, rounds)
    per_hour = pd.Series(rates).groupby(np.floor(times / 3600.0).astype(np.int64)).mean()
    hourly["checkins_per_s"] = per_hour.reindex(hour_index).fillna(0.0).to_numpy()
    hourly["turned_away_share"] = _turned_away(accepted, hourly["checkins_per_s"].to_numpy() * seconds)
    hourly["accepted"] = accepted
    # Devices working at once: sweep over task starts and ends (a device accepted after the
    # selection waits, not working, until its task starts).
    peak, hourly_peak = concurrency(parts["started_s"].to_numpy(), parts["ended_s"].to_numpy(), n_hours)
    hourly["peak_working"] = hourly_peak
    open_hour = np.floor(rounds["opened_s"].to_numpy(dtype=float) / 3600.0).astype(np.int64)
    inside = (open_hour >= 0) & (open_hour < n_hours)
    hourly["held_s"] = np.bincount(open_hour[inside], weights=rounds["held_s"].to_numpy(dtype=float)[inside],
                                   minlength=n_hours)[:n_hours]
    hourly["rounds_open"] = open_by_hour(rounds["opened_s"].to_numpy(dtype=float),
                                         rounds["ended_s"].to_numpy(dtype=float), n_hours, horizon_s)
    return hourly, by_region, peak


def _load_totals(record: Any, rounds: pd.DataFrame, horizon_s: float) -> tuple[str, float, float]:
    """(basis, check-ins answered, accepted) over the horizon, estimated: the mean over the
    census counts of :func:`estimated_rates` x horizon, and the participations accepted within
    the horizon."""
    _, rates = estimated_rates(record, rounds)
    rate = float(rates.mean()) if rates.size else 0.0
    accepted = record.participations["accepted_s"].to_numpy()
    return ESTIMATED, rate * horizon_s, float(((accepted >= 0) & (accepted < horizon_s)).sum())


def server_load_part(record: Any, hourly: pd.DataFrame, rounds: pd.DataFrame, horizon_s: float) -> dict[str, Any]:
    """``server_load`` of summary.json: check-ins per second (mean; peak hour and when), the
    share turned away, the basis of both, and the rounds the server held before opening."""
    basis, answered, accepted = _load_totals(record, rounds, horizon_s)
    rates = hourly["checkins_per_s"].to_numpy(dtype=float)
    at = int(np.nanargmax(rates)) if rates.size and np.isfinite(rates).any() else None
    held = rounds["held_s"].to_numpy(dtype=float)
    opened = rounds["opened_s"].to_numpy(dtype=float)
    # A hold runs from opened_s - held_s to opened_s; holds never overlap (one round waits at a time).
    inside = np.clip(opened, 0.0, horizon_s) - np.clip(opened - held, 0.0, horizon_s)
    return {
        "basis": basis,
        "checkins_per_s_mean": answered / horizon_s if horizon_s > 0 else float("nan"),
        "checkins_per_s_peak": float(rates[at]) if at is not None else float("nan"),
        "peak_hour_utc": str(hourly["hour_utc"].iloc[at]) if at is not None else None,
        "checkins": answered,
        "accepted": accepted,
        "turned_away_share": float(_turned_away(accepted, answered)),
        "rounds_held": int((held > 0).sum()),
        "held_s": float(held.sum()),
        "held_share": float(inside.sum() / horizon_s) if horizon_s > 0 else float("nan"),
    }
