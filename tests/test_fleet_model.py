"""The widened fleet model against closed forms, scipy and zoneinfo.

The model: four independent two-state chains per device (settled and each signal's own
chain), rates piecewise constant on a 15-minute grid of local hours and local weekend days,
a battery score that is a Gaussian copula with an Ornstein-Uhlenbeck score, and a fleet drawn
from the joint (type, region) table. Each check names its source in a comment; values
recalled rather than looked up are marked "(from memory)". Stochastic checks use fixed seeds
and state their tolerance.
"""

from __future__ import annotations

import math
from datetime import datetime, timedelta, timezone
from zoneinfo import ZoneInfo

import numpy as np
from scipy import integrate, linalg, special, stats

import fleetsim
import fleetsim.server
from fleetsim.battery import BatteryState
from fleetsim.battery import battery_crossing as _battery_crossing
from fleetsim.battery import battery_path as _battery_path
from fleetsim.chains import SignalState
from fleetsim.client import Cohort, _signal_events
from fleetsim.config import SIGNALS
from fleetsim.fleet import sample_fleet
from fleetsim.signals import (
    CHAINS,
    SETTLED,
    STEP_S,
    build_signal_tables,
    chain_parameters,
    local_calendar,
)

TYPES = ("budget-phone", "midrange-phone", "flagship-phone", "tablet")
REGIONS = ("north-atlantic", "west-europe", "south-asia", "east-asia", "southern-cone")
PHONES = TYPES[:3]  # the device types whose example spec has a settled state
ALPHA = 1e-3  # a goodness-of-fit test with a true model fails with probability 0.1%
IDLE, CHARGING, UNMETERED = (CHAINS.index(s) for s in SIGNALS)
ISO_DAY = {"monday": 1, "tuesday": 2, "wednesday": 3, "thursday": 4, "friday": 5, "saturday": 6, "sunday": 7}


def config_of(overrides: list[str]) -> fleetsim.Config:
    return fleetsim.load_config(fleetsim.example_path(), overrides)


def yaml_list(values) -> str:
    return "[" + ", ".join(str(v) for v in values) + "]"


def tables_of(config: fleetsim.Config, end_s: float):
    types, regions = tuple(config.fleet.device_types), tuple(config.fleet.regions)
    assert types == TYPES and regions == REGIONS
    return build_signal_tables(config, types, regions, end_s)


def group_of(type_name: str, region_name: str) -> int:
    return TYPES.index(type_name) * len(REGIONS) + REGIONS.index(region_name)


def no_settled() -> list[str]:
    return [f"fleet.device_types.{t}.settled=null" for t in TYPES]


def no_weekend(types=TYPES) -> list[str]:
    return [f"fleet.device_types.{t}.signals.{s}.weekend=null" for t in types for s in SIGNALS]


def two_state_generator(p: float, d: float) -> np.ndarray:
    """[[off], [on]] rows: off -> on at p / ((1 - p) d), on -> off at 1 / d (docs/architecture.md, Signals)."""
    on_rate, off_rate = p / ((1.0 - p) * d), 1.0 / d
    return np.array([[-on_rate, on_rate], [off_rate, -off_rate]])


def kronecker_sum(generators: list[np.ndarray]) -> np.ndarray:
    """Generator of independent chains: sum over c of I x ... x Q_c x ... x I (state bits in
    chain order, chain 0 the most significant)."""
    size = 2 ** len(generators)
    total = np.zeros((size, size))
    for c, q in enumerate(generators):
        left, right = np.eye(2**c), np.eye(2 ** (len(generators) - c - 1))
        total += np.kron(np.kron(left, q), right)
    return total


def chain_bits(n_chains: int = len(CHAINS)) -> np.ndarray:
    """[states, chains] bool: which chains are on in each joint state (kronecker order)."""
    index = np.arange(2**n_chains)
    return np.array([(index >> (n_chains - 1 - c)) & 1 for c in range(n_chains)], dtype=bool).T


def signal_bits(covers: list[str]) -> np.ndarray:
    """[states, signals] bool: signal s on <=> own_s on or (settled on and s covered)."""
    bits = chain_bits()
    held = np.array([s in covers for s in SIGNALS])
    return bits[:, 1:] | (bits[:, [SETTLED]] & held[None, :])


def stationary(generator: np.ndarray) -> np.ndarray:
    # pi Q = 0, sum pi = 1: the null space of Q^T (Norris, Markov Chains, 1997, section 3.5;
    # from memory), one-dimensional for an irreducible finite chain.
    basis = linalg.null_space(generator.T)
    assert basis.shape[1] == 1
    pi = basis[:, 0] / basis[:, 0].sum()
    assert (pi > -1e-12).all()
    return pi


# ------------------------------------------------ 1. piecewise-constant hazard, quad and KS

# Survival of a chain in one state under a time-varying leaving rate: S(t0, t1) =
# exp(-integral_t0^t1 rate(u) du) (e.g. Cox and Oakes, Analysis of Survival Data, 1984,
# section 1.2; from memory), the integral by scipy.integrate.quad with the local hour
# boundaries as break points. The rate comes straight from the file's 24 hourly values and
# zoneinfo's local hour: on -> off at 1 / d(h), off -> on at p(h) / ((1 - p(h)) d(h)).
HAZARD_P = [round(0.25 + 0.03 * h, 2) for h in range(24)]
HAZARD_D_MIN = [10 + 7 * ((37 * h) % 24) for h in range(24)]  # 10 to 171 minutes, all different
HAZARD_ZONE = "Asia/Kolkata"  # UTC+05:30: local hours begin at half past each UTC hour


