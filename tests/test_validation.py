"""The engine against the outside world: closed forms and reference data from named sources.

Each check names its source in a comment. Values recalled rather than looked up are marked
"(from memory)"; facts of common practice with no single source are marked "(common
practice)". Stochastic checks use fixed seeds and state their tolerance; docs/validation.md
lists them with what breaking the model showed.
"""

from __future__ import annotations

import math
from datetime import datetime, timedelta, timezone
from zoneinfo import ZoneInfo

import numpy as np
import pytest
from scipy import linalg, stats

import fleetsim
from fleetsim.chains import SignalState
from fleetsim.config import SIGNALS
from fleetsim.fleet import sample_fleet
from fleetsim.metrics import gini
from fleetsim.signals import CHAINS, STEP_S, build_signal_tables, local_hours

from . import CLASSIC_ROUNDS

TYPES = ("budget-phone", "midrange-phone", "flagship-phone", "tablet")
ALPHA = 1e-3  # a goodness-of-fit test with a true model fails with probability 0.1%


def config_of(overrides: list[str]) -> fleetsim.Config:
    # The closed forms here are built on tasks that start at acceptance, an unpaced server and
    # uncapped training (CLASSIC_ROUNDS); each case sets what it is about after that.
    return fleetsim.load_config(fleetsim.example_path(), CLASSIC_ROUNDS + overrides)


def every_type(key: str, value: object) -> list[str]:
    return [f"fleet.device_types.{name}.{key}={value}" for name in TYPES]


def status_names(result: fleetsim.Result) -> np.ndarray:
    return result.rounds["status"].to_numpy().astype(str)


# A task whose length is the same on every device: 1 MB down and up at 8 Mbit/s (1 s each),
# 300 samples at 1 s per sample, batch 1, one epoch: T = 302 s. No signal is required, the
# battery floor is 0 and there is no execution limit, so a crash is the only way to drop out.
FIXED_TASK = [
    "workload.requires=[]",
    "workload.min_battery=0",
    "workload.memory_needed=0",
    "workload.execution_limit=1d",
    "workload.model_size=1MB",
    "workload.update_encoding.bits_per_weight=32",  # the update is the whole model, 1 MB
    "workload.batch_size=1",
    "workload.epochs=1",
    *every_type("samples", 300),
    *every_type("sample_cost", "1s"),
    *every_type("download_rate", "8Mbit/s"),
    *every_type("upload_rate", "8Mbit/s"),
]
FIXED_TASK_S = 302.0


# --------------------------------------------------------------------- (a) binomial tail

# Round success with n accepted, each succeeding independently with probability p, needing
# K reports: P(success) = P(Bin(n, p) >= K) (binomial tail; scipy.stats.binom.sf).
# By construction p = exp(-h T): a constant crash hazard h over a fixed task time T
# (exponential survival, e.g. Ross, Introduction to Probability Models, ch. 5).
CRASH_PER_HOUR = 2.0
BINOMIAL = FIXED_TASK + [
    "fleet.devices=5000",
    "horizon.duration=2d",
    f"workload.crash_rate={CRASH_PER_HOUR}/h",
    "rounds.target_reports=17",
    "rounds.min_reports=17",
    "rounds.over_selection=1.17",  # ceil(17 * 1.17) = 20 accepted
    "rounds.selection_timeout=2m",
    "rounds.report_deadline=10m",
    "rounds.rest=0s",
]


@pytest.fixture(scope="module")
def binomial_run() -> fleetsim.Result:
    return fleetsim.simulate(config_of(BINOMIAL), seed=11)


def test_round_success_follows_the_binomial_tail(binomial_run):
    config = binomial_run.config
    n, k = config.rounds.accept_count, config.rounds.required_reports
    assert (n, k) == (20, 17)
    p_device = math.exp(-CRASH_PER_HOUR / 3600.0 * FIXED_TASK_S)
    p_round = stats.binom.sf(k - 1, n, p_device)
    status = status_names(binomial_run)
    assert (binomial_run.rounds["accepted"] == n).all()  # every round filled: the premise holds
    committed = int((status == "committed").sum())
    rounds = status.size
    assert rounds >= 300
    test = stats.binomtest(committed, rounds, p_round)
    assert test.pvalue >= ALPHA, (committed, rounds, p_round)


