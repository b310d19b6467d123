"""Diurnal on/off signals on local time, sampled exactly and lazily.

The form. Each device carries four independent two-state Markov chains (:data:`CHAINS`):
``settled`` (the device put down for a spell: on its charger, on a home network, untouched)
and one *own* chain per signal (idle, charging, unmetered). A signal is on when its own
chain is on, or when the settled chain is on and the device type's ``settled.turns_on``
lists the signal. A fleet file without ``settled`` gives a settled chain that is never on:
the signals are then exactly three independent chains.

Each chain has, in each local hour (weekday or weekend day of the device's region), an
on-probability p and a mean on-duration d: it leaves "on" at rate 1/d and "off" at rate
p / ((1 - p) d), so its stationary on-fraction is p. The own chain of a signal the settled
state holds on gets p_own = 1 - (1 - p_signal) / (1 - p_settled), so that the signal is on
with the file's probability p_signal (independent chains: the signal is off only when both
are off). Rates are piecewise constant on a 15-minute UTC grid: every IANA zone offset in
use is a multiple of 15 minutes, so each grid step lies in one local hour and one local day,
DST included.

Looks. The engine never walks a device's whole timeline. It keeps, per device and chain,
the last time it looked and the probability the chain was on then (0 or 1 once observed,
the chain's own law before). Over a step with constant rates the on-probability moves as
q' = p + (q - p) exp(-lambda h), lambda = 1 / ((1 - p) d): an affine map, so prefix tables
make any gap O(1). Sampling the chains at the times the engine needs is exact in
distribution (Markov property) and costs nothing for devices the server never hears from.

Paths. During a task the engine follows each chain's path exactly: a chain in state x at
time t next flips at the first t' with integral_t^t' rate_x(u) du = E, E ~ Exp(1) (the
piecewise-constant hazard, inverted on cumulative-hazard tables, :meth:`SignalTables.next_flip`).
Each device's looks and paths are kept by :mod:`fleetsim.chains`.
"""

from __future__ import annotations

from dataclasses import dataclass, field
from datetime import datetime, timedelta, timezone
from zoneinfo import ZoneInfo

import numpy as np

from .config import SIGNALS, Config

__all__ = [
    "STEP_S", "CHAINS", "SETTLED", "SignalTables", "build_signal_tables", "local_hours", "local_calendar",
    "chain_parameters",
]

STEP_S = 900.0
"""Grid step of the signal tables: 15 minutes."""

CHAINS = ("settled",) + SIGNALS
"""The chains of a device in table order: the settled state, then each signal's own chain."""

SETTLED = 0
"""Index of the settled chain; signal ``s`` (index into SIGNALS) has its own chain at ``1 + s``."""

_P_MAX = 1.0 - 1e-6  # an on-probability of exactly 1 would make the off-rate infinite
_NO_SETTLED_MEAN_ON_S = 3600.0  # any positive value: a chain with p = 0 never turns on


def local_calendar(zone: str, start: datetime, steps: int, step_s: float = STEP_S) -> tuple[np.ndarray, np.ndarray]:
    """Local hour (0-23) and ISO weekday (1 Monday ... 7 Sunday) in ``zone`` at the start of
    each grid step from ``start`` (UTC)."""
    tz = ZoneInfo(zone)
    start = start.astimezone(timezone.utc)
    hours = np.empty(steps, dtype=np.int8)
    days = np.empty(steps, dtype=np.int8)
    # Offsets change rarely: evaluate them once per step (cheap: a few thousand steps).
    for k in range(steps):
        moment = (start + timedelta(seconds=k * step_s)).astimezone(tz)
        hours[k] = moment.hour
        days[k] = moment.isoweekday()
    return hours, days


def local_hours(zone: str, start: datetime, steps: int, step_s: float = STEP_S) -> np.ndarray:
    """Local hour (0-23) in ``zone`` at the start of each grid step from ``start`` (UTC)."""
    return local_calendar(zone, start, steps, step_s)[0]