def _hazard_config() -> fleetsim.Config:
    return config_of(no_settled() + no_weekend() + [
        f"fleet.device_types.budget-phone.signals.idle.hourly={yaml_list(HAZARD_P)}",
        f"fleet.device_types.budget-phone.signals.idle.mean_on={yaml_list(f'{m}m' for m in HAZARD_D_MIN)}",
        "horizon.duration=3d",
    ])


class FileHazard:
    """The leaving rate of the idle chain from the file's values and zoneinfo, and its integral."""

    def __init__(self, start: datetime):
        self.start = start
        self.zone = ZoneInfo(HAZARD_ZONE)

    def rate(self, t: float, on: bool) -> float:
        hour = (self.start + timedelta(seconds=t)).astimezone(self.zone).hour
        p, d = HAZARD_P[hour], 60.0 * HAZARD_D_MIN[hour]
        return 1.0 / d if on else p / ((1.0 - p) * d)

    def boundaries(self, t0: float, t1: float) -> list[float]:
        """Local hour starts strictly inside (t0, t1): UTC hh:30 for this zone (horizon at 00:00Z)."""
        first = math.floor((t0 - 1800.0) / 3600.0) + 1
        return [1800.0 + 3600.0 * k for k in range(first, first + 200) if t0 < 1800.0 + 3600.0 * k < t1]

    def integral(self, t0: float, t1: float, on: bool) -> float:
        cuts = [t0, *self.boundaries(t0, t1), t1]
        return sum(integrate.quad(self.rate, a, b, args=(on,), epsabs=0, epsrel=1e-12)[0]
                   for a, b in zip(cuts[:-1], cuts[1:], strict=True))


def test_survival_is_exp_of_minus_the_integrated_hourly_rate():
    config = _hazard_config()
    tables = tables_of(config, 3 * 86400.0)
    hazard = FileHazard(config.horizon.start)
    assert config.fleet.regions["south-asia"].timezone == HAZARD_ZONE
    assert config.horizon.start == datetime(2026, 3, 2, tzinfo=timezone.utc)  # hours begin at hh:30Z
    group = group_of("budget-phone", "south-asia")
    t0 = 3 * 3600.0 + 1234.5  # mid-step, mid-hour
    spans = np.array([100.0, 700.0, 2000.0, 5400.0, 11_000.0, 30_000.0, 70_000.0])
    for on in (True, False):
        g = np.full(spans.size, group)
        engine = tables.survival(g, IDLE, np.full(spans.size, t0), t0 + spans, np.full(spans.size, on))
        reference = np.array([math.exp(-hazard.integral(t0, t0 + s, on)) for s in spans])
        assert np.allclose(engine, reference, rtol=1e-9, atol=1e-300), (on, engine, reference)
        # The instantaneous rate at points across eight local hours, as the file says.
        times = t0 + np.linspace(0.0, 8 * 3600.0, 41)
        rates = tables.hazard_rate(np.full(times.size, group), IDLE, times, np.full(times.size, on))
        assert np.allclose(rates, [hazard.rate(t, on) for t in times], rtol=1e-12)
    # The span crosses steps of unlike mean on-duration: the check is not of a constant rate.
    assert len(set(HAZARD_D_MIN)) == 24


def test_next_flip_times_follow_the_survival_function():
    # Inversion of the cumulative hazard: with E ~ Exp(1), the first t with H(t0, t) = E has
    # P(T > t) = exp(-H(t0, t)) (e.g. Devroye, Non-Uniform Random Variate Generation, 1986,
    # section VI.1; from memory). Checked with scipy.stats.kstest against 1 - S.
    config = _hazard_config()
    tables = tables_of(config, 3 * 86400.0)
    hazard = FileHazard(config.horizon.start)
    group = group_of("budget-phone", "south-asia")
    t0 = 2 * 3600.0 + 500.0
    rng = np.random.default_rng(101)
    n = 20_000
    for on in (True, False):
        when = tables.next_flip(np.full(n, group), np.full(n, IDLE), np.full(n, t0), np.full(n, on),
                                rng.exponential(1.0, n))
        assert np.isfinite(when).all() and (when > t0).all()
        # Cumulative hazard at every local hour boundary by quad, linear in between (the rate is
        # constant there), so the CDF is exact at every sample.
        cuts = np.array([t0, *hazard.boundaries(t0, t0 + 2.5 * 86400.0)])
        cumulative = np.concatenate([[0.0], np.cumsum(
            [hazard.integral(a, b, on) for a, b in zip(cuts[:-1], cuts[1:], strict=True)])])
        assert when.max() < cuts[-1]

        def cdf(t, cuts=cuts, cumulative=cumulative):
            return 1.0 - np.exp(-np.interp(t, cuts, cumulative))

        assert stats.kstest(when, cdf).pvalue >= ALPHA, on
        # The sample spans several local hours of unlike rates.
        assert np.quantile(when - t0, 0.9) > 2 * 3600.0


# ---------------------------------------------------------- 2. stationary law of the joint model

# Four independent two-state chains form one chain on 16 states whose generator is the
# Kronecker sum of theirs (e.g. Plateau, SIGMETRICS 1985, stochastic automata networks; from
# memory); its stationary vector solves pi Q = 0 (scipy.linalg.null_space).


def _hour_parameters(config, type_name, region_name, weekend: bool):
    hours = np.arange(24, dtype=np.int8)
    return chain_parameters(config, type_name, region_name, hours, np.full(24, weekend))


