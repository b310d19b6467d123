"""The engine against the literal oracle (tests/oracle.py): agreement in distribution.

Each seed samples its own fleet (``fleetsim.fleet.sample_fleet``); the oracle and the
engine share nothing else, so their outcomes are two samples of one law if the engine
implements the semantics the oracle writes out plainly. Compared: committed rounds, round
statuses, round and selection durations, accepted devices per round, outcome and
dropout-cause and dropout-phase shares, wasted work by cause, report shares by device type
and region, the hour profile of acceptances, and battery levels at check-in.

Method: independent replications (one run per seed is one observation; Law and Kelton,
Simulation Modeling and Analysis, chapter 9, from memory). For every share or quantile the
per-seed values of the engine (ENGINE_SEEDS) and of the oracle (ORACLE_SEEDS) are compared
with Welch's unequal-variance t-test (scipy.stats.ttest_ind, equal_var=False; Welch,
Biometrika 34, 1947, from memory), Bonferroni-adjusted over the categories or quantiles of
one comparison. Pooled tests over the rows of a run (a chi-square on participations, a
Kolmogorov-Smirnov test on round durations) treat rows as independent, but participations
come in rounds and rounds in runs of busy and quiet hours: on 16 and on 48 seeds of the
diurnal scenario the pooled chi-square on wasted-work causes gave p = 1e-4 and 5e-3 while
the per-seed comparison of the same shares gave p >= 0.06 for every cause (design effect
about 1.5 on round statuses), and a pooled Mann-Whitney test on the task lengths of
reports gave p = 2e-4 (devices report many times and each seed has its own fleet).
Per-seed replicates carry their own variance and need no such assumption.

Agreement means an adjusted p >= ALPHA. The ``test_*_detects_*`` tests run a deliberately
wrong engine (one setting changed) against the same oracle runs and require the same
comparison to fail (adjusted p < ALPHA), so each comparison here is shown able to fail.
"""

from __future__ import annotations

from collections.abc import Callable
from dataclasses import dataclass

import numpy as np
import pandas as pd
import pytest
from scipy import stats

import fleetsim

from .oracle import simulate_oracle

ALPHA = 1e-3  # a true model fails one comparison with probability at most 0.1%
ORACLE_SEEDS = (1, 2, 3, 4, 5, 6)
ENGINE_SEEDS = tuple(range(101, 113))  # the engine is fast: more replicates, more power
WRONG_SEEDS = tuple(range(201, 207))  # replicates of a deliberately wrong engine

# Scenario "diurnal": the bundled fleet cut down to 1,000 devices over the day New York
# springs forward (2026-03-08; IANA tz database), small rounds so that rounds committed, ended
# by the report deadline and ended by the selection timeout all occur, and a crash hazard and
# execution limit high enough to be seen.
DIURNAL = [
    "fleet.devices=1000",
    "horizon.start=2026-03-08T00:00:00Z",
    "horizon.duration=1d",
    "rounds.target_reports=12",
    "rounds.min_reports=9",
    "rounds.rest=2h",
    "workload.crash_rate=1/h",
    "workload.execution_limit=5m",
]

# Scenario "battery": charging not required and training power above the charger's, so the
# battery level drawn at check-in and its drain during the task decide dropouts.
_TYPES = ("budget-phone", "midrange-phone", "flagship-phone", "tablet")
BATTERY = [
    "fleet.devices=1000",
    "horizon.duration=12h",
    "rounds.target_reports=20",
    "rounds.min_reports=15",
    "rounds.rest=2h",
    "workload.requires=[idle, unmetered]",
    "workload.min_battery=40",
] + [f"fleet.device_types.{name}.train_power={watts}W" for name, watts in zip(_TYPES, (12, 14, 16, 25), strict=True)]


def config_of(overrides: list[str]) -> fleetsim.Config:
    return fleetsim.load_config(fleetsim.example_path(), overrides)


