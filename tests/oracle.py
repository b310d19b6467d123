"""A small, literal reference simulator of fleetsim's semantics: the oracle for the engine.

It is written plainly from the model in docs/architecture.md, docs/fleet-file.md and the
engine's docstrings, and shares none of the engine's signal, runtime, server or client code
(it reuses only :mod:`fleetsim.config` for parsing and for the merged (device type, region)
specs, and :func:`fleetsim.fleet.sample_fleet` for the devices' static traits and their
(type, region) pairs drawn from the joint mix, so that engine and oracle see the same fleet
for a seed). The round protocol's arithmetic (local work, update bytes and encoding time,
secure aggregation's phases and threshold) is written out here from docs/fleet-file.md, not
taken from the config's helpers.

Everything is simulated the slow, obvious way, with one simpy process per chain and device:

- each device carries four independent two-state chains, each a real timeline: the settled
  chain (never on when the spec has no ``settled``) and the own chain of each of idle,
  charging and unmetered. A chain with on-probability p and mean on-duration d in a step
  leaves "on" at rate 1/d and "off" at rate p / ((1 - p) d). p and d are read for the
  step's LOCAL hour and LOCAL weekday or weekend day (zoneinfo; the region's
  ``weekend_days``; the ``weekend`` values where given, else the weekday ones) from the
  device's merged (type, region) spec: the settled chain from ``settled``; the own chain of
  a signal s that the settled state holds on (``turns_on``) has
  p_own = 1 - (1 - p_s) / (1 - p_settled) (0 where p_s = p_settled) and d = the signal's
  mean on-duration in that hour; any other signal's own chain has the signal's p_s and d.
  Every p is clipped to [0, 1 - 1e-6]. Signal s is on when its own chain is on, or the
  settled chain is on and covers s. Rates are stepped on a 15-minute grid aligned to UTC
  quarter hours (the local hour and date are those of each step's start); within a step
  both rates are constant, so drawing an exponential and redrawing it at the step's end
  when it overshoots is exact (the exponential is memoryless);
- a device ticks at ``phase + k * checkin_every``; at a tick during a round's selection it
  checks in if it is eligible for the round's workload (memory fits, not working, not
  resting, every required signal on, and a battery level at or above the minimum); the
  round accepts check-ins first come,
  first served. An accepted device is working, and a device that took part in a round never
  checks in to it again (even with no rest), so a device is in a round at most once and
  checks in at its first eligible tick: the engine's "one candidate per device and
  collection window" is this rule for arrival-order selection;
- the battery level seen at a look (a tick that reaches the battery check) is
  F_c^{-1}(Phi(Z)) with F_c the Beta law (by mean and sd) of the device's charging state c
  in its merged spec and Z a standard-normal score per device: Z ~ N(0, 1) at the first
  look, then Z' = w Z + sqrt(1 - w^2) N(0, 1) with w = exp(-(t - t0) / correlation_time)
  since the last record (Z, t0); every look records (Z', t). At the end of a participation
  the level L and charging state c there are recorded as Z = Phi^{-1}(F_c(L)) (L: the level
  the task left, as of its upload's end at the latest; the level seen at check-in for a
  task that never started);
- a task starts at the device's acceptance (``configure: at-acceptance``) or, with
  ``configure: after-selection``, when the selection ends: the accepted device waits,
  reserved and not working, and then every accepted device's task starts at that instant;
  if the selection ended with too few accepted, no task starts (each participation ends
  there, stopped, with no work), and a required signal that turned off at any time while
  it waited makes the device drop out at its start;
- the task's phases run with real simpy timeouts: download, (with secure aggregation,
  key advertisement and key sharing), training, upload. Training is the local steps, then
  the update's encoding: n' = min(samples, max_examples), steps = min(epochs *
  ceil(n' / batch), max_steps), steps * batch examples at the device's per-sample cost, then
  model_size / 4 / 1e6 * (encode_time + rotation_time if rotation) seconds; the update is
  n_w * keep * bits / 8 bytes plus, when sparsified, min(n_w * keep * 4, n_w / 8) bytes of
  positions (n_w = model_size / 4 weights). Each secure-aggregation phase lasts its fixed
  time plus the transfer of its bytes at the device's rates (advertisement: 2 key_bytes up,
  2 key_bytes * n down; sharing: (n - 1) share_bytes each way; the masked upload: n_w *
  (bits + ceil(log2 n)) / 8 bytes; n the round's accepted count);
- a task is interrupted by one of its required signals turning off (several at once, as
  when the settled chain ends: the first of idle, charging, unmetered names the cause), a
  crash (exponential hazard from the task's start), the OS execution limit (measured from
  the task's start), the battery falling below the minimum (linear drain per phase: radio
  power in the transfer and key phases, training power in training and encoding, less the
  charger whenever the charging signal is on, capped at 100 %), or the round closing before
  its upload (it is stopped; an upload in flight finishes and is late);
- with secure aggregation an on-time reporter then waits for the round's close and answers
  the unmasking for its fixed time plus (n - 1) share_bytes up, exposed through both to
  its signals, the crash and the execution limit (not the battery, which is followed
  through the upload only); interrupted, it stays on time with that dropout cause and
  phase "unmasking" and ends there; the unmasking's bytes and radio energy count for the
  time spent in it;
- each round runs the round protocol in a process of its own: accept up to
  ceil(target * over_selection) until the selection timeout (fewer than min_reports
  accepted: selection-timeout), then wait for target_reports reports or the report deadline
  counted from the end of selection, commit with at least min_reports (with secure
  aggregation also at least ceil(threshold * accepted) answers to the unmasking, else
  "unmasking-failed"; the round then ends at its close plus the longest unmasking time of
  its on-time reporters), then wait the aggregation time; an accepted device rests for
  ``rest`` after its participation ends. The server starts ``horizon.warmup`` before the
  horizon (unset: the longest rest period of its workloads, at most two days) and the rounds
  it opens before the horizon start are not reported, as the engine documents;
- several workloads (``config.jobs``, each a Config of one workload with its share) share
  one selection desk, a server process that opens one round at a time: every tick during a
  selection is that round's, judged by its workload's memory, required signals and minimum
  battery. A workload is ready when it has no round open or its round has ended and its
  aggregation time passed (one round in flight each). Whenever the desk is free (at the
  start, at the end of a selection, or when a workload becomes ready while no selection
  runs) it opens a round of a ready workload, none while none is; of several ready ones,
  ``sharing.rule: priority`` takes the first in the order of ``workloads``, ``shares`` the
  one with the least selection time held so far (from the warm-up's first round) divided
  by its share, ties by that order. The desk is free again when the selection ends, so one
  workload's round may collect reports while another's selects. A device is in one round
  at a time whatever its workload (working and waiting are the device's), and after a
  participation it rests for that round's workload's ``rest``, during which no round
  takes it. Each workload's rounds are numbered from 0 after the warm-up; with several
  workloads both frames are led by a ``workload`` column (the names, as strings), rows in
  the order of ``workloads``. A file of one workload runs as it did before there were
  several: the desk opens that workload's next round once the last has ended and its
  aggregation time passed.

Disruptions, selection policies other than first-come, pacing and more than one round in
flight are not modelled.

It is slow (pure Python, an event per chain flip and per check-in tick): use it on a few
thousand devices over a day or less. :func:`simulate_oracle` returns DataFrames whose rows
mean what the engine's ``result.rounds`` and ``result.participations`` rows mean, with
string labels instead of integer codes.
"""

