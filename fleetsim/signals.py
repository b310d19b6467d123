"""Diurnal on/off signals on local time, sampled exactly and lazily.

Each device carries three two-state Markov chains (idle, charging, unmetered). In local hour
h a chain with on-probability p and mean on-duration d leaves "on" at rate 1/d and leaves
"off" at rate p / ((1 - p) d). Rates are piecewise constant on a 15-minute UTC grid (every
IANA zone offset in use is a multiple of 15 minutes, so each grid step lies in one local
hour, DST included).

The engine never walks a device's whole timeline. It keeps, per device and signal, the last
time it looked and the probability the signal was on then (0 or 1 once observed, the
chain's own law before). The on-probability at a later time follows in closed form:
over a step with constant rates, q' = p + (q - p) exp(-lambda h), lambda = 1 / ((1 - p) d);
composing steps is an affine map, so prefix tables make any gap O(1). Sampling the chain at
the times the engine needs is exact in distribution (Markov property), and costs nothing for
devices the server never hears from.

Because the off-rate 1/d does not depend on the hour, the time a signal that is on stays on
is exponential with mean d from any moment: a cohort's signal losses are drawn directly.
"""

from __future__ import annotations

from dataclasses import dataclass
from datetime import datetime, timedelta, timezone
from zoneinfo import ZoneInfo

import numpy as np

from .config import SIGNALS, Config

__all__ = ["STEP_S", "SignalTables", "build_signal_tables", "local_hours", "SignalState"]

STEP_S = 900.0
"""Grid step of the signal tables: 15 minutes."""

_P_MAX = 1.0 - 1e-6  # an on-probability of exactly 1 would make the off-rate infinite


def local_hours(zone: str, start: datetime, steps: int, step_s: float = STEP_S) -> np.ndarray:
    """Local hour (0-23) in ``zone`` at the start of each grid step from ``start`` (UTC)."""
    tz = ZoneInfo(zone)
    start = start.astimezone(timezone.utc)
    # Offsets change rarely: evaluate them once per step (cheap: a few thousand steps).
    hours = np.empty(steps, dtype=np.int8)
    for k in range(steps):
        moment = (start + timedelta(seconds=k * step_s)).astimezone(tz)
        hours[k] = moment.hour
    return hours


@dataclass(frozen=True)
class SignalTables:
    """Per (group, signal, grid step) rates and prefix maps; groups are (type, region) pairs.

    ``origin_s`` is the simulated time of grid point 0 (negative: the grid starts before the
    horizon so that the chains start from their own law, not from an arbitrary state).
    """

    origin_s: float
    step_s: float
    p: np.ndarray  # [G, S, K] on-probability per step
    rate: np.ndarray  # [G, S, K] lambda = 1 / ((1 - p) d), 1/s
    prefix_a: np.ndarray  # [G, S, K + 1] on-probability at grid point k starting "off" at point 0
    prefix_log: np.ndarray  # [G, S, K + 1] cumulative lambda * h up to grid point k
    mean_on_s: np.ndarray  # [G, S]

    @property
    def steps(self) -> int:
        return int(self.p.shape[2])

    def step_of(self, t: np.ndarray) -> np.ndarray:
        k = np.floor((t - self.origin_s) / self.step_s).astype(np.int64)
        return np.clip(k, 0, self.steps - 1)

    def on_probability(
        self, group: np.ndarray, signal: int, t_from: np.ndarray, q_from: np.ndarray, t_to: np.ndarray
    ) -> np.ndarray:
        """Probability the signal is on at ``t_to`` given on-probability ``q_from`` at ``t_from``."""
        steps = self.steps
        k0 = self.step_of(t_from)
        k1 = self.step_of(t_to)
        line = group.astype(np.int64) * self.p.shape[1] + signal
        row = line * steps
        i0, i1 = row + k0, row + k1
        p_flat, rate_flat = self._flat_p, self._flat_rate
        p0, r0 = p_flat[i0], rate_flat[i0]
        # To the end of step k0 (or to t_to if it lies in the same step).
        end0 = np.minimum(self.origin_s + (k0 + 1) * self.step_s, t_to)
        q = p0 + (q_from - p0) * np.exp(-r0 * np.maximum(end0 - t_from, 0.0))
        later = np.flatnonzero(k1 > k0)
        if later.size:
            # Across whole steps by the prefix map, then into step k1.
            prefix_row = line[later] * (steps + 1)
            j0 = prefix_row + k0[later] + 1
            j1 = prefix_row + k1[later]
            a_flat, log_flat = self._flat_a, self._flat_log
            decay = np.exp(-(log_flat[j1] - log_flat[j0]))
            ql = a_flat[j1] + decay * (q[later] - a_flat[j0])
            p1, r1 = p_flat[i1[later]], rate_flat[i1[later]]
            start1 = self.origin_s + k1[later] * self.step_s
            q[later] = p1 + (ql - p1) * np.exp(-r1 * np.maximum(t_to[later] - start1, 0.0))
        return np.clip(q, 0.0, 1.0)

    @property
    def _flat_p(self) -> np.ndarray:
        return self.p.reshape(-1)

    @property
    def _flat_rate(self) -> np.ndarray:
        return self.rate.reshape(-1)

    @property
    def _flat_a(self) -> np.ndarray:
        return self.prefix_a.reshape(-1)

    @property
    def _flat_log(self) -> np.ndarray:
        return self.prefix_log.reshape(-1)



