"""Waste, abandonment and round failure by region and by hour of day (docs/metrics.md).

A round has no region and no local hour: its devices come from many. So a region's (or a
local hour's) abandonment is the share of its accepted participations that were in rounds
the selection timeout ended (`selection-timeout`), and its failure the share that were in
rounds that reached no commit for another reason (`report-deadline`, `server-outage`,
`unmasking-failed`). By UTC hour the rows follow the hour in which each round opened, so
a round and its participations share a row, and the rounds are counted too.
"""

from __future__ import annotations

from datetime import datetime
from typing import Any

import numpy as np
import pandas as pd

from ..events import json_key
from .waste import WORK_COLUMNS, work_by_group

__all__ = ["ABANDONED", "FAILED", "CLOCKS", "participation_status", "outcomes_by_region", "outcomes_by_hour",
           "outcomes_part", "utc_hour", "local_hour"]

ABANDONED = ("selection-timeout",)
"""Round statuses counted as abandoned: the selection ended without enough devices."""
FAILED = ("report-deadline", "server-outage", "unmasking-failed")
"""Round statuses counted as failed: the round had its devices but did not commit."""
CLOCKS = ("utc", "local")
"""The clocks of ``outcomes_by_hour``: the UTC hour the round opened; the device's local hour at acceptance."""

_ROUND_COUNTS = ["rounds", "rounds_committed", "rounds_abandoned", "rounds_failed"]
_SUMMARY_FIGURES = ("accepted", "abandoned_share", "failed_share", "compute_fraction", "bytes_fraction",
                    "energy_fraction", "examples_fraction")
_PEAK_FIGURES = ("abandoned_share", "failed_share", "compute_fraction")


def participation_status(parts: pd.DataFrame, rounds: pd.DataFrame) -> np.ndarray:
    """The status of each participation's round (text), looked up by round number."""
    status = pd.Series(rounds["status"].astype(str).to_numpy(), index=rounds["round"].to_numpy())
    found = status.reindex(parts["round"].to_numpy())
    if found.isna().any():
        missing = int(parts["round"].to_numpy()[found.isna().to_numpy()][0])
        raise ValueError(f"participations: round {missing} is not in the rounds table")
    return found.to_numpy(dtype=object)


def utc_hour(start: datetime, seconds: np.ndarray) -> np.ndarray:
    """The UTC hour of day (0-23) at each time, in seconds from ``start``."""
    offset = start.hour * 3600.0 + start.minute * 60.0 + start.second + start.microsecond / 1e6
    return (np.floor((offset + np.asarray(seconds, dtype=float)) / 3600.0) % 24).astype(np.int64)


def local_hour(start: datetime, seconds: np.ndarray, zones: np.ndarray) -> np.ndarray:
    """The local hour of day (0-23) at each time (seconds from ``start``) in each row's IANA zone."""
    instants = pd.DatetimeIndex(pd.Timestamp(start) + pd.to_timedelta(np.asarray(seconds, dtype=float), unit="s"))
    zones = np.asarray(zones, dtype=object)
    hours = np.zeros(len(instants), dtype=np.int64)
    for zone in pd.unique(zones):
        mine = zones == zone
        hours[mine] = instants[mine].tz_convert(str(zone)).hour.to_numpy()
    return hours


def _outcome_rows(labelled: pd.DataFrame, status: np.ndarray, codes: np.ndarray, k: int) -> pd.DataFrame:
    """Per group (``codes`` 0 .. k-1 of each participation): counts by round outcome, shares and work."""
    codes = np.asarray(codes, dtype=np.int64)

    def count(mask: np.ndarray) -> np.ndarray:
        return np.bincount(codes[mask], minlength=k).astype(np.int64)

    every = np.ones(len(labelled), dtype=bool)
    accepted = count(every)
    table = pd.DataFrame({
        "accepted": accepted,
        "in_committed": count(status == "committed"),
        "abandoned": count(np.isin(status, ABANDONED)),
        "failed": count(np.isin(status, FAILED)),
        "reports": count(labelled["used"].to_numpy(dtype=bool)),
    })
    with np.errstate(divide="ignore", invalid="ignore"):
        table["abandoned_share"] = table["abandoned"] / np.where(accepted > 0, accepted, np.nan)
        table["failed_share"] = table["failed"] / np.where(accepted > 0, accepted, np.nan)
    unused = ~labelled["used"].to_numpy(dtype=bool)
    work = work_by_group(labelled, labelled[unused], codes, codes[unused], k)
    return pd.concat([table, work[WORK_COLUMNS]], axis=1)