@dataclass
class Pooled:
    """Rounds and participations of several seeds, labelled with names, a ``seed`` column each."""

    rounds: pd.DataFrame
    parts: pd.DataFrame

    @property
    def seeds(self) -> np.ndarray:
        return np.unique(self.rounds["seed"])


_LABELLED = ("device_type", "region", "outcome", "dropout_cause", "dropout_phase", "waste_cause")


def _label_engine(result: fleetsim.Result, seed: int) -> tuple[pd.DataFrame, pd.DataFrame]:
    # The engine's frames carry labels (Categorical); plain strings pool across seeds like the oracle's.
    rounds = result.rounds.assign(status=result.rounds["status"].astype(str))
    parts = result.participations.assign(**{c: result.participations[c].astype(str) for c in _LABELLED})
    return rounds.assign(seed=seed), parts.assign(seed=seed)


def run_engine(config: fleetsim.Config, seeds=ENGINE_SEEDS) -> Pooled:
    frames = [_label_engine(fleetsim.simulate(config, seed), seed) for seed in seeds]
    return Pooled(pd.concat([r for r, _ in frames], ignore_index=True),
                  pd.concat([p for _, p in frames], ignore_index=True))


def run_oracle(config: fleetsim.Config, seeds=ORACLE_SEEDS) -> Pooled:
    runs = [(simulate_oracle(config, seed), seed) for seed in seeds]
    return Pooled(pd.concat([o.rounds.assign(seed=s) for o, s in runs], ignore_index=True),
                  pd.concat([o.participations.assign(seed=s) for o, s in runs], ignore_index=True))


# ------------------------------------------------------------------ replicate comparisons


def welch_p(engine: np.ndarray, oracle: np.ndarray) -> float:
    """Two-sided p-value of Welch's t-test on two sets of per-seed values.

    t = (m1 - m2) / sqrt(v1/n1 + v2/n2) with the Welch-Satterthwaite degrees of freedom
    (Welch 1947; Satterthwaite 1946; from memory), written out so that a side whose values
    are all equal (a quantile at the deadline in every seed) needs no special case in
    scipy. Values are rounded to 1e-9 first so that float noise does not count as spread.
    Both sides constant: 1 if equal, else 0.
    """
    x = np.round(np.asarray(engine, dtype=float), 9)
    y = np.round(np.asarray(oracle, dtype=float), 9)
    vx, vy = x.var(ddof=1) / x.size, y.var(ddof=1) / y.size
    se2 = vx + vy
    if se2 == 0:
        return 1.0 if np.isclose(x.mean(), y.mean()) else 0.0
    t = (x.mean() - y.mean()) / np.sqrt(se2)
    df = se2**2 / (vx**2 / (x.size - 1) + vy**2 / (y.size - 1))
    return float(2.0 * stats.t.sf(abs(t), df))


def _shares(frame: pd.DataFrame, column: str, seeds: np.ndarray) -> pd.DataFrame:
    table = pd.crosstab(frame["seed"], frame[column]).reindex(seeds, fill_value=0)
    return table.div(table.sum(axis=1).replace(0, np.nan), axis=0).fillna(0.0)


def shares_p(engine: Pooled, oracle: Pooled, column: str, rows: str = "parts",
             where: Callable[[pd.DataFrame], pd.Series] | None = None) -> float:
    """Bonferroni-adjusted Welch p over the labels of ``column``: do per-seed shares agree?"""
    frames = []
    for pooled in (engine, oracle):
        frame = getattr(pooled, rows)
        if where is not None:
            frame = frame[where(frame)]
        frames.append(_shares(frame, column, pooled.seeds))
    e, o = frames
    labels = sorted(set(e.columns) | set(o.columns))
    e, o = e.reindex(columns=labels, fill_value=0.0), o.reindex(columns=labels, fill_value=0.0)
    pvalues = [welch_p(e[label], o[label]) for label in labels]
    return min(1.0, min(pvalues) * len(pvalues))


def per_seed(pooled: Pooled, value: Callable[[pd.DataFrame, pd.DataFrame], float]) -> np.ndarray:
    return np.array([
        value(pooled.rounds[pooled.rounds["seed"] == s], pooled.parts[pooled.parts["seed"] == s])
        for s in pooled.seeds
    ])


