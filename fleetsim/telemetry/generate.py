"""Synthetic telemetry drawn from a fleet file: pure functions, DataFrames out, no I/O.

From a Config and a seed: the fleet (:func:`fleetsim.fleet.sample_fleet`, the same devices a
run with that seed simulates) and each device's four chains (settled and the three signals'
own chains, :mod:`fleetsim.signals`) followed exactly over the horizon on the engine's own
tables (:func:`~fleetsim.signals.build_signal_tables`, :meth:`~fleetsim.signals.SignalTables.next_flip`).
Each chain starts from its law at the tables' origin, before the horizon, like the engine.
A signal is on while its own chain is on or the settled chain is on and covers it; its
on-intervals within the horizon, plus one ``observed`` interval per device spanning the
horizon, make the interval logs. Times are kept to the millisecond.

Snapshots: each device at its check-in ticks ``phase + k * checkin_every`` (the fleet's
phases) moved later by a jitter uniform on [0, ``JITTER`` x checkin_every), each kept with
probability checkin_every / ``snapshots_every`` (thinning; default: all), with the signals'
states then and a battery level from the model's law for the charging state
(:class:`fleetsim.battery.BatteryState`: a Beta law per charging state, joined over time by an
Ornstein-Uhlenbeck score), to 0.01%. The snapshots carry no bandwidth (the model's links are
constant: the traits hold them). The traits are the sampled fleet's.

The other generating process, ``weibull:K``, is not the fleet model: every on-spell lasts a
Weibull(shape K) time whose mean is the model's mean on-duration d for the chain at the
spell's start (scale d / Gamma(1 + 1/K)); off-spells end as in the model. K = 1 is the
model; K = 0.5 gives many short and a few very long spells (coefficient of variation
sqrt(5)), K = 3 nearly regular ones (0.36).
"""

from __future__ import annotations

import math
from collections.abc import Iterator
from dataclasses import dataclass

import numpy as np
import pandas as pd

from ..battery import BatteryState
from ..config import SIGNALS, Config
from ..errors import FleetsimError
from ..fleet import Fleet, sample_fleet, stream
from ..signals import CHAINS, SETTLED, SignalTables, build_signal_tables
from .frames import COLUMNS, Telemetry
from .schemas import SIGNAL_VALUES

__all__ = ["DURATIONS", "Durations", "parse_durations", "generate_telemetry", "iter_telemetry", "CHUNK_DEVICES",
           "JITTER", "device_ids"]

DURATIONS = ("exponential", "weibull")
"""The on-spell laws: the fleet model's (``exponential``) and ``weibull:K``."""

CHUNK_DEVICES = 16384
"""Devices drawn together (each chunk has its own random stream, so this fixes the output)."""

JITTER = 0.5
"""A check-in comes up to this fraction of ``rounds.checkin_every`` after its tick."""

SNAPSHOT_CELLS = 1 << 23
"""Check-in ticks x devices drawn at once (bounds the memory of a long horizon)."""

_OBSERVED = SIGNAL_VALUES.index("observed")


@dataclass(frozen=True)
class Durations:
    """How on-spells last: ``exponential`` (the model) or ``weibull`` with ``shape``."""

    kind: str = "exponential"
    shape: float = 1.0


def parse_durations(text: str | Durations) -> Durations:
    """``exponential`` or ``weibull:K`` (K a positive finite number). Raises FleetsimError."""
    if isinstance(text, Durations):
        return text
    name, _, shape = str(text).partition(":")
    if name == "exponential" and not shape:
        return Durations()
    if name == "weibull":
        try:
            k = float(shape)
        except ValueError:
            k = math.nan
        if math.isfinite(k) and 0.05 <= k <= 50:
            return Durations("weibull", k)
        raise FleetsimError(f"--durations: expected weibull:K with K a number from 0.05 to 50 (got {text!r})")
    raise FleetsimError(f"--durations: expected exponential or weibull:K (got {text!r})")


def device_ids(first: int, count: int, total: int) -> np.ndarray:
    """Ids of devices ``first`` .. ``first + count - 1`` of ``total``: ``d`` and zero-padded digits."""
    width = max(6, len(str(max(total - 1, 0))))
    return np.array([f"d{i:0{width}d}" for i in range(first, first + count)], dtype=object)


