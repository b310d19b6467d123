"""A small, literal reference simulator of fleetsim's semantics: the oracle for the engine.

It is written plainly from the semantics in docs/architecture.md and the docstrings of the engine's
modules, and shares none of the engine's signal, runtime, server or client code (it reuses
only :mod:`fleetsim.config` for parsing and :func:`fleetsim.fleet.sample_fleet` for the
devices' static traits, so that engine and oracle see the same fleet for a seed).

Everything is simulated the slow, obvious way, with one simpy process per device:

- each device's three signals are real two-state timelines: on -> off at rate 1/d,
  off -> on at rate p / ((1 - p) d), p read from the hourly table at the device's local hour
  (zoneinfo). Rates are stepped on a 15-minute grid aligned to UTC quarter hours; within a
  step the rate is constant, so drawing an exponential and redrawing it at the step's end
  when it overshoots is exact (the exponential is memoryless);
- a device ticks at ``phase + k * checkin_every``; at a tick during a round's selection it
  checks in if it is eligible (memory fits, not working, not resting, every required signal
  on, and a battery level drawn from its type's Beta(mean, sd) for its charging state at
  or above the minimum); the round accepts check-ins first come, first served. An accepted
  device is working, and a device that took part in a round never checks in to it again
  (even with no rest), so a device is in a round at most once and checks in at its first
  eligible tick: the engine's "one candidate per device and collection window" is this
  rule for arrival-order selection;
- an accepted device downloads, trains and uploads with real simpy timeouts, interrupted by
  one of its required signals turning off, a crash (exponential hazard), the OS execution
  limit (measured from acceptance), the battery falling below the minimum (linear drain per
  phase, less the charger whenever the charging timeline is on), or the round closing while
  it downloads or trains (it is stopped; an upload in flight finishes and is late);
- a server process runs the round protocol: accept up to ceil(target * over_selection)
  until the selection timeout (fewer than min_reports accepted: selection-timeout), then wait for
  target_reports reports or the report deadline counted from the end of selection, commit
  with at least min_reports, wait the aggregation time, open the next round; an accepted
  device rests for ``rest`` after its participation ends. The server starts
  ``horizon.warmup`` before the horizon (unset: the rest period, at most two days) and the
  rounds it opens before the horizon start are not reported, as the engine documents.

Disruptions and selection policies other than first-come are not modelled.

It is slow (pure Python, an event per signal change and per check-in tick): use it on a few
thousand devices over a day or less. :func:`simulate_oracle` returns DataFrames whose rows
mean what the engine's ``result.rounds`` and ``result.participations`` rows mean, with
string labels instead of integer codes.
"""

from __future__ import annotations

import math
import random
from dataclasses import dataclass, field
from datetime import datetime, timezone
from zoneinfo import ZoneInfo

import pandas as pd
import simpy

from fleetsim.config import Config
from fleetsim.fleet import Fleet, sample_fleet

__all__ = ["OracleResult", "simulate_oracle", "SIGNAL_NAMES", "STEP_S"]

SIGNAL_NAMES = ("idle", "charging", "unmetered")
STEP_S = 900.0  # 15 minutes; every zone offset in use is a multiple of it (IANA tz database)
_CHARGING = 1
_INF = math.inf


@dataclass
class OracleResult:
    """The oracle's event log: one row per round and one per participation (string labels)."""

    rounds: pd.DataFrame
    participations: pd.DataFrame
    fleet: Fleet


def _beta_shape(mean_pct: float, sd_pct: float) -> tuple[float, float]:
    # Beta by its first two moments: mean m, variance s^2 = m(1-m)/(a+b+1) (common practice).
    m, s = mean_pct / 100.0, sd_pct / 100.0
    total = m * (1.0 - m) / (s * s) - 1.0
    return m * total, (1.0 - m) * total