def quantiles_p(engine: Pooled, oracle: Pooled, values: Callable[[pd.DataFrame, pd.DataFrame], np.ndarray],
                levels=(0.1, 0.25, 0.5, 0.75, 0.9)) -> float:
    """Bonferroni-adjusted Welch p over per-seed quantiles (and the mean) of a quantity."""
    pvalues = []
    for level in levels:
        def at(rounds, parts, level=level):
            return float(np.quantile(values(rounds, parts), level))
        pvalues.append(welch_p(per_seed(engine, at), per_seed(oracle, at)))
    pvalues.append(welch_p(per_seed(engine, lambda r, p: float(np.mean(values(r, p)))),
                           per_seed(oracle, lambda r, p: float(np.mean(values(r, p))))))
    return min(1.0, min(pvalues) * len(pvalues))


def committed_durations(rounds: pd.DataFrame, parts: pd.DataFrame) -> np.ndarray:
    chosen = rounds[rounds["status"] == "committed"]
    return (chosen["closed_s"] - chosen["opened_s"]).to_numpy()


def selection_times(rounds: pd.DataFrame, parts: pd.DataFrame) -> np.ndarray:
    return (rounds["selected_s"] - rounds["opened_s"]).to_numpy()


def committed_count(rounds: pd.DataFrame, parts: pd.DataFrame) -> float:
    return float((rounds["status"] == "committed").sum())


def used(frame: pd.DataFrame) -> pd.Series:
    return frame["used"].astype(bool)


# ------------------------------------------------------------------------------------ runs


@pytest.fixture(scope="module")
def diurnal_oracle() -> Pooled:
    return run_oracle(config_of(DIURNAL))


@pytest.fixture(scope="module")
def diurnal_engine() -> Pooled:
    return run_engine(config_of(DIURNAL))


@pytest.fixture(scope="module")
def battery_oracle() -> Pooled:
    return run_oracle(config_of(BATTERY))


@pytest.fixture(scope="module")
def battery_engine() -> Pooled:
    return run_engine(config_of(BATTERY))


# ------------------------------------------------------------------------ sanity of the oracle


def test_oracle_runs_follow_the_round_protocol(diurnal_oracle):
    """Invariants of the protocol in the oracle's own log (what the comparisons rest on)."""
    rounds, parts = diurnal_oracle.rounds, diurnal_oracle.parts
    config = config_of(DIURNAL)
    assert set(rounds["status"]) == {"committed", "report-deadline", "selection-timeout"}
    assert (rounds["accepted"] <= config.rounds.accept_count).all()
    assert (rounds.loc[rounds["status"] == "selection-timeout", "accepted"] < config.rounds.required_reports).all()
    assert (rounds.loc[rounds["status"] == "committed", "reports"] >= config.rounds.required_reports).all()
    assert ((rounds["closed_s"] - rounds["selected_s"]) <= config.rounds.report_deadline + 1e-6).all()
    assert ((rounds["selected_s"] - rounds["opened_s"]) <= config.rounds.selection_timeout + 1e-6).all()
    assert (parts["ended_s"] >= parts["accepted_s"]).all()
    assert set(parts["outcome"]) == {"on-time", "late", "stopped", "dropout"}
    seen = set(parts["dropout_cause"])
    assert {"crash", "execution-limit", "idle-ended", "charging-ended", "unmetered-ended"} <= seen
    per_round = parts.groupby(["seed", "round"]).size()
    accepted = rounds.set_index(["seed", "round"])["accepted"]
    assert per_round.reindex(accepted.index, fill_value=0).equals(accepted.astype(per_round.dtype))


def test_oracle_rejects_what_it_does_not_model():
    with pytest.raises(ValueError, match="first-come"):
        simulate_oracle(config_of(DIURNAL + ["selection.policy=lottery"]), 1)


# ------------------------------------------------------------------- diurnal scenario: agree