def test_reports_per_round_follow_the_capped_binomial(binomial_run):
    # Reports R = min(S, target) with S ~ Bin(n, p) survivors: the round closes at the
    # target-th report (docs/architecture.md) and each device survives its task with p = exp(-h T).
    n = binomial_run.config.rounds.accept_count
    target = binomial_run.config.rounds.target_reports
    p_device = math.exp(-CRASH_PER_HOUR / 3600.0 * FIXED_TASK_S)
    reports = binomial_run.rounds["reports"].to_numpy()
    cells = [range(0, 15), range(15, 16), range(16, 17), range(17, 18)]  # pooled low cell
    observed = np.array([np.isin(reports, list(c)).sum() for c in cells])
    pmf = stats.binom.pmf(np.arange(n + 1), n, p_device)
    pmf_capped = np.concatenate([pmf[:target], [pmf[target:].sum()]])
    expected = np.array([pmf_capped[list(c)].sum() for c in cells]) * reports.size
    assert expected.min() >= 5  # Cochran's rule for the chi-square approximation (from memory)
    assert stats.chisquare(observed, expected).pvalue >= ALPHA


def test_task_survival_matches_kaplan_meier_from_lifelines(binomial_run):
    # Kaplan-Meier estimate (Kaplan and Meier, JASA 53, 1958) of the time from acceptance to
    # a crash, censored when the task ends otherwise, computed by the lifelines library,
    # against the model's survival exp(-h t). Tolerance: 4.5 Greenwood standard errors.
    from lifelines import KaplanMeierFitter

    parts = binomial_run.participations
    duration = (parts["ended_s"] - parts["accepted_s"]).to_numpy()
    crashed = (parts["dropout_cause"] == "crash").to_numpy()
    assert crashed.sum() >= 500
    fitter = KaplanMeierFitter().fit(duration, event_observed=crashed)
    times = np.array([30.0, 100.0, 200.0, 290.0])
    km = fitter.survival_function_at_times(times).to_numpy()
    model = np.exp(-CRASH_PER_HOUR / 3600.0 * times)
    # Greenwood's formula (Greenwood 1926, from memory) for the standard error at the model
    # value; with tens of thousands of tasks it is a fraction of a percent.
    table = fitter.event_table
    at_risk, died = table["at_risk"].to_numpy(), table["observed"].to_numpy()
    t_index = table.index.to_numpy()
    for t, s_km, s_model in zip(times, km, model, strict=True):
        mask = (t_index <= t) & (at_risk > died)
        var = s_km**2 * np.sum(died[mask] / (at_risk[mask] * (at_risk[mask] - died[mask])))
        assert abs(s_km - s_model) <= 4.5 * math.sqrt(var) + 1e-4, (t, s_km, s_model)


# ------------------------------------------------------------ (b) order statistics of reports

# The k-th smallest of n i.i.d. durations with CDF F satisfies F(X_(k)) ~ Beta(k, n - k + 1)
# (David and Nagaraja, Order Statistics, 3rd ed., 2003, section 2.1). With the lottery policy
# the server holds a window's check-ins and accepts the whole cohort at the window's end, so
# every member starts at once and the round closes at the k-th report, X_(k) after selection.
ORDER_MEDIAN_COST_S, ORDER_SPREAD = 3.0, 0.5
ORDER = [
    "fleet.devices=20000",
    "horizon.duration=1d",
    "workload.requires=[]",
    "workload.min_battery=0",
    "workload.memory_needed=0",
    "workload.execution_limit=1d",
    "workload.crash_rate=0",
    "workload.model_size=1MB",
    "workload.update_encoding.bits_per_weight=32",  # the update is the whole model, 1 MB
    "workload.batch_size=1",
    "workload.epochs=1",
    *every_type("samples", 100),
    *every_type("sample_cost", f"{{median: {ORDER_MEDIAN_COST_S}s, spread: {ORDER_SPREAD}}}"),
    *every_type("download_rate", "8Mbit/s"),
    *every_type("upload_rate", "8Mbit/s"),
    "rounds.target_reports=30",
    "rounds.min_reports=30",
    "rounds.over_selection=1.33",  # ceil(39.9) = 40 accepted
    "rounds.report_deadline=2h",
    "rounds.rest=0s",
    "selection.policy=lottery",
]


def task_cdf(t: np.ndarray) -> np.ndarray:
    # T = 2 s of transfer + 100 samples x cost, cost lognormal(median, spread) per device.
    train = np.maximum(np.asarray(t) - 2.0, 1e-300)
    return stats.norm.cdf(np.log(train / (100 * ORDER_MEDIAN_COST_S)) / ORDER_SPREAD)


