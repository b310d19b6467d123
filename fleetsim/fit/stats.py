"""Sufficient statistics of interval logs: time on, time off and transitions per cell.

A *cell* is (device type, region, chain, day kind, local hour). For a two-state chain with
rates piecewise constant per cell, the likelihood of fully observed paths depends on the data
only through each cell's time spent on and off and its counts of off->on (``up``) and on->off
(``down``) changes, so these four numbers are all a fit needs. They add over devices, so a log
split into partitions holding whole devices gives the same totals partition by partition
(:func:`dask_interval_statistics`). Times are summed as whole milliseconds (each piece rounded
once), so the totals, and every estimate made from them, are identical however the devices
are split.

The chains read from a device's rows:

- ``idle``, ``charging``, ``unmetered``: each signal as it is seen, inside the ``observed``
  intervals;
- ``settled``: all three signals on at once (the intersection of their on-intervals): how the
  data tells how the signals go together;
- ``own-idle``, ``own-charging``, ``own-unmetered``: the signal while not all three are on.
  Under the fleet model a device with all three signals not on is not settled, so a signal
  that is on then is on by its own chain, which leaves "on" at rate 1/d_own: time on and
  on->off changes counted only there estimate the own chain's mean on-duration exactly (the
  window closes, uncounted, when all three come on). Only their ``on_ms`` and ``down`` are used.

Each interval is cut at the 15-minute UTC grid points (every zone offset in use is a multiple
of 15 minutes, so a piece lies within one local hour) and each piece is mapped, via zoneinfo,
to its local hour and to the region's weekday or weekend. A change at instant t counts in the
step that ends at or after t (the rate that produced it is the one in force just before).
"""

from __future__ import annotations

from collections.abc import Mapping
from zoneinfo import ZoneInfo

import numpy as np
import pandas as pd

from ..config import SIGNALS
from ..errors import FleetsimError
from ..signals import STEP_S

__all__ = [
    "MARGINAL", "OWN", "CHAIN_NAMES", "DAY_KINDS", "STAT_COLUMNS", "DEFAULT_WEEKEND", "step_calendar",
    "interval_statistics", "dask_interval_statistics", "sum_statistics", "region_zones",
]

MARGINAL = SIGNALS + ("settled",)
"""Chains fitted as two-state chains of their own: the three signals and the all-on state."""
OWN = tuple(f"own-{s}" for s in SIGNALS)
"""The signals seen while not all three are on: their own chains' on-spells."""
CHAIN_NAMES = MARGINAL + OWN
DAY_KINDS = ("weekday", "weekend")
KEYS = ["device_type", "region", "chain", "day", "hour"]
STAT_COLUMNS = KEYS + ["on_ms", "off_ms", "up", "down"]
DEFAULT_WEEKEND = frozenset({6, 7})
"""Saturday and Sunday (ISO day numbers): the weekend of a region not told otherwise."""

_LAYERS = ("observed",) + SIGNALS


def step_calendar(zone: str, weekend: frozenset[int], k0: int, k1: int) -> tuple[np.ndarray, np.ndarray]:
    """Local hour and weekend flag (1 weekend, 0 weekday) of UTC grid steps k0..k1 (step k
    starts at k x 15 min after the Unix epoch), by zoneinfo."""
    moments = pd.to_datetime(np.arange(k0, k1 + 1, dtype=np.int64) * int(STEP_S), unit="s", utc=True)
    local = moments.tz_convert(ZoneInfo(zone))
    hours = np.asarray(local.hour, dtype=np.int64)
    days = np.asarray(local.dayofweek, dtype=np.int64) + 1  # ISO: Monday 1 ... Sunday 7
    return hours, np.isin(days, sorted(weekend)).astype(np.int64)


def region_zones(frame: pd.DataFrame, what: str) -> dict[str, str]:
    """Each region's time zone as the rows give it; a region with two zones is refused."""
    pairs = frame[["region", "timezone"]].drop_duplicates().astype(str)
    zones: dict[str, str] = {}
    for region, zone in sorted(pairs.itertuples(index=False)):
        if region in zones and zones[region] != zone:
            raise FleetsimError(f"{what}: region {region!r} has two time zones, {zones[region]!r} and {zone!r}")
        zones[region] = zone
    return zones