def test_committed_rounds_per_seed_agree(diurnal_engine, diurnal_oracle):
    engine, oracle = per_seed(diurnal_engine, committed_count), per_seed(diurnal_oracle, committed_count)
    assert welch_p(engine, oracle) >= ALPHA, (engine, oracle)
    assert abs(engine.mean() - oracle.mean()) <= 0.05 * oracle.mean(), (engine.mean(), oracle.mean())


def test_round_status_shares_agree(diurnal_engine, diurnal_oracle):
    assert shares_p(diurnal_engine, diurnal_oracle, "status", rows="rounds") >= ALPHA


def test_committed_round_durations_agree(diurnal_engine, diurnal_oracle):
    assert quantiles_p(diurnal_engine, diurnal_oracle, committed_durations) >= ALPHA


def test_selection_times_agree(diurnal_engine, diurnal_oracle):
    assert quantiles_p(diurnal_engine, diurnal_oracle, selection_times) >= ALPHA


def test_accepted_per_round_agree(diurnal_engine, diurnal_oracle):
    assert shares_p(diurnal_engine, diurnal_oracle, "accepted", rows="rounds") >= ALPHA


def test_outcome_shares_agree(diurnal_engine, diurnal_oracle):
    assert shares_p(diurnal_engine, diurnal_oracle, "outcome") >= ALPHA


def test_dropout_cause_shares_agree(diurnal_engine, diurnal_oracle):
    # Shares among all participations ("none": no dropout), i.e. each cause's dropout rate.
    assert shares_p(diurnal_engine, diurnal_oracle, "dropout_cause") >= ALPHA


def test_dropout_phase_shares_agree(diurnal_engine, diurnal_oracle):
    def where(parts: pd.DataFrame) -> pd.Series:
        return parts["outcome"] == "dropout"

    assert shares_p(diurnal_engine, diurnal_oracle, "dropout_phase", where=where) >= ALPHA


def test_waste_cause_shares_agree(diurnal_engine, diurnal_oracle):
    assert shares_p(diurnal_engine, diurnal_oracle, "waste_cause") >= ALPHA


def test_report_shares_by_device_type_agree(diurnal_engine, diurnal_oracle):
    assert shares_p(diurnal_engine, diurnal_oracle, "device_type", where=used) >= ALPHA


def test_report_shares_by_region_agree(diurnal_engine, diurnal_oracle):
    assert shares_p(diurnal_engine, diurnal_oracle, "region", where=used) >= ALPHA


