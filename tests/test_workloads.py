"""Several workloads on one fleet: the file's sections, the selection desk's sharing rules,
the accounting across workloads, the split figures and the run folder."""

from __future__ import annotations

import json

import numpy as np
import pandas as pd
import pytest
import yaml

import fleetsim
from fleetsim.config import build_config, example_path
from fleetsim.errors import ConfigError, FleetsimError
from fleetsim.output import write_run

SMALL = ["fleet.devices=10000", "horizon.duration=1d"]


def raw_example(**extra) -> dict:
    raw = yaml.safe_load(example_path().read_text())
    raw.update(extra)
    return raw


def two(entries: dict, rule: str = "priority", overrides: list[str] | None = None):
    raw = raw_example(workloads=entries, sharing={"rule": rule})
    return build_config(raw, source="two.yaml", overrides=SMALL + (overrides or []))


# ------------------------------------------------------------------------------ the file


def test_entries_merge_key_by_key_over_the_top_level_sections():
    config = two({"ranking": {}, "small": {"workload": {"model_size": "6MB"}, "rounds": {"target_reports": 50,
                                                                                      "min_reports": 40}}})
    ranking, small = config.jobs
    assert (ranking.name, small.name) == ("ranking", "small")
    assert ranking.config.workload == config.workload and ranking.config.rounds == config.rounds
    assert small.config.workload.model_size == 6e6  # SI prefix: 6 x 10^6 bytes (IEC 80000-13)
    # Everything the entry leaves out is the top level's, nested mappings included.
    assert small.config.workload.requires == config.workload.requires
    assert small.config.workload.update_encoding == config.workload.update_encoding
    assert small.config.rounds.pacing == config.rounds.pacing
    assert small.config.rounds.report_deadline == config.rounds.report_deadline
    assert small.config.rounds.target_reports == 50
    assert small.config.workloads is None and small.config.sharing is None


def test_a_workload_naming_another_policy_takes_none_of_the_top_levels_params():
    raw = raw_example(selection={"policy": "quick-finish", "params": {"max_predicted": 300}},
                      workloads={"a": {}, "b": {"selection": {"policy": "lottery"}}})
    a, b = build_config(raw, overrides=SMALL).jobs
    assert a.config.selection.params == {"max_predicted": 300}
    assert b.config.selection.policy == "lottery" and b.config.selection.params == {}


def test_set_reaches_one_workloads_keys():
    config = two({"a": {}, "b": {}}, overrides=["workloads.b.rounds.target_reports=60",
                                                "workloads.b.rounds.min_reports=50"])
    a, b = config.jobs
    assert a.config.rounds.target_reports == 100 and b.config.rounds.target_reports == 60


@pytest.mark.parametrize(("entries", "sharing", "where", "shown"), [
    ({"a": {}, "b": {"rounds": {"checkin_every": "5m"}}}, None, "workloads.b.rounds.checkin_every", "300s"),
    ({"a": {"share": 1}, "b": {}}, {"rule": "shares"}, "workloads.b.share", "shares"),
    ({"a": {"share": 2}, "b": {}}, {"rule": "priority"}, "workloads.a.share", "got 2"),
    ({"a": {}, "b": {"workload": {"model_sise": "6MB"}}}, None, "workloads.b.workload.model_sise", "unknown key"),
    ({"a": {}, "b": {"rounds": {"target_reports": 0}}}, None, "workloads.b.rounds.target_reports", "got 0"),
    ({" ": {}}, None, "workloads", "must not be blank"),
    (None, {"rule": "shares"}, "sharing", "several workloads"),
])
def test_bad_workloads_get_one_line_naming_the_key(entries, sharing, where, shown):
    raw = raw_example()
    if entries is not None:
        raw["workloads"] = entries
    if sharing is not None:
        raw["sharing"] = sharing
    with pytest.raises(ConfigError) as caught:
        build_config(raw, source="two.yaml")
    lines = caught.value.problems
    assert len(lines) == 1, lines
    assert lines[0].startswith(f"two.yaml: {where}: ") and shown in lines[0]