def test_joint_stationary_law_gives_each_signal_the_file_probability_and_couples_them():
    config = config_of([])
    excess = []
    for type_name in PHONES:
        for region_name in ("north-atlantic", "south-asia"):  # south-asia: overridden unmetered
            spec = config.fleet.group_spec(type_name, region_name)
            assert spec.settled is not None
            signals_on = signal_bits(spec.settled.turns_on)
            for weekend in (False, True):
                p, d = _hour_parameters(config, type_name, region_name, weekend)
                for h in range(24):
                    q = kronecker_sum([two_state_generator(p[c, h], d[c, h]) for c in range(len(CHAINS))])
                    pi = stationary(q)
                    marginal = pi @ signals_on  # [S]
                    # (a) each signal is on with the file's probability in that hour.
                    file_p = [spec.signals[s].profile(weekend)[0][h] for s in SIGNALS]
                    assert np.allclose(marginal, file_p, rtol=0, atol=1e-9), (type_name, region_name, weekend, h)
                    # (b) the settled state couples them: P(all on) exceeds the product of the
                    # marginals by exactly what the closed form of independent chains gives.
                    joint = pi @ signals_on.all(axis=1)
                    p_set = spec.settled.profile(weekend)[0][h]
                    own = [1 - (1 - file_p[s]) / (1 - p_set) for s in range(len(SIGNALS))]
                    assert math.isclose(joint, p_set + (1 - p_set) * np.prod(own), abs_tol=1e-9)
                    excess.append(joint - np.prod(marginal))
    excess = np.array(excess)
    assert (excess > 0).all()
    assert excess.max() > 0.09  # night hours: about 0.1 above independence


def test_without_a_settled_state_the_own_chains_are_the_file_chains_exactly():
    absent = config_of(no_settled())
    zero = config_of([f"fleet.device_types.{t}.settled.hourly={yaml_list([0] * 24)}" for t in PHONES]
                     + [f"fleet.device_types.{t}.settled.weekend.hourly={yaml_list([0] * 24)}" for t in PHONES])
    region = "south-asia"
    for type_name in TYPES:
        spec = absent.fleet.group_spec(type_name, region)
        for weekend in (False, True):
            p, d = _hour_parameters(absent, type_name, region, weekend)
            assert (p[SETTLED] == 0).all()
            for s, name in enumerate(SIGNALS):
                hourly, mean_on = spec.signals[name].profile(weekend)
                assert np.array_equal(p[1 + s], hourly) and np.array_equal(d[1 + s], mean_on)
    end_s = 3 * 86400.0
    t_absent, t_zero = tables_of(absent, end_s), tables_of(zero, end_s)
    assert t_absent.origin_s == t_zero.origin_s and not t_absent.has_settled
    assert (t_zero.p[:, SETTLED] == 0).all() and (t_absent.p[:, SETTLED] == 0).all()
    # Settled never on: p_own = 1 - (1 - p) / 1 is p up to rounding (a few of the example's
    # values differ from p by one unit in the last place), d_own = d exactly.
    for name in ("p", "rate", "prefix_a", "prefix_log"):
        a, b = getattr(t_absent, name)[:, 1:], getattr(t_zero, name)[:, 1:]
        assert np.allclose(a, b, rtol=4e-16, atol=4e-16), name
    assert np.array_equal(t_absent.d[:, 1:], t_zero.d[:, 1:])
    assert np.allclose(t_absent.cum_hazard[:, :, 1:], t_zero.cum_hazard[:, :, 1:], rtol=1e-14, atol=0)


# ------------------------------------------------------ 3. eligible-session length: phase type

# The time until a finite chain started in a set A leaves it is phase-type: with T the
# generator restricted to A and alpha the initial law on A, S(t) = alpha expm(T t) 1 and the
# mean is -alpha T^-1 1 (M. F. Neuts, Matrix-Geometric Solutions in Stochastic Models, 1981;
# from memory). Here A = "every required signal on", alpha the stationary law restricted to A,
# the rates flat in time and derived from the file's values by the model's own formula.
FLAT = {"idle": (0.6, 30), "charging": (0.5, 60), "unmetered": (0.7, 120)}  # p, mean on (min)
FLAT_SETTLED = (0.2, 180)  # at most every covered signal in every region (south-asia: unmetered 0.25)
FLAT_COVERS = ["charging", "unmetered"]  # idle keeps a chain of its own


def _flat_config() -> fleetsim.Config:
    t = "budget-phone"
    overrides = no_weekend([t]) + [f"fleet.device_types.{t}.settled.weekend=null"]
    for name, (p, minutes) in FLAT.items():
        overrides += [f"fleet.device_types.{t}.signals.{name}.hourly={yaml_list([p] * 24)}",
                      f"fleet.device_types.{t}.signals.{name}.mean_on={minutes}m"]
    overrides += [f"fleet.device_types.{t}.settled.hourly={yaml_list([FLAT_SETTLED[0]] * 24)}",
                  f"fleet.device_types.{t}.settled.mean_on={FLAT_SETTLED[1]}m",
                  f"fleet.device_types.{t}.settled.turns_on={yaml_list(FLAT_COVERS)}"]
    return config_of(overrides + ["horizon.duration=2d"])


def _flat_generator() -> np.ndarray:
    p_set, d_set = FLAT_SETTLED[0], 60.0 * FLAT_SETTLED[1]
    generators = [two_state_generator(p_set, d_set)]
    for name in SIGNALS:
        p, minutes = FLAT[name]
        if name in FLAT_COVERS:
            p = 1 - (1 - p) / (1 - p_set)  # docs/architecture.md, Signals: the derived own chain
        generators.append(two_state_generator(p, 60.0 * minutes))
    return kronecker_sum(generators)