def test_kth_report_time_follows_the_beta_law_of_order_statistics():
    result = fleetsim.simulate(config_of(ORDER), seed=5)
    rounds, parts = result.rounds, result.participations
    n, k = result.config.rounds.accept_count, result.config.rounds.target_reports
    assert (n, k) == (40, 30)
    # The premise: each round's cohort is accepted at one instant.
    spread = parts.groupby("round")["accepted_s"].agg(lambda v: v.max() - v.min())
    assert (spread == 0).all()
    assert (rounds["accepted"] == n).all()
    kth = (rounds["closed_s"] - rounds["selected_s"]).to_numpy()
    assert kth.size >= 150
    u = task_cdf(kth)
    assert stats.kstest(u, stats.beta(k, n - k + 1).cdf).pvalue >= ALPHA
    # The median report delay is the 20th order statistic's law too: check a second k
    # from the log itself (the 20th report of each round).
    reported = parts[parts["outcome"] == "on-time"]
    twentieth = reported.groupby("round")["ended_s"].apply(lambda v: np.sort(v.to_numpy())[19])
    start = rounds.set_index("round")["selected_s"].loc[twentieth.index]
    u20 = task_cdf((twentieth - start).to_numpy())
    assert stats.kstest(u20, stats.beta(20, n - 20 + 1).cdf).pvalue >= ALPHA


# ------------------------------------------------------------- (c) two-state Markov chain

# A two-state chain leaving "on" at rate a and "off" at rate b is on a fraction b / (a + b)
# of the time, and from state "off" at time 0 it is on at time t with probability
# b / (a + b) (1 - exp(-(a + b) t)) (Ross, Introduction to Probability Models, section 6.4,
# Kolmogorov equations for the two-state chain). fleetsim sets a = 1/d, b = p / ((1 - p) d).


def _independent_weekdays() -> list[str]:
    """Overrides that leave idle one chain of its own with no weekend values (no settled state)."""
    return ([f"fleet.device_types.{t}.settled=null" for t in TYPES]
            + [f"fleet.device_types.{t}.signals.idle.weekend=null" for t in TYPES])


def _flat_signal_config(p_idle: float, mean_on: str, hourly: list[float] | None = None) -> fleetsim.Config:
    values = hourly if hourly is not None else [p_idle] * 24
    text = "[" + ", ".join(f"{v:.6f}" for v in values) + "]"
    overrides = [f"fleet.device_types.{t}.signals.idle.hourly={text}" for t in TYPES]
    overrides += [f"fleet.device_types.{t}.signals.idle.mean_on={mean_on}" for t in TYPES]
    overrides += _independent_weekdays()
    return config_of(overrides + ["horizon.duration=1d"])


def _tables(config: fleetsim.Config, end_s: float = 86400.0):
    fleet = sample_fleet(config, seed=0)
    return fleet, build_signal_tables(config, fleet.type_names, fleet.region_names, end_s)


def test_chain_rates_give_the_stationary_on_fraction():
    p, d = 0.3, 40 * 60.0
    config = _flat_signal_config(p, "40m")
    _, tables = _tables(config)
    idle = CHAINS.index("idle")
    a, b = 1.0 / d, p / ((1.0 - p) * d)
    assert np.allclose(tables.p[:, idle, :], p)
    assert np.allclose(tables.rate[:, idle, :], a + b, rtol=1e-12)
    assert math.isclose(b / (a + b), p, rel_tol=1e-12)


def test_chain_relaxes_from_off_as_exp_of_minus_a_plus_b_t():
    p, d = 0.3, 40 * 60.0
    config = _flat_signal_config(p, "40m")
    fleet, tables = _tables(config)
    idle = CHAINS.index("idle")
    a, b = 1.0 / d, p / ((1.0 - p) * d)
    t = np.array([1.0, 60.0, 450.0, 899.0, 900.0, 1800.0, 5000.0, 20000.0, 80000.0])
    group = np.zeros(t.size, dtype=np.int64)
    closed_form = b / (a + b) * (1.0 - np.exp(-(a + b) * t))
    exact = tables.on_probability(group, idle, np.zeros(t.size), np.zeros(t.size), t)
    assert np.allclose(exact, closed_form, rtol=0, atol=1e-9)
    # From "on": p + (1 - p) exp(-(a + b) t).
    from_on = tables.on_probability(group, idle, np.zeros(t.size), np.ones(t.size), t)
    assert np.allclose(from_on, p + (1 - p) * np.exp(-(a + b) * t), rtol=0, atol=1e-9)
    # Sampled: 200,000 devices seen off at time 0, looked at again at t = 30 min.
    n = 200_000
    state = SignalState(tables, np.zeros(n, dtype=np.int64))
    rng = np.random.default_rng(3)
    devices = np.arange(n)
    state.record(devices, idle, np.zeros(n), np.zeros(n))
    on = state.observe(devices, idle, np.full(n, 1800.0), rng)
    expected = b / (a + b) * (1 - math.exp(-(a + b) * 1800.0))
    sd = math.sqrt(expected * (1 - expected) / n)
    assert abs(on.mean() - expected) <= 4.5 * sd


