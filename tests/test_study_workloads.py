"""Studies of a fleet file of several workloads: columns per workload, totals, defaults, settings.

Tiny fleets (2,000 devices for 4 simulated hours, rounds of 20 reports, rest 30 minutes, up to
4 rounds in flight) keep each run near a second. The expectations come from the documented
round protocol (docs/fleet-file.md, ``rounds``), the desk's sharing rule (fleetsim/desk.py)
and the definitions in docs/studies.md, each named where it is used.
"""

from __future__ import annotations

import json
import math

import numpy as np
import pandas as pd
import pytest
from typer.testing import CliRunner

import fleetsim
from fleetsim.cli import app
from fleetsim.config import load_config
from fleetsim.errors import ConfigError
from fleetsim.study import (
    DEFAULT_OBJECTIVE,
    DEFAULT_OBJECTIVE_SEVERAL,
    PARETO_OBJECTIVES_SEVERAL,
    Arm,
    FleetFile,
    InProcess,
    default_objective,
    direction_of,
    dominates,
    flatten_summary,
    parse_axis,
    resolve_metric,
    run_compare,
    run_sweep,
    workload_prefixes,
    write_sweep,
)
from fleetsim.study.table import absent_is_zero, frame_of_rows

WORKLOADS = ("workloads={ranking: {}, typing: {workload: {model_size: 8MB, requires: [idle, charging]}, "
             "rounds: {target_reports: 12}}}")
TINY = ["fleet.devices=2000", "horizon.duration=4h", "rounds.target_reports=20", "rounds.min_reports=15",
        "rounds.rest=30m", "rounds.in_flight=4", "rounds.pacing=null", WORKLOADS,
        "workloads.typing.rounds.min_reports=8"]
CLI_TINY = [arg for item in TINY for arg in ("--set", item)]
SEEDS = [0, 1]
TYPING_TARGETS = (8, 16)
NAMES = ("ranking", "typing")
HEADER = {"scenario", "fleet_file", "seed", "config_hash", "policy", "devices", "horizon_start", "simulated_hours",
          "replay"}
"""The header keys of a summary, which a workload's part of a run of several leaves out."""


def committed(name: str) -> str:
    return f"workloads_{name}_rounds_committed_per_hour"


@pytest.fixture(scope="module")
def run():
    """One run of the two workloads (seed 0) and its flattened row."""
    result = fleetsim.simulate(load_config(fleetsim.example_path(), TINY), seed=0)
    return result, flatten_summary(result.summary)


@pytest.fixture(scope="module")
def swept(tmp_path_factory):
    """A sweep over the typing workload's target: 2 cells x 2 seeds, written to a folder."""
    folder = tmp_path_factory.mktemp("sweep")
    axis = parse_axis(f"workloads.typing.rounds.target_reports={','.join(map(str, TYPING_TARGETS))}")
    result = run_sweep(FleetFile.read(fleetsim.example_path(), TINY), [axis], SEEDS, executor=InProcess(),
                       folder=folder)
    write_sweep(result, folder)
    return result, folder


# ------------------------------------------------------------------------------ columns


def test_each_workloads_columns_are_its_own_summary_figures(run):
    """Every column of a workload's own single-workload summary (derived ones included) is in
    the row of the run under workloads_<name>_, with the same value."""
    result, flat = run
    for name in NAMES:
        own = flatten_summary(result.workloads[name].summary)
        figures = {c: v for c, v in own.items() if c not in HEADER}
        assert len(figures) > 200
        for column, value in figures.items():
            got = flat[f"workloads_{name}_{column}"]
            if isinstance(value, float) and math.isnan(value):
                assert isinstance(got, float) and math.isnan(got), column
            else:
                assert got == value, column
    assert not any(c.startswith(("rounds_", "waste_", "bias_")) for c in flat)  # nothing left unprefixed
    for name in NAMES:
        assert flat[f"sharing_desk_share_{name}"] == result.summary["sharing"]["desk_share"][name]
    assert flat["sharing_rule"] == "priority"