def test_eligible_session_length_is_phase_type():
    config = _flat_config()
    tables = tables_of(config, 2 * 86400.0)
    q = _flat_generator()
    pi = stationary(q)
    eligible = signal_bits(FLAT_COVERS).all(axis=1)
    alpha = pi[eligible] / pi[eligible].sum()
    sub = q[np.ix_(eligible, eligible)]
    ones = np.ones(sub.shape[0])
    mean = -alpha @ linalg.solve(sub, ones)
    second = 2 * alpha @ linalg.solve(sub, linalg.solve(sub, ones))
    values, vectors = linalg.eig(sub)
    weights = (alpha @ vectors) * linalg.solve(vectors, ones)

    def survival(t):
        return np.real(np.exp(np.outer(np.atleast_1d(t), values)) @ weights)

    for t in (0.0, 600.0, 7200.0):  # the eigen form against scipy's expm
        assert math.isclose(survival(t)[0], alpha @ linalg.expm(sub * t) @ ones, rel_tol=1e-9)
    span = 86400.0
    assert survival(span)[0] < 1e-6  # following each path one day is as good as for ever

    # The engine: looks at t0 (every chain drawn from its law, here the stationary one), the
    # devices with every signal on kept, their paths followed from the recorded states.
    group = group_of("budget-phone", "north-atlantic")
    n = 30_000
    rng = np.random.default_rng(7)
    state = SignalState(tables, np.full(n, group))
    devices = np.arange(n)
    t0 = np.full(n, 5 * 3600.0 + 77.0)
    chains = np.array([state.observe(devices, c, t0, rng) for c in range(len(CHAINS))])
    on = state.signals_on(devices, chains)
    keep = on.all(axis=0)
    # The share of devices eligible is the stationary mass of A (binomial, 4.5 sd).
    share = pi[eligible].sum()
    assert abs(keep.mean() - share) <= 4.5 * math.sqrt(share * (1 - share) / n), (keep.mean(), share)
    chosen = devices[keep]
    paths = state.paths(chosen, t0[keep], t0[keep] + span, rng)
    assert np.array_equal(paths.state0, chains[:, keep])
    times, after = _signal_events(paths, state, chosen)
    off = ~after.all(axis=0) & np.isfinite(times)
    assert off.any(axis=1).all()
    length = times[np.arange(chosen.size), np.argmax(off, axis=1)] - t0[keep]
    assert stats.kstest(length, lambda t: 1.0 - survival(t)).pvalue >= ALPHA
    sd = math.sqrt(second - mean * mean)
    assert abs(length.mean() - mean) <= 4.5 * sd / math.sqrt(length.size), (length.mean(), mean)


# ----------------------------------------------- 4. weekday / weekend on local calendars, DST

# IANA time zone database via zoneinfo: New York springs forward from 02:00 EST to 03:00 EDT
# on Sunday 2026-03-08 (second Sunday in March, Energy Policy Act of 2005; from memory), so
# that local day has 23 hours; Riyadh is UTC+03:00 with no DST and Kolkata UTC+05:30 with no
# DST (from memory; zoneinfo is the reference below).


def utc(text: str) -> datetime:
    return datetime.fromisoformat(text).replace(tzinfo=timezone.utc)


def _zoneinfo_calendar(zone: str, start: datetime, steps: int) -> tuple[list[int], list[int]]:
    tz = ZoneInfo(zone)
    moments = [(start + timedelta(seconds=STEP_S * k)).astimezone(tz) for k in range(steps)]
    return [m.hour for m in moments], [m.isoweekday() for m in moments]


def test_local_calendar_matches_zoneinfo_over_the_spring_forward_weekend():
    start = utc("2026-03-07T05:00:00")  # Saturday 00:00 EST
    steps = 3 * 96
    hours, days = local_calendar("America/New_York", start, steps)
    ref_hours, ref_days = _zoneinfo_calendar("America/New_York", start, steps)
    assert hours.tolist() == ref_hours and days.tolist() == ref_days
    counts = np.bincount(days, minlength=8)
    assert counts[6] == 96 and counts[7] == 92  # Saturday 24 hours, Sunday 23
    assert 2 not in hours[96:96 + 92].tolist()  # 02:00 to 03:00 does not exist that Sunday
    # Riyadh: Friday begins at Thursday 21:00Z.
    start = utc("2026-03-05T00:00:00")
    hours, days = local_calendar("Asia/Riyadh", start, 4 * 96)
    ref_hours, ref_days = _zoneinfo_calendar("Asia/Riyadh", start, 4 * 96)
    assert hours.tolist() == ref_hours and days.tolist() == ref_days
    assert days[83] == 4 and days[84] == 5  # 20:45Z Thursday, 21:00Z Friday


WEEK_IDLE = [round(0.30 + 0.01 * h, 2) for h in range(24)]
WEEKEND_IDLE = [round(0.60 + 0.01 * h, 2) for h in range(24)]
WEEK_IDLE_MIN = [10 + h for h in range(24)]
WEEKEND_IDLE_MIN = [40 + h for h in range(24)]
WEEK_SETTLED = [round(0.05 + 0.005 * h, 3) for h in range(24)]
WEEKEND_SETTLED = [round(0.20 + 0.005 * h, 3) for h in range(24)]
CALENDAR_REGIONS = {  # region: (zone, weekend days)
    "north-atlantic": ("America/New_York", ("saturday", "sunday")),
    "south-asia": ("Asia/Kolkata", ("sunday",)),  # the example's six-day week
    "east-asia": ("Asia/Riyadh", ("friday", "saturday")),
}