def test_one_listed_workload_runs_exactly_as_the_file_alone():
    alone = fleetsim.simulate(build_config(raw_example(), overrides=SMALL), seed=3)
    listed = fleetsim.simulate(build_config(raw_example(workloads={"only": {}}), overrides=SMALL), seed=3)
    pd.testing.assert_frame_equal(alone.participations, listed.participations)
    pd.testing.assert_frame_equal(alone.rounds, listed.rounds)
    assert listed.config.jobs[0].name == "only"


# ------------------------------------------------------------------------------ accounting


@pytest.fixture(scope="module")
def rivals():
    """Two workloads that want different devices' time: a long rest and a short one."""
    config = two({"ranking": {}, "small": {"workload": {"model_size": "6MB", "requires": ["idle", "charging"]},
                                           "rounds": {"target_reports": 50, "min_reports": 40, "rest": "2h"}}},
                 overrides=["fleet.devices=8000"])
    return fleetsim.simulate(config, seed=5)


def test_no_device_is_in_two_rounds_at_once_and_each_rests_after_any_workload(rivals):
    parts = rivals.participations.sort_values(["device", "accepted_s"], kind="stable")
    rest = {job.name: job.config.rounds.rest for job in rivals.config.jobs}
    device = parts["device"].to_numpy()
    same = device[1:] == device[:-1]
    rested = parts["ended_s"].to_numpy() + parts["workload"].map(rest).to_numpy(dtype=float)
    assert same.sum() > 500  # devices took part more than once, across workloads too
    assert np.all(parts["accepted_s"].to_numpy()[1:][same] >= rested[:-1][same] - 1e-6)
    across = same & (parts["workload"].to_numpy()[1:] != parts["workload"].to_numpy()[:-1])
    assert across.sum() > 100
    assert (parts.groupby(["workload", "round", "device"], observed=True).size() == 1).all()


def test_selections_never_overlap_and_each_workload_numbers_its_rounds(rivals):
    rounds = rivals.rounds.sort_values("opened_s", kind="stable")
    opened, selected = rounds["opened_s"].to_numpy(), rounds["selected_s"].to_numpy()
    assert np.all(opened[1:] >= selected[:-1] - 1e-9)  # one selection at a time
    for _, own in rivals.rounds.groupby("workload", observed=True):
        assert list(own["round"]) == list(range(len(own)))


def test_each_workload_sees_the_same_devices_by_its_own_requirements():
    from fleetsim.engine import STREAMS
    from fleetsim.fleet import sample_fleet, stream
    from fleetsim.runtime import FleetRuntime
    from fleetsim.signals import build_signal_tables

    config = two({"ranking": {}, "light": {"workload": {"requires": ["idle", "charging"], "min_battery": "20%",
                                                        "memory_needed": "1GB"}}},
                 overrides=["fleet.devices=3000"])
    ranking, light = (job.config for job in config.jobs)
    fleet = sample_fleet(config, 0)
    tables = build_signal_tables(config, fleet.type_names, fleet.region_names, 86400.0, 0.0)
    runtime = FleetRuntime(ranking, fleet, tables, {name: stream(0, name) for name in STREAMS})
    view = runtime.for_workload(light)
    assert view.free_at is runtime.free_at and view.signals is runtime.signals  # one fleet
    devices = np.arange(fleet.size)
    for t in (3 * 3600.0, 15 * 3600.0):
        strict = runtime._eligible_probability(devices, t)
        loose = view._eligible_probability(devices, t)
        # Fewer signals, a lower battery floor: the event "eligible" only grows, device by device.
        assert np.all(loose >= strict - 1e-12) and loose.mean() > strict.mean() + 0.01
    assert view.capable.sum() > runtime.capable.sum()  # 1 GB fits more devices than 1.5 GB
    runtime.accept(devices[:10])
    assert np.all(np.isinf(view.free_at[:10]))  # busy for one workload is busy for every one


