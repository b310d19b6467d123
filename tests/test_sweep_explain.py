"""Sweeps that explain: the edge of the grid, the derived objectives, the worst group over
every grouping, the mechanism behind a recommendation and the frontier's limits.

The rules are those of docs/studies.md ("Derived columns", "The edge of the grid", "Why");
each test checks them against figures computed here from the definitions in docs/metrics.md
and the event log, or against a known injected cause. Tiny fleets (1,500 devices for 8
simulated hours, rounds of 20 reports) keep each run near a second.
"""

from __future__ import annotations

import json
import math

import numpy as np
import pandas as pd
import pytest
from scipy import stats
from typer.testing import CliRunner

import fleetsim
from fleetsim.cli import app
from fleetsim.config import load_config
from fleetsim.study import (
    FleetFile,
    InProcess,
    Objective,
    flatten_summary,
    grid_cells,
    parse_axis,
    parse_limit,
    run_sweep,
    write_sweep,
)
from fleetsim.study.sweep import edge_warnings
from fleetsim.study.table import (
    ABANDONED_SHARE,
    FAILED_SHARE,
    USED_EXAMPLES_PER_HOUR,
    USED_REPORTS_PER_HOUR,
    WEIGHT_PER_HOUR,
    WORST_GROUP,
    WORST_GROUP_GROUPING,
    WORST_GROUP_NAME,
    WORST_GROUP_WORKLOAD,
    WORST_REPRESENTATION,
    direction_of,
)

TINY = ["fleet.devices=1500", "horizon.duration=8h", "rounds.target_reports=20", "rounds.min_reports=15"]
CLI_TINY = [arg for item in TINY for arg in ("--set", item)]
SEEDS = [0, 1]
AXIS = "rounds.over_selection=1.1,1.5"
LIMIT = "waste_compute_fraction<=0.9"


def tiny_base() -> FleetFile:
    return FleetFile.read(fleetsim.example_path(), TINY)


def t_interval(values: np.ndarray) -> tuple[float, float, float]:
    """Mean and 95% Student t interval, from scipy.stats (not the study's own statistics)."""
    mean = float(np.mean(values))
    half = float(stats.t.ppf(0.975, len(values) - 1) * np.std(values, ddof=1) / math.sqrt(len(values)))
    return mean, mean - half, mean + half


@pytest.fixture(scope="module")
def swept(tmp_path_factory):
    """A sweep of 2 cells x 2 seeds, run here and written to a folder."""
    folder = tmp_path_factory.mktemp("explain")
    result = run_sweep(tiny_base(), [parse_axis(AXIS)], SEEDS, limits=[parse_limit(LIMIT)], executor=InProcess(),
                       folder=folder)
    write_sweep(result, folder, heatmaps=[])
    return result, folder


# ------------------------------------------------------------------------------ the edge of the grid


def constructed(base: FleetFile, texts: list[str], objective: dict[tuple, list[float]]):
    """Axes, cells, per-cell means and a per-run table whose objective ``score`` is given per
    cell (by its values, in axis order) and per seed."""
    axes = [parse_axis(text) for text in texts]
    grid = [cell for cell, _ in grid_cells(base, axes)]
    rows = [{"cell": c.index, "label": c.label, "seed": s, "score": objective[tuple(v for _, v in c.settings)][i]}
            for c in grid for i, s in enumerate(SEEDS)]
    runs = pd.DataFrame(rows)
    cells = runs.groupby(["cell", "label"], as_index=False)["score"].mean()
    return axes, grid, cells, runs


def best(cells: pd.DataFrame, maximise: bool = True) -> int:
    column = cells["score"] if maximise else -cells["score"]
    return int(cells.loc[column.idxmax(), "cell"])


