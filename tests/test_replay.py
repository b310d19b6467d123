"""Replay: logged signals drive the run; snapshots are filled by a Markov bridge that keeps
every logged state."""

from __future__ import annotations

import dataclasses

import numpy as np
import pandas as pd
import pytest
import yaml

import fleetsim
from fleetsim.bridge import bridge_intervals
from fleetsim.config import SIGNALS, build_config, example_path, load_config
from fleetsim.errors import FleetsimError
from fleetsim.replay import ReplaySignals, replay_from_frame
from fleetsim.signals import build_signal_tables
from fleetsim.telemetry.generate import generate_telemetry

DAY = 86400.0


def model_logs(config, seed: int) -> pd.DataFrame:
    """Interval logs of the config's own fleet over its horizon: the synthetic telemetry's
    (docs/telemetry.md), which follows each device's chains exactly with the engine's tables."""
    return generate_telemetry(config, seed).intervals


def test_devices_check_in_only_while_their_logs_say_every_signal_is_on():
    config = load_config(example_path(), ["fleet.devices=600", "horizon.duration=1d", "horizon.warmup=0s",
                                          "rounds.target_reports=5", "rounds.min_reports=3", "rounds.rest=1h",
                                          "rounds.selection_timeout=10m", "rounds.configure=at-acceptance",
                                          "workload.min_battery=0%", "rounds.pacing=null", "workload.epochs=40",
                                          "workload.max_examples=null", "workload.execution_limit=null",
                                          "workload.crash_rate=0/h", "rounds.report_deadline=1h"])
    origin = config.horizon.start.timestamp()
    n = 600
    hour = (np.arange(n) % 24).astype(float)  # device i: idle for one hour from hour i % 24
    rows = [(f"d{i}", "midrange-phone", "west-europe", "observed", 0.0, DAY) for i in range(n)]
    rows += [(f"d{i}", "midrange-phone", "west-europe", s, 0.0, DAY)
             for i in range(n) for s in ("charging", "unmetered")]
    rows += [(f"d{i}", "midrange-phone", "west-europe", "idle", hour[i] * 3600, hour[i] * 3600 + 3600)
             for i in range(n)]
    frame = pd.DataFrame(rows, columns=["device_id", "device_type", "region", "signal", "start_s", "end_s"])
    frame[["start_s", "end_s"]] += origin
    replay = replay_from_frame(frame, origin)
    result = fleetsim.simulate(config, seed=1, replay=replay)
    parts = result.participations
    assert len(parts) > 200
    start = np.empty(n)  # each device's idle hour's start, by its index in the replay
    start[np.searchsorted(replay.device_id, [f"d{i}" for i in range(n)])] = hour * 3600
    begin = start[parts["device"].to_numpy()]
    # Every check-in fell inside the device's logged idle hour ...
    accepted = parts["accepted_s"].to_numpy()
    assert np.all((accepted >= begin) & (accepted < begin + 3600))
    # ... and a task still running at the hour's end stopped there, the idle signal its cause.
    idle_ended = parts[parts["dropout_cause"] == "idle-ended"]
    assert len(idle_ended) > 0
    np.testing.assert_allclose(idle_ended["ended_s"], start[idle_ended["device"].to_numpy()] + 3600, atol=1e-3)
    assert set(parts["dropout_cause"].astype(str)) <= {"none", "idle-ended", "battery-low"}


