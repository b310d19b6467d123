"""Replay: the logged devices' own signals drive the run instead of the fleet model's chains.

A :class:`Replay` holds, for each logged device, its type and region names and, per signal,
the intervals the signal was on, in run time (seconds from the horizon start): the interval
logs of docs/telemetry.md, clipped to the times the device was logged (outside them every
signal is off: the device cannot check in). :class:`ReplaySignals` answers the engine's
questions of the chains (:class:`fleetsim.chains.SignalState`) from them: a look at a
signal is its logged state, a task's path is the logged changes, and a look changes nothing.
There is no settled state: the logged signals already hold whatever correlation the
devices had. Batteries, traits, the workload and the round protocol come from the fleet file.

The intervals are sorted by line (device x 3 + signal) and start; a look is a binary search
within the device's own line, a few steps for a line of a few dozen intervals, vectorised
over every device looked at.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
import pandas as pd

from .chains import Draws, Paths, SignalState
from .config import SIGNALS
from .signals import CHAINS, SETTLED, SignalTables

__all__ = ["Replay", "ReplaySignals", "replay_from_frame", "first_above"]

_S = len(SIGNALS)


@dataclass(frozen=True)
class Replay:
    """Logged devices and their signals' on-intervals (run time, s).

    ``device_id``, ``device_type`` and ``region`` name each device; ``line`` (device x 3 +
    signal index), ``start`` and ``end`` list the on-intervals, sorted by line and start,
    touching or overlapping intervals of a line merged; ``first_s`` and ``last_s`` are the
    logs' span (the earliest and latest logged instant of any device)."""

    device_id: np.ndarray
    device_type: np.ndarray
    region: np.ndarray
    line: np.ndarray
    start: np.ndarray
    end: np.ndarray
    first_s: float
    last_s: float

    @property
    def size(self) -> int:
        return int(self.device_id.size)

    @classmethod
    def from_intervals(cls, devices: dict[str, np.ndarray], signal: np.ndarray, device: np.ndarray,
                       start: np.ndarray, end: np.ndarray, observed: tuple[np.ndarray, np.ndarray, np.ndarray]
                       ) -> Replay:
        """Build from per-device names (``devices``: ``device_id``, ``device_type``,
        ``region``), the on-intervals (``signal``: index into SIGNALS; ``device``: index
        into the devices) and the observed intervals (device index, start, end). Each
        on-interval is cut to the device's observed intervals."""
        obs_device, obs_start, obs_end = (np.asarray(a) for a in observed)
        device = np.asarray(device, dtype=np.int64)
        signal = np.asarray(signal, dtype=np.int64)
        start, end = np.asarray(start, dtype=float), np.asarray(end, dtype=float)
        keep, lo, hi = _within_observed(device, start, end, obs_device, obs_start, obs_end)
        line = device[keep] * _S + signal[keep]
        line, lo, hi = _merge(line, lo, hi)
        span = (float(obs_start.min()), float(obs_end.max())) if obs_start.size else (0.0, 0.0)
        return cls(np.asarray(devices["device_id"]), np.asarray(devices["device_type"]),
                   np.asarray(devices["region"]), line, lo, hi, *span)


def replay_from_frame(intervals: pd.DataFrame, origin_epoch_s: float) -> Replay:
    """A :class:`Replay` from an interval-log frame (docs/telemetry.md: ``device_id``,
    ``device_type``, ``region``, ``signal`` (a signal name or ``observed``), ``start_s``,
    ``end_s`` in Unix seconds), in run time from ``origin_epoch_s`` (the horizon start).
    Devices are in order of their ids."""
    codes, uniques = pd.factorize(intervals["device_id"], sort=True)  # hashed, then the names sorted
    ids = np.asarray(uniques).astype(str)
    device = codes.astype(np.int64)
    first = np.full(ids.size, -1, dtype=np.int64)
    first[device[::-1]] = np.arange(device.size - 1, -1, -1)  # each device's first row
    names = {
        "device_id": ids,
        "device_type": intervals["device_type"].iloc[first].astype(str).to_numpy(),
        "region": intervals["region"].iloc[first].astype(str).to_numpy(),
    }
    kinds, kind_names = pd.factorize(intervals["signal"])  # a handful of names: map each once
    lookup = np.array([SIGNALS.index(k) if k in SIGNALS else (-2 if k == "observed" else -1)
                       for k in map(str, kind_names)] + [-1], dtype=np.int64)
    code = lookup[kinds]
    start = intervals["start_s"].to_numpy(dtype=float) - origin_epoch_s
    end = intervals["end_s"].to_numpy(dtype=float) - origin_epoch_s
    seen = code == -2
    on = code >= 0
    return Replay.from_intervals(names, code[on], device[on], start[on], end[on],
                                 (device[seen], start[seen], end[seen]))