def outcomes_by_region(labelled: pd.DataFrame, status: np.ndarray, region_names: list[str]) -> pd.DataFrame:
    """One row per region: its participations by their round's outcome, and its work used and wasted.

    ``labelled`` is a :func:`fleetsim.metrics.waste.labelled_frame`; ``status`` the status of
    each row's round (:func:`participation_status`).
    """
    table = _outcome_rows(labelled, status, labelled["region"].cat.codes.to_numpy(), len(region_names))
    table.insert(0, "region", region_names)
    return table


def outcomes_by_hour(labelled: pd.DataFrame, status: np.ndarray, rounds: pd.DataFrame, start: datetime,
                     zones: dict[str, str]) -> pd.DataFrame:
    """48 rows: ``clock`` ``utc`` (hours 0-23 of the rounds' opening, UTC), then ``local`` (hours
    0-23 of the participations' acceptance, in the device's region's zone).

    UTC rows also count the rounds that opened in the hour by outcome; local rows leave those
    columns empty, as a round has no local hour. ``zones`` maps each region to its IANA zone.
    """
    opened = pd.Series(rounds["opened_s"].to_numpy(dtype=float), index=rounds["round"].to_numpy())
    part_opened = opened.reindex(labelled["round"].to_numpy()).to_numpy(dtype=float)
    region = labelled["region"]
    zone_of = np.array([zones[str(r)] for r in region.cat.categories], dtype=object)[region.cat.codes.to_numpy()]
    frames = []
    for clock, hours in (("utc", utc_hour(start, part_opened)),
                         ("local", local_hour(start, labelled["accepted_s"].to_numpy(dtype=float), zone_of))):
        table = _outcome_rows(labelled, status, hours, 24)
        table.insert(0, "clock", clock)
        table.insert(1, "hour_of_day", np.arange(24))
        frames.append(table)
    hours = utc_hour(start, rounds["opened_s"].to_numpy(dtype=float))
    text = rounds["status"].astype(str).to_numpy()
    counts = {
        "rounds": np.bincount(hours, minlength=24),
        "rounds_committed": np.bincount(hours[text == "committed"], minlength=24),
        "rounds_abandoned": np.bincount(hours[np.isin(text, ABANDONED)], minlength=24),
        "rounds_failed": np.bincount(hours[np.isin(text, FAILED)], minlength=24),
    }
    for i, name in enumerate(_ROUND_COUNTS):  # whole numbers, empty on the local rows
        frames[0].insert(2 + i, name, pd.array(counts[name], dtype="Int64"))
        frames[1].insert(2 + i, name, pd.array([None] * 24, dtype="Int64"))
    return pd.concat(frames, ignore_index=True)


def _peaks(table: pd.DataFrame) -> dict[str, Any]:
    """Per figure of :data:`_PEAK_FIGURES`, its largest value over the hours with a participation
    and that hour (the first on a tie); None when no hour had one."""
    out: dict[str, Any] = {}
    for figure in _PEAK_FIGURES:
        values = table[figure].to_numpy(dtype=float)
        finite = np.isfinite(values)
        if finite.any():
            at = int(np.argmax(np.where(finite, values, -np.inf)))
            out[f"{figure}_peak"], out[f"{figure}_peak_hour"] = float(values[at]), int(table["hour_of_day"].iloc[at])
        else:
            out[f"{figure}_peak"], out[f"{figure}_peak_hour"] = None, None
    return out


def outcomes_part(by_region: pd.DataFrame, by_hour: pd.DataFrame) -> dict[str, Any]:
    """``outcomes`` of summary.json: per region its accepted participations, abandonment and
    failure shares and wasted fractions; per clock the hour each share peaked in."""
    return {
        "by_region": {row["region"]: {f: row[f] for f in _SUMMARY_FIGURES} for row in by_region.to_dict("records")},
        **{f"by_hour_{json_key(clock)}": _peaks(by_hour[by_hour["clock"] == clock]) for clock in CLOCKS},
    }