def _calendar_config() -> fleetsim.Config:
    overrides = ["horizon.start=2026-03-05T00:00:00Z", "horizon.duration=5d",
                 "fleet.regions.east-asia.timezone=Asia/Riyadh",
                 "fleet.regions.east-asia.weekend_days=[friday, saturday]"]
    for t in ("budget-phone", "tablet"):
        base = f"fleet.device_types.{t}.signals.idle"
        overrides += [f"{base}.hourly={yaml_list(WEEK_IDLE)}",
                      f"{base}.mean_on={yaml_list(f'{m}m' for m in WEEK_IDLE_MIN)}",
                      f"{base}.weekend={{hourly: {yaml_list(WEEKEND_IDLE)}, "
                      f"mean_on: {yaml_list(f'{m}m' for m in WEEKEND_IDLE_MIN)}}}"]
    base = "fleet.device_types.budget-phone.settled"
    overrides += [f"{base}.hourly={yaml_list(WEEK_SETTLED)}", f"{base}.mean_on=2h", f"{base}.turns_on=[idle]",
                  f"{base}.weekend={{hourly: {yaml_list(WEEKEND_SETTLED)}, mean_on: 5h}}"]
    return config_of(overrides)


def test_tables_use_weekend_values_exactly_on_local_weekend_days():
    config = _calendar_config()
    tables = tables_of(config, 5 * 86400.0)
    steps = tables.steps
    grid_start = config.horizon.start + timedelta(seconds=tables.origin_s)
    for region, (zone, weekend_days) in CALENDAR_REGIONS.items():
        assert config.fleet.regions[region].timezone == zone
        hours, days = _zoneinfo_calendar(zone, grid_start, steps)
        hours = np.array(hours)
        weekend = np.isin(days, [ISO_DAY[day] for day in weekend_days])
        assert 0 < weekend.sum() < steps
        idle_p = np.where(weekend, np.array(WEEKEND_IDLE)[hours], np.array(WEEK_IDLE)[hours])
        idle_d = 60.0 * np.where(weekend, np.array(WEEKEND_IDLE_MIN)[hours], np.array(WEEK_IDLE_MIN)[hours])
        settled_p = np.where(weekend, np.array(WEEKEND_SETTLED)[hours], np.array(WEEK_SETTLED)[hours])
        settled_d = np.where(weekend, 5 * 3600.0, 2 * 3600.0)
        phone, tablet = group_of("budget-phone", region), group_of("tablet", region)
        # The tablet has no settled state: its idle chain is the file's.
        assert np.array_equal(tables.p[tablet, IDLE], idle_p), region
        assert np.array_equal(tables.d[tablet, IDLE], idle_d), region
        assert (tables.p[tablet, SETTLED] == 0).all()
        # The phone: settled as the file says, idle's own chain derived from the same day's values.
        assert np.array_equal(tables.p[phone, SETTLED], settled_p), region
        assert np.array_equal(tables.d[phone, SETTLED], settled_d), region
        own = 1.0 - (1.0 - idle_p) / (1.0 - settled_p)
        assert np.allclose(tables.p[phone, IDLE], own, rtol=0, atol=1e-12), region
        assert np.array_equal(tables.d[phone, IDLE], idle_d), region
        if zone == "Asia/Kolkata":  # the local day begins at half past a UTC hour: 18:30Z
            begins = np.flatnonzero(np.diff(weekend.astype(int)) == 1) + 1
            assert begins.size and all((grid_start + timedelta(seconds=STEP_S * k)).minute == 30 for k in begins)
    # New York's DST Sunday is a weekend day of 92 steps whose 02:00 hour is missing.
    zone = ZoneInfo("America/New_York")
    sunday = [k for k in range(steps)
              if (grid_start + timedelta(seconds=STEP_S * k)).astimezone(zone).date().isoformat() == "2026-03-08"]
    assert len(sunday) == 92
    group = group_of("tablet", "north-atlantic")
    used = tables.p[group, IDLE, sunday]
    assert np.isin(np.round(used, 6), WEEKEND_IDLE).all() and not np.isclose(used, WEEKEND_IDLE[2]).any()


# ---------------------------------------------------------------------------- 5. joint mix

# Devices draw their (type, region) pair from P(type, region) = region share x the region's
# type mix (else the types' shares) (docs/architecture.md, Fleet); the counts are multinomial, checked
# by Pearson's chi-square (scipy.stats.chisquare). A sample median of n draws lies between
# the order statistics X_(l) and X_(n-l+1), l the ALPHA/2 quantile of Bin(n, 1/2), with
# probability at least 1 - ALPHA (distribution-free interval for a median, e.g. David and
# Nagaraja, Order Statistics, 2003, section 7.1; from memory).
MIX_OVERRIDES = [
    "fleet.devices=200000",
    "fleet.regions.east-asia.overrides={sample_cost: {median: 200ms}}",
    "fleet.device_types.tablet.by_region={east-asia: {sample_cost: {median: 300ms}}}",
]


def _median_within_bounds(x: np.ndarray, median: float) -> bool:
    x = np.sort(x)
    n = x.size
    low = int(stats.binom.ppf(ALPHA / 2, n, 0.5))
    return bool(x[max(low - 1, 0)] <= median <= x[n - low])