def test_worst_representation_per_workload_and_the_totals(run):
    """docs/studies.md: per workload min over types of min(r, 1/r); totals: the sum of committed
    rounds per hour, the largest compute waste fraction, the smallest worst representation."""
    result, flat = run
    parts = result.summary["workloads"]
    worst = {}
    for name in NAMES:
        ratios = {t: v["representation_ratio"] for t, v in parts[name]["bias"]["by_device_type"].items()}
        closeness = {t: min(r, 1 / r) if r > 0 else 0.0 for t, r in ratios.items()}
        kind = min(closeness, key=closeness.__getitem__)
        worst[name] = closeness[kind]
        assert flat[f"workloads_{name}_study_worst_representation"] == pytest.approx(closeness[kind], rel=1e-12)
        assert flat[f"workloads_{name}_study_worst_representation_type"] == kind
    assert flat["study_rounds_committed_per_hour"] == pytest.approx(
        sum(parts[n]["rounds"]["committed_per_hour"] for n in NAMES), rel=1e-12)
    waste = {n: parts[n]["waste"]["compute_fraction"] for n in NAMES}
    assert flat["study_worst_waste_compute_fraction"] == max(waste.values())
    assert flat["study_worst_waste_compute_fraction_workload"] == max(waste, key=waste.__getitem__)
    lowest = min(worst, key=worst.__getitem__)
    assert flat["study_worst_representation"] == pytest.approx(worst[lowest], rel=1e-12)
    assert flat["study_worst_representation_workload"] == lowest
    assert flat["study_worst_representation_type"] == flat[f"workloads_{lowest}_study_worst_representation_type"]


def test_a_total_is_undefined_when_a_workloads_figure_is(run):
    result, _ = run
    summary = json.loads(json.dumps(result.summary))
    summary["workloads"]["typing"]["waste"]["compute_fraction"] = None
    summary["workloads"]["ranking"]["bias"]["by_device_type"]["tablet"]["representation_ratio"] = None
    flat = flatten_summary(summary)
    assert math.isnan(flat["study_worst_waste_compute_fraction"])
    assert flat["study_worst_waste_compute_fraction_workload"] is None
    assert math.isnan(flat["workloads_ranking_study_worst_representation"])
    assert math.isnan(flat["study_worst_representation"]) and flat["study_worst_representation_workload"] is None
    assert math.isfinite(flat["workloads_typing_study_worst_representation"])


def test_counts_a_workload_did_not_see_are_zero(run):
    """docs/studies.md: counts by cause or outcome a run did not see are 0, per workload too."""
    _, flat = run
    count = next(c for c in flat if c.startswith("workloads_typing_participations_dropouts_by_cause_"))
    other = "workloads_typing_rounds_duration_s_p50"
    missing = {c: v for c, v in flat.items() if c not in (count, other)}
    frame = frame_of_rows([flat, missing])
    assert frame.at[1, count] == 0 and frame.at[0, count] == flat[count]
    assert math.isnan(frame.at[1, other])
    unseen = "workloads_typing_participations_dropouts_by_cause_battery_low"
    columns = [c for c in flat if c != unseen]  # as if no run had seen it
    assert absent_is_zero("workloads_ranking_participations_dropouts_by_cause_battery_low", columns)
    assert absent_is_zero("workloads_ranking_waste_by_cause_crash_compute_s", columns)
    assert not absent_is_zero("workloads_ranking_waste_by_cause_crash_no_such_figure", columns)
    assert not absent_is_zero("workloads_nosuch_participations_dropouts_by_cause_battery_low", columns)
    assert resolve_metric(unseen, columns, "--limit", absent_zero=True) == unseen


def test_a_workloads_column_has_the_direction_of_its_own(run):
    """docs/studies.md: a workload's column is judged as the same column of one workload, also
    when the workload's name holds a pattern's first word."""
    result, flat = run
    own = flatten_summary(result.workloads["ranking"].summary)
    prefixes = workload_prefixes(flat)
    assert prefixes == ["workloads_ranking_", "workloads_typing_"]
    judged = [c for c in own if c not in HEADER]
    for column in judged:
        assert direction_of(f"workloads_ranking_{column}", prefixes) == direction_of(column), column
        assert direction_of(f"workloads_ranking_{column}") == direction_of(column), column
    odd = ["workloads_x_waste_study_worst_representation"]
    for column in ("bias_by_device_type_tablet_report_share", "rounds_committed", "bias_gini"):
        assert direction_of(f"workloads_x_waste_{column}", workload_prefixes(odd)) == direction_of(column)
    assert {direction_of(c) for c in ("sharing_desk_share_ranking", "sharing_reported_for_several")} == {None}
    assert [direction_of(m) for m, _ in PARETO_OBJECTIVES_SEVERAL] == ["higher", "lower", "higher"]


# ------------------------------------------------------------------------------ sweep