def _within_observed(device: np.ndarray, start: np.ndarray, end: np.ndarray, obs_device: np.ndarray,
                     obs_start: np.ndarray, obs_end: np.ndarray) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Which intervals lie (partly) in an observed interval of their device, and their parts
    there: each is cut to the observed interval it starts in (the format puts every signal
    row inside one); the others are dropped. Returns the mask and the cut starts and ends."""
    if not obs_device.size or not device.size:
        return np.zeros(device.size, dtype=bool), start[:0], end[:0]
    lo_t = min(float(obs_start.min()), float(start.min()))
    gap = max(float(obs_end.max()), float(end.max())) - lo_t + 2.0
    obs_key = obs_device.astype(np.int64) * gap + (obs_start - lo_t)
    order = np.argsort(obs_key, kind="stable")
    obs_key, o_dev, o_start, o_end = obs_key[order], obs_device[order], obs_start[order], obs_end[order]
    k = np.searchsorted(obs_key, device.astype(np.int64) * gap + (start - lo_t), side="right") - 1
    safe = np.maximum(k, 0)
    lo = np.maximum(start, o_start[safe])
    hi = np.minimum(end, o_end[safe])
    keep = (k >= 0) & (o_dev[safe] == device) & (hi > lo)
    return keep, lo[keep], hi[keep]


def _merge(line: np.ndarray, start: np.ndarray, end: np.ndarray) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Sort by (line, start) and merge intervals of a line that touch or overlap."""
    if line.size < 2:
        return line, start, end
    # One integer key (line, start in ms from the earliest): sorted already when the logs are
    # in the order the reader gives, else one stable sort instead of a two-key one.
    key = line * (2**31) + np.floor((start - start.min()) * 1000.0).astype(np.int64)
    if np.any(key[1:] < key[:-1]) or np.ptp(start) * 1000.0 >= 2**31:
        order = np.argsort(key, kind="stable") if np.ptp(start) * 1000.0 < 2**31 else np.lexsort((start, line))
        line, start, end = line[order], start[order], end[order]
    furthest = pd.Series(end).groupby(line).cummax().to_numpy()  # the furthest end so far, per line
    new = np.ones(line.size, dtype=bool)
    new[1:] = (line[1:] != line[:-1]) | (start[1:] > furthest[:-1])
    return line[new], start[new], np.maximum.reduceat(end, np.flatnonzero(new))