def chain_parameters(
    config: Config, type_name: str, region_name: str, hours: np.ndarray, weekend: np.ndarray,
    step_times: np.ndarray | None = None, marginal: bool = False,
) -> tuple[np.ndarray, np.ndarray]:
    """On-probability and mean on-duration (s) of each chain at each step, [CHAINS, steps].

    ``hours`` and ``weekend`` give each step's local hour and whether its local day is a
    weekend day of the region. The signals' own chains are derived from the file's signal
    probabilities as the module says; behaviour-shift disruptions (``step_times``: each
    step's start, s) change a signal's probability for their window before that. With
    ``marginal`` the settled state is left out and each signal's chain has the file's own
    values: the law of each signal alone (as a replay's bridge fills the time between logged
    states, :mod:`fleetsim.bridge`).
    """
    spec = config.fleet.group_spec(type_name, region_name)
    steps = hours.size
    hours = hours.astype(np.int64)
    p = np.zeros((len(CHAINS), steps))
    d = np.full((len(CHAINS), steps), _NO_SETTLED_MEAN_ON_S)

    def fill(pattern, row: int) -> np.ndarray:
        """Fill ``row`` from a pattern's weekday/weekend tables; return its [2, 24] probabilities."""
        tables = [pattern.profile(False), pattern.profile(True)]
        prob = np.array([t[0] for t in tables])
        mean = np.array([t[1] for t in tables])
        day = weekend.astype(np.int64)
        p[row] = prob[day, hours]
        d[row] = mean[day, hours]
        return prob

    hourly = {}
    for s, name in enumerate(SIGNALS):
        hourly[s] = fill(spec.signals[name], 1 + s)
    if step_times is not None:
        for event in config.disruptions:
            if event.kind != "behaviour-shift":
                continue
            if event.regions and region_name not in event.regions:
                continue
            if event.device_types and type_name not in event.device_types:
                continue
            s = SIGNALS.index(event.signal)  # type: ignore[arg-type]
            inside = (step_times >= event.start) & (step_times < event.start + event.duration)
            shifted = (hours - int(round(event.shift_hours))) % 24
            values = hourly[s][weekend.astype(np.int64), shifted] * event.factor
            p[1 + s, inside] = values[inside]
    p = np.clip(p, 0.0, _P_MAX)
    if spec.settled is not None and not marginal:
        fill(spec.settled, SETTLED)
        p[SETTLED] = np.clip(p[SETTLED], 0.0, _P_MAX)
        for name in spec.settled.turns_on:
            row = 1 + SIGNALS.index(name)
            # The settled state holds the signal on: its own chain fills the rest.
            derived = np.clip(1.0 - (1.0 - p[row]) / (1.0 - p[SETTLED]), 0.0, _P_MAX)
            p[row] = np.where(p[SETTLED] > 0.0, derived, p[row])  # never settled: the file's value as it is
    return p, d


