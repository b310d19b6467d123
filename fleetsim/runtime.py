"""The fleet's changing state, kept as arrays: who checks in, who is eligible, who is busy.

Check-in ticks: device i ticks at ``phase_i + k * checkin_every``. Devices are kept sorted
by phase, so the ticks in a window are one or two contiguous slices found by binary search:
the cost of a window grows with the check-ins in it, not with the fleet.

Eligibility at a tick: the device's memory fits the model, it is neither working nor
resting, every required signal is on (sampled lazily, see :mod:`fleetsim.signals`), and its
battery level, drawn at check-in from its type's level distribution for its charging state,
is at or above the workload's minimum.
"""

from __future__ import annotations

import numpy as np
from scipy import stats

from .config import SIGNALS, Config
from .fleet import Fleet
from .policies import Candidates
from .signals import SignalState, SignalTables

__all__ = ["FleetRuntime"]

_CHARGING = SIGNALS.index("charging")


def _beta_params(mean_pct: float, sd_pct: float) -> tuple[float, float]:
    """Beta(a, b) on [0, 1] with the given mean and sd (method of moments)."""
    m, s = mean_pct / 100.0, sd_pct / 100.0
    k = m * (1.0 - m) / (s * s) - 1.0
    return m * k, (1.0 - m) * k