def _segments(frame: pd.DataFrame) -> tuple[np.ndarray, ...]:
    """Split each device's timeline at every row boundary: (device code, start, end, state
    [n, 4] of observed/idle/charging/unmetered) of each segment, in time order per device."""
    device = pd.factorize(frame["device_id"], sort=True)[0]
    layer = pd.Categorical(frame["signal"].astype(str), categories=_LAYERS).codes.astype(np.int64)
    if (layer < 0).any():
        raise FleetsimError(f"intervals: unknown signal {frame['signal'][layer < 0].iloc[0]!r}")
    start, end = frame["start_s"].to_numpy(float), frame["end_s"].to_numpy(float)
    dev = np.concatenate([device, device])
    time = np.concatenate([start, end])
    lay = np.concatenate([layer, layer])
    delta = np.concatenate([np.ones(len(frame), np.int64), -np.ones(len(frame), np.int64)])
    order = np.lexsort((time, dev))
    dev, time, lay, delta = dev[order], time[order], lay[order], delta[order]
    onehot = np.zeros((dev.size, len(_LAYERS)), dtype=np.int64)
    onehot[np.arange(dev.size), lay] = delta
    state = np.cumsum(onehot, axis=0) > 0  # each device's deltas sum to 0: a global cumsum is per device
    last = np.ones(dev.size, dtype=bool)  # the state after the last event at each (device, instant)
    last[:-1] = (dev[1:] != dev[:-1]) | (time[1:] != time[:-1])
    dev, time, state = dev[last], time[last], state[last]
    same = dev[1:] == dev[:-1]
    return dev[:-1][same], time[:-1][same], time[1:][same], state[:-1][same]


def _indicators(state: np.ndarray) -> tuple[list[np.ndarray], list[np.ndarray]]:
    """Per chain (CHAIN_NAMES order): whether each segment is on, and whether it is in the
    chain's window (observed; for the own chains, observed and not all on)."""
    observed = state[:, 0]
    signal = [state[:, 1 + s] for s in range(len(SIGNALS))]
    all_on = signal[0] & signal[1] & signal[2]
    on = signal + [all_on] + [s & ~all_on for s in signal]
    window = [observed] * len(MARGINAL) + [observed & ~all_on] * len(OWN)
    return on, window