def test_replaying_the_models_own_logs_gives_its_round_statistics():
    config = load_config(example_path(), ["fleet.devices=6000", "horizon.duration=1d", "horizon.warmup=0s"])
    replay = replay_from_frame(model_logs(config, seed=11), config.horizon.start.timestamp())
    replayed = [fleetsim.simulate(config, seed=s, replay=replay).summary for s in range(3)]
    modelled = [fleetsim.simulate(config, seed=s).summary for s in range(3)]
    per_run = {name: [s["participations"]["accepted"] for s in runs] for name, runs in
               (("replay", replayed), ("model", modelled))}
    a, b = np.mean(per_run["replay"]), np.mean(per_run["model"])
    # Accepted participations over a day: Poisson-like counts of about 3,000; the two means
    # differ by less than 4 standard errors of their difference (common practice).
    assert abs(a - b) < 4 * np.sqrt((a + b) / 3)
    for kind in ("budget-phone", "tablet"):
        share = [np.mean([s["bias"]["by_device_type"][kind]["report_share"] for s in runs])
                 for runs in (replayed, modelled)]
        assert share[0] == pytest.approx(share[1], abs=0.04)
    # The same devices logged with every signal off: the replay follows the logs, not the model.
    silent = model_logs(config, seed=11)
    silent = silent[silent["signal"] == "observed"]
    quiet = fleetsim.simulate(config, seed=0, replay=replay_from_frame(silent, config.horizon.start.timestamp()))
    assert quiet.summary["participations"]["accepted"] == 0


def test_a_horizon_outside_the_logs_and_unknown_names_are_refused():
    config = load_config(example_path(), ["fleet.devices=50", "horizon.duration=2d"])
    frame = model_logs(load_config(example_path(), ["fleet.devices=50", "horizon.duration=1d"]), seed=2)
    replay = replay_from_frame(frame, config.horizon.start.timestamp())
    with pytest.raises(FleetsimError, match=r"not within the logs' span .* ends 1d after"):
        fleetsim.simulate(config, seed=0, replay=replay)
    frame.loc[0, "device_type"] = "e-ink-slate"
    with pytest.raises(FleetsimError, match="'e-ink-slate', not in the fleet file's fleet.device_types"):
        fleetsim.simulate(load_config(example_path(), ["horizon.duration=1d"]), seed=0,
                          replay=replay_from_frame(frame, config.horizon.start.timestamp()))


# ------------------------------------------------------------------------------ the bridge


def constant_fleet(p: float, mean_on: str):
    """The example with every signal of every type at on-probability p and mean on-duration
    mean_on in every hour, and no settled state: a time-homogeneous chain."""
    raw = yaml.safe_load(example_path().read_text())
    for spec in raw["fleet"]["device_types"].values():
        spec["signals"] = {name: {"hourly": [p] * 24, "mean_on": mean_on} for name in SIGNALS}
        spec.pop("settled", None)
        spec.pop("by_region", None)
    for region in raw["fleet"]["regions"].values():
        region.pop("overrides", None)
    return build_config(raw, overrides=["horizon.duration=1d"])


def test_the_bridge_keeps_every_logged_state_and_follows_the_bridge_law():
    config = constant_fleet(0.3, "1h")
    origin = config.horizon.start.timestamp()
    rng = np.random.default_rng(4)
    gaps = 6000
    # Each device: off at 0, off again two hours later; the bridge fills the hours between.
    times = np.r_[np.zeros(gaps), np.full(gaps, 7200.0)] + origin + 3600.0
    ids = np.r_[np.arange(gaps), np.arange(gaps)]
    frame = pd.DataFrame({"device_id": [f"g{i:05d}" for i in ids], "device_type": "tablet", "region": "east-asia",
                          "time_s": times, "idle": False, "charging": rng.random(2 * gaps) < 0.5,
                          "unmetered": True})
    intervals = bridge_intervals(frame, config, seed=3)
    replay = replay_from_frame(intervals, origin)
    tables = build_signal_tables(config, tuple(config.fleet.device_types), tuple(config.fleet.regions), DAY, 0.0)
    tables = dataclasses.replace(tables, covers=np.zeros_like(tables.covers), has_settled=False)
    signals = ReplaySignals(tables, np.zeros(replay.size, np.int64), replay)
    device = np.searchsorted(replay.device_id, frame["device_id"].to_numpy())
    for s, name in enumerate(SIGNALS):
        seen = signals.observe(device, 1 + s, frame["time_s"].to_numpy() - origin, None)
        assert np.array_equal(seen, frame[name].to_numpy())  # every logged state, exactly
    # Closed form for a two-state chain (on-rate a, off-rate b, lambda = a + b, pi = a / lambda):
    # P(on at T/2 | off at 0 and at T) = P01(T/2) P10(T/2) / P00(T), with
    # P01(h) = pi (1 - e^{-lambda h}), P10(h) = (1 - pi)(1 - e^{-lambda h}) (Ross, Introduction to
    # Probability Models, section 6.9, from memory).
    p, d, half = 0.3, 3600.0, 3600.0
    lam = 1.0 / ((1.0 - p) * d)
    p01 = p * (1 - np.exp(-lam * half))
    p10 = (1 - p) * (1 - np.exp(-lam * half))
    p00 = 1 - p * (1 - np.exp(-2 * lam * half))
    expected = p01 * p10 / p00
    middle = signals.observe(np.arange(replay.size), 1, np.full(replay.size, 3600.0 + half), None)
    sd = np.sqrt(expected * (1 - expected) / replay.size)
    assert abs(middle.mean() - expected) < 4 * sd, (middle.mean(), expected)