class ReplaySignals(SignalState):
    """The chains as the logs show them (see the module doc): looks and paths from the logs,
    nothing drawn, nothing recorded. ``tables`` must hold no settled state."""

    def __init__(self, tables: SignalTables, group: np.ndarray, replay: Replay):
        super().__init__(tables, group)
        assert not tables.has_settled, "replayed signals have no settled state"
        self.replay = replay
        lines = int(group.size) * _S
        # Each line's intervals are a slice of the sorted arrays: offsets[line] to offsets[line + 1].
        self._offsets = np.searchsorted(replay.line, np.arange(lines + 1), side="left")
        self._bound_time = np.stack([replay.start, replay.end], axis=1).reshape(-1)
        # Per line and query kind, the answer of the line's last query: simulated time mostly
        # moves forward, so the next answer is usually the same entry or the next.
        self._last = {key: self._offsets[:-1] * (2 if key != "on" else 1) for key in ("on", "from", "to")}

    def _count(self, values: np.ndarray, scale: int, line: np.ndarray, t: np.ndarray, last: str) -> np.ndarray:
        """For each query, the index (into ``values``, the line's entries from ``offsets[line] x
        scale``) of its line's first entry after ``t``. Most queries have the answer of the
        line's last query of kind ``last`` (time moves on a little between looks), or the next
        entry; the rest get a binary search within the line's own slice."""
        lo = self._offsets[line] * scale
        hi = self._offsets[line + 1] * scale
        k = self._last[last][line]
        for _ in range(2):  # the last answer, then one step from it
            wrong = _wrong(values, lo, hi, k, t)
            if not wrong.any():
                break
            k = k + wrong
        else:
            far = np.flatnonzero(_wrong(values, lo, hi, k, t))
            if far.size:
                k[far] = first_above(values, lo[far], hi[far], t[far])
        self._last[last][line] = k
        return k

    def _on(self, devices: np.ndarray, chain: int, t: np.ndarray) -> np.ndarray:
        if chain == SETTLED or not self.replay.start.size:
            return np.zeros(devices.size, dtype=bool)
        t = np.broadcast_to(np.asarray(t, dtype=float), devices.shape)
        line = devices.astype(np.int64) * _S + (chain - 1)
        k = self._count(self.replay.start, 1, line, t, "on") - 1
        safe = np.maximum(k, 0)
        return (k >= self._offsets[line]) & (self.replay.end[safe] > t)

    def _probability(self, devices: np.ndarray, chain: int, t: np.ndarray) -> np.ndarray:
        return self._on(devices, chain, t).astype(float)

    def observe(self, devices: np.ndarray, chain: int, t: np.ndarray, draws: Draws | np.ndarray) -> np.ndarray:
        return self._on(devices, chain, t)

    def _probabilities(self, devices: np.ndarray, chains: list[int], t: np.ndarray) -> np.ndarray:
        return np.stack([self._on(devices, c, t) for c in chains]).astype(float) if chains else (
            np.zeros((0, devices.size)))

    def observe_chains(self, devices: np.ndarray, chains: list[int], t: np.ndarray,
                       draws: Draws | np.ndarray) -> np.ndarray:
        return self._probabilities(devices, chains, t) > 0.5

    def record(self, devices: np.ndarray, chain: int, t: np.ndarray, on: np.ndarray) -> None:
        """The logs are what they are: nothing a task did changes them."""

    def paths(self, devices: np.ndarray, t0: np.ndarray, t_stop: np.ndarray, draws: Draws,
              own: list[int] | None = None) -> Paths:
        """The logged states at ``t0`` and every logged change up to ``t_stop``."""
        n = devices.size
        t0 = np.asarray(t0, dtype=float)
        t_stop = np.asarray(t_stop, dtype=float)
        followed = np.zeros(len(CHAINS), dtype=bool)
        followed[own if own is not None else list(range(1, len(CHAINS)))] = True
        state0 = np.zeros((len(CHAINS), n), dtype=bool)
        lows, counts = {}, {}
        for c in np.flatnonzero(followed):
            state0[c] = self._on(devices, int(c), t0)
            line = devices.astype(np.int64) * _S + (int(c) - 1)
            lo = self._count(self._bound_time, 2, line, t0, "from") if self.replay.start.size else np.zeros(n, np.int64)
            hi = self._count(self._bound_time, 2, line, np.maximum(t_stop, t0), "to") if self.replay.start.size else lo
            lows[c], counts[c] = lo, hi - lo
        most = max((int(v.max(initial=0)) for v in counts.values()), default=0)
        flips = np.full((len(CHAINS), n, most), np.inf)
        for c, lo in lows.items():
            for j in range(most):
                has = counts[c] > j
                flips[c, has, j] = self._bound_time[lo[has] + j]
        return Paths(t0=t0, state0=state0, flips=flips, t_stop=t_stop, followed=followed)


def _wrong(values: np.ndarray, lo: np.ndarray, hi: np.ndarray, k: np.ndarray, t: np.ndarray) -> np.ndarray:
    """Per query, -1 where the answer lies before ``k``, +1 where after, 0 where ``k`` is it."""
    top = values.size - 1
    back = (k > lo) & (values[np.maximum(k - 1, 0)] > t)
    return ((k < hi) & (values[np.minimum(k, top)] <= t)).astype(np.int64) - back


def first_above(values: np.ndarray, lo: np.ndarray, hi: np.ndarray, t: np.ndarray) -> np.ndarray:
    """Per query, the first index in [lo, hi) of sorted ``values`` whose value is above ``t``
    (``hi`` if none): a binary search of every query's own slice at once."""
    top = values.size - 1
    while True:
        open_ = lo < hi
        if not open_.any():
            return lo
        mid = (lo + hi) // 2
        right = open_ & (values[np.minimum(mid, top)] <= t)
        lo = np.where(right, mid + 1, lo)
        hi = np.where(open_ & ~right, mid, hi)