class FleetRuntime:
    """Dynamic per-device state and the queries the server makes of the fleet."""

    def __init__(self, config: Config, fleet: Fleet, tables: SignalTables, rngs: dict[str, np.random.Generator]):
        self.config = config
        self.fleet = fleet
        self.tables = tables
        self.rngs = rngs
        n = fleet.size
        self.checkin_every = config.rounds.checkin_every
        self.order = np.argsort(fleet.checkin_phase_s, kind="stable")
        self.sorted_phase = fleet.checkin_phase_s[self.order]
        self.capable = fleet.memory_bytes >= config.workload.memory_needed
        self.free_at = np.full(n, -np.inf)
        self.last_participation = np.full(n, -np.inf)
        self.participations = np.zeros(n, dtype=np.int32)
        self.group = fleet.group
        self.signals = SignalState(tables, self.group)
        self.required = [SIGNALS.index(s) for s in config.workload.requires]
        self.min_battery = config.workload.min_battery
        levels = [config.fleet.device_types[name].battery_level for name in fleet.type_names]
        self.beta_charging = np.array([_beta_params(lv.charging.mean, lv.charging.sd) for lv in levels])
        self.beta_unplugged = np.array([_beta_params(lv.unplugged.mean, lv.unplugged.sd) for lv in levels])
        floor = self.min_battery / 100.0
        self.battery_ok_charging = stats.beta.sf(floor, *self.beta_charging.T)
        self.battery_ok_unplugged = stats.beta.sf(floor, *self.beta_unplugged.T)
        work = config.workload
        padded = np.ceil(fleet.samples / work.batch_size) * work.batch_size
        self.predicted_s = (
            work.model_size * 8.0 / (fleet.down_mbps * 1e6)
            + padded * work.epochs * fleet.sample_cost_s
            + work.upload_bytes * 8.0 / (fleet.up_mbps * 1e6)
        )

    # ------------------------------------------------------------------ check-in ticks

    def ticks(self, start: float, end: float) -> tuple[np.ndarray, np.ndarray]:
        """Devices whose check-in tick falls in [start, end), and the tick times, in time order.

        Within one period the slice from ``lo`` up is in phase (hence time) order and the
        wrapped slice from 0 comes after it; successive periods follow each other.
        """
        period = self.checkin_every
        devices, times = [], []
        a = start
        while a < end:
            b = min(end, a + period)
            lo = a % period
            hi = lo + (b - a)
            i0 = np.searchsorted(self.sorted_phase, lo, side="left")
            if hi <= period:
                i1 = np.searchsorted(self.sorted_phase, hi, side="left")
                idx = np.arange(i0, i1)
            else:
                i1 = np.searchsorted(self.sorted_phase, hi - period, side="left")
                idx = np.concatenate([np.arange(i0, self.sorted_phase.size), np.arange(0, i1)])
            phase = self.sorted_phase[idx]
            devices.append(self.order[idx])
            times.append(a + (phase - lo) % period)
            a = b
        if len(devices) == 1:
            return devices[0], times[0]
        return np.concatenate(devices), np.concatenate(times)

    def _battery(self, devices: np.ndarray, charging: np.ndarray, rng: np.random.Generator) -> np.ndarray:
        types = self.fleet.device_type[devices]
        params = np.where(charging[:, None], self.beta_charging[types], self.beta_unplugged[types])
        return 100.0 * rng.beta(params[:, 0], params[:, 1])

    def free_ticks(self, start: float, end: float) -> tuple[np.ndarray, np.ndarray]:
        """Ticks in [start, end) of devices that could check in (memory fits, not busy or
        resting), sorted by time. Nothing is observed."""
        devices, times = self.ticks(start, end)
        keep = self.capable[devices] & (self.free_at[devices] <= times)
        return devices[keep], times[keep]

    def eligible(self, devices: np.ndarray, times: np.ndarray) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
        """Of these ticks, the ones whose device is eligible: positions, battery %, charging.

        Observes the signals it needs at the tick times and records them (the run's history
        moves forward); draws the battery level seen at check-in.
        """
        rng = self.rngs["checkin"]
        live = np.arange(devices.size)
        for s in self.required:
            on = self.signals.observe(devices[live], s, times[live], rng)
            live = live[on]
        if _CHARGING in self.required:
            charging = np.ones(live.size, dtype=bool)
        else:
            charging = self.signals.observe(devices[live], _CHARGING, times[live], rng)
        battery = self._battery(devices[live], charging, self.rngs["battery"])
        ok = battery >= self.min_battery
        return live[ok], battery[ok], charging[ok]

    def candidates(
        self, devices: np.ndarray, times: np.ndarray, battery: np.ndarray, charging: np.ndarray
    ) -> Candidates:
        """The check-ins as a policy sees them (per-device traits gathered on demand)."""
        fleet = self.fleet
        arrays = {
            "device_type": fleet.device_type,
            "region": fleet.region,
            "samples": fleet.samples,
            "predicted_s": self.predicted_s,
            "last_participation_s": self.last_participation,
            "participations": self.participations,
        }
        return Candidates(devices, times, battery, charging, arrays, fleet.type_names, fleet.region_names)

    # ------------------------------------------------------------------ measurement

    def census(self, t: float, sample: int) -> tuple[np.ndarray, np.ndarray]:
        """Sampled devices per (type, region) group and their expected eligible count at ``t``.

        Each sampled device adds its probability of being eligible given the run so far (the
        product of its required signals' on-probabilities and the chance its battery level
        clears the minimum), so the count has no sampling noise beyond the choice of devices
        and measuring does not change the run.
        """
        n = self.fleet.size
        devices = np.arange(n) if sample >= n else self.rngs["census"].integers(0, n, size=sample)
        n_groups = len(self.fleet.type_names) * len(self.fleet.region_names)
        sampled = np.bincount(self.group[devices], minlength=n_groups)
        live = devices[self.capable[devices] & (self.free_at[devices] <= t)]
        times = np.full(live.size, t)
        prob = np.ones(live.size)
        for s in self.required:
            prob *= self.signals.probability(live, s, times)
        types = self.fleet.device_type[live]
        if _CHARGING in self.required:
            prob *= self.battery_ok_charging[types]
        else:
            q = self.signals.probability(live, _CHARGING, times)
            prob *= q * self.battery_ok_charging[types] + (1 - q) * self.battery_ok_unplugged[types]
        eligible = np.bincount(self.group[live], weights=prob, minlength=n_groups)
        return sampled, eligible