def test_edge_warning_fires_where_more_over_selection_is_still_better():
    base = tiny_base()
    scores = {(1.1,): [1.0, 1.2], (1.3,): [2.0, 2.1], (1.5,): [2.6, 3.0]}
    axes, grid, cells, runs = constructed(base, ["rounds.over_selection=1.1,1.3,1.5"], scores)
    (edge,) = edge_warnings(base, axes, grid, cells, runs, Objective("score"), best(cells))
    assert (edge.key, edge.side, edge.value, edge.neighbour) == ("rounds.over_selection", "largest", 1.5, 1.3)
    assert edge.extension == pytest.approx(1.7) and edge.problem is None
    assert edge.vary == "--vary rounds.over_selection=1.1,1.3,1.5,1.7"
    mean, low, high = t_interval(np.array([2.6 - 2.0, 3.0 - 2.1]))  # paired gain per seed
    assert (edge.gain.mean, edge.gain.low, edge.gain.high) == pytest.approx((mean, low, high))
    assert (edge.value_mean, edge.neighbour_mean) == pytest.approx((2.8, 2.05))
    assert "extend it with --vary rounds.over_selection=1.1,1.3,1.5,1.7" in edge.text


def test_no_edge_warning_inside_the_grid_or_without_improvement():
    base = tiny_base()
    peaked = {(1.1,): [1.0, 1.0], (1.3,): [3.0, 3.0], (1.5,): [2.0, 2.0]}
    axes, grid, cells, runs = constructed(base, ["rounds.over_selection=1.1,1.3,1.5"], peaked)
    assert edge_warnings(base, axes, grid, cells, runs, Objective("score"), best(cells)) == []
    tie = {(1.1,): [2.0, 2.0], (1.5,): [2.0, 2.0]}  # two values, neither better: nothing to extend
    axes, grid, cells, runs = constructed(base, ["rounds.over_selection=1.1,1.5"], tie)
    assert edge_warnings(base, axes, grid, cells, runs, Objective("score"), 0) == []
    # The chosen cell is worse than its neighbour (which a limit ruled out): no improvement.
    assert edge_warnings(base, axes, grid, cells, runs, Objective("score"), 1) == []
    names = {("first-come",): [1.0, 1.0], ("lottery",): [2.0, 2.0]}  # names have no order, so no edge
    axes, grid, cells, runs = constructed(base, ["selection.policy=first-come,lottery"], names)
    assert edge_warnings(base, axes, grid, cells, runs, Objective("score"), 1) == []


def test_edge_at_the_keys_bound_is_a_note_naming_the_problem():
    """docs/fleet-file.md: over_selection is at least 1, so 1.0 - 0.2 cannot be tried."""
    base = tiny_base()
    scores = {(1.0,): [3.0, 3.2], (1.2,): [2.0, 2.4]}
    axes, grid, cells, runs = constructed(base, ["rounds.over_selection=1.0,1.2"], scores)
    (edge,) = edge_warnings(base, axes, grid, cells, runs, Objective("score"), best(cells))
    assert edge.side == "smallest" and edge.extension == pytest.approx(0.8) and edge.vary is None
    assert "rounds.over_selection" in edge.problem and "0.8" in edge.problem