def test_a_sweep_axis_on_a_workload_key_changes_that_workload_only(swept):
    """docs/fleet-file.md: a round accepts ceil(target_reports x over_selection) check-ins and
    commits with min_reports to target_reports reports (it closes at the target). The typing
    target is varied, min_reports 8 set by --set workloads.typing.rounds.min_reports=8."""
    result, _ = swept
    runs = result.runs
    column = "setting_workloads_typing_rounds_target_reports"
    assert sorted(runs[column].unique()) == list(TYPING_TARGETS)
    assert [c.label for c in result.grid] == [f"target_reports={t}" for t in TYPING_TARGETS]
    for config, target in zip(result.configs, TYPING_TARGETS, strict=True):
        jobs = {job.name: job.config.rounds for job in config.jobs}
        assert (jobs["typing"].target_reports, jobs["typing"].min_reports) == (target, 8)
        assert (jobs["ranking"].target_reports, jobs["ranking"].min_reports) == (20, 15)
    over = result.configs[0].rounds.over_selection
    for _, row in runs.iterrows():
        for name, low, high in (("typing", 8, row[column]), ("ranking", 15, 20)):
            p = f"workloads_{name}_"
            used = row[p + "participations_used_reports"] / row[p + "rounds_committed"]
            assert low <= used <= high, (name, row[column])
            assert row[p + "participations_accepted"] / row[p + "rounds_attempted"] <= math.ceil(high * over)
    per_round = runs.groupby(column).apply(
        lambda g: (g["workloads_typing_participations_used_reports"] / g["workloads_typing_rounds_committed"]).mean(),
        include_groups=False)
    assert per_round[8] == 8 and per_round[16] > 12  # min = target = 8 uses exactly 8 reports


def test_the_sweeps_recommendation_maximises_the_summed_throughput(swept):
    """docs/studies.md: the default objective of several workloads is the sum of their
    committed rounds per hour, and the front is built on the three totals."""
    result, _ = swept
    assert result.workloads == list(NAMES) and result.objectives == PARETO_OBJECTIVES_SEVERAL
    rec = result.recommendation
    assert rec.objective == DEFAULT_OBJECTIVE_SEVERAL == default_objective(NAMES)
    assert default_objective([]) == DEFAULT_OBJECTIVE
    runs = result.runs
    total = runs[committed("ranking")] + runs[committed("typing")]
    np.testing.assert_allclose(runs["study_rounds_committed_per_hour"], total, rtol=1e-12)
    means = total.groupby(runs["cell"]).mean()
    assert rec.cell == int(means.idxmax())
    assert rec.value.mean == pytest.approx(means.max(), rel=1e-12)
    # The front by brute force on the totals computed here from each workload's columns.
    by_cell = runs.assign(
        total=total,
        waste=runs[["workloads_ranking_waste_compute_fraction", "workloads_typing_waste_compute_fraction"]].max(axis=1),
        rep=runs[["workloads_ranking_study_worst_representation",
                  "workloads_typing_study_worst_representation"]].min(axis=1),
    ).groupby("cell")[["total", "waste", "rep"]].mean()
    points = by_cell.to_numpy()
    expected = [int(c) for i, c in enumerate(by_cell.index)
                if not any(dominates(points[j], points[i], [True, False, True]) for j in range(len(points)) if j != i)]
    assert result.front == expected


def test_the_sweep_folder_splits_figures_by_workload(swept):
    result, folder = swept
    front = pd.read_csv(folder / "front.csv")
    for name in NAMES:
        for figure in ("rounds_committed_per_hour", "waste_compute_fraction", "study_worst_representation"):
            assert f"workloads_{name}_{figure}_mean" in front.columns
        assert (folder / "heatmaps" / f"workloads_{name}_rounds_committed_per_hour.png").is_file()
    means = result.cell_means.set_index(["cell", "metric"])["mean"]
    assert list(front[f"{committed('typing')}_mean"]) == [means[c, committed("typing")] for c in front["cell"]]
    record = json.loads((folder / "study.json").read_text())
    assert record["workloads"] == list(NAMES)
    assert [o["metric"] for o in record["pareto_objectives"]] == [m for m, _ in PARETO_OBJECTIVES_SEVERAL]
    text = (folder / "study.md").read_text()
    assert "the recommended cell by workload" in text and "\n    typing: " in text
    assert "caution: These figures come from a model" in text


def _sweep_args(folder, *extra):
    targets = ",".join(map(str, TYPING_TARGETS))
    return ["sweep", *CLI_TINY, "--vary", f"workloads.typing.rounds.target_reports={targets}",
            "--seeds", str(len(SEEDS)), "--out", str(folder), "--workers", "1", *extra]