def test_pairs_follow_the_joint_table_and_traits_the_pair_spec():
    config = config_of(MIX_OVERRIDES)
    fleet = sample_fleet(config, seed=17)
    spec = config.fleet
    expected = np.zeros((len(TYPES), len(REGIONS)))
    for r, region_name in enumerate(REGIONS):
        region = spec.regions[region_name]
        for t, type_name in enumerate(TYPES):
            mix = region.type_mix.get(type_name, 0.0) if region.type_mix else spec.device_types[type_name].share
            expected[t, r] = region.share * mix
    assert spec.regions["south-asia"].type_mix is not None
    assert math.isclose(expected.sum(), 1.0) and np.allclose(spec.joint_mix(), expected, rtol=1e-12)
    counts = np.bincount(fleet.group, minlength=expected.size)
    assert stats.chisquare(counts, expected.reshape(-1) * fleet.size).pvalue >= ALPHA
    # The type mix of south-asia differs from elsewhere (0.55 budget phones, not 0.38).
    south = fleet.region == REGIONS.index("south-asia")
    assert abs((fleet.device_type[south] == 0).mean() - 0.55) < 0.01

    def members(type_name, region_name):
        return (fleet.device_type == TYPES.index(type_name)) & (fleet.region == REGIONS.index(region_name))

    # by_region: budget phones in south-asia download at a median of 6 Mbit/s, spread kept (0.9).
    down = fleet.down_mbps[members("budget-phone", "south-asia")]
    assert _median_within_bounds(down, 6.0) and not _median_within_bounds(down, 14.0)
    n = down.size
    log_var = np.var(np.log(down), ddof=1)
    chi2 = stats.chi2(n - 1)  # (n - 1) s^2 / sigma^2 for normal logs (common practice)
    assert chi2.ppf(ALPHA / 2) <= (n - 1) * log_var / 0.9**2 <= chi2.ppf(1 - ALPHA / 2)
    assert _median_within_bounds(fleet.down_mbps[members("budget-phone", "north-atlantic")], 14.0)
    # Precedence: the type's own < the region's overrides < the type's by_region entry.
    for type_name, region_name, median_s in (("budget-phone", "east-asia", 0.200), ("tablet", "east-asia", 0.300),
                                             ("budget-phone", "west-europe", 0.110), ("tablet", "west-europe", 0.040)):
        cost = fleet.sample_cost_s[members(type_name, region_name)]
        assert cost.size > 2000 and _median_within_bounds(cost, median_s), (type_name, region_name)


# --------------------------------------------------------------- 6. battery follows the device

# At a look with charging state c the level is F_c^-1(Phi(Z)), F_c the Beta law by mean and sd
# (method of moments, common practice), and between looks Z is an Ornstein-Uhlenbeck score:
# Z' = w Z + sqrt(1 - w^2) N(0, 1), w = exp(-gap / tau) (Uhlenbeck and Ornstein, Physical
# Review 36, 1930; from memory), so Z stays N(0, 1) and corr(Z, Z') = w.


def _beta_law(mean_pct: float, sd_pct: float):
    m, s = mean_pct / 100.0, sd_pct / 100.0
    k = m * (1 - m) / (s * s) - 1
    return stats.beta(m * k, (1 - m) * k)


BATTERY_GROUPS = {  # (type, region): (charging mean, sd), (unplugged mean, sd), tau s
    ("budget-phone", "east-asia"): ((80.0, 12.0), (45.0, 20.0), 2 * 3600.0),  # by_region values
    ("budget-phone", "north-atlantic"): ((72.0, 20.0), (52.0, 24.0), 6 * 3600.0),  # the type's own, tau default
}
BATTERY_OVERRIDES = [
    "fleet.device_types.budget-phone.by_region={east-asia: {battery_level: {charging: {mean: 80%, sd: 12%}, "
    "unplugged: {mean: 45%, sd: 20%}, correlation_time: 2h}}}",
]


def test_battery_looks_have_the_beta_law_and_ou_correlation():
    config = config_of(BATTERY_OVERRIDES)
    groups = [group_of(*key) for key in BATTERY_GROUPS]
    n = 20_000
    group = np.repeat(groups, n)
    battery = BatteryState(config, TYPES, REGIONS, group)
    rng = np.random.default_rng(23)
    devices = np.arange(group.size)
    looks = np.array([0.0, 1800.0, 9000.0, 9600.0, 30_600.0])  # gaps 30 min, 2 h, 10 min, 6 h
    scores = []
    for t in looks:
        charging = rng.random(group.size) < 0.5
        level = battery.look(devices, np.full(group.size, t), charging, rng)
        assert ((level > 0) & (level < 100)).all()
        z = np.empty(group.size)
        for (key, (on, off, _)), g in zip(BATTERY_GROUPS.items(), groups, strict=True):
            for state, (mean, sd) in ((True, on), (False, off)):
                mask = (group == g) & (charging == state)
                law = _beta_law(mean, sd)
                # The level's marginal law at every look, with history or without, is the
                # charging state's Beta law of the (type, region) spec.
                assert stats.kstest(level[mask] / 100.0, law.cdf).pvalue >= ALPHA, (key, t, state)
                z[mask] = special.ndtri(law.cdf(level[mask] / 100.0))
        scores.append(z)
    for j in range(1, looks.size):
        gap = looks[j] - looks[j - 1]
        for (key, (_, _, tau)), g in zip(BATTERY_GROUPS.items(), groups, strict=True):
            mask = group == g
            r = np.corrcoef(scores[j - 1][mask], scores[j][mask])[0, 1]
            w = math.exp(-gap / tau)
            # Standard error of a sample correlation (1 - rho^2) / sqrt(n) (Fisher 1915, from memory).
            assert abs(r - w) <= 4.5 * (1 - w * w) / math.sqrt(n) + 1e-3, (key, gap, r, w)