def test_edge_holds_the_other_axes_and_follows_the_step_pattern():
    base = tiny_base()
    # The recommendation (1.5, 4m): along over_selection at 4m the score rises to the edge;
    # along the deadline at 1.5 it falls from 4m to 6m, so 4m, the smallest, is an edge too.
    scores = {(1.1, "4m"): [1.0, 1.0], (1.1, "6m"): [5.0, 5.0], (1.3, "4m"): [2.0, 2.2], (1.3, "6m"): [4.0, 4.0],
              (1.5, "4m"): [3.0, 3.4], (1.5, "6m"): [0.5, 0.5]}
    axes, grid, cells, runs = constructed(base, ["rounds.over_selection=1.1,1.3,1.5",
                                                 "rounds.report_deadline=4m,6m"], scores)
    chosen = next(c.index for c in grid if dict(c.settings) == {"rounds.over_selection": 1.5,
                                                                  "rounds.report_deadline": "4m"})
    edges = edge_warnings(base, axes, grid, cells, runs, Objective("score"), chosen)
    assert [(e.key, e.side, e.neighbour) for e in edges] == [("rounds.over_selection", "largest", 1.3),
                                                             ("rounds.report_deadline", "smallest", "6m")]
    assert edges[0].neighbour_mean == pytest.approx(2.1)  # the cell (1.3, 4m), not (1.3, 6m)
    assert edges[1].vary == "--vary rounds.report_deadline=2m,4m,6m"
    # Geometric values extend by their ratio; a minimised objective improves downwards.
    doubling = {(20,): [9.0, 9.0], (40,): [5.0, 5.0], (80,): [1.0, 1.2]}
    axes, grid, cells, runs = constructed(base, ["rounds.target_reports=20,40,80"], doubling)
    (edge,) = edge_warnings(base, axes, grid, cells, runs, Objective("score", maximise=False),
                            best(cells, maximise=False))
    assert edge.extension == 160 and isinstance(edge.extension, int)
    assert edge.vary == "--vary rounds.target_reports=20,40,80,160"


def test_the_sweeps_edges_are_the_rule_read_from_its_table(swept):
    result, folder = swept
    means = result.runs.groupby("cell")[result.recommendation.objective.metric].mean()
    rec = result.recommendation.cell
    other = 1 - rec
    improves = means[rec] > means[other]
    assert [e.side for e in result.edges] == ([("largest" if rec == 1 else "smallest")] if improves else [])
    record = json.loads((folder / "study.json").read_text())
    assert [e["text"] for e in record["edges"]] == [e.text for e in result.edges]


# ------------------------------------------------------------------------------ derived columns


def test_new_objectives_equal_the_event_log():
    """docs/metrics.md: a used report is a participation with ``used``; examples processed are
    the event log's ``examples_processed``; abandoned rounds have status selection-timeout."""
    config = load_config(fleetsim.example_path(), TINY)
    result = fleetsim.simulate(config, seed=0)
    flat = flatten_summary(result.summary)
    parts, rounds = result.participations, result.rounds
    hours = config.horizon.duration / 3600.0
    used = parts["used"].to_numpy(dtype=bool)
    assert flat[USED_REPORTS_PER_HOUR] == pytest.approx(used.sum() / hours, rel=1e-12)
    assert flat[USED_EXAMPLES_PER_HOUR] == pytest.approx(parts.loc[used, "examples_processed"].sum() / hours,
                                                         rel=1e-9)
    status = rounds["status"].astype(str)
    assert flat[ABANDONED_SHARE] == pytest.approx((status == "selection-timeout").mean(), rel=1e-12)
    assert flat[FAILED_SHARE] == pytest.approx(status.isin(["report-deadline", "unmasking-failed"]).mean(),
                                               rel=1e-12)
    assert 0 < flat[ABANDONED_SHARE] < 1  # the figures are not trivially 0 here
    assert flat[WEIGHT_PER_HOUR] == pytest.approx(parts.loc[used, "weight"].sum() / hours, rel=1e-12)
    summary = json.loads(json.dumps(result.summary))
    summary["participations"]["used_weight"] = float(parts.loc[used, "weight"].sum())
    assert flatten_summary(summary)[WEIGHT_PER_HOUR] == pytest.approx(parts.loc[used, "weight"].sum() / hours)
    for column in (USED_REPORTS_PER_HOUR, USED_EXAMPLES_PER_HOUR, WEIGHT_PER_HOUR, WORST_GROUP):
        assert direction_of(column) == "higher"
    assert direction_of(ABANDONED_SHARE) == direction_of(FAILED_SHARE) == "lower"