def test_time_average_of_a_sampled_chain_is_the_stationary_fraction():
    # Ergodic theorem for a finite chain (Ross, section 4.4): the long-run fraction of looks
    # that find the chain on is b / (a + b), each look drawn given the one before.
    p, d = 0.65, 20 * 60.0
    config = _flat_signal_config(p, "20m")
    _, tables = _tables(config, end_s=7 * 86400.0)
    idle = CHAINS.index("idle")
    n, looks = 400, 1000
    state = SignalState(tables, np.zeros(n, dtype=np.int64))
    rng = np.random.default_rng(8)
    devices = np.arange(n)
    total = 0
    for j in range(looks):
        total += state.observe(devices, idle, np.full(n, 600.0 * j), rng).sum()
    fraction = total / (n * looks)
    # Looks 10 minutes apart are correlated: variance inflation (1 + r) / (1 - r) with
    # r = exp(-(a + b) 600 s) for an AR(1)-like chain (common practice), then 4.5 sd.
    r = math.exp(-600.0 / ((1 - p) * d))
    sd = math.sqrt(p * (1 - p) / (n * looks) * (1 + r) / (1 - r))
    assert abs(fraction - p) <= 4.5 * sd, (fraction, p, sd)


def test_prefix_maps_match_a_product_of_matrix_exponentials_over_changing_hours():
    # With rates constant on each 15-minute step, the transition matrix over many steps is
    # the product of expm(Q_k h) (Kolmogorov forward equations; Ross, section 6.4). The
    # engine's closed form with prefix maps must agree with that product.
    hourly = [0.05 + 0.9 * (h % 7) / 6 for h in range(24)]
    config = _flat_signal_config(0.5, "35m", hourly)
    fleet, tables = _tables(config)
    idle = CHAINS.index("idle")
    group = 3
    d = tables.d[group, idle, 0]  # one mean on-duration in every hour
    t_from, t_to = -3000.0, 40_000.0 + 123.0
    probability = 1.0
    for q_from in (0.0, 1.0, 0.37):
        vector = np.array([1 - q_from, q_from])  # [off, on]
        t = t_from
        while t < t_to:
            k = int(tables.step_of(np.array([t]))[0])
            step_end = min(tables.origin_s + (k + 1) * tables.step_s, t_to)
            pk = tables.p[group, idle, k]
            a, b = 1.0 / d, pk / ((1 - pk) * d)
            generator = np.array([[-b, b], [a, -a]])
            vector = vector @ linalg.expm(generator * (step_end - t))
            t = step_end
        probability = vector[1]
        engine = tables.on_probability(np.array([group]), idle, np.array([t_from]), np.array([q_from]),
                                       np.array([t_to]))[0]
        assert math.isclose(engine, probability, abs_tol=1e-9), (q_from, engine, probability)


# ------------------------------------------------------------------------ (d) Little's law

# Little's law L = lambda W (Little, Operations Research 9, 1961). On a finite horizon
# [0, H] the sample-path form is exact: the integral of the number working over [0, H] equals
# the total time of tasks started in [0, H) less their parts after H (e.g. Stidham,
# Operations Research 22, 1974, from memory). The overshoot must be small for L = lambda W.


def _working_integral(starts: np.ndarray, ends: np.ndarray, horizon: float) -> float:
    # An event sweep of N(t), independent of fleetsim.metrics.
    times = np.concatenate([starts, ends, [horizon]])
    steps = np.concatenate([np.ones(starts.size), -np.ones(ends.size), [0.0]])
    order = np.argsort(times, kind="stable")
    times, level = times[order], np.cumsum(steps[order])
    inside = times < horizon
    widths = np.diff(np.append(times[inside], horizon))
    return float(np.sum(level[inside] * widths))


@pytest.fixture(scope="module")
def diurnal_run() -> fleetsim.Result:
    # The bundled fleet cut to 5,000 devices, with rounds small enough for that fleet.
    overrides = ["fleet.devices=5000", "horizon.duration=1d", "rounds.target_reports=20",
                 "rounds.min_reports=15", "rounds.rest=2h"]
    return fleetsim.simulate(config_of(overrides), seed=2)