from __future__ import annotations

import math
import random
from dataclasses import dataclass, field
from datetime import datetime, timezone
from fractions import Fraction
from zoneinfo import ZoneInfo

import pandas as pd
import simpy
from scipy import special

from fleetsim.config import Config
from fleetsim.fleet import Fleet, sample_fleet

__all__ = ["OracleResult", "simulate_oracle", "SIGNAL_NAMES", "CHAIN_NAMES", "STEP_S", "chain_laws"]

SIGNAL_NAMES = ("idle", "charging", "unmetered")
CHAIN_NAMES = ("settled", "idle", "charging", "unmetered")  # chain 0, then each signal's own chain
STEP_S = 900.0  # 15 minutes; every zone offset in use is a multiple of it (IANA tz database)
_CHARGING = 1
_INF = math.inf
_P_MAX = 1.0 - 1e-6  # every on-probability is clipped to [0, 1 - 1e-6]
_DAY_NAMES = ("monday", "tuesday", "wednesday", "thursday", "friday", "saturday", "sunday")  # date.weekday() order
# A level of exactly 0 % or 100 % has the Beta CDF 0 or 1, whose normal score is infinite; the
# score is kept finite (|Z| below about 7) so that later looks still mix in fresh noise.
_U_CLIP = 1e-12


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


def _by_hour(value) -> list[float]:
    """24 values by local hour from a list of 24, or from one value for every hour."""
    if isinstance(value, (int, float)):
        return [float(value)] * 24
    values = [float(v) for v in value]
    assert len(values) == 24, values
    return values


def _pattern_law(pattern) -> tuple[list[list[float]], list[list[float]]]:
    """A signal's or the settled state's (p, d) as [weekday, weekend][local hour]; d in s.

    A ``weekend`` key missing (or the whole ``weekend``): the weekday value.
    """
    p_week, d_week = _by_hour(pattern.hourly), _by_hour(pattern.mean_on)
    weekend = pattern.weekend
    p_end = p_week if weekend is None or weekend.hourly is None else _by_hour(weekend.hourly)
    d_end = d_week if weekend is None or weekend.mean_on is None else _by_hour(weekend.mean_on)
    return [p_week, p_end], [d_week, d_end]


def chain_laws(spec) -> tuple[list[list[list[float]]], list[list[list[float]]]]:
    """On-probability and mean on-duration (s) of each chain of a merged (type, region) spec.

    Both indexed [chain (CHAIN_NAMES)][0 weekday, 1 weekend][local hour]. The own chain of a
    signal s held on by the settled state has p_own = 1 - (1 - p_s) / (1 - p_settled) (0
    where p_s = p_settled), so that, the chains being independent,
    P(s off) = (1 - p_own)(1 - p_settled) = 1 - p_s. No settled state: chain 0 is never on.
    Every p is clipped to [0, 1 - 1e-6].
    """
    signals = {name: _pattern_law(spec.signals[name]) for name in SIGNAL_NAMES}
    settled = spec.settled
    if settled is None:
        p_set, d_set = [[0.0] * 24, [0.0] * 24], [[3600.0] * 24, [3600.0] * 24]
        covered: set[str] = set()
    else:
        p_set, d_set = _pattern_law(settled)
        covered = set(settled.turns_on)
    p = [[[0.0] * 24 for _ in range(2)] for _ in CHAIN_NAMES]
    d = [[[0.0] * 24 for _ in range(2)] for _ in CHAIN_NAMES]
    for w in range(2):
        for h in range(24):
            p[0][w][h], d[0][w][h] = p_set[w][h], d_set[w][h]
            for c, name in enumerate(SIGNAL_NAMES, start=1):
                p_s, d_s = signals[name][0][w][h], signals[name][1][w][h]
                if name in covered:
                    ps = p_set[w][h]
                    p_s = 0.0 if p_s == ps else 1.0 - (1.0 - p_s) / (1.0 - ps)
                p[c][w][h], d[c][w][h] = p_s, d_s
            for c in range(len(CHAIN_NAMES)):
                p[c][w][h] = min(max(p[c][w][h], 0.0), _P_MAX)
    return p, d