def test_worst_group_names_a_region_whose_devices_are_rarely_eligible():
    """Southern-cone devices get a memory of median 1 GB against the workload's 1.5 GB need, so
    about 5% of them can ever take part (lognormal spread 0.25: P(z > ln 1.5 / 0.25) = 0.053):
    their representation ratio falls far below every other group's, and so do the pairs of a
    type and that region when the summary has them (docs/metrics.md, ``bias``)."""
    config = load_config(fleetsim.example_path(),
                         [*TINY, "fleet.regions.southern-cone.overrides.memory={median: 1GB, spread: 0.25}"])
    for seed in SEEDS:
        summary = fleetsim.simulate(config, seed=seed).summary
        flat = flatten_summary(summary)
        groupings = [g for g in ("device_type", "region", "data_quartile", "type_and_region")
                     if f"by_{g}" in summary["bias"]]
        def groups(g, summary=summary):  # the pairs' map nests type -> region; in text a pair is "type / region"
            table = summary["bias"][f"by_{g}"]
            if g == "type_and_region":
                return [(f"{t} / {r}", v) for t, inner in table.items() for r, v in inner.items()]
            return list(table.items())

        closeness = {(g, name): 0.0 if not v["representation_ratio"] else min(v["representation_ratio"],
                                                                              1 / v["representation_ratio"])
                     for g in groupings for name, v in groups(g) if v["fleet_share"] > 0}
        worst = min(closeness, key=closeness.__getitem__)  # the first of equals, in the documented order
        assert (flat[WORST_GROUP_GROUPING], flat[WORST_GROUP_NAME]) == worst
        assert flat[WORST_GROUP] == pytest.approx(closeness[worst], rel=1e-12)
        regions = {name: c for (g, name), c in closeness.items() if g == "region"}
        assert min(regions, key=regions.__getitem__) == "southern-cone" and regions["southern-cone"] < 0.3
        assert worst[1] in ("southern-cone", *(f"{t} / southern-cone" for t in summary["bias"]["by_device_type"]))
        assert flat[WORST_GROUP] < 0.3 < flat[WORST_REPRESENTATION]  # device types alone do not show it


def _bias(ratio: float) -> dict:
    return {"by_device_type": {"phone": {"fleet_share": 1.0, "representation_ratio": 1.0}},
            "by_region": {"north": {"fleet_share": 0.5, "representation_ratio": ratio},
                          "south": {"fleet_share": 0.5, "representation_ratio": 2 - ratio}},
            "by_data_quartile": {"Q1": {"fleet_share": 0.25, "representation_ratio": 0.9}}}


def test_worst_group_reads_type_by_region_when_present_and_the_workloads_totals():
    bias = _bias(0.8)
    bias["by_type_and_region"] = {"phone": {"north": {"fleet_share": 0.5, "representation_ratio": 2.5},
                                               "south": {"fleet_share": 0.0, "representation_ratio": None}}}
    flat = flatten_summary({"bias": bias})
    assert (flat[WORST_GROUP], flat[WORST_GROUP_GROUPING], flat[WORST_GROUP_NAME]) == \
        (pytest.approx(0.4), "type_and_region", "phone / north")  # 1/2.5; the empty pair passed over
    bias["by_type_and_region"] = {"phone x north": {"fleet_share": 0.5, "representation_ratio": 0.95}}
    assert flatten_summary({"bias": bias})[WORST_GROUP_NAME] == "north"  # 0.8 at region level is worse
    several = {"simulated_hours": 4.0, "sharing": {"rule": "priority"}, "workloads": {
        "a": {"participations": {"used_reports": 40}, "bias": _bias(0.9)},
        "b": {"participations": {"used_reports": 20}, "bias": _bias(0.5)}}}
    flat = flatten_summary(several)
    assert flat[f"workloads_a_{USED_REPORTS_PER_HOUR}"] == 10 and flat[USED_REPORTS_PER_HOUR] == 15
    assert flat[WORST_GROUP] == 0.5 and flat[WORST_GROUP_WORKLOAD] == "b" and flat[WORST_GROUP_NAME] == "north"