@dataclass(frozen=True)
class SignalTables:
    """Per (group, chain, grid step) rates, prefix maps and cumulative hazards; groups are
    (type, region) pairs (index type * regions + region).

    ``origin_s`` is the simulated time of grid point 0 (negative: the grid starts before the
    horizon so that the chains start from their own law, not from an arbitrary state).
    ``covers[g, s]`` says whether group g's settled state holds signal s on.
    """

    origin_s: float
    step_s: float
    p: np.ndarray  # [G, C, K] on-probability per step
    d: np.ndarray  # [G, C, K] mean on-duration per step, s
    rate: np.ndarray  # [G, C, K] lambda = 1 / ((1 - p) d), 1/s
    prefix_a: np.ndarray  # [G, C, K + 1] on-probability at grid point k starting "off" at point 0
    prefix_log: np.ndarray  # [G, C, K + 1] cumulative lambda * h up to grid point k
    leave_rate: np.ndarray  # [2, G, C, K] rate of leaving "off" (0: the on-rate) and "on" (1: 1/d), 1/s
    cum_hazard: np.ndarray  # [2, G, C, K + 1] cumulative leaving rate * h from "off" (0) and "on" (1)
    covers: np.ndarray  # [G, S] bool
    has_settled: bool
    # Every cumulative-hazard line rises from 0 to at most `line_gap - 1`: line j shifted up by
    # j * line_gap makes one ascending array of them all, searched once for every target.
    search_key: np.ndarray
    line_gap: float
    # Derived in __post_init__ (below), for the hot lookups.
    _grid: np.ndarray = field(init=False, repr=False, compare=False)
    _p_pad: np.ndarray = field(init=False, repr=False, compare=False)
    _neg_rate_pad: np.ndarray = field(init=False, repr=False, compare=False)
    _leave_pad: np.ndarray = field(init=False, repr=False, compare=False)
    _cum_end: np.ndarray = field(init=False, repr=False, compare=False)

    def __post_init__(self) -> None:
        # Lookups the hot paths share, each the value the formula it replaces gives bit for bit:
        # the start of grid point k (origin_s + k * step_s) and the negated rates (-(r x) = (-r) x).
        # p and the negated rates are also kept padded to K + 1 steps a line, the layout of the
        # prefix maps, so that one index reads all four (the padding is never read).
        grid = self.origin_s + np.arange(self.p.shape[2] + 1) * self.step_s
        object.__setattr__(self, "_grid", grid)

        def padded(table: np.ndarray) -> np.ndarray:
            return np.concatenate([table, table[:, :, -1:]], axis=2).reshape(-1)

        object.__setattr__(self, "_p_pad", padded(self.p))
        object.__setattr__(self, "_neg_rate_pad", padded(-self.rate))
        leave = self.leave_rate
        object.__setattr__(self, "_leave_pad", np.concatenate([leave, leave[..., -1:]], axis=3).reshape(-1))
        object.__setattr__(self, "_cum_end", self.cum_hazard[..., -1].reshape(-1))  # each line's total

    @property
    def steps(self) -> int:
        return int(self.p.shape[2])

    def step_of(self, t: np.ndarray) -> np.ndarray:
        k = np.floor((t - self.origin_s) / self.step_s).astype(np.int64)
        np.maximum(k, 0, out=k)
        return np.minimum(k, self.steps - 1, out=k)

    def _line(self, group: np.ndarray, chain: np.ndarray | int) -> np.ndarray:
        return group.astype(np.int64, copy=False) * self.p.shape[1] + chain

    def on_probability(
        self, group: np.ndarray, chain: np.ndarray | int, t_from: np.ndarray, q_from: np.ndarray, t_to: np.ndarray
    ) -> np.ndarray:
        """Probability the chain is on at ``t_to`` given on-probability ``q_from`` at ``t_from``."""
        if not t_to.size:
            return np.empty(0)
        k0 = self.step_of(t_from)
        k1 = self.step_of(t_to)
        base = self._line(group, chain) * (self.steps + 1)  # line start in the padded tables and prefix maps
        i0 = base + k0
        p_pad, neg_rate, grid = self._p_pad, self._neg_rate_pad, self._grid
        p0, nr0 = p_pad[i0], neg_rate[i0]
        # To the end of step k0 (or to t_to if it lies in the same step).
        end0 = np.minimum(grid[1:][k0], t_to)
        q = p0 + (q_from - p0) * np.exp(nr0 * np.maximum(end0 - t_from, 0.0))
        later = k1 > k0
        n_later = int(np.count_nonzero(later))
        if n_later:
            # Across whole steps by the prefix map, then into step k1. When most looks cross a
            # step boundary every element is carried (the same float operations, element by
            # element, as on the subset; a look within its step crosses no step: j0 = j1) and
            # the others are kept by a mask: fewer gathers.
            some = n_later * 2 < t_to.size
            pick = np.flatnonzero(later) if some else slice(None)
            ks1 = k1[pick] if some else k1
            j1 = (base[pick] if some else base) + ks1
            j0 = i0[pick] + 1 if some else np.minimum(i0 + 1, j1)
            a_flat, log_flat = self.prefix_a.reshape(-1), self.prefix_log.reshape(-1)
            decay = np.exp(log_flat[j0] - log_flat[j1])  # exactly -(log[j1] - log[j0])
            ql = a_flat[j1] + decay * (q[pick] - a_flat[j0])
            p1, nr1 = p_pad[j1], neg_rate[j1]
            q_later = p1 + (ql - p1) * np.exp(nr1 * np.maximum(t_to[pick] - grid[ks1], 0.0))
            if some:
                q[pick] = q_later
            else:
                q = np.where(later, q_later, q)
        np.maximum(q, 0.0, out=q)
        return np.minimum(q, 1.0, out=q)

    def hazard_rate(self, group: np.ndarray, chain: np.ndarray | int, t: np.ndarray, on: np.ndarray) -> np.ndarray:
        """Rate (1/s) at which a chain in state ``on`` at ``t`` leaves it."""
        line = self._line(group, chain) + np.asarray(on, dtype=np.int64) * (self.p.shape[0] * self.p.shape[1])
        return self.leave_rate.reshape(-1)[line * self.steps + self.step_of(t)]

    def next_flip(
        self, group: np.ndarray, chain: np.ndarray, t: np.ndarray, on: np.ndarray, e: np.ndarray
    ) -> np.ndarray:
        """Time of each chain's next change of state after ``t`` (s; inf past the tables' end):
        the first t' with the integral of its leaving rate from t to t' equal to ``e`` (unit
        exponential draws), the rate piecewise constant per step."""
        steps = self.steps
        # Lines of the leaving-rate and cumulative tables: [from off: G x C, from on: G x C];
        # the leaving rates padded to K + 1 a line, so one index reads both.
        line = group.astype(np.int64) * self.p.shape[1] + chain + on * (self.p.shape[0] * self.p.shape[1])
        cum = self.cum_hazard.reshape(-1)
        leave = self._leave_pad
        k0 = self.step_of(t)
        row = line * (steps + 1)
        grid = self._grid  # grid[k] is origin_s + k * step_s
        at = row + k0
        target = cum[at] + leave[at] * (t - grid[k0]) + e
        # One binary search over every line at once (see `search_key`).
        k = np.searchsorted(self.search_key, target + line * self.line_gap, side="right") - 1 - row
        np.clip(k, 0, steps - 1, out=k)
        at = row + k
        with np.errstate(divide="ignore", invalid="ignore"):
            step_in = (target - cum[at]) / leave[at]
        when = grid[k] + np.clip(step_in, 0.0, self.step_s)
        return np.where(target < self._cum_end[line], np.maximum(when, t), np.inf)

    def survival(self, group: np.ndarray, chain: np.ndarray | int, t0: np.ndarray, t1: np.ndarray,
                 on: np.ndarray) -> np.ndarray:
        """Probability that a chain in state ``on`` at ``t0`` has not left it by ``t1``:
        exp(-integral of the leaving rate from t0 to t1)."""
        steps = self.steps
        line = self._line(group, chain) + np.where(on, self.p.shape[0] * self.p.shape[1], 0)
        cum = self.cum_hazard.reshape(-1)

        def at(t: np.ndarray) -> np.ndarray:
            k = self.step_of(t)
            return cum[line * (steps + 1) + k] + self.hazard_rate(group, chain, t, on) * np.maximum(
                t - (self.origin_s + k * self.step_s), 0.0)

        return np.exp(-(at(t1) - at(t0)))