def test_littles_law_for_devices_working(diurnal_run):
    parts = diurnal_run.participations
    horizon = diurnal_run.horizon_s
    starts, ends = parts["accepted_s"].to_numpy(), parts["ended_s"].to_numpy()
    assert (ends >= starts).all() and (starts >= 0).all()
    began = starts < horizon
    rate = began.sum() / horizon  # lambda: tasks per second
    mean_time = (ends[began] - starts[began]).mean()  # W
    working = _working_integral(starts[began], ends[began], horizon) / horizon  # L
    overshoot = np.clip(ends[began] - horizon, 0, None).sum() / horizon
    assert math.isclose(working + overshoot, rate * mean_time, rel_tol=1e-9)
    assert overshoot <= 0.01 * working
    assert math.isclose(working, rate * mean_time, rel_tol=0.01)
    # The summary's time-average of devices working is the same L.
    assert math.isclose(diurnal_run.summary["load"]["mean_working"], working, rel_tol=1e-6)


def test_littles_law_for_devices_in_the_training_phase(diurnal_run):
    parts = diurnal_run.participations
    horizon = diurnal_run.horizon_s
    train_start = (parts["accepted_s"] + parts["download_s"]).to_numpy()
    train_end = np.minimum(parts["ended_s"].to_numpy(), train_start + parts["train_s"].to_numpy())
    trained = train_end > train_start
    s, e = train_start[trained], train_end[trained]
    began = s < horizon
    working = _working_integral(s[began], e[began], horizon) / horizon
    overshoot = np.clip(e[began] - horizon, 0, None).sum() / horizon
    rate, mean_time = began.sum() / horizon, (e[began] - s[began]).mean()
    assert math.isclose(working + overshoot, rate * mean_time, rel_tol=1e-9)
    # The log's training seconds are the same time in training, row by row.
    assert np.allclose(parts["compute_s"].to_numpy()[trained], e - s, rtol=1e-9, atol=1e-9)
    assert math.isclose(working, rate * mean_time, rel_tol=0.01)


# ------------------------------------------------------------------ (e) local time and DST

# IANA time zone database (via zoneinfo and the tzdata package). US rule: clocks go from
# 02:00 to 03:00 on the second Sunday in March and from 02:00 back to 01:00 on the first
# Sunday in November (Energy Policy Act of 2005, from memory). India uses UTC+05:30 with no
# DST, Japan UTC+09:00 with no DST, and Brazil dropped DST in 2019 (all from memory; the
# tz database confirms each below).


def utc(text: str) -> datetime:
    return datetime.fromisoformat(text).replace(tzinfo=timezone.utc)


