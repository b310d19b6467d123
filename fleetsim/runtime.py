"""The fleet's changing state, kept as arrays: who checks in, who is eligible, who is busy.

Check-in ticks: device i ticks at ``phase_i + k * checkin_every``. Devices are kept sorted
by phase, so the ticks in a window are one or two contiguous slices found by binary search:
the cost of a window grows with the check-ins in it, not with the fleet. A window longer
than ``checkin_every`` holds several ticks of a device; the device checks in once, at its
first tick in the window at which it is eligible (a device that checked in waits for the
server's answer), so it is one candidate per window.

Eligibility at a tick: the device's memory fits the model, it is neither working nor
resting, every required signal is on (its chains sampled lazily, see :mod:`fleetsim.signals`:
the settled chain first, then the own chain of each required signal the settled state does
not hold on), and its battery level seen at check-in (:mod:`fleetsim.battery`: its law for
the charging state, with memory of the last look) is at or above the workload's minimum.

Draws (:mod:`fleetsim.keyed`): every look at a device is keyed by the device and the index k
of the tick looked at (tick times are computed as ``k * checkin_every + phase``, the same
float whatever window found them), in the ``checkin`` stream: lane c for chain c, lane
``BATTERY_LANE`` for the battery score; a participation's in ``task`` by its check-in tick
(:mod:`fleetsim.client`). Every lane of a check-in is drawn at once (one keyed prefix per
tick), whether or not the look needs it: a draw left unused changes nothing. Given keyed
streams (``keys``) the draws are :class:`TickDraws`; without, they come in order from the
``rngs`` generators of the same names.
"""

from __future__ import annotations

import copy

import numpy as np

from .battery import BatteryState
from .chains import SignalState
from .client import Cohort, task_times
from .config import SIGNALS, Config
from .fleet import Fleet
from .keyed import KeyedStream, OrderedDraws, TickDraws, to_normal
from .signals import CHAINS, SETTLED, SignalTables

__all__ = ["FleetRuntime", "KEYED_STREAMS"]

_CHARGING = SIGNALS.index("charging")

KEYED_STREAMS = ("checkin", "task", "policy")
"""The streams whose draws are about a device and keyed by its check-in ticks."""

BATTERY_LANE = len(CHAINS)
"""Lane of the ``checkin`` stream behind the battery score seen at a check-in (lane c < it: chain c)."""

_LOOK_LANES = np.arange(len(CHAINS) + 1)[:, None]


