"""Invariants of the round protocol on random small valid fleets (property tests).

Each example is the bundled fleet cut to 200-3,000 devices over one or two simulated hours,
with random check-in period (5 s to 5 min, so collection windows often hold several ticks of
a device), selection policy, over-selection, selection timeout, report deadline, rest and
required signals. Whatever the settings, the log must obey the protocol's rules as
docs/architecture.md and docs/metrics.md state them: a device is in a round at most once and
in one round at a time, no device is accepted while it rests, every accepted device has one
outcome, wasted work is part of the work done, and a committed round holds at least the
minimum reports. Hypothesis draws the examples from a fixed seed (``derandomize``), so a run
is repeatable.
"""

from __future__ import annotations

import numpy as np
import pandas as pd
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

import fleetsim
from fleetsim.config import SIGNALS
from fleetsim.events import OUTCOMES
from fleetsim.policies import BUILTIN_POLICIES

from . import CLASSIC_ROUNDS

EPS = 1e-6  # s; times are sums of floats


@st.composite
def scenarios(draw: st.DrawFn) -> tuple[list[str], int]:
    """Overrides of the bundled fleet file for one small, valid run, and a seed."""
    target = draw(st.integers(3, 40))
    requires = draw(st.lists(st.sampled_from(SIGNALS), unique=True, max_size=len(SIGNALS)))
    overrides = [
        f"fleet.devices={draw(st.integers(200, 3000))}",
        f"horizon.duration={draw(st.sampled_from(['1h', '90m', '2h']))}",
        # Half the examples tick faster than a collection window (20-30 s) is long.
        f"rounds.checkin_every={draw(st.one_of(st.integers(5, 30), st.integers(31, 300)))}s",
        f"selection.policy={draw(st.sampled_from(sorted(BUILTIN_POLICIES)))}",
        f"rounds.target_reports={target}",
        f"rounds.min_reports={draw(st.integers(1, target))}",
        f"rounds.over_selection={draw(st.floats(1.0, 1.8)):.3f}",
        f"rounds.selection_timeout={draw(st.integers(20, 300))}s",
        f"rounds.report_deadline={draw(st.integers(30, 600))}s",
        f"rounds.rest={draw(st.sampled_from([0, 30, 300, 1800, 3600]))}s",
        f"workload.requires=[{', '.join(requires)}]",
        f"workload.min_battery={draw(st.sampled_from([0, 20, 50]))}",
        f"workload.crash_rate={draw(st.sampled_from([0, 0.5, 3]))}",
        # The round protocol's options: when tasks start, pacing, rounds in flight, a work cap.
        f"rounds.configure={draw(st.sampled_from(['at-acceptance', 'after-selection']))}",
        f"rounds.pacing={draw(st.sampled_from(['null', 'null', '{margin: 1.0}', '{margin: 1.5, fill_time: 30s}']))}",
        f"rounds.in_flight={draw(st.integers(1, 3))}",
        f"workload.max_examples={draw(st.sampled_from(['null', 64]))}",
    ]
    return overrides, draw(st.integers(0, 10_000))


def _run(overrides: list[str], seed: int) -> fleetsim.Result:
    return fleetsim.simulate(fleetsim.load_config(fleetsim.example_path(), overrides), seed=seed)


def _check(result: fleetsim.Result) -> None:
    rounds, parts = result.rounds, result.participations
    settings_ = result.config.rounds
    # A device is in a round at most once.
    assert not parts.duplicated(["round", "device"]).any()
    # Never in two rounds at once, and never accepted while resting: a device's next
    # acceptance comes at least `rest` after its previous participation ended.
    ordered = parts.sort_values(["device", "accepted_s"], kind="stable")
    device = ordered["device"].to_numpy()
    same = device[1:] == device[:-1]
    accepted, ended = ordered["accepted_s"].to_numpy(), ordered["ended_s"].to_numpy()
    assert (ended >= accepted - EPS).all()
    assert (accepted[1:][same] >= ended[:-1][same] - EPS).all()
    assert (accepted[1:][same] >= ended[:-1][same] + settings_.rest - EPS).all()
    # Every accepted device has exactly one outcome: accepted = on-time + late + stopped + dropout.
    outcomes = pd.crosstab(parts["round"], parts["outcome"]).reindex(columns=list(OUTCOMES), fill_value=0)
    per_round = outcomes.reindex(rounds["round"], fill_value=0)
    assert (per_round.sum(axis=1).to_numpy() == rounds["accepted"].to_numpy()).all()
    assert (per_round["on-time"].to_numpy() == rounds["reports"].to_numpy()).all()
    assert (rounds["accepted"] <= settings_.accept_count).all()
    # The eligible check-ins seen in a selection include every one it accepted.
    assert (rounds["checkins"] >= rounds["accepted"]).all()
    # Waste is part of the work: per participation and in total.
    assert (parts["compute_s"] <= parts["train_s"] + EPS).all()
    wasted = parts[~parts["used"]]
    for column in ("compute_s", "download_bytes", "upload_bytes", "energy_wh"):
        assert wasted[column].sum() <= parts[column].sum() + EPS
    waste = result.summary["waste"]
    for key in ("compute_fraction", "bytes_fraction", "energy_fraction"):
        assert waste[key] is None or 0.0 <= waste[key] <= 1.0 + 1e-12
    # A committed round holds at least the minimum reports, and uses exactly its reports.
    committed = rounds[rounds["status"] == "committed"]
    assert (committed["reports"] >= settings_.required_reports).all()
    used = parts[parts["used"]].groupby("round").size().reindex(committed["round"], fill_value=0)
    assert (used.to_numpy() == committed["reports"].to_numpy()).all()
    assert set(parts.loc[parts["used"], "round"]) <= set(committed["round"])