class _Grid:
    """The 15-minute UTC grid and each region's local hour on it."""

    def __init__(self, start: datetime, first_s: float, last_s: float, zones: list[str]):
        self.epoch0 = start.astimezone(timezone.utc).timestamp()
        # Align grid point 0 to a UTC quarter hour at or before the first simulated time.
        q0 = math.floor((self.epoch0 + first_s) / STEP_S) * STEP_S
        self.origin_s = q0 - self.epoch0
        self.steps = int(math.ceil((last_s - self.origin_s) / STEP_S)) + 1
        self.hours: list[list[int]] = []
        for zone in zones:
            tz = ZoneInfo(zone)
            hours = []
            for k in range(self.steps):
                mid = q0 + (k + 0.5) * STEP_S
                offset = datetime.fromtimestamp(mid, timezone.utc).astimezone(tz).utcoffset()
                local = mid + offset.total_seconds()
                hours.append(int(local // 3600) % 24)
            self.hours.append(hours)

    def step(self, t: float) -> int:
        return int((t - self.origin_s) // STEP_S)

    def step_end(self, k: int) -> float:
        return self.origin_s + (k + 1) * STEP_S


@dataclass
class _Part:
    round: int
    device: int
    accepted_s: float
    battery_start_pct: float
    ended_s: float = _INF
    outcome: str = ""
    cause: str = "none"
    phase: str = "none"
    download_done: float = 0.0
    train_done: float = 0.0
    upload_done: float = 0.0


@dataclass
class _Round:
    index: int
    opened_s: float
    full: simpy.Event
    target: simpy.Event
    close: simpy.Event
    selecting: bool = True
    closed: bool = False
    selected_s: float = _INF
    closed_s: float = _INF
    accepted: int = 0
    reports: int = 0
    checkins: int = 0
    status: str = ""


@dataclass
class _Device:
    index: int
    type: int
    region: int
    on: list[bool]
    capable: bool
    working: bool = False
    free_at: float = -_INF
    change: simpy.Event | None = None  # succeeded on any signal change while working
    parts: list[_Part] = field(default_factory=list)


class _Oracle:
    def __init__(self, config: Config, seed: int):
        self.config = config
        self.fleet = sample_fleet(config, seed)
        # An explicit random stream of its own (never the engine's streams).
        self.rng = random.Random(f"oracle-{seed}")
        self.horizon_s = float(config.horizon.duration)
        types = config.fleet.device_types
        regions = config.fleet.regions
        self.type_specs = [types[name] for name in self.fleet.type_names]
        mean_on = [[t.signals[s].mean_on for s in SIGNAL_NAMES] for t in self.type_specs]
        self.mean_on = mean_on
        longest = max(max(row) for row in mean_on)
        # Signals settle before anything looks at them, so each chain starts near its own law:
        # five mean on-durations cover the relaxation exp(-t (a + b)), a + b >= 1/d (Ross).
        self.settle_s = max(6 * 3600.0, 5.0 * longest)
        # The server's own warm-up (``horizon.warmup``; unset: the rest period, at most two
        # days, as the config documents): rounds run before the horizon so that rest periods
        # are in their running state at its start; those rounds are not reported.
        if not hasattr(config.horizon, "warmup"):
            self.server_warmup_s = 0.0  # a config without the key: no server warm-up
        elif config.horizon.warmup is not None:
            self.server_warmup_s = float(config.horizon.warmup)
        else:
            self.server_warmup_s = min(config.rounds.rest, 2 * 86400.0)
        self.warmup_s = self.server_warmup_s + self.settle_s
        # simpy's clock starts before the warm-ups: simulated time 0 is the horizon start.
        self.env = simpy.Environment(initial_time=-self.warmup_s)
        rounds = config.rounds
        tail = rounds.selection_timeout + rounds.report_deadline + 2 * 86400.0
        self.grid = _Grid(config.horizon.start, -self.warmup_s, self.horizon_s + tail,
                          [regions[name].timezone for name in self.fleet.region_names])
        # off -> on rate per (type, region, signal) and grid step.
        self.on_rate: dict[tuple[int, int, int], list[float]] = {}
        self.p_at: dict[tuple[int, int, int], list[float]] = {}
        for ti, spec in enumerate(self.type_specs):
            for ri in range(len(self.fleet.region_names)):
                for si, name in enumerate(SIGNAL_NAMES):
                    pattern = spec.signals[name]
                    ps = [pattern.hourly[h] for h in self.grid.hours[ri]]
                    rates = []
                    for p in ps:
                        rates.append(_INF if p >= 1.0 else p / ((1.0 - p) * pattern.mean_on))
                    self.on_rate[(ti, ri, si)] = rates
                    self.p_at[(ti, ri, si)] = ps
        self.beta = [
            (_beta_shape(t.battery_level.unplugged.mean, t.battery_level.unplugged.sd),
             _beta_shape(t.battery_level.charging.mean, t.battery_level.charging.sd))
            for t in self.type_specs
        ]
        work = config.workload
        self.required = [SIGNAL_NAMES.index(s) for s in work.requires]
        fleet = self.fleet
        self.devices: list[_Device] = []
        for i in range(fleet.size):
            self.devices.append(_Device(
                index=i,
                type=int(fleet.device_type[i]),
                region=int(fleet.region[i]),
                on=[False, False, False],
                capable=bool(fleet.memory_bytes[i] >= work.memory_needed),
            ))
        self.round: _Round | None = None
        self.rounds: list[_Round] = []
        self.tasks: list[simpy.Process] = []

    # ------------------------------------------------------------------ signals

    def _signal(self, dev: _Device, s: int):
        env, rng, grid = self.env, self.rng, self.grid
        off_rate = 1.0 / self.mean_on[dev.type][s]
        on_rates = self.on_rate[(dev.type, dev.region, s)]
        end_of_grid = grid.origin_s + grid.steps * STEP_S
        # The chain starts at the warm-up origin from the step's on-probability.
        k0 = grid.step(env.now)
        dev.on[s] = rng.random() < self.p_at[(dev.type, dev.region, s)][k0]
        while True:
            t = env.now
            if dev.on[s]:
                # The on -> off rate 1/d is the same in every step, so redrawing at each
                # boundary would give the same law: one exponential draw suffices.
                t += rng.expovariate(off_rate)
            while not dev.on[s]:
                k = grid.step(t)
                if k >= grid.steps:
                    return  # past the grid: the run is over long before this
                rate = on_rates[k]
                wait = 0.0 if rate == _INF else (rng.expovariate(rate) if rate > 0 else _INF)
                end = grid.step_end(k)
                if t + wait < end:
                    t += wait
                    break
                t = end  # overshoot: redraw at the step boundary with the next step's rate
                if t >= end_of_grid:
                    return
            yield env.timeout(t - env.now)
            dev.on[s] = not dev.on[s]
            if dev.change is not None and not dev.change.triggered:
                dev.change.succeed()

    # ------------------------------------------------------------------ check-ins

    def _ticks(self, dev: _Device):
        env = self.env
        every = self.config.rounds.checkin_every
        phase = float(self.fleet.checkin_phase_s[dev.index])
        first = phase + math.ceil((-self.server_warmup_s - phase) / every) * every
        yield env.timeout(first - env.now)
        while True:
            self._tick(dev)
            yield env.timeout(every)

    def _tick(self, dev: _Device) -> None:
        rnd = self.round
        if rnd is None or not rnd.selecting:
            return
        now = self.env.now
        if not dev.capable or dev.working or now < dev.free_at:
            return
        if dev.parts and dev.parts[-1].round == rnd.index:
            return  # a round takes a device once (common practice), even with no rest
        if not all(dev.on[s] for s in self.required):
            return
        charging = dev.on[_CHARGING]
        a, b = self.beta[dev.type][1 if charging else 0]
        battery = 100.0 * self.rng.betavariate(a, b)
        if battery < self.config.workload.min_battery:
            return
        rnd.checkins += 1
        if rnd.accepted >= self.config.rounds.accept_count:
            return
        rnd.accepted += 1
        part = _Part(round=rnd.index, device=dev.index, accepted_s=now, battery_start_pct=battery)
        dev.parts.append(part)
        dev.working = True
        self.tasks.append(self.env.process(self._task(dev, rnd, part)))
        if rnd.accepted == self.config.rounds.accept_count:
            rnd.full.succeed()

    # ------------------------------------------------------------------ the task

    def _task(self, dev: _Device, rnd: _Round, part: _Part):
        env, rng = self.env, self.rng
        fleet, work = self.fleet, self.config.workload
        i = dev.index
        down_s = work.model_size * 8.0 / (fleet.down_mbps[i] * 1e6)
        padded = math.ceil(int(fleet.samples[i]) / work.batch_size) * work.batch_size
        train_s = padded * work.epochs * float(fleet.sample_cost_s[i])
        up_s = work.upload_bytes * 8.0 / (fleet.up_mbps[i] * 1e6)
        hazard = work.crash_rate / 3600.0
        start = env.now
        crash_at = start + rng.expovariate(hazard) if hazard > 0 else _INF
        os_at = start + work.execution_limit
        level = part.battery_start_pct
        per_ws = 100.0 / (3600.0 * float(fleet.battery_wh[i]))  # percent per watt-second
        charge_w = float(fleet.charge_power_w[i])
        phases = (("download", down_s, float(fleet.radio_power_w[i])),
                  ("train", train_s, float(fleet.train_power_w[i])),
                  ("upload", up_s, float(fleet.radio_power_w[i])))
        done = {"download": 0.0, "train": 0.0, "upload": 0.0}
        ended_by = ""
        for name, length, draw_w in phases:
            phase_end = env.now + length
            while True:
                now = env.now
                slope = ((charge_w if dev.on[_CHARGING] else 0.0) - draw_w) * per_ws
                cross_at = now + (level - work.min_battery) / -slope if slope < 0 else _INF
                due = {"phase": phase_end, "execution-limit": os_at, "crash": crash_at, "battery-low": cross_at}
                first = min(due, key=lambda key: (due[key], key != "phase"))  # ties: completion
                dev.change = env.event()
                waits = [env.timeout(max(due[first] - now, 0.0)), dev.change]
                if name != "upload":
                    waits.append(rnd.close)
                fired = yield env.any_of(waits)
                elapsed = env.now - now
                done[name] += elapsed
                level = min(level + slope * elapsed, 100.0)
                dev.change = None
                off = [s for s in self.required if not dev.on[s]]
                if off:
                    ended_by = SIGNAL_NAMES[off[0]] + "-ended"
                    break
                if waits[0] in fired:
                    if first == "phase":
                        break
                    ended_by = first
                    break
                if name != "upload" and rnd.close in fired:
                    ended_by = "stopped"
                    break
                # A signal changed that does not end the task (e.g. the charger): go on.
            if ended_by:
                part.phase = name
                break
        part.download_done, part.train_done, part.upload_done = done["download"], done["train"], done["upload"]
        part.ended_s = env.now
        if ended_by == "stopped":
            part.outcome, part.phase = "stopped", "none"
        elif ended_by:
            part.outcome, part.cause = "dropout", ended_by
        elif rnd.closed:
            part.outcome = "late"
        else:
            part.outcome = "on-time"
            rnd.reports += 1
            if rnd.reports == self.config.rounds.target_reports:
                rnd.target.succeed()
        dev.working = False
        dev.free_at = env.now + self.config.rounds.rest

    # ------------------------------------------------------------------ the server

    def _server(self):
        env = self.env
        rounds = self.config.rounds
        index = 0
        yield env.timeout(-self.server_warmup_s - env.now)  # the first round opens here
        while env.now < self.horizon_s:
            rnd = _Round(index=index, opened_s=env.now, full=env.event(), target=env.event(), close=env.event())
            index += 1
            self.round = rnd
            self.rounds.append(rnd)
            yield env.timeout(rounds.selection_timeout) | rnd.full
            rnd.selecting = False
            rnd.selected_s = env.now
            if rnd.accepted < rounds.required_reports:
                rnd.status = "selection-timeout"
            else:
                if not rnd.target.triggered:
                    yield env.timeout(rounds.report_deadline) | rnd.target
                rnd.status = "committed" if rnd.reports >= rounds.required_reports else "report-deadline"
            rnd.closed = True
            rnd.closed_s = env.now
            rnd.close.succeed()  # devices still downloading or training stop now
            yield env.timeout(rounds.aggregation_time)

    def run(self) -> OracleResult:
        env = self.env
        for dev in self.devices:
            for s in range(len(SIGNAL_NAMES)):
                env.process(self._signal(dev, s))
            env.process(self._ticks(dev))
        server = env.process(self._server())
        env.run(until=server)
        # Uploads in flight at the last close finish (late) or drop out.
        pending = [task for task in self.tasks if task.is_alive]
        if pending:
            env.run(until=env.all_of(pending))
        return self._result()

    def _result(self) -> OracleResult:
        fleet, work = self.fleet, self.config.workload
        reported = [r for r in self.rounds if r.opened_s >= 0.0]  # not the warm-up's rounds
        first = reported[0].index if reported else len(self.rounds)
        status = {r.index: r.status for r in self.rounds}
        rows = []
        for dev in self.devices:
            for part in dev.parts:
                if part.round < first:
                    continue
                i = part.device
                bytes_down = work.model_size * min(part.download_done / self._down_s(i), 1.0)
                up_s = work.upload_bytes * 8.0 / (fleet.up_mbps[i] * 1e6)
                bytes_up = work.upload_bytes * min(part.upload_done / up_s, 1.0) if up_s > 0 else 0.0
                radio_w, train_w = float(fleet.radio_power_w[i]), float(fleet.train_power_w[i])
                energy_wh = (radio_w * (part.download_done + part.upload_done) + train_w * part.train_done) / 3600.0
                committed = status[part.round] == "committed"
                used = part.outcome == "on-time" and committed
                if used:
                    waste = "used"
                elif part.outcome == "dropout":
                    waste = part.cause
                elif not committed:
                    waste = status[part.round]  # the round's status names the waste
                elif part.outcome == "late":
                    waste = "late"
                else:
                    waste = "stopped"
                rows.append({
                    "round": part.round - first,
                    "device": i,
                    "device_type": fleet.type_names[dev.type],
                    "region": fleet.region_names[dev.region],
                    "accepted_s": part.accepted_s,
                    "ended_s": part.ended_s,
                    "outcome": part.outcome,
                    "dropout_cause": part.cause,
                    "dropout_phase": part.phase,
                    "waste_cause": waste,
                    "used": used,
                    "compute_s": part.train_done,
                    "download_bytes": bytes_down,
                    "upload_bytes": bytes_up,
                    "energy_wh": energy_wh,
                    "battery_start_pct": part.battery_start_pct,
                    "samples": int(fleet.samples[i]),
                })
        parts = pd.DataFrame(rows, columns=_PART_COLUMNS)
        parts = parts.sort_values(["round", "accepted_s"], kind="stable").reset_index(drop=True)
        rounds = pd.DataFrame(
            {
                "round": [r.index - first for r in reported],
                "opened_s": [r.opened_s for r in reported],
                "selected_s": [r.selected_s for r in reported],
                "closed_s": [r.closed_s for r in reported],
                "accepted": [r.accepted for r in reported],
                "reports": [r.reports for r in reported],
                "status": [r.status for r in reported],
                "checkins": [r.checkins for r in reported],
            }
        )
        return OracleResult(rounds=rounds, participations=parts, fleet=fleet)

    def _down_s(self, i: int) -> float:
        return self.config.workload.model_size * 8.0 / (self.fleet.down_mbps[i] * 1e6)


_PART_COLUMNS = [
    "round", "device", "device_type", "region", "accepted_s", "ended_s", "outcome", "dropout_cause", "dropout_phase",
    "waste_cause", "used", "compute_s", "download_bytes", "upload_bytes", "energy_wh", "battery_start_pct",
    "samples",
]


def simulate_oracle(config: Config, seed: int = 0) -> OracleResult:
    """Run the literal reference simulation of ``config`` (first-come selection, no disruptions).

    The fleet is :func:`fleetsim.fleet.sample_fleet` of the same seed; every dynamic draw
    comes from the oracle's own stream. Raises ValueError for a configuration it does not
    model (another selection policy, or disruptions).
    """
    if config.selection.policy != "first-come":
        raise ValueError(f"the oracle models first-come selection only, not {config.selection.policy!r}")
    if config.disruptions:
        raise ValueError("the oracle does not model disruptions")
    return _Oracle(config, seed).run()