def test_new_york_spring_forward_day_has_23_local_hours():
    start = utc("2026-03-08T05:00:00")  # local midnight, EST (UTC-5)
    end = utc("2026-03-09T04:00:00")  # next local midnight, EDT (UTC-4)
    steps = int((end - start).total_seconds() // STEP_S)
    assert steps == 23 * 4
    hours = local_hours("America/New_York", start, steps + 4)
    assert sorted(set(hours[:steps].tolist())) == [h for h in range(24) if h != 2]
    assert np.bincount(hours[:steps], minlength=24).tolist() == [4, 4, 0] + [4] * 21
    assert hours[steps:].tolist() == [0, 0, 0, 0]  # the next local day has begun


def test_new_york_fall_back_day_has_25_local_hours():
    start = utc("2026-11-01T04:00:00")  # local midnight, EDT
    end = utc("2026-11-02T05:00:00")  # next local midnight, EST
    steps = int((end - start).total_seconds() // STEP_S)
    assert steps == 25 * 4
    hours = local_hours("America/New_York", start, steps)
    assert np.bincount(hours, minlength=24).tolist() == [4, 8] + [4] * 22


def test_kolkata_offset_is_five_and_a_half_hours():
    hours = local_hours("Asia/Kolkata", utc("2026-03-02T00:00:00"), 8)
    # 00:00Z = 05:30 local: the 15-minute steps starting at 05:30, 05:45 are hour 5, the
    # next from 06:00 are hour 6.
    assert hours.tolist() == [5, 5, 6, 6, 6, 6, 7, 7]


@pytest.mark.parametrize("zone, hour_at_midnight_utc", [("Asia/Tokyo", 9), ("America/Sao_Paulo", 21),
                                                        ("Asia/Kolkata", 5)])
def test_zones_without_dst_keep_one_offset_all_year(zone, hour_at_midnight_utc):
    start = utc("2026-01-01T00:00:00")
    days = 365
    hours = local_hours(zone, start, days * 96)
    assert (hours[::96] == hour_at_midnight_utc).all()


def test_local_hours_agree_with_zoneinfo_offsets_for_a_whole_year():
    zone = ZoneInfo("Europe/Lisbon")  # DST from the last Sunday of March to that of October
    start = utc("2026-01-01T00:00:00")
    steps = 365 * 96
    hours = local_hours("Europe/Lisbon", start, steps)
    moments = [start + timedelta(seconds=k * STEP_S) for k in range(0, steps, 37)]
    expected = [m.astimezone(zone).hour for m in moments]
    assert hours[::37].tolist() == expected


def test_signal_tables_follow_local_time_across_the_dst_change():
    # Each hour its own on-probability, so the table shows which local hour it used.
    hourly = [0.02 + 0.04 * h for h in range(24)]
    overrides = [f"fleet.device_types.{t}.signals.idle.hourly=[{', '.join(f'{v:.2f}' for v in hourly)}]"
                 for t in TYPES] + _independent_weekdays()
    config = config_of(overrides + ["horizon.start=2026-03-08T00:00:00Z", "horizon.duration=1d"])
    fleet, tables = _tables(config)
    region = fleet.region_names.index("north-atlantic")
    group = 0 * len(fleet.region_names) + region
    zone = ZoneInfo("America/New_York")
    start = config.horizon.start
    idle = CHAINS.index("idle")
    for k in range(0, 96):
        t = k * STEP_S
        local = (start + timedelta(seconds=t + 1)).astimezone(zone).hour
        step = int(tables.step_of(np.array([t + 1.0]))[0])
        assert math.isclose(tables.p[group, idle, step], hourly[local]), (k, local)
    # Local 02:00 does not exist that day: no step uses hour 2's value after 07:00Z.
    steps = tables.step_of(np.arange(0.0, 86400.0, STEP_S) + 1.0)
    assert not np.isclose(tables.p[group, idle, steps], hourly[2]).any()


# -------------------------------------------------------------------------- (f) Gini

# Gini coefficient of known distributions: exponential 1/2, uniform on [0, 1] 1/3,
# Pareto with index alpha 1 / (2 alpha - 1) (all from memory; e.g. Kleiber and Kotz,
# Statistical Size Distributions in Economics, 2003). Definition: half the relative mean
# absolute difference (Gini 1912, from memory).


def test_gini_of_known_distributions():
    rng = np.random.default_rng(12)
    n = 400_000
    assert abs(gini(rng.exponential(2.0, n)) - 0.5) <= 0.005
    assert abs(gini(rng.uniform(0.0, 1.0, n)) - 1.0 / 3.0) <= 0.005
    alpha = 3.0
    assert abs(gini(rng.pareto(alpha, n) + 1.0) - 1.0 / (2 * alpha - 1)) <= 0.01


def test_gini_equals_half_the_relative_mean_absolute_difference():
    rng = np.random.default_rng(4)
    for size in (1, 2, 7, 300):
        x = rng.poisson(2.0, size).astype(float)
        if x.sum() == 0:
            continue
        mad = np.abs(x[:, None] - x[None, :]).sum() / (size * size)
        assert math.isclose(gini(x), mad / (2 * x.mean()), rel_tol=1e-12, abs_tol=1e-12)
    assert gini(np.full(10, 3.0)) == 0.0
    one_hot = np.zeros(10)
    one_hot[4] = 1.0
    assert math.isclose(gini(one_hot), 9 / 10)


# ---------------------------------------------------------- (g) selection time vs Erlang

# Check-ins from many devices with independent uniform phases form, in the limit, a
# Poisson stream (Palm-Khintchine theorem; Khintchine, Mathematical Methods in the Theory of
# Queueing, 1960, from memory). Thinned independently by the battery check (level drawn
# afresh at each check-in, Beta(mean, sd)), the rate is lambda = N q / checkin_every with
# q = P(level >= min). The time to the M-th accepted check-in is then Erlang(M, lambda)
# (scipy.stats.gamma with shape M and scale 1/lambda).
ERLANG_DEVICES, ERLANG_EVERY_S, ERLANG_MIN = 3000, 600.0, 40.0
ERLANG = FIXED_TASK + [
    f"fleet.devices={ERLANG_DEVICES}",
    "horizon.duration=1d",
    f"workload.min_battery={ERLANG_MIN}",
    "workload.crash_rate=0",
    *every_type("samples", 50),
    *every_type("battery_level.charging", "{mean: 50, sd: 20}"),
    *every_type("battery_level.unplugged", "{mean: 50, sd: 20}"),
    "rounds.target_reports=16",
    "rounds.min_reports=16",
    "rounds.over_selection=1.25",  # M = 20
    "rounds.checkin_every=10m",
    "rounds.selection_timeout=5m",
    "rounds.report_deadline=5m",
    "rounds.rest=0s",
]


def _beta_shape(mean: float, sd: float) -> tuple[float, float]:
    # Method of moments for the Beta distribution (common practice).
    m, s = mean / 100, sd / 100
    total = m * (1 - m) / (s * s) - 1
    return m * total, (1 - m) * total


def test_selection_time_is_erlang_with_poisson_checkins():
    result = fleetsim.simulate(config_of(ERLANG), seed=21)
    rounds = result.rounds
    m = result.config.rounds.accept_count
    assert m == 20 and (rounds["accepted"] == m).all()
    q = stats.beta(*_beta_shape(50, 20)).sf(ERLANG_MIN / 100)
    rate = ERLANG_DEVICES * q / ERLANG_EVERY_S
    selection = (rounds["selected_s"] - rounds["opened_s"]).to_numpy()
    assert selection.size >= 500
    erlang = stats.gamma(a=m, scale=1.0 / rate)
    assert stats.kstest(selection, erlang.cdf).pvalue >= ALPHA
    assert abs(selection.mean() - erlang.mean()) <= 4.5 * erlang.std() / math.sqrt(selection.size)


# ------------------------------------------------------------- (h) chi-square in the summary

# Pearson's chi-square goodness of fit (Pearson 1900, from memory), as scipy.stats.chisquare
# computes it; with 2 degrees of freedom the tail is exp(-x / 2) (from memory).


def test_scipy_chisquare_on_a_hand_worked_example():
    result = stats.chisquare([10, 20, 30])  # expected 20 each
    assert math.isclose(result.statistic, (100 + 0 + 100) / 20)
    assert math.isclose(result.pvalue, math.exp(-10 / 2), rel_tol=1e-9)


def test_summary_chi_square_is_scipy_chisquare_of_reports_against_fleet_shares(diurnal_run):
    parts = diurnal_run.participations
    fleet = diurnal_run.fleet
    types = len(fleet.type_names)
    used = parts["used"].to_numpy()
    reports = np.bincount(parts["device_type"].cat.codes.to_numpy()[used], minlength=types).astype(float)
    fleet_share = np.bincount(fleet.device_type, minlength=types) / fleet.size
    assert reports.sum() > 1000
    scipy_result = stats.chisquare(reports, fleet_share * reports.sum())
    bias = diurnal_run.summary["bias"]
    assert math.isclose(bias["chi_square_device_type"], scipy_result.statistic, rel_tol=1e-9)
    assert math.isclose(bias["chi_square_device_type_p"], scipy_result.pvalue, rel_tol=1e-6, abs_tol=1e-300)
    table = diurnal_run.tables["bias_by_device_type"]
    assert np.allclose(table["reports"].to_numpy(), reports)


@pytest.mark.slow
def test_round_success_binomial_tail_over_more_rounds():
    result = fleetsim.simulate(config_of([*BINOMIAL, "horizon.duration=7d"]), seed=12)
    n, k = result.config.rounds.accept_count, result.config.rounds.required_reports
    p_round = stats.binom.sf(k - 1, n, math.exp(-CRASH_PER_HOUR / 3600.0 * FIXED_TASK_S))
    status = status_names(result)
    assert stats.binomtest(int((status == "committed").sum()), status.size, p_round).pvalue >= ALPHA


# ----------------------------------------------------------------- the census estimator


def _census_fleet(rare: int = 15, small: int = 100):
    """100,000 devices with one (type, region) group of ``rare`` devices, one of ``small``
    (drawn in large part, so the finite population correction matters) and, within every
    group, devices of unlike eligibility: some busy, some whose signals were seen off or on."""
    from fleetsim.engine import STREAMS
    from fleetsim.fleet import stream
    from fleetsim.runtime import FleetRuntime

    config = config_of(["fleet.devices=100000", "workload.memory_needed=3GB"])
    fleet = sample_fleet(config, 0)
    rng = np.random.default_rng(7)
    tablet, last = TYPES.index("tablet"), len(fleet.region_names) - 1
    group = (fleet.device_type == tablet) & (fleet.region == last)
    fleet.region[group] = 0  # empty the group, then give it exactly `rare` devices
    fleet.region[(fleet.device_type == tablet) & (fleet.region == last - 1)] = 0
    chosen = rng.choice(fleet.size, size=rare + small, replace=False)
    fleet.device_type[chosen], fleet.region[chosen[:rare]], fleet.region[chosen[rare:]] = tablet, last, last - 1
    tables = build_signal_tables(config, fleet.type_names, fleet.region_names, 86400.0, 0.0)
    runtime = FleetRuntime(config, fleet, tables, {name: stream(3, name) for name in STREAMS})
    runtime.free_at[rng.random(fleet.size) < 0.3] = np.inf  # busy: never eligible
    seen = np.flatnonzero(rng.random(fleet.size) < 0.5)
    for s in range(len(SIGNALS)):
        runtime.signals.record(seen, 1 + s, np.full(seen.size, 3600.0), rng.random(seen.size) < 0.5)
    rare_group = tablet * len(fleet.region_names) + last
    return runtime, rare_group


def test_stratified_census_is_unbiased_within_its_standard_error_for_a_group_of_15_in_100000():
    # Stratified random sampling without replacement: N x the sample mean is unbiased for the
    # group total, variance N^2 (1 - n/N) s^2 / n (Cochran, Sampling Techniques, 1977, ch. 5;
    # from memory). The exact expectation sums every device's eligibility probability.
    from fleetsim.engine import CENSUS_MIN_PER_GROUP, CENSUS_SAMPLE

    runtime, rare = _census_fleet()
    t = 3600.0 + 900.0
    size = runtime.group_size
    assert size[rare] == 15 and size[rare - 1] == 100
    whole, _, exact, exact_var = runtime.census(t, runtime.fleet.size, 0)
    assert (whole == size).all() and np.allclose(exact_var, 0.0)
    draws = 300
    runs = [runtime.census(t, CENSUS_SAMPLE, CENSUS_MIN_PER_GROUP) for _ in range(draws)]
    drawn = runs[0][0]
    estimates = np.array([r[2] for r in runs])  # [draws, groups]
    se = np.sqrt(np.array([r[3] for r in runs]))
    assert drawn.sum() < 2 * CENSUS_SAMPLE  # the census stays cheap
    # The rare group is counted whole: exact, with no sampling error.
    assert drawn[rare] == 15
    assert np.allclose(estimates[:, rare], exact[rare]) and np.allclose(se[:, rare], 0.0)
    sampled = (drawn < size) & (size > 0)
    assert sampled.sum() >= 15 and sampled[rare - 1] and drawn[rare - 1] / size[rare - 1] > 0.5
    # Unbiased: the mean of 300 estimates is within 4 standard errors of the mean of the truth.
    mean_error = estimates[:, sampled].mean(axis=0) - exact[sampled]
    assert (np.abs(mean_error) <= 4.0 * se[:, sampled].mean(axis=0) / np.sqrt(draws)).all()
    # Pooled over the groups (independent draws): the sum of the standardised mean errors of
    # 19-odd groups is N(0, groups) if unbiased.
    standardised = mean_error / (se[:, sampled].mean(axis=0) / np.sqrt(draws))
    assert abs(standardised.sum()) / np.sqrt(standardised.size) < 4.0
    # The standard error is right: the spread of the estimates matches it (sd of a sample of
    # 300 is within about 10% of the truth at 3 sigma, normal theory, from memory).
    ratio = estimates[:, sampled].std(axis=0, ddof=1) / se[:, sampled].mean(axis=0)
    assert (np.abs(ratio - 1.0) < 0.15).all(), ratio


def test_census_tables_carry_standard_errors_and_devices_drawn():
    result = fleetsim.simulate(config_of(["fleet.devices=20000", "horizon.duration=3h"]), seed=2)
    census = result.census
    assert {"devices", "sampled", "eligible_est", "eligible_se"} <= set(census.columns)
    assert (census["sampled"] < census["devices"]).all()
    assert (census.loc[census["eligible_est"] > 0, "eligible_se"] > 0).all()
    # A fleet smaller than the census sample is counted whole, with no sampling error.
    small = fleetsim.simulate(config_of(["fleet.devices=1500", "horizon.duration=1h"]), seed=2).census
    assert (small["sampled"] == small["devices"]).all() and (small["eligible_se"] == 0).all()
    for name in ("bias_by_device_type", "bias_by_region", "bias_by_data_quartile"):
        table = result.tables[name]
        assert (table["eligible_share_se"] >= 0).all() and (table["eligible_share_se"] < 0.05).all()
        # Every count drew devices of every type and region: the figures rest on them all.
        assert table["eligible_drawn"].sum() == pytest.approx(census["sampled"].sum())
    hourly = result.tables["hourly"]
    assert (hourly["eligible_se"] > 0).all() and (hourly["eligible_drawn"] > 0).all()