@settings(max_examples=50, deadline=None, derandomize=True, suppress_health_check=[HealthCheck.too_slow])
@given(scenarios())
def test_round_protocol_invariants_hold_on_random_small_fleets(scenario: tuple[list[str], int]) -> None:
    overrides, seed = scenario
    _check(_run(overrides, seed))


def test_the_invariant_check_catches_a_device_accepted_twice() -> None:
    # The check itself must be able to fail: a log with one participation repeated in its
    # round is refused (what the engine produced before windows deduplicated ticks).
    result = _run(["fleet.devices=1500", "horizon.duration=1h", "rounds.rest=0s"], 3)
    _check(result)
    parts = result.participations
    result.participations = pd.concat([parts, parts.iloc[[0]]], ignore_index=True)
    try:
        _check(result)
    except AssertionError:
        return
    raise AssertionError("a repeated participation passed the invariant check")


def test_the_invariant_check_catches_an_acceptance_during_rest() -> None:
    result = _run(CLASSIC_ROUNDS + ["fleet.devices=400", "horizon.duration=2h", "rounds.rest=10m"], 4)
    _check(result)
    parts = result.participations.sort_values(["device", "accepted_s"]).reset_index(drop=True)
    again = parts["device"].to_numpy()[1:] == parts["device"].to_numpy()[:-1]
    assert again.any()
    later = int(np.flatnonzero(again)[0]) + 1
    # Move the device's second participation to just after its first one ended (inside the rest).
    shift = parts.loc[later, "accepted_s"] - (parts.loc[later - 1, "ended_s"] + 60.0)
    parts.loc[later, ["accepted_s", "ended_s"]] -= shift
    result.participations = parts
    try:
        _check(result)
    except AssertionError:
        return
    raise AssertionError("an acceptance during the rest period passed the invariant check")


@st.composite
def shared_fleets(draw: st.DrawFn) -> tuple[dict, list[str], int]:
    """Two or three workloads on one small fleet: random requirements, round sizes, rests,
    rounds in flight and sharing rule (the rest as :func:`scenarios` draws it)."""
    overrides, seed = draw(scenarios())
    rule = draw(st.sampled_from(["priority", "shares"]))
    entries = {}
    for i in range(draw(st.integers(2, 3))):
        target = draw(st.integers(3, 30))
        entries[f"w{i}"] = {
            "workload": {"requires": draw(st.lists(st.sampled_from(SIGNALS), unique=True, max_size=len(SIGNALS)))},
            "rounds": {"target_reports": target, "min_reports": draw(st.integers(1, target)),
                       "rest": f"{draw(st.sampled_from([0, 300, 3600]))}s", "in_flight": draw(st.integers(1, 3))},
            **({"share": draw(st.integers(1, 4))} if rule == "shares" else {}),
        }
    return {"workloads": entries, "sharing": {"rule": rule}}, overrides, seed


@settings(max_examples=15, deadline=None, derandomize=True, suppress_health_check=[HealthCheck.too_slow])
@given(shared_fleets())
def test_invariants_hold_for_each_workload_and_across_them(fleet: tuple[dict, list[str], int]) -> None:
    import yaml

    extra, overrides, seed = fleet
    raw = {**yaml.safe_load(fleetsim.example_path().read_text()), **extra}
    result = fleetsim.simulate(fleetsim.build_config(raw, overrides=overrides), seed=seed)
    for part in result.workloads.values():
        _check(part)
    # Across workloads: one round at a time, and the rest of the workload it last took part in.
    rest = {job.name: job.config.rounds.rest for job in result.config.jobs}
    ordered = result.participations.sort_values(["device", "accepted_s"], kind="stable")
    same = ordered["device"].to_numpy()[1:] == ordered["device"].to_numpy()[:-1]
    free = ordered["ended_s"].to_numpy() + ordered["workload"].map(rest).to_numpy(dtype=float)
    assert (ordered["accepted_s"].to_numpy()[1:][same] >= free[:-1][same] - EPS).all()
    rounds = result.rounds.sort_values("opened_s", kind="stable")
    assert (rounds["opened_s"].to_numpy()[1:] >= rounds["selected_s"].to_numpy()[:-1] - EPS).all()