def test_battery_record_sets_the_score_of_the_level_a_task_left():
    # At a participation's end the level L with charging state c is kept as the score
    # Z = Phi^-1(F_c(L)) (docs/architecture.md, Battery): a look at once shows F_c'^-1(F_c(L)) (L itself
    # for the same state), and a look tau later has the OU transition law
    # (Z' - w Z) / sqrt(1 - w^2) ~ N(0, 1), w = exp(-1).
    config = config_of(BATTERY_OVERRIDES)
    (key, (on, off, tau)), = [(k, v) for k, v in BATTERY_GROUPS.items() if k[1] == "east-asia"]
    laws = {True: _beta_law(*on), False: _beta_law(*off)}
    n = 20_000
    group = np.full(n, group_of(*key))
    battery = BatteryState(config, TYPES, REGIONS, group)
    rng = np.random.default_rng(29)
    devices = np.arange(n)
    left = rng.uniform(5.0, 95.0, n)
    state = rng.random(n) < 0.5
    z = np.empty(n)
    for c in (True, False):
        z[state == c] = special.ndtri(laws[c].cdf(left[state == c] / 100.0))
    for t, gap in ((1000.0, 0.0), (50_000.0, tau)):
        battery.record(devices, np.full(n, t), state, left)
        later = rng.random(n) < 0.5
        level = battery.look(devices, np.full(n, t + gap), later, rng)
        seen = np.empty(n)
        for c in (True, False):
            seen[later == c] = special.ndtri(laws[c].cdf(level[later == c] / 100.0))
        if gap == 0.0:
            same = later == state
            assert np.allclose(level[same], left[same], rtol=0, atol=1e-3)
            assert np.allclose(seen, z, rtol=0, atol=1e-4)
        else:
            w = math.exp(-gap / tau)
            assert stats.kstest((seen - w * z) / math.sqrt(1 - w * w), stats.norm.cdf).pvalue >= ALPHA


def _truncated_mean(law, floor: float) -> float:
    # E[X | X >= m] for X ~ Beta(a, b): a / (a + b) P(Beta(a + 1, b) >= m) / P(X >= m)
    # (the Beta density identity x f(x; a, b) = a / (a + b) f(x; a + 1, b); from memory).
    a, b = law.args
    return 100.0 * a / (a + b) * stats.beta(a + 1, b).sf(floor) / law.sf(floor)


LONG_RUN = [
    "fleet.devices=3000", "horizon.duration=10d", "workload.requires=[idle, unmetered]", "rounds.rest=30m",
    "rounds.target_reports=40", "rounds.min_reports=30", "rounds.aggregation_time=15m",
    "fleet.regions.east-asia.overrides={battery_level: {charging: {mean: 85%, sd: 10%}, "
    "unplugged: {mean: 60%, sd: 15%}}}",
]
BANDS = ((0, 6), (6, 12), (12, 18), (18, 24))


def _check_in_levels(monkeypatch, overrides: list[str]):
    """Run the long run; yield (charging state, hour band, region cells) with the levels seen at
    the accepted check-ins in the cell and the truncated Beta law of its spec."""
    seen = []
    resolve = fleetsim.server.resolve_cohort

    def spy(config, arrays, device, accept_s, checkin_s, charging, battery_pct, *args, **kwargs):
        seen.append((device.copy(), checkin_s.copy(), charging.copy(), battery_pct.copy()))
        return resolve(config, arrays, device, accept_s, checkin_s, charging, battery_pct, *args, **kwargs)

    monkeypatch.setattr(fleetsim.server, "resolve_cohort", spy)
    config = config_of(LONG_RUN + overrides)
    result = fleetsim.simulate(config, seed=3)
    device, checkin, charging, level = (np.concatenate(parts) for parts in zip(*seen, strict=True))
    assert charging.mean() > 0.3 and (~charging).mean() > 0.2  # charging varies at check-in
    assert (result.participations["battery_used_pct"] > 0).mean() > 0.99  # tasks drain the battery
    floor = config.workload.min_battery / 100.0
    assert (level >= 100 * floor).all()
    region = result.fleet.region[device]
    local_hour = np.empty(device.size, dtype=np.int64)
    for r, name in enumerate(REGIONS):
        zone = ZoneInfo(config.fleet.regions[name].timezone)
        local_hour[region == r] = [(config.horizon.start + timedelta(seconds=float(t))).astimezone(zone).hour
                                   for t in checkin[region == r]]
    east = region == REGIONS.index("east-asia")
    for state in (True, False):
        kind = "charging" if state else "unplugged"
        # Every type has the same levels in a region; east-asia's overrides replace them there.
        for where, law_region, bands in ((~east, "west-europe", BANDS), (east, "east-asia", ((0, 24),))):
            spec = getattr(config.fleet.group_spec("budget-phone", law_region).battery_level, kind)
            law = _beta_law(spec.mean, spec.sd)
            for lo, hi in bands:
                mask = where & (charging == state) & (local_hour >= lo) & (local_hour < hi)
                assert mask.sum() >= 300, (kind, lo, hi)
                yield (kind, law_region, lo, hi), level[mask], law, floor


def test_long_run_levels_at_check_in_follow_the_truncated_beta_law(monkeypatch):
    # The level seen at check-in has the charging state's Beta law; an accepted check-in has it
    # truncated at min_battery. The law is exact at a look whose time does not depend on the
    # score (see the memory-off run below); here who is free to be looked at depends on earlier
    # levels (a device found low keeps checking in and is taken just above the floor; one back
    # from a short rest keeps its high level, less what its task used), which moved the cell
    # means up by 0.1 to 1.6 points in this setting (seeds 3 to 5; never down, about 0.7 on
    # average). Tolerance: 2.5 points.
    for cell, level, law, floor in _check_in_levels(monkeypatch, []):
        expected = _truncated_mean(law, floor)
        assert abs(level.mean() - expected) <= 2.5, (cell, level.mean(), expected)


