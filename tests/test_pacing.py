"""Pacing (stretch, hold) and pipelined rounds (in_flight), on cut-down copies of the example."""

from __future__ import annotations

import numpy as np
import pytest

import fleetsim
from fleetsim.config import example_path, load_config


def run(*overrides: str, seed: int = 0):
    return fleetsim.simulate(load_config(example_path(), list(overrides)), seed=seed)


def no_overlap(result) -> None:
    """Invariants across rounds: a device is in one round at a time and rests after each."""
    parts = result.participations.sort_values(["device", "accepted_s"])
    device = parts["device"].to_numpy()
    same = device[1:] == device[:-1]
    start = parts["accepted_s"].to_numpy()[1:][same]
    previous_end = parts["ended_s"].to_numpy()[:-1][same]
    assert np.all(start >= previous_end + result.config.rounds.rest - 1e-6)
    pairs = parts.groupby(["round", "device"]).size()
    assert (pairs == 1).all()


# ------------------------------------------------------------------------------ pipelining

SPARE = ["fleet.devices=100000", "horizon.duration=8h", "rounds.rest=0s", "rounds.pacing=null"]


@pytest.fixture(scope="module")
def pipelined():
    return {flight: run(*SPARE, f"rounds.in_flight={flight}") for flight in (1, 2)}


def test_pipelining_raises_committed_rounds_on_a_fleet_with_spare_supply(pipelined):
    # With devices to spare the report phase is what a round waits for; a second round in
    # flight overlaps it. Each run commits a few hundred rounds, so a rise of a quarter is far
    # beyond the seed-to-seed spread of committed counts (a few per cent here).
    one, two = (int((pipelined[k].rounds["status"] == "committed").sum()) for k in (1, 2))
    assert two >= 1.25 * one, (one, two)


def test_pipelined_rounds_overlap_yet_keep_every_accounting_rule(pipelined):
    result = pipelined[2]
    rounds = result.rounds.sort_values("opened_s")
    # The next round opens when the previous selection ends, before that round has closed.
    opened = rounds["opened_s"].to_numpy()
    assert np.any(opened[1:] < rounds["closed_s"].to_numpy()[:-1])
    # Never more than two rounds open at once.
    edges = np.concatenate([np.c_[opened, np.ones(len(rounds))],
                            np.c_[rounds["ended_s"].to_numpy() + result.config.rounds.aggregation_time,
                                  -np.ones(len(rounds))]])
    edges = edges[np.lexsort((edges[:, 1], edges[:, 0]))]
    assert np.cumsum(edges[:, 1]).max() <= 2
    no_overlap(result)
    no_overlap(pipelined[1])


# ------------------------------------------------------------------------------ pacing

def test_the_stretch_keeps_a_paced_device_to_every_mth_tick():
    config = load_config(example_path(), ["fleet.devices=2000", "horizon.duration=1h"])
    from fleetsim.engine import STREAMS
    from fleetsim.fleet import sample_fleet, stream
    from fleetsim.runtime import FleetRuntime
    from fleetsim.signals import build_signal_tables

    fleet = sample_fleet(config, 0)
    tables = build_signal_tables(config, fleet.type_names, fleet.region_names, 7200.0, 0.0)
    runtime = FleetRuntime(config, fleet, tables, {name: stream(0, name) for name in STREAMS})
    period = config.rounds.checkin_every
    all_devices, _ = runtime.free_ticks(0.0, 4 * period)
    runtime.stretch = 4
    devices, times = runtime.free_ticks(0.0, 4 * period)
    # Over four periods each device (whose memory fits) ticks four times and, at stretch 4,
    # may check in at one of them.
    capable = np.flatnonzero(runtime.capable)
    assert all_devices.size == 4 * capable.size
    assert np.array_equal(np.sort(devices), capable)
    k = np.rint((times - fleet.checkin_phase_s[devices]) / period).astype(np.int64)
    assert np.all((k + runtime.pace_offset[devices]) % 4 == 0)


@pytest.fixture(scope="module")
def crowded():
    # A large fleet checks in far faster than rounds need: the paced server stretches.
    sets = ["fleet.devices=300000", "horizon.duration=6h"]
    return run(*sets), run(*sets, "rounds.pacing=null")


def test_a_crowded_fleet_is_stretched_and_meets_fewer_checkins_per_round(crowded):
    paced, unpaced = crowded
    assert paced.rounds["stretch"].median() >= 5
    assert (unpaced.rounds["stretch"] == 1).all()
    # Rounds still fill: the stretch asks for margin x accepted / fill_time check-ins a second.
    assert (paced.rounds["status"] == "committed").mean() >= 0.95
    per_round = paced.rounds["checkins"].mean(), unpaced.rounds["checkins"].mean()
    assert per_round[0] <= per_round[1]
    no_overlap(paced)


def test_a_drained_fleet_holds_rounds_instead_of_abandoning_them():
    # 20,000 devices resting a day: supply runs short, and unpaced rounds end at the selection
    # timeout; the paced server holds instead (same seed, same fleet).
    sets = ["fleet.devices=20000", "horizon.duration=1d"]
    paced, unpaced = run(*sets), run(*sets, "rounds.pacing=null")
    timeouts = [int((r.rounds["status"] == "selection-timeout").sum()) for r in (paced, unpaced)]
    assert paced.rounds["held_s"].sum() > 3600
    assert timeouts[0] < 0.5 * timeouts[1], timeouts
    assert (unpaced.rounds["held_s"] == 0).all()