def test_sweep_command_names_the_objective_a_user_gives(swept):
    """The same sweep from the command line reuses every run; the default objective is the sum,
    a short name matching one column per workload is refused listing them, and a workload's
    own column is followed (typing's used reports favour its larger target)."""
    result, folder = swept
    runner = CliRunner()
    default = runner.invoke(app, _sweep_args(folder))
    assert default.exit_code == 0, default.output
    assert f"0 run now, {2 * len(SEEDS)} reused" in default.stdout
    assert "recommendation (maximise study_rounds_committed_per_hour):" in default.stdout
    assert f"\n  {result.recommendation.label}\n" in default.stdout
    refused = runner.invoke(app, _sweep_args(folder, "--maximise", "committed_per_hour"))
    assert refused.exit_code == 2
    assert refused.stderr.strip() == (
        "error: --maximise committed_per_hour: matches several metrics (workloads_ranking_rounds_committed_per_hour, "
        "workloads_typing_rounds_committed_per_hour, study_rounds_committed_per_hour); give the full name")
    own = "workloads_typing_participations_used_reports"
    chosen = runner.invoke(app, _sweep_args(folder, "--maximise", own))
    assert chosen.exit_code == 0, chosen.output
    means = result.runs.groupby("label")[own].mean()
    assert means["target_reports=16"] > means["target_reports=8"]
    assert f"recommendation (maximise {own}):\n  target_reports=16\n" in chosen.stdout


def test_cells_that_train_different_workloads_are_refused():
    base = FleetFile.read(fleetsim.example_path(), TINY)
    with pytest.raises(ConfigError) as info:
        run_sweep(base, [parse_axis("workloads={a: {}, b: {}},{a: {}, c: {}}")], [0], executor=InProcess())
    (line,) = info.value.problems
    assert line.startswith("--vary cell workloads=") and "(workloads={'a': {}, 'b': {}}: a, b;" in line
    with pytest.raises(ConfigError) as info:
        run_sweep(base, [parse_axis("workloads.typing.selection.policy=lottery,no-such-policy")], [0])
    assert "workloads.typing.selection.policy: unknown policy 'no-such-policy'" in info.value.problems[0]


# ------------------------------------------------------------------------------ compare


def test_compare_of_two_sharing_rules(tmp_path):
    """fleetsim/desk.py: under shares each workload holds the desk in proportion to its share
    whenever they all want it (here four rounds in flight keep both wanting it), while priority
    gives the first workload the desk first. Typing's share 9 of 10 must move the desk, and with
    it each workload's committed rounds, judged in each workload's own direction."""
    out = tmp_path / "sharing"
    args = ["compare", *CLI_TINY, "--seeds", "3", "--workers", "1", "--out", str(out),
            "--baseline", "sharing.rule=priority", "--candidate", "sharing.rule=shares",
            "--candidate", "workloads.ranking.share=1", "--candidate", "workloads.typing.share=9"]
    result = CliRunner().invoke(app, args)
    assert result.exit_code == 0, result.output
    runs = pd.read_parquet(out / "runs.parquet").set_index(["arm", "seed"])
    part = runs["sharing_desk_share_typing"] / (runs["sharing_desk_share_typing"] + runs["sharing_desk_share_ranking"])
    assert set(runs.loc["baseline", "sharing_rule"]) == {"priority"}
    assert set(runs.loc["candidate", "sharing_rule"]) == {"shares"}
    assert (runs.loc["candidate", "sharing_shares_typing"] == 0.9).all()
    assert (part["candidate"] - 0.9).abs().max() < 0.06 and abs(part["candidate"].mean() - 0.9) < 0.03
    assert part["baseline"].max() < 0.2
    d = pd.read_parquet(out / "differences.parquet").set_index("metric")
    assert d.at["sharing_desk_share_typing", "verdict"] == "higher"
    assert d.at[committed("typing"), "verdict"] == "better"
    assert d.at[committed("ranking"), "verdict"] == "worse"
    assert d.at["workloads_ranking_waste_compute_fraction", "direction"] == "lower"
    assert d.at["workloads_typing_bias_by_device_type_tablet_representation_ratio", "direction"] == "closer-to-1"
    record = json.loads((out / "comparison.json").read_text())
    assert record["workloads"] == list(NAMES)
    assert record["arms"][1]["settings"] == ["sharing.rule=shares", "workloads.ranking.share=1",
                                             "workloads.typing.share=9"]
    for name in NAMES:
        assert f"  workload {name} (workloads_{name}_<column>):" in result.stdout
    assert "  tablet: representation_ratio" in result.stdout
    assert "caution: These figures come from a model" in result.stdout


def test_arms_that_train_different_workloads_are_refused():
    base = FleetFile.read(fleetsim.example_path(), TINY)
    with pytest.raises(ConfigError) as info:
        run_compare(base, Arm("baseline", ()), Arm("candidate", ("workloads.extra.workload.model_size=4MB",)), [0])
    assert info.value.problems == [
        "--candidate workloads.extra.workload.model_size=4MB: the arms train different workloads (baseline: "
        "ranking, typing; candidate: ranking, typing, extra); a comparison pairs each workload's figures, so both "
        "arms need the same workloads"]
    with pytest.raises(ConfigError) as info:
        run_compare(base, Arm("baseline", ()), Arm("candidate", ("sharing.rule=shares",)), [0])
    assert "workloads.ranking.share: sharing.rule is shares" in info.value.problems[0]