class _Grid:
    """The 15-minute UTC grid and, per region, the local hour and weekend flag of each step.

    Step k covers [origin_s + k STEP_S, origin_s + (k + 1) STEP_S); its local hour and local
    date are those of its start in the region's zone (zoneinfo), and it is a weekend step when
    that date's day name is one of the region's weekend days.
    """

    def __init__(self, start: datetime, first_s: float, last_s: float, zones: list[str],
                 weekend_days: list[tuple[str, ...]]):
        self.epoch0 = start.astimezone(timezone.utc).timestamp()
        # Align grid point 0 to a UTC quarter hour at or before the first simulated time.
        q0 = math.floor((self.epoch0 + first_s) / STEP_S) * STEP_S
        self.origin_s = q0 - self.epoch0
        self.steps = int(math.ceil((last_s - self.origin_s) / STEP_S)) + 1
        self.hours: list[list[int]] = []
        self.weekend: list[list[int]] = []
        for zone, days in zip(zones, weekend_days, strict=True):
            tz = ZoneInfo(zone)
            hours, weekend = [], []
            for k in range(self.steps):
                local = datetime.fromtimestamp(q0 + k * STEP_S, timezone.utc).astimezone(tz)
                hours.append(local.hour)
                weekend.append(1 if _DAY_NAMES[local.weekday()] in days else 0)
            self.hours.append(hours)
            self.weekend.append(weekend)

    def step(self, t: float) -> int:
        return int((t - self.origin_s) // STEP_S)

    def step_end(self, k: int) -> float:
        return self.origin_s + (k + 1) * STEP_S


@dataclass
class _Phase:
    """One phase of a task: its length (s), the power it draws (W), whether the battery is
    followed through it, and the bytes it moves each way over its whole length."""

    name: str
    length: float
    power_w: float
    followed: bool = True
    down_bytes: float = 0.0
    up_bytes: float = 0.0


@dataclass
class _Plan:
    """A device's task in a round: the phases in order and the local-work arithmetic."""

    phases: list[_Phase]
    unmask: _Phase | None  # secure aggregation's unmasking (from the round's close), else None
    steps: int  # local steps (batches)
    batch: int
    local_s: float  # the local steps' time (the training phase less the encoding)
    weight: float  # the FedAvg weight: distinct examples trained on


@dataclass
class _Part:
    round: int
    device: int
    accepted_s: float
    battery_start_pct: float
    job: int = 0  # the index of the round's workload in ``config.jobs``
    started_s: float = _INF
    ended_s: float = _INF
    outcome: str = ""
    cause: str = "none"
    phase: str = "none"
    plan: _Plan | None = None
    done: dict[str, float] = field(default_factory=dict)  # seconds spent in each phase entered
    survived: bool = False  # secure aggregation: an on-time reporter that answered the unmasking


@dataclass
class _Round:
    index: int
    job: _Job = field(repr=False)  # the round's workload
    opened_s: float
    full: simpy.Event
    selected: simpy.Event  # the selection's end
    target: simpy.Event
    close: simpy.Event
    selecting: bool = True
    closed: bool = False
    abandoned: bool = False  # after-selection: the selection failed, so no task starts
    selected_s: float = _INF
    closed_s: float = _INF
    ended_s: float = _INF
    accepted: int = 0
    reports: int = 0
    checkins: int = 0
    status: str = ""  # the status at close; secure aggregation may turn "committed" into "unmasking-failed"
    parts: list[_Part] = field(default_factory=list)


@dataclass
class _Device:
    index: int
    type: int
    region: int
    on: list[bool]  # the signals idle, charging, unmetered
    chain: list[bool]  # the chains settled, own idle, own charging, own unmetered
    working: bool = False  # in a round of any workload, from its acceptance to its end
    free_at: float = -_INF
    change: simpy.Event | None = None  # succeeded on any signal change while working
    waiting: bool = False  # accepted, waiting for the selection's end (after-selection)
    lost: set[int] = field(default_factory=set)  # required signals that turned off while waiting
    required: list[int] = field(default_factory=list)  # the signals its current round's workload requires
    parts: list[_Part] = field(default_factory=list)
    score: float | None = None  # the battery's normal score Z at its last record (None: no look yet)
    score_s: float = 0.0  # the time of that record


@dataclass
class _Job:
    """One workload as the server runs it (an entry of ``config.jobs``): its Config of one
    workload, what its eligibility reads of it, its rounds and the desk time they held."""

    index: int
    name: str
    config: Config
    share: float
    required: list[int]  # its required signals, in signal order
    capable: list[bool]  # by device: the device's memory fits its model
    rounds: list[_Round] = field(default_factory=list, repr=False)
    desk_s: float = 0.0  # the selection time its rounds have held the desk, from the warm-up on
    running: simpy.Process | None = None  # its last round's process (selection to aggregation)

    @property
    def after_selection(self) -> bool:
        return self.config.rounds.configure == "after-selection"

    @property
    def secure(self):
        return self.config.rounds.secure_aggregation


@dataclass
class _Clock:
    """What a running task carries from phase to phase: its battery level and deadlines."""

    level: float
    crash_at: float
    os_at: float
    per_ws: float  # percent per watt-second
    charge_w: float


def _jobs(config: Config, fleet: Fleet) -> list[_Job]:
    """Each workload of ``config`` with its requirements; its round protocol's options (when
    tasks start, secure aggregation, docs/fleet-file.md) are read from its Config where used."""
    return [
        _Job(
            index=w, name=job.name, config=job.config, share=float(job.share),
            # In signal order, so that signals ending at once name the first of idle, charging, unmetered.
            required=sorted(SIGNAL_NAMES.index(s) for s in job.config.workload.requires),
            capable=[bool(m >= job.config.workload.memory_needed) for m in fleet.memory_bytes],
        )
        for w, job in enumerate(config.jobs)
    ]


class _Oracle:
    def __init__(self, config: Config, seed: int):
        self.config = config
        self.fleet = sample_fleet(config, seed)
        # An explicit random stream of its own (never the engine's streams).
        self.rng = random.Random(f"oracle-{seed}")
        self.horizon_s = float(config.horizon.duration)
        jobs = config.jobs  # each workload as a Config of one workload, in the order of ``workloads``
        sharing = getattr(config, "sharing", None)
        self.rule = sharing.rule if sharing is not None else "priority"  # unset: priority
        regions = config.fleet.regions
        fleet = self.fleet
        n_types, n_regions = len(fleet.type_names), len(fleet.region_names)
        # Every (type, region) pair's merged spec: the type's values < the region's overrides <
        # the type's by_region entry for the region (fleetsim.config merges and validates).
        self.group_specs = {
            (ti, ri): config.fleet.group_spec(fleet.type_names[ti], fleet.region_names[ri])
            for ti in range(n_types) for ri in range(n_regions)
        }
        laws = {key: chain_laws(spec) for key, spec in self.group_specs.items()}
        longest = max(d for _, ds in laws.values() for chain in ds for week in chain for d in week)
        # Chains settle before anything looks at them, so each starts near its own law: five
        # of the longest mean on-durations cover the relaxation exp(-integral of (a + b)),
        # with a + b = 1 / ((1 - p) d) >= 1/d in every step (Ross, section 6.4, from memory).
        self.settle_s = max(6 * 3600.0, 5.0 * longest)
        # The server's own warm-up (``horizon.warmup``; unset: the longest rest period of the
        # workloads, at most two days, as the config documents): rounds run before the horizon
        # so that rest periods are in their running state at its start; those rounds are not
        # reported.
        if not hasattr(config.horizon, "warmup"):
            self.server_warmup_s = 0.0  # a config without the key: no server warm-up
        elif config.horizon.warmup is not None:
            self.server_warmup_s = float(config.horizon.warmup)
        else:
            self.server_warmup_s = min(max(job.config.rounds.rest for job in jobs), 2 * 86400.0)
        self.warmup_s = self.server_warmup_s + self.settle_s
        # simpy's clock starts before the warm-ups: simulated time 0 is the horizon start.
        self.env = simpy.Environment(initial_time=-self.warmup_s)
        tail = max(job.config.rounds.selection_timeout + job.config.rounds.report_deadline for job in jobs)
        tail += 2 * 86400.0
        region_specs = [regions[name] for name in fleet.region_names]
        self.grid = _Grid(config.horizon.start, -self.warmup_s, self.horizon_s + tail,
                          [r.timezone for r in region_specs],
                          [tuple(r.weekend_days) for r in region_specs])
        # Per (type, region, chain) and grid step: the on-probability and the rates of leaving
        # "off" (p / ((1 - p) d)) and "on" (1 / d), for the step's local hour and day kind.
        self.p_at: dict[tuple[int, int, int], list[float]] = {}
        self.on_rate: dict[tuple[int, int, int], list[float]] = {}
        self.off_rate: dict[tuple[int, int, int], list[float]] = {}
        for (ti, ri), (p, d) in laws.items():
            hours, weekend = self.grid.hours[ri], self.grid.weekend[ri]
            for c in range(len(CHAIN_NAMES)):
                ps = [p[c][w][h] for w, h in zip(weekend, hours, strict=True)]
                ds = [d[c][w][h] for w, h in zip(weekend, hours, strict=True)]
                self.p_at[(ti, ri, c)] = ps
                self.on_rate[(ti, ri, c)] = [q / ((1.0 - q) * dur) for q, dur in zip(ps, ds, strict=True)]
                self.off_rate[(ti, ri, c)] = [1.0 / dur for dur in ds]
        # Which signals the settled chain holds on, per group (none without a settled state).
        self.covers = {}
        for key, spec in self.group_specs.items():
            settled = spec.settled
            turns_on = set(settled.turns_on) if settled is not None else set()
            self.covers[key] = [name in turns_on for name in SIGNAL_NAMES]
        # Battery: Beta shapes (unplugged, charging) and the score's correlation time, per group.
        self.beta, self.correlation_s = {}, {}
        for key, spec in self.group_specs.items():
            levels = spec.battery_level
            self.beta[key] = (_beta_shape(levels.unplugged.mean, levels.unplugged.sd),
                              _beta_shape(levels.charging.mean, levels.charging.sd))
            self.correlation_s[key] = float(levels.correlation_time)
        self.devices: list[_Device] = []
        for i in range(fleet.size):
            self.devices.append(_Device(
                index=i,
                type=int(fleet.device_type[i]),
                region=int(fleet.region[i]),
                on=[False, False, False],
                chain=[False, False, False, False],
            ))
        self.jobs = _jobs(config, fleet)
        self.round: _Round | None = None  # the round selecting now, or the last one that did
        self.tasks: list[simpy.Process] = []

    # ------------------------------------------------------------------ signals

    def _chain(self, dev: _Device, c: int):
        env, rng, grid = self.env, self.rng, self.grid
        key = (dev.type, dev.region, c)
        rates = (self.on_rate[key], self.off_rate[key])  # indexed by the state: leave off, leave on
        end_of_grid = grid.origin_s + grid.steps * STEP_S
        # The chain starts at the warm-up origin from the step's on-probability.
        k0 = grid.step(env.now)
        dev.chain[c] = rng.random() < self.p_at[key][k0]
        self._update_signals(dev)
        while True:
            t = env.now
            state = dev.chain[c]
            while True:
                k = grid.step(t)
                if k >= grid.steps:
                    return  # past the grid: the run is over long before this
                rate = rates[state][k]
                wait = rng.expovariate(rate) if rate > 0 else _INF
                end = grid.step_end(k)
                if t + wait < end:
                    t += wait
                    break
                t = end  # overshoot: redraw at the step boundary with the next step's rate
                if t >= end_of_grid:
                    return
            yield env.timeout(t - env.now)
            dev.chain[c] = not state
            self._update_signals(dev)

    def _update_signals(self, dev: _Device) -> None:
        """Signal s is on when its own chain is on, or the settled chain is on and covers s."""
        covers = self.covers[(dev.type, dev.region)]
        settled = dev.chain[0]
        on = [dev.chain[1 + s] or (settled and covers[s]) for s in range(len(SIGNAL_NAMES))]
        if dev.waiting:
            dev.lost.update(s for s in dev.required if not on[s])
        if on != dev.on:
            dev.on = on
            if dev.change is not None and not dev.change.triggered:
                dev.change.succeed()

    # ------------------------------------------------------------------ battery

    def _look(self, dev: _Device) -> float:
        """The battery level (%) seen now: a fresh or correlated normal score through the Beta law."""
        now, key = self.env.now, (dev.type, dev.region)
        fresh = self.rng.gauss(0.0, 1.0)
        if dev.score is None:
            score = fresh
        else:
            tau = self.correlation_s[key]
            w = math.exp(-(now - dev.score_s) / tau) if tau > 0 else 0.0
            score = w * dev.score + math.sqrt(1.0 - w * w) * fresh
        dev.score, dev.score_s = score, now
        a, b = self.beta[key][1 if dev.on[_CHARGING] else 0]
        return 100.0 * float(special.betaincinv(a, b, float(special.ndtr(score))))

    def _record(self, dev: _Device, level_pct: float) -> None:
        """Record the level at a participation's end as the score Phi^{-1}(F_c(L)), c the charging state now."""
        a, b = self.beta[(dev.type, dev.region)][1 if dev.on[_CHARGING] else 0]
        u = float(special.betainc(a, b, min(max(level_pct / 100.0, 0.0), 1.0)))
        dev.score = float(special.ndtri(min(max(u, _U_CLIP), 1.0 - _U_CLIP)))
        dev.score_s = self.env.now

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
        """A check-in tick: the selecting round's (if any) to judge by its workload's needs."""
        rnd = self.round
        if rnd is None or not rnd.selecting:
            return
        now, job = self.env.now, rnd.job
        if not job.capable[dev.index] or dev.working or now < dev.free_at:
            return
        if dev.parts and (dev.parts[-1].job, dev.parts[-1].round) == (job.index, rnd.index):
            return  # a round takes a device once (common practice), even with no rest
        if not all(dev.on[s] for s in job.required):
            return
        battery = self._look(dev)
        if battery < job.config.workload.min_battery:
            return
        rnd.checkins += 1
        accept_count = job.config.rounds.accept_count
        if rnd.accepted >= accept_count:
            return
        rnd.accepted += 1
        part = _Part(round=rnd.index, device=dev.index, accepted_s=now, battery_start_pct=battery, job=job.index)
        dev.parts.append(part)
        rnd.parts.append(part)
        dev.working, dev.required = True, job.required
        self.tasks.append(self.env.process(self._task(dev, rnd, part)))
        if rnd.accepted == accept_count:
            rnd.full.succeed()

    # ------------------------------------------------------------------ the task

    def _plan(self, i: int, accepted: int, job: _Job) -> _Plan:
        """Device i's task in a round of ``job`` that accepted ``accepted`` devices, written out
        from the protocol's arithmetic (docs/fleet-file.md): the local work cap, the update
        encoding and, when on, secure aggregation's phases. No compute-drift or network
        disruption (factor 1)."""
        fleet, work = self.fleet, job.config.workload
        enc = work.update_encoding
        down_bps, up_bps = float(fleet.down_mbps[i]) * 1e6, float(fleet.up_mbps[i]) * 1e6
        radio_w, train_w = float(fleet.radio_power_w[i]), float(fleet.train_power_w[i])
        n_w = work.model_size / 4.0  # the model's weights are 32-bit floats
        used_n = int(fleet.samples[i])
        if work.max_examples is not None:
            used_n = min(used_n, work.max_examples)
        batch = work.batch_size
        steps = work.epochs * math.ceil(used_n / batch)
        if work.max_steps is not None:
            steps = min(steps, work.max_steps)
        local_s = steps * batch * float(fleet.sample_cost_s[i])  # the last batch of each epoch is padded
        encode_s = n_w / 1e6 * (enc.encode_time + (enc.rotation_time if enc.rotation else 0.0))
        train = _Phase("train", local_s + encode_s, train_w)  # the local steps, then the encoding

        def timed(name: str, fixed: float, down: float, up: float, followed: bool = True) -> _Phase:
            # A phase's time: its fixed time plus the transfer of its bytes each way.
            return _Phase(name, fixed + down * 8.0 / down_bps + up * 8.0 / up_bps, radio_w, followed, down, up)

        download = timed("download", 0.0, work.model_size, 0.0)
        secure, unmask = job.secure, None
        if secure is None:
            keep, bits = enc.keep_fraction, enc.bits_per_weight
            # Sparsified: a 32-bit index per kept weight or a one-bit-per-weight mask, the smaller.
            index = 0.0 if keep == 1.0 else min(n_w * keep * 4.0, n_w / 8.0)
            phases = [download, train, timed("upload", 0.0, 0.0, n_w * keep * bits / 8.0 + index)]
        else:
            n = accepted
            shares = (n - 1) * secure.share_bytes  # one share per peer
            masked = n_w * (enc.bits_per_weight + math.ceil(math.log2(n))) / 8.0  # the sum must not wrap
            phases = [
                download,
                timed("key-advertisement", secure.key_advertisement, 2.0 * secure.key_bytes * n,
                      2.0 * secure.key_bytes),
                timed("key-sharing", secure.key_sharing, shares, shares),
                train,
                timed("upload", 0.0, 0.0, masked),
            ]
            unmask = timed("unmasking", secure.unmasking, 0.0, shares, followed=False)
        return _Plan(phases, unmask, steps, batch, local_s, weight=float(min(used_n, steps * batch)))

    def _task(self, dev: _Device, rnd: _Round, part: _Part):
        env, job = self.env, rnd.job
        if job.after_selection:
            dev.waiting, dev.lost = True, set()
            yield rnd.selected  # reserved, not working, until the selection ends
            dev.waiting = False
        part.started_s = env.now
        plan = part.plan = self._plan(dev.index, rnd.accepted, job)
        i, work = dev.index, job.config.workload
        hazard = work.crash_rate / 3600.0
        clock = _Clock(
            level=part.battery_start_pct,
            crash_at=env.now + self.rng.expovariate(hazard) if hazard > 0 else _INF,
            os_at=env.now + work.execution_limit,  # the OS limit counts from the task's start
            per_ws=100.0 / (3600.0 * float(self.fleet.battery_wh[i])),
            charge_w=float(self.fleet.charge_power_w[i]),
        )
        ended_by = ""
        if rnd.abandoned:
            ended_by = "stopped"  # the selection failed: no task starts
        elif dev.lost:
            # A required signal turned off while it waited: out at its start (the first in
            # signal order names the cause, as for signals ending at once).
            ended_by = SIGNAL_NAMES[min(dev.lost)] + "-ended"
            part.phase = plan.phases[0].name
            part.done[part.phase] = 0.0
        else:
            for phase in plan.phases:
                # The close stops a device in any phase but the upload (which finishes, late).
                close = "ignore" if phase.name == "upload" else "stop"
                ended_by = yield from self._phase(dev, rnd, part, phase, clock, close)
                if ended_by:
                    part.phase = phase.name
                    break
        level = clock.level  # the battery is followed through the upload, not after it
        if ended_by == "stopped":
            part.outcome, part.phase = "stopped", "none"
        elif ended_by:
            part.outcome, part.cause = "dropout", ended_by
        elif rnd.closed:
            part.outcome = "late"
        else:
            part.outcome = "on-time"
            rnd.reports += 1
            if rnd.reports == job.config.rounds.target_reports:
                rnd.target.succeed()
            if plan.unmask is not None:
                cause = yield from self._unmasking(dev, rnd, part, plan.unmask, clock)
                if cause:  # its masked update is in the sum: still on time
                    part.cause, part.phase = cause, "unmasking"
                else:
                    part.survived = True
        part.ended_s = env.now
        self._record(dev, level)
        dev.working = False
        dev.free_at = env.now + job.config.rounds.rest  # no workload takes it while it rests

    def _unmasking(self, dev: _Device, rnd: _Round, part: _Part, unmask: _Phase, clock: _Clock):
        """Secure aggregation after an on-time upload: wait for the round's close, then answer
        the unmasking for its length; the cause of an interruption, or "" when it answered."""
        wait = _Phase("wait", _INF, 0.0, followed=False)
        cause = yield from self._phase(dev, rnd, part, wait, clock, "end")
        if cause:
            return cause
        return (yield from self._phase(dev, rnd, part, unmask, clock, "ignore"))

    def _phase(self, dev: _Device, rnd: _Round, part: _Part, phase: _Phase, clock: _Clock, close: str):
        """Run ``phase`` until it is done or interrupted: "" when done, else the cause.

        Interruptions: a required signal turning off, the crash, the OS execution limit and,
        where the battery is followed, its level falling below the minimum (linear: the
        phase's draw, less the charger whenever the charging signal is on, capped at 100 %).
        ``close``: "stop" (the round's close stops the phase: "stopped"), "end" (the close
        ends it: the wait for the close), "ignore".
        """
        env, work = self.env, rnd.job.config.workload
        part.done.setdefault(phase.name, 0.0)
        phase_end = env.now + phase.length
        while True:
            now = env.now
            due = {"phase": phase_end, "execution-limit": clock.os_at, "crash": clock.crash_at}
            slope = 0.0
            if phase.followed:
                slope = ((clock.charge_w if dev.on[_CHARGING] else 0.0) - phase.power_w) * clock.per_ws
                due["battery-low"] = now + (clock.level - work.min_battery) / -slope if slope < 0 else _INF
            first = min(due, key=lambda key: (due[key], key != "phase"))  # ties: completion
            dev.change = env.event()
            timer = env.timeout(max(due[first] - now, 0.0)) if due[first] < _INF else None
            waits = [w for w in (timer, dev.change) if w is not None]
            if close != "ignore":
                waits.append(rnd.close)
            fired = yield env.any_of(waits)
            elapsed = env.now - now
            part.done[phase.name] += elapsed
            clock.level = min(clock.level + slope * elapsed, 100.0)
            dev.change = None
            off = [s for s in rnd.job.required if not dev.on[s]]
            if off:
                return SIGNAL_NAMES[off[0]] + "-ended"
            if timer is not None and timer in fired:
                return "" if first == "phase" else first
            if close != "ignore" and rnd.close in fired:
                return "stopped" if close == "stop" else ""
            # A signal changed that does not end the task (e.g. the charger): go on.

    # ------------------------------------------------------------------ the server

    def _desk(self):
        """The selection desk: opens one round at a time, of a ready workload, until the horizon.

        It is free at the start, whenever a selection ends and whenever a workload becomes
        ready while no selection runs; each round's reports, close, unmasking and aggregation
        then run in the round's own process."""
        env = self.env
        yield env.timeout(-self.server_warmup_s - env.now)  # the first round opens here
        while env.now < self.horizon_s:
            ready = [job for job in self.jobs if self._ready(job)]
            if not ready:
                yield env.any_of([job.running for job in self.jobs])  # the first round to end
                continue
            job = self._choose(ready)
            rnd = _Round(index=len(job.rounds), job=job, opened_s=env.now, full=env.event(),
                         selected=env.event(), target=env.event(), close=env.event())
            self.round = rnd
            job.rounds.append(rnd)
            job.running = env.process(self._round(rnd))
            yield rnd.selected  # the desk is free once the selection ends
            job.desk_s += rnd.selected_s - rnd.opened_s

    def _ready(self, job: _Job) -> bool:
        """Whether ``job`` may open a round now: its last round (if any) has ended and its
        aggregation time has passed. (A round with no aggregation time frees its workload at
        its end, in the same instant, though its process has yet to finish.)"""
        if job.running is None or not job.running.is_alive:
            return True
        last = job.rounds[-1]
        return last.ended_s + job.config.rounds.aggregation_time <= self.env.now

    def _choose(self, ready: list[_Job]) -> _Job:
        """Of the ready workloads (in the order of ``workloads``), the one the desk opens:
        ``priority``, the first; ``shares``, the least desk time over share, ties by order."""
        if self.rule == "shares":
            return min(ready, key=lambda job: (job.desk_s / job.share, job.index))
        return ready[0]

    def _round(self, rnd: _Round):
        """One round of the protocol, from its opening to the end of its aggregation time."""
        env, job = self.env, rnd.job
        rounds = job.config.rounds
        yield env.timeout(rounds.selection_timeout) | rnd.full
        rnd.selecting = False
        rnd.selected_s = env.now
        enough = rnd.accepted >= rounds.required_reports
        rnd.abandoned = job.after_selection and not enough
        rnd.selected.succeed()  # after-selection: every accepted device's task starts now
        if not enough:
            rnd.status = "selection-timeout"
        else:
            if not rnd.target.triggered:
                yield env.timeout(rounds.report_deadline) | rnd.target
            rnd.status = "committed" if rnd.reports >= rounds.required_reports else "report-deadline"
        rnd.closed = True
        rnd.closed_s = rnd.ended_s = env.now
        rnd.close.succeed()  # devices before their upload stop now
        reporters = [p for p in rnd.parts if p.outcome == "on-time"]
        if job.secure is not None and reporters:
            # The unmasking runs [close, close + u_i] for every on-time reporter.
            rnd.ended_s = rnd.closed_s + max(p.plan.unmask.length for p in reporters)
            yield env.timeout(rnd.ended_s - env.now)
        yield env.timeout(rounds.aggregation_time)

    def run(self) -> OracleResult:
        env = self.env
        for dev in self.devices:
            for c in range(len(CHAIN_NAMES)):
                if c == 0 and not any(self.covers[(dev.type, dev.region)]):
                    continue  # no settled state: chain 0 is never on
                env.process(self._chain(dev, c))
            env.process(self._ticks(dev))
        desk = env.process(self._desk())
        env.run(until=desk)
        # Rounds still collecting reports when the desk stops run to their end.
        running = [job.running for job in self.jobs if job.running is not None and job.running.is_alive]
        if running:
            env.run(until=env.all_of(running))
        # Uploads in flight at the last close finish (late) or drop out.
        pending = [task for task in self.tasks if task.is_alive]
        if pending:
            env.run(until=env.all_of(pending))
        return self._result()

    def _settle(self, rnd: _Round) -> int:
        """Secure aggregation's verdict once every answer is in: the round's unmasking answers
        |U|; a round with enough reports but fewer than t = ceil(threshold * accepted) answers
        is "unmasking-failed". (The threshold is read as the decimal written, so that
        0.7 x 10 is 7, not the 7.000000000000001 of binary floating point.)"""
        responses = sum(p.survived for p in rnd.parts)
        secure = rnd.job.secure
        if secure is not None and rnd.status == "committed":
            needed = math.ceil(Fraction(repr(secure.threshold)) * rnd.accepted)
            if responses < needed:
                rnd.status = "unmasking-failed"
        return responses

    def _result(self) -> OracleResult:
        """The log of the run: one workload's frames as they are, several workloads' frames one
        after another in the order of ``workloads``, each led by a ``workload`` column."""
        frames = [self._frames(job) for job in self.jobs]
        if len(frames) == 1:
            rounds, parts = frames[0]
        else:
            for job, (job_rounds, job_parts) in zip(self.jobs, frames, strict=True):
                job_rounds.insert(0, "workload", job.name)
                job_parts.insert(0, "workload", job.name)
            rounds = pd.concat([r for r, _ in frames], ignore_index=True)
            parts = pd.concat([p for _, p in frames], ignore_index=True)
        return OracleResult(rounds=rounds, participations=parts, fleet=self.fleet)

    def _frames(self, job: _Job) -> tuple[pd.DataFrame, pd.DataFrame]:
        """One workload's rounds and participations after the warm-up, rounds numbered from 0."""
        responses = {r.index: self._settle(r) for r in job.rounds}
        reported = [r for r in job.rounds if r.opened_s >= 0.0]  # not the warm-up's rounds
        first = reported[0].index if reported else len(job.rounds)
        status = {r.index: r.status for r in job.rounds}
        rows = [self._row(dev, part, status[part.round], first)
                for dev in self.devices for part in dev.parts if part.job == job.index and part.round >= first]
        parts = pd.DataFrame(rows, columns=_PART_COLUMNS)
        parts = parts.sort_values(["round", "accepted_s"], kind="stable").reset_index(drop=True)
        rounds = pd.DataFrame(
            {
                "round": [r.index - first for r in reported],
                "opened_s": [r.opened_s for r in reported],
                "selected_s": [r.selected_s for r in reported],
                "closed_s": [r.closed_s for r in reported],
                "ended_s": [r.ended_s for r in reported],
                "accepted": [r.accepted for r in reported],
                "reports": [r.reports for r in reported],
                "status": [r.status for r in reported],
                "checkins": [r.checkins for r in reported],
                "unmask_responses": [responses[r.index] for r in reported],
            }
        )
        return rounds, parts

    def _row(self, dev: _Device, part: _Part, status: str, first: int) -> dict:
        """A participation's row: its work counted up to its end (each phase's bytes in
        proportion to the time spent in it; energy: each phase's power times that time)."""
        fleet, plan, i = self.fleet, part.plan, part.device
        assert plan is not None  # every task is planned when it starts
        down = up = energy_ws = 0.0
        for phase in plan.phases + ([plan.unmask] if plan.unmask is not None else []):
            spent = part.done.get(phase.name)
            if spent is None:
                continue  # never entered
            share = min(spent / phase.length, 1.0) if phase.length > 0 else 1.0
            down += phase.down_bytes * share
            up += phase.up_bytes * share
            energy_ws += phase.power_w * spent
        train_done = part.done.get("train", 0.0)
        examples = plan.steps * plan.batch * min(train_done / plan.local_s, 1.0) if plan.local_s > 0 else 0.0
        committed = status == "committed"
        used = part.outcome == "on-time" and committed
        if used:
            waste = "used"
        elif part.outcome == "dropout":
            waste = part.cause
        elif not committed:
            waste = status  # the round's status names the waste
        elif part.outcome == "late":
            waste = "late"
        else:
            waste = "stopped"
        return {
            "round": part.round - first,
            "device": i,
            "device_type": fleet.type_names[dev.type],
            "region": fleet.region_names[dev.region],
            "accepted_s": part.accepted_s,
            "started_s": part.started_s,
            "ended_s": part.ended_s,
            "outcome": part.outcome,
            "dropout_cause": part.cause,
            "dropout_phase": part.phase,
            "waste_cause": waste,
            "used": used,
            "compute_s": train_done,
            "examples_processed": examples,
            "weight": plan.weight,
            "download_bytes": down,
            "upload_bytes": up,
            "energy_wh": energy_ws / 3600.0,
            "battery_start_pct": part.battery_start_pct,
            "samples": int(fleet.samples[i]),
        }


_PART_COLUMNS = [
    "round", "device", "device_type", "region", "accepted_s", "started_s", "ended_s", "outcome", "dropout_cause",
    "dropout_phase", "waste_cause", "used", "compute_s", "examples_processed", "weight", "download_bytes",
    "upload_bytes", "energy_wh", "battery_start_pct", "samples",
]


def simulate_oracle(config: Config, seed: int = 0) -> OracleResult:
    """Run the literal reference simulation of ``config`` (first-come selection, no disruptions).

    The fleet is :func:`fleetsim.fleet.sample_fleet` of the same seed; every dynamic draw
    comes from the oracle's own stream. Several workloads share one selection desk (module
    docstring); their frames are led by a ``workload`` column. Raises ValueError for a configuration it does not
    model (in any workload: another selection policy, pacing, or more than one round in
    flight; disruptions).
    """
    if config.disruptions:
        raise ValueError("the oracle does not model disruptions")
    for job in config.jobs:
        where = "" if len(config.jobs) == 1 else f" (workload {job.name!r})"
        own = job.config
        if own.selection.policy != "first-come":
            raise ValueError(f"the oracle models first-come selection only, not {own.selection.policy!r}{where}")
        if getattr(own.rounds, "pacing", None) is not None:
            raise ValueError(f"the oracle does not model pacing{where}")
        if getattr(own.rounds, "in_flight", 1) != 1:
            raise ValueError(f"the oracle models one round at a time, not rounds.in_flight > 1{where}")
    return _Oracle(config, seed).run()