class FleetRuntime:
    """Dynamic per-device state and the queries the server makes of the fleet."""

    def __init__(self, config: Config, fleet: Fleet, tables: SignalTables, rngs: dict[str, np.random.Generator],
                 paced: bool | None = None, signals: SignalState | None = None,
                 keys: dict[str, KeyedStream] | None = None):
        self.config = config
        self.fleet = fleet
        self.tables = tables
        self.rngs = rngs
        n = fleet.size
        self.checkin_every = config.rounds.checkin_every
        self.draws: dict[str, TickDraws | OrderedDraws] = {
            name: TickDraws(keys[name], fleet.checkin_phase_s, self.checkin_every) if keys is not None
            else OrderedDraws(rngs[name]) for name in KEYED_STREAMS if keys is not None or name in rngs}
        self.order = np.argsort(fleet.checkin_phase_s, kind="stable")
        self.sorted_phase = fleet.checkin_phase_s[self.order]
        self.free_at = np.full(n, -np.inf)
        # Paced runs (fleetsim.pacing): a turned-away device stays away ``stretch`` check-in
        # periods, so it checks in only at the ticks k with (k + pace_offset) % stretch == 0.
        self.stretch = 1
        self.pace_offset = (
            rngs["pacing"].integers(0, 2**20, size=n)
            if (config.rounds.pacing is not None if paced is None else paced) else np.zeros(n, np.int64)
        )
        self._paced: dict[int, list[tuple[np.ndarray, np.ndarray]]] = {}  # see _paced_index
        self.last_participation = np.full(n, -np.inf)
        self.participations = np.zeros(n, dtype=np.int32)
        self.group = fleet.group
        self._set_workload(config)
        # Devices by (type, region) group, for the stratified census.
        n_groups = len(fleet.type_names) * len(fleet.region_names)
        self.by_group = np.argsort(self.group, kind="stable")
        self.group_size = np.bincount(self.group, minlength=n_groups)
        self.group_start = np.concatenate([[0], np.cumsum(self.group_size)[:-1]])
        self.signals = signals if signals is not None else SignalState(tables, self.group)
        self.battery = BatteryState(config, fleet.type_names, fleet.region_names, self.group)

    def _set_workload(self, config: Config) -> None:
        """What eligibility and ranking read of the workload: memory, signals, battery, task time."""
        fleet = self.fleet
        self.config = config
        self.capable = fleet.memory_bytes >= config.workload.memory_needed
        self.all_capable = bool(self.capable.all())  # the common case: no tick is refused for memory
        self.required = [SIGNALS.index(s) for s in config.workload.requires]
        self.min_battery = config.workload.min_battery
        # Each device's task time without disruptions (what a policy may rank by), s.
        download_s, train_s, upload_s = task_times(
            config.workload, fleet.down_mbps, fleet.up_mbps, fleet.samples, fleet.sample_cost_s
        )
        self.predicted_s = download_s + train_s + upload_s

    def for_workload(self, config: Config) -> FleetRuntime:
        """The fleet as one workload of several sees it: the same devices, chains, battery
        levels and busy and rest times (a device busy or resting for one workload is so for
        all), with this workload's requirements, task times, rest and pacing stretch."""
        view = copy.copy(self)
        view._set_workload(config)
        view.stretch = 1
        return view

    # ------------------------------------------------------------------ check-in ticks

    def ticks(self, start: float, end: float) -> tuple[np.ndarray, np.ndarray]:
        """Devices whose check-in tick falls in [start, end), and the tick times, in time order.

        Within one period the slice from ``lo`` up is in phase (hence time) order and the
        wrapped slice from 0 comes after it; successive periods follow each other.
        """
        return self._ticks(start, end, lambda k: (self.order, self.sorted_phase))

    def _ticks(self, start: float, end: float, index) -> tuple[np.ndarray, np.ndarray]:
        """:meth:`ticks` over the devices ``index(k)`` gives for period k: (devices in phase
        order, their phases)."""
        period = self.checkin_every
        devices, times = [], []
        a = start
        while a < end:
            b = min(end, a + period)
            lo = a % period
            hi = lo + (b - a)
            k = round((a - lo) / period)  # the period a lies in, as lo has it
            order, phases = index(k)
            i0 = np.searchsorted(phases, lo, side="left")
            # Each tick's time is k * period + phase: the same float whichever window finds the
            # tick (keyed draws and the last looks then agree between runs to the bit).
            if hi <= period:
                i1 = np.searchsorted(phases, hi, side="left")
                picked, at = order[i0:i1], k * period + phases[i0:i1]
            else:
                order_next, phases_next = index(k + 1)  # ticks past the period's end: its next tick
                i1 = np.searchsorted(phases_next, hi - period, side="left")
                picked = np.concatenate([order[i0:], order_next[:i1]])
                at = np.concatenate([k * period + phases[i0:], (k + 1) * period + phases_next[:i1]])
            devices.append(picked)
            times.append(at)
            a = b
        if len(devices) == 1:
            return devices[0], times[0]
        return np.concatenate(devices), np.concatenate(times)

    def _paced_index(self, stretch: int):
        """For stretch m: period k's devices that may check in (those with (k + offset) % m
        == 0), in phase order, as a function of k. The devices are sorted once per m by
        offset % m, then phase; a few such orders are kept."""
        cached = self._paced.get(stretch)
        if cached is None:
            residue = self.pace_offset[self.order] % stretch
            by_residue = np.argsort(residue, kind="stable")  # phase order kept within a residue
            order = self.order[by_residue]
            phases = self.sorted_phase[by_residue]
            bounds = np.searchsorted(residue[by_residue], np.arange(stretch + 1), side="left")
            cached = [(order[bounds[r]:bounds[r + 1]], phases[bounds[r]:bounds[r + 1]]) for r in range(stretch)]
            if len(self._paced) >= 4:
                self._paced.pop(next(iter(self._paced)))
            self._paced[stretch] = cached
        return lambda k: cached[(-k) % stretch]

    def free_ticks(self, start: float, end: float) -> tuple[np.ndarray, np.ndarray]:
        """Ticks in [start, end) of devices that could check in (memory fits, not busy or
        resting, and with pacing not told to stay away), sorted by time. Nothing is observed.
        At stretch m only the ticks k with (k + pace_offset) % m == 0 are looked at: the
        devices of one offset residue per period (:meth:`_paced_index`)."""
        if self.stretch > 1:
            devices, times = self._ticks(start, end, self._paced_index(self.stretch))
        else:
            devices, times = self.ticks(start, end)
        keep = self.free_at[devices] <= times
        if not self.all_capable:
            keep &= self.capable[devices]
        return devices[keep], times[keep]

    def eligible(self, devices: np.ndarray, times: np.ndarray) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
        """Of these ticks (in time order), the check-ins: positions, battery %, charging.

        A device listed several times checks in once, at its first tick at which it is
        eligible: its later ticks are looked at only while it has not been found eligible, so
        each device is observed forward in time and is at most one check-in. Observes the
        signals it needs at the tick times and records them (the run's history moves
        forward); draws the battery level seen at check-in.
        """
        # Two ticks of one device lie a whole period apart: a shorter span has no repeats.
        if devices.size < 2 or times.max() - times.min() < self.checkin_every:
            return self._eligible_once(devices, times)
        occurrence = _occurrence(devices)
        if occurrence.max() == 0:
            return self._eligible_once(devices, times)
        # Positions grouped by occurrence: pass k looks at the k-th ticks of devices not yet in.
        by_pass = np.argsort(occurrence, kind="stable")
        bounds = np.concatenate([[0], np.cumsum(np.bincount(occurrence))])
        found: list[tuple[np.ndarray, np.ndarray, np.ndarray]] = []
        checked_in = np.empty(0, dtype=devices.dtype)
        for k in range(bounds.size - 1):
            pending = by_pass[bounds[k]:bounds[k + 1]]
            if k:
                pending = pending[~np.isin(devices[pending], checked_in)]
            if not pending.size:
                continue
            live, battery, charging = self._eligible_once(devices[pending], times[pending])
            found.append((pending[live], battery, charging))
            checked_in = np.concatenate([checked_in, devices[pending[live]]])
        if not found:
            return self._eligible_once(devices[:0], times[:0])
        positions, battery, charging = (np.concatenate(parts) for parts in zip(*found, strict=True))
        in_time = np.argsort(positions, kind="stable")
        return positions[in_time], battery[in_time], charging[in_time]

    def _eligible_once(self, devices: np.ndarray, times: np.ndarray) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
        """:meth:`eligible` for ticks of distinct devices.

        The settled chain is sampled first, then the own chain of the first required signal
        where the settled state does not hold it on, then, for the ticks still eligible, the
        own chains of the other signals that matter (required, and charging) in one pass: a
        chain looked at but not needed (its signal held on by the settled state) is still a
        true look at an independent chain, so the run stays exact."""
        # Every lane of each check-in at once, from one keyed prefix per tick: [lane, n].
        u = self.draws["checkin"].at(devices, times).uniform(None, _LOOK_LANES)
        signals = self.signals
        n = devices.size
        if self.tables.has_settled:
            settled = signals.observe(devices, SETTLED, times, u[SETTLED])
        else:
            settled = np.zeros(n, dtype=bool)
        covers = self.tables.covers[self.group[devices]]  # [n, S]
        ok = np.ones(n, dtype=bool)
        wanted = self.required + ([] if _CHARGING in self.required else [_CHARGING])
        on: dict[int, np.ndarray] = {}
        if self.required:  # the first required signal prunes most ticks: look at it alone first
            first = self.required[0]
            held = settled & covers[:, first]
            look = np.flatnonzero(~held)
            on[first] = held.copy()
            on[first][look] = signals.observe(devices[look], 1 + first, times[look], u[1 + first][look])
            ok = on[first].copy()
        live = np.flatnonzero(ok)
        rest = [s for s in wanted if s not in on]
        lanes = [1 + s for s in rest]
        own = signals.observe_chains(devices[live], lanes, times[live], u[lanes][:, live])
        for i, s in enumerate(rest):
            on[s] = np.zeros(n, dtype=bool)
            on[s][live] = own[i] | (settled[live] & covers[live, s])
        for s in self.required:
            ok &= on[s]
        live = np.flatnonzero(ok)
        charging = on[_CHARGING][live]
        battery = self.battery.look(devices[live], times[live], charging, to_normal(u[BATTERY_LANE][live]))
        ok = battery >= self.min_battery
        return live[ok], battery[ok], charging[ok]

    def traits(self) -> dict[str, np.ndarray]:
        """Per-device arrays a selection policy may read (indexed by device)."""
        fleet = self.fleet
        return {
            "device_type": fleet.device_type,
            "region": fleet.region,
            "samples": fleet.samples,
            "predicted_s": self.predicted_s,
            "last_participation_s": self.last_participation,
            "participations": self.participations,
        }

    # ------------------------------------------------------------------ participation

    def accept(self, devices: np.ndarray) -> None:
        """A round accepted ``devices``: busy until released (no more check-ins)."""
        self.free_at[devices] = np.inf

    def release(self, cohort: Cohort, end_rel: np.ndarray) -> None:
        """The cohort's devices ended their participation at ``accept_s + end_rel`` (s): they
        rest for the rounds' ``rest``, their participation count and time move on, and the
        states their tasks left (every chain, the battery level) are recorded."""
        devices = cohort.device
        ended = cohort.accept_s + end_rel
        self.free_at[devices] = ended + self.config.rounds.rest
        self.last_participation[devices] = ended
        self.participations[devices] += 1
        chains = cohort.paths.state_at(np.minimum(ended, cohort.paths.t_stop))
        for c in np.flatnonzero(cohort.paths.followed):
            self.signals.record(devices, int(c), ended, chains[c].astype(float))
        charging = self.signals.signals_on(devices, chains)[_CHARGING]
        self.battery.record(devices, ended, charging, cohort.battery_at(end_rel))

    # ------------------------------------------------------------------ measurement

    def census_allocation(self, sample: int, minimum: int) -> np.ndarray:
        """Devices to draw per (type, region) group: ``sample`` spread in proportion to group
        sizes, at least ``minimum`` a group, never more than the group holds (so a group of
        ``minimum`` devices or fewer is counted whole)."""
        n = max(self.fleet.size, 1)
        share = np.rint(sample * self.group_size / n).astype(np.int64)
        return np.minimum(self.group_size, np.maximum(share, minimum))

    def census(self, t: float, sample: int, minimum: int) -> tuple[np.ndarray, np.ndarray, np.ndarray, np.ndarray]:
        """Stratified count of eligible devices at ``t`` per (type, region) group.

        In each group of N devices, n = :meth:`census_allocation` devices are drawn without
        replacement; each adds its probability of being eligible given the run so far (0 if
        its memory does not fit or it is busy or resting; else the product of its required
        signals' on-probabilities and the chance its battery level clears the minimum). The
        group's estimate is N x the mean of the drawn probabilities: unbiased for the
        group's expected eligible count. Its variance is N^2 (1 - n / N) s^2 / n, s^2 the
        sample variance of the drawn probabilities (stratified random sampling, Cochran,
        Sampling Techniques, 3rd ed., 1977, chapter 5; from memory): 0 for a group counted
        whole. Nothing is recorded, so measuring does not change the run.

        Returns per group: devices drawn, their summed probability, the estimate, its variance.
        """
        size = self.group_size
        drawn = self.census_allocation(sample, minimum)
        n_groups = size.size
        if not drawn.any():
            zero = np.zeros(n_groups)
            return drawn, zero, zero, zero.copy()
        devices = self.by_group[self._draw_strata(drawn)]
        prob = np.zeros(devices.size)
        live = self.capable[devices] & (self.free_at[devices] <= t)
        prob[live] = self._eligible_probability(devices[live], t)
        group = self.group[devices]
        total = np.bincount(group, weights=prob, minlength=n_groups)
        squares = np.bincount(group, weights=prob * prob, minlength=n_groups)
        with np.errstate(invalid="ignore", divide="ignore"):
            mean = np.where(drawn > 0, total / drawn, 0.0)
            s2 = np.where(drawn > 1, (squares - drawn * mean * mean) / (drawn - 1), 0.0)
            fpc = np.where(size > 0, 1.0 - drawn / size, 0.0)
            variance = np.where(drawn > 0, size * size * fpc * np.maximum(s2, 0.0) / drawn, 0.0)
        return drawn, total, size * mean, variance

    def _draw_strata(self, drawn: np.ndarray) -> np.ndarray:
        """Positions into ``by_group``: ``drawn[g]`` distinct devices of each group g, a uniform
        random subset of the group drawn without replacement (all of it when ``drawn[g]`` is
        its size)."""
        rng = self.rngs["census"]
        size, start = self.group_size, self.group_start
        parts = []
        for g in np.flatnonzero(drawn):
            if drawn[g] == size[g]:
                parts.append(start[g] + np.arange(size[g]))
            else:
                parts.append(start[g] + rng.choice(size[g], size=drawn[g], replace=False))
        return np.concatenate(parts)

    def _eligible_probability(self, devices: np.ndarray, t: float) -> np.ndarray:
        """Probability that each (free, capable) device would be eligible at ``t``: over the
        settled chain's two states, the product of the required signals' on-probabilities
        (1 for a signal the settled state holds on, else its own chain's), times the chance
        the battery clears the minimum for each charging state."""
        times = np.full(devices.size, t)
        signals, battery = self.signals, self.battery
        covers = self.tables.covers[self.group[devices]]  # [n, S]
        needed = sorted(set(self.required) | {_CHARGING})
        chains = ([SETTLED] if self.tables.has_settled else []) + [1 + s for s in needed]
        q = signals.probabilities(devices, chains, times)  # one pass over every chain that matters
        own = {s: q[chains.index(1 + s)] for s in needed}
        q_settled = q[0] if self.tables.has_settled else np.zeros(devices.size)
        ok_on = battery.ok_probability(devices, times, True, self.min_battery)
        ok_off = battery.ok_probability(devices, times, False, self.min_battery)
        total = np.zeros(devices.size)
        for settled, weight in ((False, 1.0 - q_settled), (True, q_settled)):
            prob = weight.copy()
            for s in self.required:
                prob *= np.where(settled & covers[:, s], 1.0, own[s])
            if _CHARGING in self.required:
                prob *= ok_on
            else:
                q = np.where(settled & covers[:, _CHARGING], 1.0, own[_CHARGING])
                prob *= q * ok_on + (1 - q) * ok_off
            total += prob
        return total


def _occurrence(devices: np.ndarray) -> np.ndarray:
    """For each entry, how many earlier entries name the same device (0 for the first)."""
    if devices.size < 2:
        return np.zeros(devices.size, dtype=np.int64)
    order = np.argsort(devices, kind="stable")
    ranked = devices[order]
    index = np.arange(devices.size)
    run_start = np.maximum.accumulate(np.where(np.r_[True, ranked[1:] != ranked[:-1]], index, 0))
    occurrence = np.empty(devices.size, dtype=np.int64)
    occurrence[order] = index - run_start
    return occurrence