def test_long_run_levels_without_memory_are_exactly_the_truncated_beta_law(monkeypatch):
    # The same run with a correlation time of 1 s: looks 10 minutes apart are independent, so
    # the accepted levels of a cell are i.i.d. from the Beta law truncated at the floor
    # (scipy.stats.beta; the CDF (F(x) - F(m)) / (1 - F(m))): KS test, and the mean within
    # 4.5 standard errors.
    overrides = [f"fleet.device_types.{t}.battery_level.correlation_time=1s" for t in TYPES] + ["horizon.duration=5d"]
    for cell, level, law, floor in _check_in_levels(monkeypatch, overrides):
        def cdf(x, law=law, floor=floor):
            return (law.cdf(x / 100.0) - law.cdf(floor)) / law.sf(floor)

        assert stats.kstest(level, cdf).pvalue >= ALPHA, cell
        expected = _truncated_mean(law, floor)
        assert abs(level.mean() - expected) <= 4.5 * level.std() / math.sqrt(level.size), (cell, level.mean(), expected)


# Hand-worked battery path: 1 Wh battery (1 J = 1/36 %), download 36 s at 1 W radio, training
# 720 s at 3 W, upload 72 s at 1 W, charger 9 W; the slope is (charger - draw) / 36 % per s.
HAND_TIMES = np.array([[36.0], [720.0], [72.0]])  # download, training, upload
HAND_POWERS = np.array([[1.0], [3.0], [1.0]])


def _path(start_pct: float, charging0: bool, changes: list[float]):
    return _battery_path(np.cumsum(HAND_TIMES, axis=0), HAND_POWERS, np.array([start_pct]),
                         np.array([changes + [np.inf]]), np.array([charging0]), np.array([9.0]), np.array([1.0]))


def _cohort(points, levels, slopes) -> Cohort:
    one = np.zeros(1)
    return Cohort(device=np.zeros(1, dtype=np.int64), accept_s=one, phases=(1, 2, 3), durations=HAND_TIMES,
                  powers=HAND_POWERS, bytes_down=np.array([1.0, 0.0, 0.0]), bytes_up=np.array([0.0, 0.0, 1.0]),
                  examples=one, weight=one, local_s=HAND_TIMES[1], drop_at=np.full(1, np.inf),
                  cause=np.zeros(1, dtype=np.int8), interrupt_at=np.full(1, np.inf),
                  interrupt_cause=np.zeros(1, dtype=np.int8), unmask_s=one, unmask_bytes=0.0,
                  battery_start_pct=one, paths=None, battery_points=points, battery_levels=levels,
                  battery_slopes=slopes)


def test_battery_path_charges_when_plugged_in_mid_task_capped_at_full():
    # 80% unplugged; plugged in at 216 s (training); unplugged again at 792 s (upload):
    #   [0, 36]    download, unplugged: -1/36 %/s  -> 79 at 36
    #   [36, 216]  training, unplugged: -3/36      -> 64 at 216
    #   [216, 756] training, charging:  +6/36      -> 100 at 216 + 36 / (1/6) = 432, then flat (full)
    #   [756, 792] upload, charging:    +8/36      -> stays 100
    #   [792, 828] upload, unplugged:   -1/36      -> 99 at 828
    points, levels, slopes = _path(80.0, False, [216.0, 792.0])
    cohort = _cohort(points, levels, slopes)
    rel = np.array([0.0, 18.0, 36.0, 126.0, 216.0, 300.0, 432.0, 600.0, 756.0, 780.0, 792.0, 810.0, 828.0])
    expected = [80.0, 79.5, 79.0, 71.5, 64.0, 78.0, 100.0, 100.0, 100.0, 100.0, 100.0, 99.5, 99.0]
    got = [cohort.battery_at(np.array([r]))[0] for r in rel]
    assert np.allclose(got, expected, rtol=0, atol=1e-9), got
    assert math.isinf(_battery_crossing(points, levels, slopes, 30.0)[0])


def test_battery_crossing_is_the_exact_first_passage_below_the_floor():
    # 40% charging at check-in, unplugged at 108 s, floor 30%:
    #   [0, 36] +8/36 -> 48;  [36, 108] +6/36 -> 60;  then -3/36: 30% at 108 + 30 * 12 = 468 s.
    points, levels, slopes = _path(40.0, True, [108.0])
    assert math.isclose(_battery_crossing(points, levels, slopes, 30.0)[0], 468.0, rel_tol=1e-12)
    assert math.isclose(_cohort(points, levels, slopes).battery_at(np.array([468.0]))[0], 30.0, rel_tol=1e-12)
    # Unplugged at 30.5%: falls at 1/36 %/s during the download, 30% at 18 s.
    points, levels, slopes = _path(30.5, False, [])
    assert math.isclose(_battery_crossing(points, levels, slopes, 30.0)[0], 18.0, rel_tol=1e-12)
    # 35% unplugged, plugged in at 36 s (34% then): never below 30%.
    points, levels, slopes = _path(35.0, False, [36.0])
    assert math.isinf(_battery_crossing(points, levels, slopes, 30.0)[0])
    # Plugged in while the check-in was held (a change before acceptance, -50 s): charging from 0 s.
    points, levels, slopes = _path(31.0, False, [-50.0])
    assert math.isinf(_battery_crossing(points, levels, slopes, 30.0)[0])
    assert math.isclose(_cohort(points, levels, slopes).battery_at(np.array([36.0]))[0], 39.0, rel_tol=1e-12)