def test_replayed_lookups_agree_with_a_search_of_each_line():
    """The replayed state and the changes a task sees, found by one search over every line's
    composite keys, against numpy's own searchsorted on each line alone; queries land exactly
    on interval bounds, between them and outside the logs' span."""
    rng = np.random.default_rng(7)
    n, origin = 50, 1.7e9
    rows = [(f"d{i}", "tablet", "west-europe", "observed", origin, origin + 7 * DAY) for i in range(n)]
    for i in range(n):
        for s in SIGNALS:
            cuts = np.sort(rng.choice(np.arange(1, 7 * 1440), size=2 * rng.integers(0, 30), replace=False)) * 60.0
            rows += [(f"d{i}", "tablet", "west-europe", s, origin + a, origin + b) for a, b in cuts.reshape(-1, 2)]
    frame = pd.DataFrame(rows, columns=["device_id", "device_type", "region", "signal", "start_s", "end_s"])
    replay = replay_from_frame(frame, origin)
    config = load_config(example_path(), ["fleet.devices=50"])
    built = build_signal_tables(config, ("tablet",), ("west-europe",), 8 * DAY)
    tables = dataclasses.replace(built, covers=np.zeros_like(built.covers), has_settled=False)
    signals = ReplaySignals(tables, np.zeros(n, dtype=np.int64), replay)
    bounds = np.concatenate([replay.start, replay.end])
    t = np.concatenate([rng.choice(bounds, 4000), rng.uniform(-DAY, 8 * DAY, 4000)])
    devices = rng.integers(0, n, t.size)
    for chain in range(1, len(SIGNALS) + 1):
        got = signals._on(devices, chain, t)
        line = devices * len(SIGNALS) + chain - 1
        want = np.empty(t.size, dtype=bool)
        for j in range(t.size):
            sel = replay.line == line[j]
            k = np.searchsorted(replay.start[sel], t[j], side="right") - 1
            want[j] = k >= 0 and replay.end[sel][k] > t[j]
        assert np.array_equal(got, want), chain
    paths = signals.paths(devices[:500], t[:500], t[:500] + 6 * 3600.0, draws=None)
    for j in range(500):
        for chain in range(1, len(SIGNALS) + 1):
            sel = replay.line == devices[j] * len(SIGNALS) + chain - 1
            edges = np.stack([replay.start[sel], replay.end[sel]], axis=1).reshape(-1)
            want = edges[(edges > t[j]) & (edges <= t[j] + 6 * 3600.0)]
            got = paths.flips[chain, j][np.isfinite(paths.flips[chain, j])]
            assert np.array_equal(got, want), (j, chain)