def _chain_intervals(tables: SignalTables, group: np.ndarray, end_s: float, rng: np.random.Generator,
                     durations: Durations) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """On-intervals of every chain of the devices over [tables' origin, end_s]: (line, start,
    end), line = device * chains + chain, sorted by line and time.

    Every chain still before ``end_s`` flips once per pass, so a chain's j-th flip is made in
    pass j: its flips come out in time order, and whether it turns the chain on is known
    from its initial state and j."""
    n, c_all = group.size, len(CHAINS)
    chains = np.arange(c_all) if tables.has_settled else np.arange(1, c_all)
    line = (np.arange(n)[:, None] * c_all + chains[None, :]).reshape(-1)
    g_all, c_line = group[line // c_all], line % c_all
    on0 = rng.random(line.size) < tables.p[g_all, c_line, 0]
    scale = tables.d / math.gamma(1.0 + 1.0 / durations.shape)
    active, g, chain = np.arange(line.size), g_all, c_line
    state, now = on0.copy(), np.full(line.size, tables.origin_s)
    flip_at, flip_line, flip_up = [], [], []
    while active.size:
        e = rng.exponential(1.0, active.size)
        when = tables.next_flip(g, chain, now, state.astype(np.int64), e)
        if durations.kind == "weibull":
            lasting = np.flatnonzero(state)
            at = (g[lasting], chain[lasting], tables.step_of(now[lasting]))
            when[lasting] = now[lasting] + scale[at] * e[lasting] ** (1.0 / durations.shape)
        moved = when <= end_s
        active, g, chain, now, state = active[moved], g[moved], chain[moved], when[moved], ~state[moved]
        flip_at.append(now)
        flip_line.append(active)
        flip_up.append(state)
    times = np.concatenate(flip_at) if flip_at else np.zeros(0)
    lines = np.concatenate(flip_line) if flip_line else np.zeros(0, dtype=np.int64)
    up = np.concatenate(flip_up) if flip_up else np.zeros(0, dtype=bool)
    order = np.argsort(lines, kind="stable")  # each line's flips are already in time order
    times, lines, up = times[order], lines[order], up[order]
    # An on-spell runs from a flip that turns the chain on (or the origin, if it starts on) to
    # the line's next flip (or end_s, if there is none).
    nxt = np.concatenate([times[1:], [end_s]])
    same = np.concatenate([lines[1:] == lines[:-1], [False]])
    spell_end = np.where(same, nxt, end_s)
    first_flip = np.full(line.size, end_s)
    has_flip = np.concatenate([[True], lines[1:] != lines[:-1]]) if lines.size else np.zeros(0, dtype=bool)
    first_flip[lines[has_flip]] = times[has_flip]
    begun = np.flatnonzero(on0)
    starts = np.concatenate([np.full(begun.size, tables.origin_s), times[up]])
    ends = np.concatenate([first_flip[begun], spell_end[up]])
    which = np.concatenate([begun, lines[up]])
    order = np.argsort(which, kind="stable")  # the origin spell of a line is its first
    return line[which[order]], starts[order], ends[order]


def _union(key: np.ndarray, start: np.ndarray, end: np.ndarray, span: int) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """The union of intervals per key (touching ones merged): (key, start, end) sorted by key
    and start. Times are whole ms in [0, span)."""
    # One int64 sort key: key, then time, then starts before ends (so touching intervals merge).
    packed = np.concatenate([(key * span + start) * 2, (key * span + end) * 2 + 1])
    order = np.argsort(packed, kind="stable")
    closing = (packed[order] & 1).astype(bool)
    depth = np.cumsum(np.where(closing, -1, 1))
    opens = ~closing & (depth == 1)
    closes = closing & (depth == 0)
    point = packed[order] >> 1
    return point[opens] // span, point[opens] % span, point[closes] % span


def _signal_intervals(tables: SignalTables, group: np.ndarray, end_ms: int, rng: np.random.Generator,
                      durations: Durations) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Each device's signal on-intervals in whole ms from the horizon's start: (key, start,
    end), key = device * 3 + signal, sorted by key and start."""
    c_all, s_all = len(CHAINS), len(SIGNALS)
    line, start, end = _chain_intervals(tables, group, end_ms / 1000.0, rng, durations)
    start = np.clip(np.rint(start * 1000.0), 0, end_ms).astype(np.int64)
    end = np.clip(np.rint(end * 1000.0), 0, end_ms).astype(np.int64)
    keep = end > start
    line, start, end = line[keep], start[keep], end[keep]
    device, chain = line // c_all, line % c_all
    own = chain != SETTLED
    keys = [device[own] * s_all + chain[own] - 1]
    starts, ends = [start[own]], [end[own]]
    settled = ~own
    for s in range(s_all):
        covered = settled & tables.covers[group[device], s]
        keys.append(device[covered] * s_all + s)
        starts.append(start[covered])
        ends.append(end[covered])
    return _union(np.concatenate(keys), np.concatenate(starts), np.concatenate(ends), end_ms + 1)


def _states(key: np.ndarray, start: np.ndarray, end: np.ndarray, device: np.ndarray, t_ms: np.ndarray,
            span: int) -> np.ndarray:
    """[S, m] whether each signal is on at each (device, time) given the on-intervals."""
    s_all = len(SIGNALS)
    packed = key * span + start
    out = np.zeros((s_all, device.size), dtype=bool)
    for s in range(s_all):
        want = device * s_all + s
        j = np.searchsorted(packed, want * span + t_ms, side="right") - 1
        safe = np.maximum(j, 0)
        out[s] = (j >= 0) & (key[safe] == want) & (t_ms < end[safe])
    return out


def _snapshot_block(config: Config, fleet: Fleet, devices: np.ndarray, first: int,
                    intervals: tuple[np.ndarray, np.ndarray, np.ndarray], end_ms: int, rng: np.random.Generator,
                    keep_p: float) -> dict[str, np.ndarray]:
    """Check-in snapshots of ``devices`` (the chunk's from position ``first`` on), device-major
    and in time order within a device."""
    every = config.rounds.checkin_every
    ticks = int(math.ceil(end_ms / 1000.0 / every)) + 1
    t = (fleet.checkin_phase_s[devices][None, :] + every * np.arange(ticks)[:, None]
         + rng.uniform(0.0, JITTER * every, size=(ticks, devices.size)))
    t_ms = np.floor(t * 1000.0).astype(np.int64)
    kept = (t_ms < end_ms) & (rng.random((ticks, devices.size)) < keep_p)
    local = np.broadcast_to(np.arange(first, first + devices.size)[None, :], kept.shape)
    mask = kept.T  # device-major: the look-ups come sorted, which the binary search likes
    key, start, end = intervals
    on = _states(key, start, end, local.T[mask], t_ms.T[mask], end_ms + 1)
    charging = np.zeros(mask.shape, dtype=bool)
    charging[mask] = on[SIGNALS.index("charging")]
    charging = charging.T
    group = fleet.group[devices]
    battery = BatteryState(config, fleet.type_names, fleet.region_names, group)
    level = np.zeros(kept.shape)
    for k in range(ticks):
        who = np.flatnonzero(kept[k])
        level[k, who] = battery.look(who, t_ms[k, who] / 1000.0, charging[k, who].astype(np.int64), rng)
    out = {"device": local.T[mask], "time_ms": t_ms.T[mask], "battery": level.T[mask]}
    for s, name in enumerate(SIGNALS):
        out[name] = on[s]
    return out


def _snapshots(config: Config, fleet: Fleet, devices: np.ndarray, intervals: tuple[np.ndarray, np.ndarray, np.ndarray],
               end_ms: int, rng: np.random.Generator, snapshots_every: float | None) -> dict[str, np.ndarray]:
    """The chunk's snapshots, drawn for a few devices at a time so that the [ticks, devices]
    arrays stay within :data:`SNAPSHOT_CELLS` whatever the horizon."""
    every = config.rounds.checkin_every
    keep_p = 1.0 if snapshots_every is None else min(1.0, every / snapshots_every)
    ticks = int(math.ceil(end_ms / 1000.0 / every)) + 1
    per = max(1, SNAPSHOT_CELLS // ticks)
    blocks = [_snapshot_block(config, fleet, devices[a:a + per], a, intervals, end_ms, rng, keep_p)
              for a in range(0, devices.size, per)]
    return {name: np.concatenate([b[name] for b in blocks]) for name in blocks[0]}


def _frames(config: Config, fleet: Fleet, devices: np.ndarray, intervals: tuple, snaps: dict[str, np.ndarray],
            end_ms: int) -> Telemetry:
    """The chunk's interval logs, snapshots and traits as in-memory frames."""
    start_ms = int(round(config.horizon.start.timestamp() * 1000.0))
    ids = device_ids(int(devices[0]), devices.size, fleet.size)
    types = np.asarray(fleet.type_names, dtype=object)[fleet.device_type[devices]]
    regions = np.asarray(fleet.region_names, dtype=object)[fleet.region[devices]]
    zones = np.asarray([config.fleet.regions[r].timezone for r in fleet.region_names],
                       dtype=object)[fleet.region[devices]]
    key, start, end = intervals
    device = np.concatenate([key // len(SIGNALS), np.arange(devices.size)])
    signal = np.concatenate([key % len(SIGNALS), np.full(devices.size, _OBSERVED)])
    start = np.concatenate([start, np.zeros(devices.size, dtype=np.int64)])
    end = np.concatenate([end, np.full(devices.size, end_ms, dtype=np.int64)])
    order = np.lexsort([start, signal, device])
    device, signal = device[order], signal[order]
    frame = {"device_id": ids[device], "device_type": types[device], "region": regions[device],
             "timezone": zones[device], "signal": pd.Categorical.from_codes(signal, categories=list(SIGNAL_VALUES)),
             "start_s": (start_ms + start[order]) / 1000.0, "end_s": (start_ms + end[order]) / 1000.0}
    d = snaps["device"]
    snapshot = {"device_id": ids[d], "device_type": types[d], "region": regions[d], "timezone": zones[d],
                "time_s": (start_ms + snaps["time_ms"]) / 1000.0, **{s: snaps[s] for s in SIGNALS},
                "battery": np.round(snaps["battery"], 2), "download_mbps": np.full(d.size, np.nan),
                "upload_mbps": np.full(d.size, np.nan)}
    traits = {"device_id": ids, "device_type": types, "region": regions,
              "download_mbps": fleet.down_mbps[devices], "upload_mbps": fleet.up_mbps[devices],
              "sample_cost_s": fleet.sample_cost_s[devices], "samples": fleet.samples[devices].astype(np.float64),
              "memory_gb": fleet.memory_bytes[devices] / 1e9, "battery_wh": fleet.battery_wh[devices],
              "train_power_w": fleet.train_power_w[devices]}
    # copy=False: the columns are fresh arrays, and pandas would otherwise copy them into blocks.
    return Telemetry(intervals=pd.DataFrame(frame, columns=COLUMNS["intervals"], copy=False),
                     snapshots=pd.DataFrame(snapshot, columns=COLUMNS["snapshots"], copy=False),
                     traits=pd.DataFrame(traits, columns=COLUMNS["traits"], copy=False))


def iter_telemetry(config: Config, seed: int = 0, *, durations: str | Durations = "exponential",
                   snapshots_every: float | None = None) -> Iterator[Telemetry]:
    """Synthetic telemetry of ``config``'s fleet over its horizon, :data:`CHUNK_DEVICES`
    devices at a time (in device order; frames sorted as read frames are).

    ``durations``: ``exponential`` (the model) or ``weibull:K``; ``snapshots_every``: mean
    time between kept check-ins, s (default: every check-in).
    """
    law = parse_durations(durations)
    if snapshots_every is not None and not (math.isfinite(snapshots_every) and snapshots_every > 0):
        raise FleetsimError(f"--snapshots-every: expected a positive duration (got {snapshots_every!r})")
    fleet = sample_fleet(config, seed)
    tables = build_signal_tables(config, fleet.type_names, fleet.region_names, config.horizon.duration)
    end_ms = int(math.floor(config.horizon.duration * 1000.0))
    for chunk, first in enumerate(range(0, fleet.size, CHUNK_DEVICES)):
        devices = np.arange(first, min(fleet.size, first + CHUNK_DEVICES))
        rng = stream(seed, f"telemetry.{chunk}")
        intervals = _signal_intervals(tables, fleet.group[devices], end_ms, rng, law)
        snaps = _snapshots(config, fleet, devices, intervals, end_ms, rng, snapshots_every)
        yield _frames(config, fleet, devices, intervals, snaps, end_ms)


def generate_telemetry(config: Config, seed: int = 0, *, durations: str | Durations = "exponential",
                       snapshots_every: float | None = None) -> Telemetry:
    """All of :func:`iter_telemetry` in one :class:`Telemetry` (intervals, snapshots, traits)."""
    parts = list(iter_telemetry(config, seed, durations=durations, snapshots_every=snapshots_every))
    out = Telemetry()
    for kind in ("intervals", "snapshots", "traits"):
        # Chunks come in device order, so the concatenation keeps the frames' order (SORT).
        setattr(out, kind, pd.concat([p.frame(kind) for p in parts], ignore_index=True))
    return out