def build_signal_tables(
    config: Config, type_names: tuple[str, ...], region_names: tuple[str, ...], end_s: float, begin_s: float = 0.0
) -> SignalTables:
    """Tables for every (type, region) group from ``begin_s`` minus a settling time to ``end_s``.

    The settling time (12 mean on-durations, 6 hours to 3 days) lets each chain start from
    its own law rather than an arbitrary state.

    Behaviour-shift disruptions scale or move a signal's hourly on-probabilities for their
    window, regions and device types.
    """
    types = config.fleet.device_types
    regions = config.fleet.regions
    mean_on = np.array([[types[t].signals[s].mean_on for s in SIGNALS] for t in type_names])
    warmup_s = float(min(3 * 86400.0, max(6 * 3600.0, 12 * mean_on.max())))
    warmup_s = np.ceil(warmup_s / STEP_S) * STEP_S
    origin_s = min(begin_s, 0.0) - warmup_s
    # Put grid points on UTC quarter hours, whatever the horizon's start, so that each step
    # lies within one local hour of every zone.
    start_epoch = config.horizon.start.timestamp()
    origin_s = float(np.floor((start_epoch + origin_s) / STEP_S) * STEP_S - start_epoch)
    steps = int(np.ceil((end_s - origin_s) / STEP_S)) + 1
    grid_start = config.horizon.start + timedelta(seconds=origin_s)
    step_times = origin_s + STEP_S * np.arange(steps)

    n_groups = len(type_names) * len(region_names)
    p = np.empty((n_groups, len(SIGNALS), steps))
    region_hours = {name: local_hours(regions[name].timezone, grid_start, steps) for name in region_names}
    for ti, tname in enumerate(type_names):
        hourly = np.array([types[tname].signals[s].hourly for s in SIGNALS])  # [S, 24]
        for ri, rname in enumerate(region_names):
            g = ti * len(region_names) + ri
            hours = region_hours[rname].astype(np.int64)
            p[g] = hourly[:, hours]
            for event in config.disruptions:
                if event.kind != "behaviour-shift":
                    continue
                if event.regions and rname not in event.regions:
                    continue
                if event.device_types and tname not in event.device_types:
                    continue
                s = SIGNALS.index(event.signal)  # type: ignore[arg-type]
                inside = (step_times >= event.start) & (step_times < event.start + event.duration)
                shifted = (hours - int(round(event.shift_hours))) % 24
                values = hourly[s, shifted] * event.factor
                p[g, s, inside] = values[inside]
    p = np.clip(p, 0.0, _P_MAX)
    group_mean_on = np.repeat(mean_on, len(region_names), axis=0)  # [G, S]
    rate = 1.0 / ((1.0 - p) * group_mean_on[:, :, None])
    decay = np.exp(-rate * STEP_S)
    prefix_a = np.zeros((n_groups, len(SIGNALS), steps + 1))
    for k in range(steps):
        prefix_a[:, :, k + 1] = p[:, :, k] + (prefix_a[:, :, k] - p[:, :, k]) * decay[:, :, k]
    prefix_log = np.concatenate([np.zeros((n_groups, len(SIGNALS), 1)), np.cumsum(rate * STEP_S, axis=2)], axis=2)
    return SignalTables(
        origin_s=origin_s,
        step_s=STEP_S,
        p=p,
        rate=rate,
        prefix_a=prefix_a,
        prefix_log=prefix_log,
        mean_on_s=group_mean_on,
    )


class SignalState:
    """Per-device, per-signal last look: time and on-probability then (0/1 once seen).

    Observations must move forward in time per device and signal; :meth:`observe` samples
    the states at later times and records them, :meth:`probability` gives the on-probability
    without drawing or recording (for measurements that must not disturb the run).
    """

    def __init__(self, tables: SignalTables, group: np.ndarray):
        n = group.size
        self.tables = tables
        self.group = group
        self.t_last = np.full((len(SIGNALS), n), tables.origin_s)
        # At the grid origin each chain starts from the step's on-probability.
        self.q_last = np.empty((len(SIGNALS), n))
        for s in range(len(SIGNALS)):
            self.q_last[s] = tables.p[group, s, 0]

    def _probability(self, devices: np.ndarray, signal: int, t: np.ndarray) -> np.ndarray:
        t_from = self.t_last[signal, devices]
        # A look back in time (a measurement behind the run) reuses the last state.
        t_eval = np.maximum(t, t_from)
        return self.tables.on_probability(self.group[devices], signal, t_from, self.q_last[signal, devices], t_eval)

    def observe(self, devices: np.ndarray, signal: int, t: np.ndarray, rng: np.random.Generator) -> np.ndarray:
        """Sample whether ``signal`` is on for ``devices`` at times ``t``; record it."""
        on = rng.random(devices.size) < self._probability(devices, signal, t)
        self.t_last[signal, devices] = t
        self.q_last[signal, devices] = on
        return on

    def probability(self, devices: np.ndarray, signal: int, t: np.ndarray) -> np.ndarray:
        """On-probability of ``signal`` at ``t`` given what the run has seen (nothing recorded)."""
        return self._probability(devices, signal, t)

    def record(self, devices: np.ndarray, signal: int, t: np.ndarray, on: np.ndarray) -> None:
        """Record known states (e.g. a signal seen on until a task ended)."""
        self.t_last[signal, devices] = t
        self.q_last[signal, devices] = on