def label_region_hours(pooled: Pooled) -> Pooled:
    parts = pooled.parts
    if "region_hour" not in parts:
        parts["region_hour"] = parts["region"] + "@" + (parts["accepted_s"] // 3600).astype(int).astype(str)
    return pooled


def test_accept_hour_profile_by_region_agrees(diurnal_engine, diurnal_oracle):
    # When in the day each region's devices are accepted: the diurnal signals run on local
    # time, so a wrong offset or DST rule moves a region's profile.
    engine, oracle = label_region_hours(diurnal_engine), label_region_hours(diurnal_oracle)
    assert shares_p(engine, oracle, "region_hour") >= ALPHA


def accept_times_by_region_p(engine: Pooled, oracle: Pooled, levels=(0.25, 0.5, 0.75)) -> float:
    """Bonferroni-adjusted Welch p over per-seed quartiles of each region's acceptance times."""
    regions = sorted(set(engine.parts["region"]) | set(oracle.parts["region"]))
    pvalues = []
    for region in regions:
        for level in levels:
            def at(rounds: pd.DataFrame, parts: pd.DataFrame, region=region, level=level) -> float:
                return float(np.quantile(parts.loc[parts["region"] == region, "accepted_s"], level))
            pvalues.append(welch_p(per_seed(engine, at), per_seed(oracle, at)))
    return min(1.0, min(pvalues) * len(pvalues))


def test_accept_times_by_region_agree(diurnal_engine, diurnal_oracle):
    # The quartiles of each region's acceptance times over the day: a sharper view of the
    # same local-time dependence (one number per region and quartile, not 24 shares).
    assert accept_times_by_region_p(diurnal_engine, diurnal_oracle) >= ALPHA


def test_wasted_compute_agrees(diurnal_engine, diurnal_oracle):
    def wasted_share(rounds: pd.DataFrame, parts: pd.DataFrame) -> float:
        return float(parts.loc[~used(parts), "compute_s"].sum() / parts["compute_s"].sum())

    def wasted(rounds: pd.DataFrame, parts: pd.DataFrame) -> np.ndarray:
        return parts.loc[~used(parts), "compute_s"].to_numpy()

    assert welch_p(per_seed(diurnal_engine, wasted_share), per_seed(diurnal_oracle, wasted_share)) >= ALPHA
    assert quantiles_p(diurnal_engine, diurnal_oracle, wasted, levels=(0.25, 0.5, 0.75, 0.9)) >= ALPHA


def test_task_time_of_on_time_reports_agrees(diurnal_engine, diurnal_oracle):
    # Not a pooled Mann-Whitney test over all reports: a task's length is set by the device's
    # traits, devices report many times, and each seed has its own fleet, so reports are not
    # independent (the pooled test gave p = 2e-4 with the two in agreement otherwise).
    def task(rounds: pd.DataFrame, parts: pd.DataFrame) -> np.ndarray:
        reported = parts[parts["outcome"] == "on-time"]
        return (reported["ended_s"] - reported["accepted_s"]).to_numpy()

    assert quantiles_p(diurnal_engine, diurnal_oracle, task) >= ALPHA


# ------------------------------------------------------------------- battery scenario: agree


def test_battery_scenario_dropout_causes_agree(battery_engine, battery_oracle):
    assert (battery_oracle.parts["dropout_cause"] == "battery-low").sum() >= 50  # the scenario exercises it
    assert shares_p(battery_engine, battery_oracle, "dropout_cause") >= ALPHA


def test_battery_scenario_level_at_checkin_agrees(battery_engine, battery_oracle):
    def level(rounds: pd.DataFrame, parts: pd.DataFrame) -> np.ndarray:
        return parts["battery_start_pct"].to_numpy()

    assert battery_engine.parts["battery_start_pct"].min() >= 40
    assert battery_oracle.parts["battery_start_pct"].min() >= 40
    assert quantiles_p(battery_engine, battery_oracle, level) >= ALPHA


def test_battery_scenario_round_outcomes_agree(battery_engine, battery_oracle):
    assert shares_p(battery_engine, battery_oracle, "status", rows="rounds") >= ALPHA
    assert quantiles_p(battery_engine, battery_oracle, committed_durations) >= ALPHA
    assert shares_p(battery_engine, battery_oracle, "device_type", where=used) >= ALPHA
    assert shares_p(battery_engine, battery_oracle, "outcome") >= ALPHA


def checkins_per_round(rounds: pd.DataFrame, parts: pd.DataFrame) -> np.ndarray:
    return rounds["checkins"].to_numpy(dtype=float)


def accepted_per_round(rounds: pd.DataFrame, parts: pd.DataFrame) -> np.ndarray:
    return rounds["accepted"].to_numpy(dtype=float)


# Scenario "fast": check-ins every 10 s, so that the engine's collection windows hold several
# ticks of a device; scarce enough (400 devices, 20-minute rest) that selections run long.
FAST = DIURNAL + ["fleet.devices=400", "horizon.duration=4h", "rounds.checkin_every=10s",
                  "rounds.rest=20m", "rounds.target_reports=30", "rounds.min_reports=24"]


def test_checkins_inside_the_window_agree_with_one_checkin_per_tick():
    # The oracle has no windows: a device checks in at its first eligible tick of a selection
    # and is then working. The engine's one candidate per device and window must give the
    # same rounds, and count the same check-ins per round (docs/metrics.md: from open to the
    # selection's end).
    engine = run_engine(config_of(FAST), tuple(range(500, 516)))
    oracle = run_oracle(config_of(FAST), tuple(range(40, 46)))
    for pooled in (engine, oracle):
        assert not pooled.parts.duplicated(["seed", "round", "device"]).any()
    assert shares_p(engine, oracle, "status", rows="rounds") >= ALPHA
    assert quantiles_p(engine, oracle, accepted_per_round) >= ALPHA
    assert quantiles_p(engine, oracle, checkins_per_round) >= ALPHA
    assert quantiles_p(engine, oracle, selection_times) >= ALPHA


# ----------------------------------------------------------- the comparisons can fail


def wrong_engine(base: list[str], change: list[str]) -> Pooled:
    return run_engine(config_of(base + change), WRONG_SEEDS)


def test_cause_comparison_detects_a_doubled_crash_hazard(diurnal_oracle):
    wrong = wrong_engine(DIURNAL, ["workload.crash_rate=2/h"])
    assert shares_p(wrong, diurnal_oracle, "dropout_cause") < ALPHA


def test_cause_comparison_detects_a_halved_idle_on_duration(diurnal_oracle):
    wrong = wrong_engine(DIURNAL, [f"fleet.device_types.{t}.signals.idle.mean_on=25m" for t in _TYPES])
    assert shares_p(wrong, diurnal_oracle, "dropout_cause") < ALPHA


def test_duration_comparison_detects_a_shorter_deadline(diurnal_oracle):
    wrong = wrong_engine(DIURNAL, ["rounds.report_deadline=5m"])
    assert quantiles_p(wrong, diurnal_oracle, committed_durations) < ALPHA


def test_region_time_comparison_detects_a_zone_one_hour_off(diurnal_oracle):
    wrong = wrong_engine(DIURNAL, ["fleet.regions.north-atlantic.timezone=America/Chicago"])
    assert accept_times_by_region_p(wrong, diurnal_oracle) < ALPHA


def test_status_comparison_detects_a_halved_rest_period(diurnal_oracle):
    wrong = wrong_engine(DIURNAL, ["rounds.rest=1h"])
    assert shares_p(wrong, diurnal_oracle, "status", rows="rounds") < ALPHA


def test_battery_comparison_detects_a_smaller_battery(battery_oracle):
    wrong = wrong_engine(BATTERY, [f"fleet.device_types.{t}.battery_capacity=7Wh" for t in _TYPES])
    assert shares_p(wrong, battery_oracle, "dropout_cause") < ALPHA


# ---------------------------------------------------------------------------- heavier


@pytest.mark.slow
def test_larger_fleet_agrees_on_every_headline_share():
    overrides = DIURNAL + ["fleet.devices=2500", "rounds.target_reports=30", "rounds.min_reports=24"]
    engine = run_engine(config_of(overrides), tuple(range(300, 324)))
    oracle = run_oracle(config_of(overrides), tuple(range(10, 20)))
    assert shares_p(engine, oracle, "status", rows="rounds") >= ALPHA
    assert quantiles_p(engine, oracle, committed_durations) >= ALPHA
    assert quantiles_p(engine, oracle, selection_times) >= ALPHA
    for column in ("outcome", "dropout_cause", "waste_cause"):
        assert shares_p(engine, oracle, column) >= ALPHA, column
    for column in ("device_type", "region"):
        assert shares_p(engine, oracle, column, where=used) >= ALPHA, column


@pytest.mark.slow
def test_no_rest_and_fast_checkins_agree():
    # Devices may come back in the next round at once; check-ins every 3 minutes.
    overrides = DIURNAL + ["rounds.rest=0s", "rounds.checkin_every=3m", "horizon.duration=12h"]
    engine = run_engine(config_of(overrides), tuple(range(400, 424)))
    oracle = run_oracle(config_of(overrides), tuple(range(30, 38)))
    assert shares_p(engine, oracle, "status", rows="rounds") >= ALPHA
    assert quantiles_p(engine, oracle, committed_durations) >= ALPHA
    for column in ("outcome", "dropout_cause", "waste_cause"):
        assert shares_p(engine, oracle, column) >= ALPHA, column
    assert shares_p(engine, oracle, "device_type", where=used) >= ALPHA