def build_signal_tables(
    config: Config, type_names: tuple[str, ...], region_names: tuple[str, ...], end_s: float, begin_s: float = 0.0,
    marginal: bool = False,
) -> SignalTables:
    """Tables for every (type, region) group from ``begin_s`` minus a settling time to ``end_s``.

    The settling time (12 of the longest mean on-durations, 6 hours to 3 days) lets each
    chain start from its own law rather than an arbitrary state. ``marginal``: each signal
    as a chain of its own, no settled state (:func:`chain_parameters`).
    """
    fleet = config.fleet
    longest = 0.0
    for t in type_names:
        for r in region_names:
            spec = fleet.group_spec(t, r)
            patterns = [spec.signals[s] for s in SIGNALS] + ([spec.settled] if spec.settled is not None else [])
            for pattern in patterns:
                for weekend in (False, True):
                    longest = max(longest, max(pattern.profile(weekend)[1]))
    warmup_s = float(min(3 * 86400.0, max(6 * 3600.0, 12 * longest)))
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
    p = np.empty((n_groups, len(CHAINS), steps))
    d = np.empty((n_groups, len(CHAINS), steps))
    covers = np.zeros((n_groups, len(SIGNALS)), dtype=bool)
    calendars = {}
    for name in region_names:
        region = fleet.regions[name]
        hours, days = local_calendar(region.timezone, grid_start, steps)
        calendars[name] = (hours, np.isin(days, sorted(region.weekend_isodays)))
    for ti, tname in enumerate(type_names):
        for ri, rname in enumerate(region_names):
            g = ti * len(region_names) + ri
            hours, weekend = calendars[rname]
            p[g], d[g] = chain_parameters(config, tname, rname, hours, weekend, step_times, marginal)
            settled = fleet.group_spec(tname, rname).settled
            if settled is not None and not marginal:
                covers[g] = [s in settled.turns_on for s in SIGNALS]
    rate = 1.0 / ((1.0 - p) * d)
    decay = np.exp(-rate * STEP_S)
    prefix_a = np.zeros((n_groups, len(CHAINS), steps + 1))
    for k in range(steps):
        prefix_a[:, :, k + 1] = p[:, :, k] + (prefix_a[:, :, k] - p[:, :, k]) * decay[:, :, k]
    zero = np.zeros((n_groups, len(CHAINS), 1))
    prefix_log = np.concatenate([zero, np.cumsum(rate * STEP_S, axis=2)], axis=2)
    leave = np.stack([rate * p, rate * (1.0 - p)])  # from off: the on-rate; from on: 1/d
    cum_hazard = np.concatenate([np.zeros((2, n_groups, len(CHAINS), 1)), np.cumsum(leave * STEP_S, axis=3)], axis=3)
    top = float(cum_hazard[..., -1].max())
    lines = cum_hazard.size // (steps + 1)
    search_key = cum_hazard.reshape(-1) + np.repeat(np.arange(lines), steps + 1) * (top + 1.0)
    return SignalTables(
        origin_s=origin_s, step_s=STEP_S, p=p, d=d, rate=rate, prefix_a=prefix_a, prefix_log=prefix_log,
        leave_rate=leave, cum_hazard=cum_hazard, covers=covers, has_settled=bool(covers.any()), search_key=search_key,
        line_gap=top + 1.0,
    )