def interval_statistics(
    intervals: pd.DataFrame, weekend_days: Mapping[str, frozenset[int]] | None = None
) -> pd.DataFrame:
    """Time on/off (ms) and up/down changes per cell (columns :data:`STAT_COLUMNS`) of the
    ``intervals`` frame (the telemetry reader's columns). ``weekend_days`` maps a region to
    its weekend's ISO day numbers (default Saturday and Sunday). Rows of one device must all
    be in the frame: the result adds over frames holding disjoint sets of devices."""
    weekend_days = weekend_days or {}
    if intervals is None or not len(intervals):
        return pd.DataFrame({c: pd.Series(dtype=object if c in KEYS[:4] else np.int64) for c in STAT_COLUMNS})
    zones = region_zones(intervals, "intervals")
    firsts = intervals.drop_duplicates("device_id").sort_values("device_id")
    dev_type = firsts["device_type"].astype(str).to_numpy()
    dev_region = firsts["region"].astype(str).to_numpy()
    dev, a, b, state = _segments(intervals)
    on, window = _indicators(state)
    keep = state[:, 0]
    # Pieces of observed segments between grid points.
    seg = np.flatnonzero(keep & (b > a))
    k0 = np.floor(a[seg] / STEP_S).astype(np.int64)
    k1 = np.ceil(b[seg] / STEP_S).astype(np.int64) - 1
    count = k1 - k0 + 1
    piece_seg = np.repeat(seg, count)
    piece_k = np.repeat(k0, count) + (np.arange(count.sum()) - np.repeat(np.cumsum(count) - count, count))
    lo = np.maximum(a[piece_seg], piece_k * STEP_S)
    hi = np.minimum(b[piece_seg], (piece_k + 1) * STEP_S)
    ms = np.rint((hi - lo) * 1000.0).astype(np.int64)
    # Boundaries between a device's consecutive segments: possible changes.
    nxt = np.flatnonzero((dev[1:] == dev[:-1]) & (b[:-1] == a[1:]))
    change_k = np.ceil(b[nxt] / STEP_S).astype(np.int64) - 1
    parts = []
    group_names = sorted(set(zip(dev_type, dev_region, strict=True)))
    group_code = {g: i for i, g in enumerate(group_names)}
    dev_group = np.array([group_code[g] for g in zip(dev_type, dev_region, strict=True)], dtype=np.int64)
    cells_per_chain = len(group_names) * 2 * 24

    def cells(devices: np.ndarray, steps: np.ndarray) -> np.ndarray:
        """Cell index (group, day kind, hour) of each (device, grid step)."""
        out = np.empty(devices.size, dtype=np.int64)
        region = dev_region[devices]
        for name in sorted(set(region)):
            mask = region == name
            ks = steps[mask]
            hours, weekend = step_calendar(zones[name], weekend_days.get(name, DEFAULT_WEEKEND),
                                           int(ks.min()), int(ks.max()))
            out[mask] = (dev_group[devices[mask]] * 2 + weekend[ks - ks.min()]) * 24 + hours[ks - ks.min()]
        return out

    piece_cell = cells(dev[piece_seg], piece_k) if piece_seg.size else np.empty(0, np.int64)
    change_cell = cells(dev[nxt], change_k) if nxt.size else np.empty(0, np.int64)
    for c, name in enumerate(CHAIN_NAMES):
        x, w = on[c], window[c]
        px, pw = x[piece_seg], w[piece_seg]
        on_ms = np.bincount(piece_cell, weights=ms * (px & pw), minlength=cells_per_chain)
        off_ms = np.bincount(piece_cell, weights=ms * (~px & pw), minlength=cells_per_chain)
        inside = w[nxt] & w[nxt + 1]
        up = np.bincount(change_cell, weights=inside & ~x[nxt] & x[nxt + 1], minlength=cells_per_chain)
        down = np.bincount(change_cell, weights=inside & x[nxt] & ~x[nxt + 1], minlength=cells_per_chain)
        idx = np.arange(cells_per_chain)
        g, rest = np.divmod(idx, 48)
        part = pd.DataFrame({
            "device_type": [group_names[i][0] for i in g], "region": [group_names[i][1] for i in g],
            "chain": name, "day": np.array(DAY_KINDS)[rest // 24], "hour": rest % 24,
            # bincount sums in float64: exact for integers below 2**53 ms (285,000 years)
            "on_ms": np.rint(on_ms).astype(np.int64), "off_ms": np.rint(off_ms).astype(np.int64),
            "up": np.rint(up).astype(np.int64), "down": np.rint(down).astype(np.int64),
        })
        parts.append(part)
    out = pd.concat(parts, ignore_index=True)
    return out.sort_values(KEYS, kind="stable").reset_index(drop=True)


def sum_statistics(parts: pd.DataFrame) -> pd.DataFrame:
    """Add statistics rows of the same cell (from several partitions); sorted by cell."""
    summed = parts.groupby(KEYS, sort=True, observed=True)[["on_ms", "off_ms", "up", "down"]].sum()
    return summed.reset_index()[STAT_COLUMNS]


def dask_interval_statistics(intervals, weekend_days: Mapping[str, frozenset[int]] | None = None) -> pd.DataFrame:
    """:func:`interval_statistics` of a Dask DataFrame too large for memory: the rows are
    shuffled so that each partition holds whole devices, the statistics computed per
    partition (``map_partitions``) and summed. Identical to the pandas result."""
    meta = pd.DataFrame({c: pd.Series(dtype=object if c in KEYS[:4] else np.int64) for c in STAT_COLUMNS})
    by_device = intervals.shuffle("device_id")
    parts = by_device.map_partitions(interval_statistics, weekend_days, meta=meta).compute()
    return sum_statistics(parts)