def test_split_figures_are_each_workloads_own_and_the_competition_adds_up(rivals):
    parts = rivals.participations
    summary = rivals.summary
    for name, part in rivals.workloads.items():
        own = parts[parts["workload"] == name]
        assert part.summary["participations"]["accepted"] == len(own)
        assert summary["workloads"][name]["rounds"] == part.summary["rounds"]
        assert part.summary["rounds"]["attempted"] == int((rivals.rounds["workload"] == name).sum())
    table = rivals.tables["competition_by_device_type"]
    counted = parts.groupby(["device_type", "workload"], observed=True).size()
    for row in table.itertuples():
        assert row.accepted == counted.get((row.device_type, row.workload), 0)
    np.testing.assert_allclose(table.groupby("device_type")["accepted_share"].sum(), 1.0)
    np.testing.assert_allclose(table.groupby("workload")["report_share"].sum(), 1.0)
    by_type = summary["sharing"]["by_device_type"]
    for row in table.itertuples():
        assert by_type[row.device_type][row.workload] == pytest.approx(row.accepted_share)
    several = parts[parts["used"]].groupby("device")["workload"].nunique()
    assert summary["sharing"]["reported_for_several"] == pytest.approx((several > 1).mean())


# ------------------------------------------------------------------------------ sharing rules


def committed(result) -> dict[str, int]:
    return {name: part["rounds"]["committed"] for name, part in result.summary["workloads"].items()}


def test_two_identical_workloads_at_equal_shares_agree_in_rounds_per_hour():
    totals = {"a": 0, "b": 0}
    for seed in range(4):
        result = fleetsim.simulate(two({"a": {"share": 1}, "b": {"share": 1}}, "shares"), seed=seed)
        for name, count in committed(result).items():
            totals[name] += count
    a, b = totals["a"], totals["b"]
    assert a + b > 200
    # Counts of rare events: the difference of two equal-rate counts has sd about sqrt(a + b)
    # (Poisson, from memory); three sd bound it.
    assert abs(a - b) <= 3 * np.sqrt(a + b)


BACKLOG = ["rounds.in_flight=64", "rounds.rest=0s"]  # every workload wants the desk all the time


@pytest.mark.parametrize("weights", [(3, 1), (1, 1)])
def test_shares_split_the_desk_in_proportion_when_every_workload_wants_it(weights):
    config = two({"a": {"share": weights[0]}, "b": {"share": weights[1]}}, "shares",
                 overrides=BACKLOG + ["horizon.duration=12h"])
    desk = fleetsim.simulate(config, seed=2).summary["sharing"]["desk_share"]
    # Weighted fair sharing of a busy resource serves each in proportion to its weight.
    assert desk["a"] / desk["b"] == pytest.approx(weights[0] / weights[1], rel=0.15)


def test_priority_serves_the_first_workload_first():
    config = two({"a": {}, "b": {}}, "priority", overrides=BACKLOG + ["horizon.duration=12h"])
    result = fleetsim.simulate(config, seed=2)
    desk = result.summary["sharing"]["desk_share"]
    counts = committed(result)
    assert desk["a"] > 2 * desk["b"] and counts["a"] > 2 * counts["b"]


# ------------------------------------------------------------------------------ run folder


def test_the_run_folder_holds_one_run_folder_per_workload(rivals, tmp_path):
    out = write_run(rivals, tmp_path / "run")
    top = json.loads((out / "summary.json").read_text())
    assert top["sharing"]["workloads"] == ["ranking", "small"]
    for name, part in rivals.workloads.items():
        folder = out / "workloads" / name
        assert json.loads((folder / "summary.json").read_text()) == json.loads(json.dumps(part.summary))
        events = pd.read_parquet(folder / "events.parquet")
        assert len(events) == part.summary["participations"]["accepted"]
        assert (folder / "tables" / "bias_by_device_type.csv").is_file()
    assert set(pd.read_parquet(out / "events.parquet")["workload"]) == {"ranking", "small"}
    write_run(rivals, out, force=True)  # a run folder of several workloads is fleetsim's own
    (out / "workloads" / "small" / "notes.txt").write_text("mine")
    with pytest.raises(FleetsimError, match="workloads/small/notes.txt"):
        write_run(rivals, out, force=True)
    assert (out / "workloads" / "small" / "notes.txt").read_text() == "mine"


def test_the_two_model_example_shares_the_examples_fleet_and_protocol():
    from pathlib import Path

    path = Path(__file__).parents[1] / "fleets" / "inkwren-two-models.yaml"
    two_models = yaml.safe_load(path.read_text())
    one = raw_example()
    for section in ("horizon", "fleet", "workload", "rounds", "selection"):
        assert two_models[section] == one[section], section
    config = build_config(two_models, source=str(path))
    assert [job.name for job in config.jobs] == ["ranking", "highlights"]
    assert config.jobs[0].config.workload == build_config(one).workload