# ------------------------------------------------------------------------------ why


def test_why_sets_the_recommendations_figures_beside_the_runner_up(swept):
    result, folder = swept
    rec, why = result.recommendation, result.why
    assert why is not None and why.basis == "runner-up" and why.against == rec.runner_up
    runs = result.runs

    def mean(cell: int, values: pd.Series) -> float:
        return float(values[runs["cell"] == cell].mean())

    hand = {
        "abandoned_share": runs["rounds_ended_by_selection_timeout"] / runs["rounds_attempted"],
        "failed_share": (runs["rounds_ended_by_report_deadline"] + runs["rounds_ended_by_unmasking_failed"])
        / runs["rounds_attempted"],
        "accepted_per_round": runs["participations_accepted"] / runs["rounds_attempted"],
        "accepted_per_hour": runs["server_load_accepted"] / runs["simulated_hours"],
        "waste_compute_fraction": runs["waste_compute_fraction"],
        "waste_late_compute_share": runs["waste_compute_fraction"] * runs["waste_by_cause_late_compute_s"]
        / runs["waste_compute_s"],
    }
    figures = {f["figure"]: f for f in why.figures}
    for name, values in hand.items():
        assert figures[name]["recommended"] == pytest.approx(mean(rec.cell, values), rel=1e-12), name
        assert figures[name]["against"] == pytest.approx(mean(why.against, values), rel=1e-12), name
    asked = {c.index: math.ceil(20 * dict(c.settings)["rounds.over_selection"] - 1e-9) for c in result.grid}
    assert (figures["asked_per_round"]["recommended"], figures["asked_per_round"]["against"]) == \
        (asked[rec.cell], asked[why.against])
    lines = "\n".join(why.lines)
    a, b = (100 * figures["abandoned_share"][k] for k in ("recommended", "against"))
    assert f"abandoned at the selection timeout {a:.1f}% against {b:.1f}%" in lines
    assert f"of {asked[rec.cell]} asked against" in lines
    text = (folder / "study.md").read_text()
    assert f"why ({rec.label} against the runner-up, {why.against_label};" in text and why.lines[0] in text
    record = json.loads((folder / "study.json").read_text())
    assert record["why"]["lines"] == why.lines and record["why"]["against"] == why.against


def test_the_command_prints_why_and_ranks_by_the_weight_per_hour(swept):
    _, folder = swept
    args = ["sweep", *CLI_TINY, "--vary", AXIS, "--seeds", "2", "--limit", LIMIT, "--out", str(folder),
            "--workers", "1", "--heatmap", "bias_coverage"]
    done = CliRunner().invoke(app, args)
    assert done.exit_code == 0, done.output
    assert "0 run now, 4 reused" in done.stdout and "\nwhy (" in done.stdout and "  waste: " in done.stdout
    assert (folder / "frontier.png").stat().st_size > 0
    by_weight = CliRunner().invoke(app, [*args, "--maximise", "weight_per_hour"])
    assert by_weight.exit_code == 0, by_weight.output
    assert WEIGHT_PER_HOUR in by_weight.stdout  # the objective the recommendation rests on


def test_weight_per_hour_is_the_used_reports_fedavg_weight_per_hour():
    # The FedAvg weight of a used report is its `weight` (distinct examples trained on, as
    # capped; McMahan et al. 2017 weight clients by their example counts, from memory).
    result = fleetsim.simulate(load_config(fleetsim.example_path(), TINY), seed=1)
    parts = result.participations
    used_weight = float(parts.loc[parts["used"], "weight"].sum())
    assert used_weight > 0 and result.summary["participations"]["used_weight"] == pytest.approx(used_weight)
    flat = flatten_summary(result.summary)
    assert flat["study_weight_per_hour"] == pytest.approx(used_weight / 8.0)
