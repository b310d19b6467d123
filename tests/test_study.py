"""Studies: sweeps, Pareto fronts, recommendations, paired comparisons, executors and resume.

Tiny fleets (3,000 devices for 12 simulated hours, rounds of 20 reports) keep each run
near a second. The
statistical checks name their sources in the test docstrings.
"""

from __future__ import annotations

import json
import math
import os
import shutil
import signal
import stat
import subprocess
import sys
import time
from pathlib import Path

import numpy as np
import pandas as pd
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st
from scipy import stats
from typer.testing import CliRunner

import fleetsim
from fleetsim.cli import app
from fleetsim.errors import ConfigError
from fleetsim.policies import SelectionPolicy
from fleetsim.study import (
    CONDITIONS,
    PARETO_OBJECTIVES,
    VERDICTS,
    WORST_REPRESENTATION,
    WORST_REPRESENTATION_TYPE,
    Arm,
    DaskCluster,
    FleetFile,
    InProcess,
    Limit,
    LocalProcesses,
    Objective,
    RunStore,
    direction_of,
    dominates,
    flatten_summary,
    grid_cells,
    mean_interval,
    paired_interval,
    paired_power,
    pareto_front,
    parse_axis,
    parse_limit,
    render_compare,
    resolve_metric,
    run_compare,
    run_sweep,
    seeds_needed,
    store,
    write_compare,
    write_sweep,
)
from fleetsim.study.cells import settings_columns

TINY = ["fleet.devices=3000", "horizon.duration=12h", "rounds.target_reports=20", "rounds.min_reports=15"]
CLI_TINY = [arg for item in TINY for arg in ("--set", item)]
VARY = ["rounds.over_selection=1.1,1.3", "rounds.report_deadline=4m,6m"]
LIMITS = ["waste_compute_fraction<=0.9", "worst_representation>=0.3"]
SEEDS = [0, 1]


class NoTablets(SelectionPolicy):
    """A plug-in that never accepts a tablet (first-come otherwise): a known injected bias."""

    name = "no-tablets"
    holds_checkins = False
    window_s = 30.0

    def choose(self, candidates, round, rng):
        names = np.asarray(candidates.type_names)[candidates.device_type]
        return np.flatnonzero(names != "tablet")[: round.needed]


PLUGIN = f"{__name__}:NoTablets"


def tiny_base() -> FleetFile:
    return FleetFile.read(fleetsim.example_path(), TINY)


@pytest.fixture(scope="module")
def swept(tmp_path_factory):
    """The reference sweep: 2 x 2 cells x 2 seeds, run here, written to a folder."""
    folder = tmp_path_factory.mktemp("sweep")
    axes = [parse_axis(text) for text in VARY]
    result = run_sweep(tiny_base(), axes, SEEDS, Objective("rounds_committed_per_hour"),
                       [parse_limit(t) for t in LIMITS], executor=InProcess(), folder=folder)
    write_sweep(result, folder)
    return result, folder


@pytest.fixture(scope="module")
def compare_folder(tmp_path_factory):
    """One store for the comparisons, so baseline runs shared by several tests run once."""
    return tmp_path_factory.mktemp("compare")


# ------------------------------------------------------------------------------ settings


def test_axes_read_lists_and_ranges():
    assert parse_axis("rounds.over_selection=1.1,1.3,1.5").values == (1.1, 1.3, 1.5)
    assert parse_axis("rounds.target_reports=50:150:50").values == (50, 100, 150)
    assert parse_axis("rounds.over_selection=1.0:1.6:0.2").values == (1.0, 1.2, 1.4, 1.6)
    assert parse_axis("rounds.report_deadline=2m:6m:2m").values == (120.0, 240.0, 360.0)
    assert parse_axis("selection.policy=first-come,lottery").values == ("first-come", "lottery")
    assert parse_axis("workload.requires=[idle, charging],[idle]").values == (["idle", "charging"], ["idle"])
    for bad in ("rounds.rest", "rounds.rest=1,,2", "rounds.rest=1,1", "rounds.rest=5:1:1",
                "rounds.rest=1:5:0", "rounds.rest=a:b:c"):
        with pytest.raises(ConfigError) as info:
            parse_axis(bad)
        assert info.value.problems[0].startswith("--vary")


def test_bad_cell_names_file_and_key():
    base = tiny_base()
    with pytest.raises(ConfigError) as info:
        grid_cells(base, [parse_axis("rounds.over_selection=0.5,1.3"), parse_axis("rounds.rest=1h,2h")])
    (line,) = info.value.problems
    assert "over_selection=0.5" in line and "(and 1 more cells)" in line
    assert f"{fleetsim.example_path()}: rounds.over_selection" in line


def test_stress_file_errors_name_the_stress_file_and_key(tmp_path):
    stress = tmp_path / "storm.yaml"
    stress.write_text("disruptions:\n  - kind: crash-surge\n    start: 1h\n    duration: 2h\n    factor: -3\n")
    with pytest.raises(ConfigError) as info:
        tiny_base().with_stress(stress)
    assert info.value.problems[0].startswith(f"{stress}: disruptions.0.factor")
    stress.write_text("events: []\n")
    with pytest.raises(ConfigError) as info:
        tiny_base().with_stress(stress)
    assert str(stress) in info.value.problems[0]
    stress.write_text(
        "disruptions:\n  - {kind: crash-surge, start: 1h, duration: 2h, factor: 3, device_types: [tablet]}\n"
    )
    config = tiny_base().with_stress(stress).config()
    assert [d.kind for d in config.disruptions] == ["crash-surge"]


def test_limits_read_numbers_and_percentages():
    assert parse_limit("waste_compute_fraction<=30%") == Limit("waste_compute_fraction", "<=", 0.3)
    assert parse_limit("coverage >= 0.2") == Limit("coverage", ">=", 0.2)
    for bad in ("coverage=0.2", "coverage<0.2", "coverage>=x"):
        with pytest.raises(ConfigError):
            parse_limit(bad)


# ------------------------------------------------------------------------------ column names


def test_columns_join_the_key_path_with_underscores():
    summary = {"rounds": {"ended_by": {"report_deadline": 2}, "duration_s": {"p50": None}},
               "waste": {"by_cause": {"idle_ended": {"compute_s": 1.5}}},
               "bias": {"by_device_type": {"budget-phone": {"representation_ratio": 0.5},
                                           "tablet": {"representation_ratio": 1.25}}},
               "policy": "first-come", "caution": "left out"}
    row = flatten_summary(summary)
    assert row == pytest.approx({
        "rounds_ended_by_report_deadline": 2, "rounds_duration_s_p50": math.nan,
        "waste_by_cause_idle_ended_compute_s": 1.5, "bias_by_device_type_budget_phone_representation_ratio": 0.5,
        "bias_by_device_type_tablet_representation_ratio": 1.25, "policy": "first-come",
        WORST_REPRESENTATION: 0.5, WORST_REPRESENTATION_TYPE: "budget-phone",
    }, nan_ok=True)
    assert WORST_REPRESENTATION_TYPE == "study_worst_representation_type"


def test_two_paths_giving_one_column_are_an_error_naming_both():
    summary = {"bias": {"by_device_type": {"budget-phone": {"report_share": 0.5},
                                           "budget_phone": {"report_share": 0.5}}}}
    with pytest.raises(ConfigError) as info:
        flatten_summary(summary)
    (line,) = info.value.problems
    assert line.startswith("bias.by_device_type.budget-phone.report_share and "
                           "bias.by_device_type.budget_phone.report_share: both would be the study column "
                           "bias_by_device_type_budget_phone_report_share")
    with pytest.raises(ConfigError) as info:
        settings_columns([parse_axis("selection.params.a_b=1,2"), parse_axis("selection.params.a.b=1,2")])
    assert info.value.problems == ["--vary selection.params.a_b and --vary selection.params.a.b: both would be "
                                   "the column setting_selection_params_a_b; vary one of them"]


@pytest.mark.parametrize(("metric", "direction"), [
    ("rounds_committed_per_hour", "higher"), ("rounds_ended_by_report_deadline", "lower"),
    ("rounds_ended_by_selection_timeout", "lower"), ("rounds_ended_by_server_outage", "lower"),
    ("participations_by_outcome_late", "lower"), ("participations_by_outcome_stopped", "lower"),
    ("participations_by_outcome_dropout", "lower"), ("participations_by_outcome_on_time", None),
    ("participations_dropouts_by_cause_battery_low", "lower"), ("waste_by_cause_idle_ended_compute_s", "lower"),
    ("bias_by_region_south_asia_representation_ratio", "closer-to-1"), ("bias_by_device_type_tablet_never_share",
                                                                        "lower"),
    (WORST_REPRESENTATION, "higher"), ("bias_chi_square_device_type", None), ("rounds_selection_at_timeout", None),
])
def test_directions_use_the_study_columns(metric, direction):
    assert direction_of(metric) == direction


@pytest.mark.parametrize(("old", "new"), [
    ("rounds.committed_per_hour", "rounds_committed_per_hour"),
    ("rounds.failed", "rounds_ended_by_report_deadline"),
    ("rounds.abandoned", "rounds_ended_by_selection_timeout"),
    ("rounds.outage", "rounds_ended_by_server_outage"),
    ("failed", "rounds_ended_by_report_deadline"),
    ("rounds_failed", "rounds_ended_by_report_deadline"),
    ("participations.by_outcome.reported", "participations_by_outcome_on_time"),
    ("waste.by_cause.stopped-at-close.compute_s", "waste_by_cause_stopped_compute_s"),
    ("waste_by_cause_stopped_at_close_compute_s", "waste_by_cause_stopped_compute_s"),
    ("signal:idle", "participations_dropouts_by_cause_idle_ended"),
    ("participations.dropouts_by_cause.signal:idle", "participations_dropouts_by_cause_idle_ended"),
    ("bias.chi_square", "bias_chi_square_device_type"),
    ("bias.lorenz_gini", "bias_gini"),
    ("study.worst_representation", WORST_REPRESENTATION),
    ("bias.by_device_type.budget-phone.report_share", "bias_by_device_type_budget_phone_report_share"),
])
def test_old_metric_names_are_refused_naming_the_new_column(swept, old, new):
    result, _ = swept
    with pytest.raises(ConfigError) as info:
        resolve_metric(old, result.runs.columns, "--limit", absent_zero=True)
    assert info.value.problems == [f"--limit {old}: renamed to {new}"]


def test_new_metric_names_resolve(swept):
    result, _ = swept
    columns = list(result.runs.columns)
    assert resolve_metric("committed_per_hour", columns, "--limit") == "rounds_committed_per_hour"
    assert resolve_metric("worst_representation", columns, "--limit") == WORST_REPRESENTATION
    absent = "participations_dropouts_by_cause_execution_limit"  # no tiny run reaches the OS limit
    assert absent not in columns and resolve_metric(absent, columns, "--limit", absent_zero=True) == absent
    with pytest.raises(ConfigError):
        resolve_metric("waste_by_cause_battery_low_no_such_figure", columns, "--limit", absent_zero=True)


def test_compare_refuses_an_old_detect_metric_in_one_line():
    args = ["compare", *CLI_TINY, "--seeds", "1", "--workers", "1", "--detect", "rounds.failed=1"]
    result = CliRunner().invoke(app, args)
    assert result.exit_code == 2, result.output
    assert result.stderr.strip() == "error: --detect rounds.failed: renamed to rounds_ended_by_report_deadline"


def test_the_code_tables_in_the_docs_match_the_code():
    text = (Path(__file__).resolve().parents[1] / "docs" / "studies.md").read_text()

    def codes(heading: str) -> list[str]:
        table = text.split(heading, 1)[1].split("\n\n", 2)[1]
        return [line.split("|")[1].strip().strip("`") for line in table.splitlines()[2:]]

    assert codes("### Verdict codes") == list(VERDICTS)
    assert codes("### Condition codes") == list(CONDITIONS)


# ------------------------------------------------------------------------------ resume and files


def test_engine_fingerprint_covers_the_core_subpackages(tmp_path, monkeypatch):
    """A change anywhere in the core (a module at the top or in the config, metrics or policies
    packages, or a new file) changes the fingerprint; the report and study packages do not."""
    copy = tmp_path / "fleetsim"
    shutil.copytree(store.PACKAGE, copy, ignore=shutil.ignore_patterns("__pycache__"))
    monkeypatch.setattr(store, "PACKAGE", copy)

    def fingerprint() -> str:
        store._FINGERPRINTS.pop(copy, None)  # the copy changes under the test; the real entry stays
        return store.engine_fingerprint()

    original = fingerprint()
    assert original == store.source_fingerprint(copy)
    for relative, changes in (("metrics/waste.py", True), ("policies/builtin.py", True),
                              ("config/models.py", True), ("events.py", True), ("metrics/new.py", True),
                              ("report/page.py", False), ("study/table.py", False)):
        path = copy / relative
        before = path.read_bytes() if path.exists() else None
        path.write_bytes((before or b"") + b"\n# changed\n")
        assert (fingerprint() != original) is changes, relative
        if before is None:
            path.unlink()
        else:
            path.write_bytes(before)
    assert fingerprint() == original
    store._FINGERPRINTS.pop(copy, None)


def test_study_files_are_readable_like_any_output(swept, compare_folder, tmp_path):
    """Under umask 022 every file a sweep or comparison writes is 0644 and every folder 0755
    (0666 and 0777 less the umask, as open() and mkdir() give), not private 0600."""
    result, _ = swept
    previous = os.umask(0o022)
    try:
        write_sweep(result, tmp_path / "sweep", heatmaps=["bias_coverage"])
        RunStore(tmp_path / "sweep" / "cells").save("0" * 20, {"summary": {}})
        compared = run_compare(tiny_base(), Arm("baseline", ()), Arm("candidate", (f"selection.policy={PLUGIN}",)),
                               seeds=[0], executor=InProcess(), folder=compare_folder)
        write_compare(compared, tmp_path / "compare")
    finally:
        os.umask(previous)
    entries = [p for folder in ("sweep", "compare") for p in (tmp_path / folder).rglob("*")]
    assert any(p.name == "runs.parquet" for p in entries) and any(p.suffix == ".png" for p in entries)
    assert any(p.parent.name == "cells" for p in entries)
    modes = {str(p.relative_to(tmp_path)): stat.S_IMODE(p.stat().st_mode) for p in entries}
    assert modes == {name: (0o755 if (tmp_path / name).is_dir() else 0o644) for name in modes}
    assert stat.S_IMODE((tmp_path / "sweep").stat().st_mode) == 0o755


# ------------------------------------------------------------------------------ Pareto front


def direct_front(points: np.ndarray, maximise: list[bool]) -> np.ndarray:
    """The definition, written out: on the front when finite and no other row dominates it."""
    n = len(points)
    keep = np.zeros(n, dtype=bool)
    for i in range(n):
        if not np.all(np.isfinite(points[i])):
            continue
        keep[i] = not any(
            j != i and np.all(np.isfinite(points[j])) and dominates(points[j], points[i], maximise)
            for j in range(n)
        )
    return keep


@settings(max_examples=300, deadline=None)
@given(
    st.lists(st.lists(st.integers(0, 4) | st.just(math.nan) | st.floats(-1, 1, allow_nan=False),
                      min_size=3, max_size=3), min_size=0, max_size=25),
    st.lists(st.booleans(), min_size=3, max_size=3),
)
def test_pareto_front_matches_its_definition(rows, maximise):
    points = np.array(rows, dtype=float).reshape(-1, 3)
    assert np.array_equal(pareto_front(points, maximise), direct_front(points, maximise))


def test_pareto_front_of_a_sweep_matches_its_definition(swept):
    result, _ = swept
    names = [name for name, _ in PARETO_OBJECTIVES]
    means = result.runs.groupby("cell")[names].mean()
    expected = direct_front(means.to_numpy(), [up for _, up in PARETO_OBJECTIVES])
    assert result.front == [int(c) for c in means.index[expected]]


# ------------------------------------------------------------------------------ sweep


def test_sweep_table_has_every_metric_per_cell_and_seed(swept):
    result, folder = swept
    runs = pd.read_parquet(folder / "runs.parquet")
    assert len(runs) == 4 * len(SEEDS)
    assert list(runs[["cell", "seed"]].itertuples(index=False, name=None)) == [
        (c, s) for c in range(4) for s in SEEDS
    ]
    for name in ("rounds_committed_per_hour", "waste_compute_fraction", "bias_coverage", WORST_REPRESENTATION,
                 "bias_by_device_type_tablet_report_share", "bias_by_device_type_budget_phone_weight_share",
                 "bias_by_data_quartile_Q4_representation_ratio", "bias_by_data_quartile_Q4_samples_high",
                 "rounds_ended_by_report_deadline", "participations_by_outcome_on_time",
                 "setting_rounds_over_selection", "setting_rounds_report_deadline"):
        assert name in runs.columns, name
    csv = pd.read_csv(folder / "runs.csv")
    assert list(csv.columns) == list(runs.columns)
    # per-cell means and intervals are the Student t interval of the table's own values
    means = pd.read_parquet(folder / "cell_means.parquet")
    row = means[(means["cell"] == 2) & (means["metric"] == "rounds_committed_per_hour")].iloc[0]
    expected = mean_interval(runs.loc[runs["cell"] == 2, "rounds_committed_per_hour"].to_numpy())
    assert row["mean"] == pytest.approx(expected.mean) and row["low"] == pytest.approx(expected.low)
    # worst representation is min over types of min(r, 1/r)
    r = runs.iloc[0][[c for c in runs.columns if c.startswith("bias_by_device_type_")
                      and c.endswith("_representation_ratio")]].astype(float)
    assert runs.iloc[0][WORST_REPRESENTATION] == pytest.approx(np.minimum(r, 1 / r).min())
    record = json.loads((folder / "study.json").read_text())
    assert record["caution"] == fleetsim.metrics.CAUTION
    assert (folder / "frontier.png").stat().st_size > 0
    assert (folder / "heatmaps" / "rounds_committed_per_hour.png").stat().st_size > 0
    assert len(list((folder / "cells").glob("*.json"))) == 4 * len(SEEDS)


def brute_force_pick(runs: pd.DataFrame, objective: str, limits: list[Limit], front: list[int]) -> list[int]:
    """Read the table directly: means per cell, keep cells meeting every limit, order them by
    objective (ties: front first, then lower cell)."""
    means = runs.groupby("cell").mean(numeric_only=True)
    ok = []
    for cell, row in means.iterrows():
        if all((row[lim.metric] <= lim.value) if lim.operator == "<=" else (row[lim.metric] >= lim.value)
               for lim in limits):
            ok.append(cell)
    return sorted(ok, key=lambda c: (-means.at[c, objective], c not in front, c))


def test_recommendation_is_the_brute_force_reading_of_its_table(swept):
    result, folder = swept
    runs = pd.read_parquet(folder / "runs.parquet")
    rec = result.recommendation
    limits = [Limit("waste_compute_fraction", "<=", 0.9), Limit(WORST_REPRESENTATION, ">=", 0.3)]
    assert rec.limits == limits
    order = brute_force_pick(runs, "rounds_committed_per_hour", limits, result.front)
    assert order, "the limits should leave at least one cell"
    assert rec.cell == order[0]
    assert rec.runner_up == (order[1] if len(order) > 1 else None)
    assert rec.feasible == sorted(order)
    assert any("runner-up" in reason or "no runner-up" in reason for reason in rec.reasons)
    # Other objectives and limits, read the same way; the median limit rules out about half.
    median = float(runs.groupby("cell")["waste_compute_fraction"].mean().median())
    for objective, bounds in (
        (Objective("rounds_committed_per_hour"), [Limit("waste_compute_fraction", "<=", median)]),
        (Objective("waste_compute_fraction", maximise=False), []),
        (Objective(WORST_REPRESENTATION), [Limit("rounds_committed_per_hour", ">=", 0.3)]),
        (Objective("rounds_committed_per_hour"), [Limit("waste_compute_fraction", "<=", 0.0)]),
    ):
        from fleetsim.study import recommend

        pick = recommend(result.cells, result.runs, objective, bounds, front=set(result.front))
        sign = 1 if objective.maximise else -1
        flipped = runs.assign(**{objective.metric: sign * runs[objective.metric]})
        order = brute_force_pick(flipped, objective.metric, bounds, result.front)
        assert pick.cell == (order[0] if order else None)


def test_sweep_on_a_dask_cluster_gives_the_same_tables(swept, tmp_path):
    from distributed import LocalCluster

    result, folder = swept
    with LocalCluster(n_workers=1, threads_per_worker=2, processes=False, protocol="tcp", host="127.0.0.1",
                      dashboard_address=None) as cluster:
        remote = run_sweep(tiny_base(), [parse_axis(t) for t in VARY], SEEDS,
                           Objective("rounds_committed_per_hour"), [parse_limit(t) for t in LIMITS],
                           executor=DaskCluster(cluster.scheduler_address), folder=tmp_path)
    assert remote.reused == 0 and "Dask" in remote.executor
    write_sweep(remote, tmp_path, heatmaps=[])
    for name in ("runs.parquet", "cell_means.parquet"):
        pd.testing.assert_frame_equal(pd.read_parquet(tmp_path / name), pd.read_parquet(folder / name))
    assert remote.front == result.front and remote.recommendation.cell == result.recommendation.cell


def _cli(*args: str) -> list[str]:
    return [sys.executable, "-c", "from fleetsim.cli import main; main()", *args]


def _sweep_args(out: Path) -> list[str]:
    args = ["sweep", *CLI_TINY, "--seeds", str(len(SEEDS)),
            "--out", str(out), "--workers", "1"]
    for text in VARY:
        args += ["--vary", text]
    for text in LIMITS:
        args += ["--limit", text]
    return args


def test_killed_sweep_resumes_to_the_same_table(swept, tmp_path):
    _, folder = swept
    out = tmp_path / "study"
    log = tmp_path / "stderr.txt"
    with log.open("wb") as stderr:
        process = subprocess.Popen(_cli(*_sweep_args(out)), stdout=subprocess.DEVNULL, stderr=stderr)
    cells = out / "cells"
    deadline = time.monotonic() + 120
    try:
        while time.monotonic() < deadline and process.poll() is None:
            if cells.is_dir() and any(cells.glob("*.json")):
                break
            time.sleep(0.02)
        assert process.poll() is None, "the sweep ended before it could be interrupted: " + log.read_text()
    finally:
        process.kill()  # SIGKILL: no chance to clean up
        process.wait()
    assert process.returncode == -signal.SIGKILL
    saved = list(cells.glob("*.json"))
    assert 1 <= len(saved) < 4 * len(SEEDS)
    for path in saved:  # every file present is whole
        assert json.loads(path.read_text())["summary"]["devices"] == 3000
    assert not (out / "runs.parquet").exists()

    result = CliRunner().invoke(app, _sweep_args(out))
    assert result.exit_code == 0, result.output
    assert f"{len(saved)} reused" in result.stdout
    assert not list(cells.glob(".partial-*"))
    for name in ("runs.parquet", "cell_means.parquet"):
        pd.testing.assert_frame_equal(pd.read_parquet(out / name), pd.read_parquet(folder / name))
    assert (out / "front.csv").read_text() == (folder / "front.csv").read_text()


def test_sweep_command_reuses_finished_runs_and_prints_the_caution(swept):
    _, folder = swept
    result = CliRunner().invoke(app, _sweep_args(folder))
    assert result.exit_code == 0, result.output
    assert f"0 run now, {4 * len(SEEDS)} reused" in result.stdout
    assert "recommendation (maximise rounds_committed_per_hour subject to" in result.stdout
    assert "runner-up" in result.stdout or "no runner-up" in result.stdout
    assert "caution: These figures come from a model" in result.stdout


@pytest.mark.parametrize(
    ("extra", "expected"),
    [
        (["--vary", "rounds.over_selection=0.5"], "rounds.over_selection"),
        (["--vary", "rounds.over_selection=1.1", "--limit", "no_such_metric<=1"], "--limit no_such_metric: no such"),
        (["--vary", "rounds.over_selection=1.1", "--maximise", "a", "--minimise", "b"], "--maximise and --minimise"),
        (["--vary", "rounds.over_selection=1.1", "--maximise", "rounds.failed"],
         "--maximise rounds.failed: renamed to rounds_ended_by_report_deadline"),
        (["--vary", "rounds.over_selection=1.1", "--minimise", "waste.by_cause.stopped-at-close.compute_s"],
         "--minimise waste.by_cause.stopped-at-close.compute_s: renamed to waste_by_cause_stopped_compute_s"),
        (["--vary", "rounds.over_selection=1.1", "--limit", "waste.compute_fraction<=0.3"],
         "--limit waste.compute_fraction: renamed to waste_compute_fraction"),
        (["--vary", "rounds.over_selection=1.1", "--heatmap", "bias.coverage"],
         "--heatmap bias.coverage: renamed to bias_coverage"),
        (["--vary", "rounds.over_selection=1.1", "--plot-format", "gif"], "--plot-format gif"),
        (["--vary", "rounds.over_selection=1.1", "--stress", "/nonexistent/storm.yaml"], "/nonexistent/storm.yaml"),
        (["--vary", "rounds.over_selection=1.1", "--workers", "0"], "--workers 0"),
        ([], "--vary"),
    ],
)
def test_sweep_command_reports_bad_input_in_one_line(swept, extra, expected):
    _, folder = swept
    args = ["sweep", *CLI_TINY, "--seeds", "2", "--out", str(folder),
            "--workers", "1", *extra]
    result = CliRunner().invoke(app, args)
    assert result.exit_code == 2, result.output
    lines = result.stderr.strip().splitlines()
    assert lines and all(line.startswith("error: ") for line in lines), result.stderr
    assert expected in result.stderr


# ------------------------------------------------------------------------------ compare


def test_compare_finds_an_injected_difference(compare_folder):
    result = run_compare(tiny_base(), Arm("baseline", ()), Arm("candidate", (f"selection.policy={PLUGIN}",)),
                         seeds=[0, 1, 2], executor=InProcess(), folder=compare_folder)
    d = result.differences.set_index("metric")
    tablet = "bias_by_device_type_tablet"
    assert d.at[f"{tablet}_accepted_share", "candidate_mean"] == 0
    assert d.at[f"{tablet}_representation_ratio", "verdict"] == "worse"
    assert d.at[f"{tablet}_report_share", "verdict"] == "lower"
    assert d.at[WORST_REPRESENTATION, "verdict"] == "worse"
    low, high = d.at[f"{tablet}_report_share", "low"], d.at[f"{tablet}_report_share", "high"]
    assert high < 0 and low <= d.at[f"{tablet}_report_share", "difference"] <= high
    assert set(d["verdict"]) <= set(VERDICTS) and set(d["condition"]) == {"as-configured"}
    assert (d["seeds"] == 3).any() and (d["alpha"] == 0.05).all()
    assert set(result.runs["arm_settings"]) == {"", f"selection.policy={PLUGIN}"}
    text = render_compare(result)
    assert f"{tablet.rsplit('_', 1)[-1]}: report_share" in text and "lower (neutral)" in text


def test_compare_of_identical_settings_finds_no_change(compare_folder):
    result = run_compare(tiny_base(), Arm("baseline", ()), Arm("candidate", ("selection.policy=first-come",)),
                         seeds=[0, 1, 2], executor=InProcess(), folder=compare_folder)
    arms = result.runs.drop(columns="arm_settings").set_index(["arm", "seed"])
    pd.testing.assert_frame_equal(arms.loc["baseline"], arms.loc["candidate"])
    d = result.differences
    assert set(d["verdict"]) <= {"no-detectable-change", "too-few-seeds", "not-tested-constant", "judged-as-rate"}
    assert (d.loc[d["verdict"] == "too-few-seeds", "seeds"] < 2).all()  # undefined in these runs
    assert ((d["verdict"] == "no-detectable-change") & (d["seeds"] == 3)).sum() > 100
    assert "no detectable change at 3 seeds" in render_compare(result)
    assert (result.differences["difference"].fillna(0) == 0).all()


def test_compare_runs_a_test_module_plugin_in_worker_processes(compare_folder, tmp_path):
    here = run_compare(tiny_base(), Arm("baseline", ()), Arm("candidate", (f"selection.policy={PLUGIN}",)),
                       seeds=[0], executor=InProcess(), folder=compare_folder)
    there = run_compare(tiny_base(), Arm("baseline", ()), Arm("candidate", (f"selection.policy={PLUGIN}",)),
                        seeds=[0], executor=LocalProcesses(2), folder=tmp_path)
    assert there.reused == 0 and "2 local processes" in there.executor
    pd.testing.assert_frame_equal(there.runs, here.runs)


def test_compare_command_with_stress_and_seeds_needed(compare_folder, tmp_path):
    stress = tmp_path / "outage.yaml"
    stress.write_text("disruptions:\n  - {kind: server-outage, start: 3h, duration: 2h}\n")
    args = ["compare", *CLI_TINY, "--seeds", "2", "--workers", "1",
            "--candidate", f"selection.policy={PLUGIN}", "--stress", str(stress),
            "--detect", "committed_per_hour=20%", "--out", str(compare_folder)]
    result = CliRunner().invoke(app, args)
    assert result.exit_code == 0, result.output
    out = result.stdout
    assert "as configured:" in out and f"stressed by {stress}:" in out
    assert "does the candidate still win under stress?" in out
    assert "seeds needed (paired t test" in out and "caution:" in out
    runs = pd.read_parquet(compare_folder / "runs.parquet")
    assert set(runs["condition"]) == {"as-configured", "stressed"}
    stressed = runs[runs["condition"] == "stressed"]
    assert (stressed["stress_file"] == str(stress)).all() and runs.loc[runs["condition"] == "as-configured",
                                                                      "stress_file"].isna().all()
    assert (stressed["rounds_ended_by_server_outage"] + stressed["rounds_attempted"] > 0).all()
    record = json.loads((compare_folder / "comparison.json").read_text())
    assert record["caution"] == fleetsim.metrics.CAUTION
    assert record["conditions"][1] == {"condition": "stressed", "stress_file": str(stress),
                                       "meaning": CONDITIONS["stressed"]}
    assert record["alpha"] == 0.05 and record["verdict_codes"] == VERDICTS
    assert set(record["verdicts"]["stressed"].values()) <= set(VERDICTS)
    differences = pd.read_csv(compare_folder / "differences.csv")
    assert {"condition", "stress_file", "metric", "seeds", "alpha", "verdict"} <= set(differences.columns)


def test_unpaired_aa_comparison_covers_zero(compare_folder):
    """Light engine case with a known answer: the same settings with the candidate on other
    seeds, so the true mean difference of every metric is 0 by construction. The paired-t
    intervals (nominal 95%) should cover 0 for nearly all metrics; the metrics are correlated,
    so the bound is loose. The full coverage check is the synthetic test below and the slow
    engine test."""
    result = run_compare(tiny_base(), Arm("baseline", ()), Arm("candidate", ()), seeds=[0, 1, 2],
                         executor=InProcess(), folder=compare_folder, candidate_seed_offset=1000)
    d = result.differences
    d = d[np.isfinite(d["low"]) & (d["sd_of_differences"] > 0)]
    covered = ((d["low"] <= 0) & (d["high"] >= 0)).mean()
    assert len(d) > 100 and covered >= 0.8


# ------------------------------------------------------------------------------ statistics


def test_paired_interval_covers_a_known_difference_at_the_nominal_rate():
    """Coverage of the paired t interval (Student 1908) on pairs whose true mean difference is
    0.3 by construction: 4,000 replications of 5 correlated pairs. The count of covering
    intervals is Binomial(4000, 0.95); we allow 4 standard deviations."""
    rng = np.random.default_rng(20260302)
    reps, n, true = 4000, 5, 0.3
    covered = 0
    for _ in range(reps):
        common = rng.normal(10.0, 2.0, n)  # shared randomness, as common random numbers give
        baseline = common + rng.normal(0.0, 0.5, n)
        candidate = common + true + rng.normal(0.0, 0.5, n)
        covered += paired_interval(baseline, candidate).contains(true)
    sd = math.sqrt(0.95 * 0.05 / reps)
    assert abs(covered / reps - 0.95) < 4 * sd


def test_mean_interval_edge_cases():
    empty = mean_interval([])
    assert empty.n == 0 and math.isnan(empty.mean)
    one = mean_interval([2.0, math.nan])
    assert one.n == 1 and one.mean == 2.0 and math.isnan(one.low)
    flat = mean_interval([3.0, 3.0, 3.0])
    assert flat.low == flat.high == 3.0 and flat.excludes_zero()
    # 95% t interval of 1, 2, 3: 2 +- t_{0.975,2} / sqrt(3) (t_{0.975,2} = 4.303, tables)
    assert mean_interval([1, 2, 3]).high == pytest.approx(2 + 4.302653 / math.sqrt(3), rel=1e-6)


def test_seeds_needed_matches_published_values_and_simulation():
    """Paired t test, two-sided 5% level, power 0.8: an effect of 0.5 sd needs 34 pairs and
    0.8 sd needs 15 (Cohen 1988, ch. 2; G*Power gives the same; values from memory). The
    power at 34 pairs is also checked by simulating the test with scipy.stats.ttest_1samp."""
    assert seeds_needed(0.5, 1.0) == 34
    assert seeds_needed(0.8, 1.0) == 15
    assert seeds_needed(-0.5, 1.0) == 34
    assert paired_power(34, 0.5, 1.0) >= 0.8 > paired_power(33, 0.5, 1.0)
    assert seeds_needed(0.0, 1.0) is None and seeds_needed(1.0, 0.0) == 2
    rng = np.random.default_rng(7)
    differences = rng.normal(0.5, 1.0, size=(4000, 34))
    rejected = (stats.ttest_1samp(differences, 0.0, axis=1).pvalue < 0.05).mean()
    assert abs(rejected - paired_power(34, 0.5, 1.0)) < 4 * math.sqrt(0.8 * 0.2 / 4000)


# ------------------------------------------------------------------------------ common random numbers


def test_same_seed_gives_the_same_fleet_in_every_cell():
    base = FleetFile.read(fleetsim.example_path(), ["fleet.devices=3000", "horizon.duration=2h"])
    a = fleetsim.simulate(base.config(["rounds.over_selection=1.1", "rounds.report_deadline=4m"]), seed=5)
    b = fleetsim.simulate(base.config(["rounds.over_selection=1.5", "selection.policy=lottery"]), seed=5)
    for name in ("device_type", "region", "sample_cost_s", "memory_bytes", "down_mbps", "samples",
                 "checkin_phase_s"):
        assert np.array_equal(getattr(a.fleet, name), getattr(b.fleet, name)), name
    c = fleetsim.simulate(base.config(["rounds.over_selection=1.1", "rounds.report_deadline=4m"]), seed=6)
    assert not np.array_equal(a.fleet.sample_cost_s, c.fleet.sample_cost_s)
    share = "bias_by_device_type_tablet_fleet_share"
    assert flatten_summary(a.summary)[share] == flatten_summary(b.summary)[share]


# ------------------------------------------------------------------------------ slow


@pytest.mark.slow
def test_engine_paired_interval_coverage_on_unpaired_aa():
    """Engine case across many seeds: 40 replications of an A/A comparison (same settings,
    candidate on other seeds; true difference 0) with 3 pairs each, for committed rounds per
    hour and the tablet's fleet share. Coverage should be near 95% (Binomial(40, 0.95): at
    least 33 of 40 with probability above 0.99)."""
    base = FleetFile.read(fleetsim.example_path(), [*TINY[:1], "horizon.duration=6h", *TINY[2:]])
    config = base.config()
    values = {s: flatten_summary(fleetsim.simulate(config, seed=s).summary) for s in range(240)}
    for metric in ("rounds_committed_per_hour", "bias_by_device_type_tablet_fleet_share"):
        covered = 0
        for rep in range(40):
            seeds = range(6 * rep, 6 * rep + 6)
            b = [values[s][metric] for s in list(seeds)[:3]]
            c = [values[s][metric] for s in list(seeds)[3:]]
            covered += paired_interval(b, c).contains(0.0)
        assert covered >= 33, (metric, covered)



# ------------------------------------------------------------------------------ docs and interruption


def test_the_stress_file_in_the_docs_is_valid(tmp_path):
    text = (Path(__file__).resolve().parents[1] / "docs" / "studies.md").read_text()
    block = text.split("```yaml\n", 1)[1].split("```", 1)[0]
    stress = tmp_path / "storm.yaml"
    stress.write_text(block)
    config = FleetFile.read(fleetsim.example_path(), ["horizon.duration=3d"]).with_stress(stress).config()
    assert [d.kind for d in config.disruptions] == ["network-slowdown", "behaviour-shift", "server-outage"]


def test_interrupted_command_says_how_to_resume(monkeypatch, tmp_path):
    import fleetsim.study.sweep as sweep_module

    def interrupted(*args, **kwargs):
        raise KeyboardInterrupt

    monkeypatch.setattr(sweep_module, "run_sweep", interrupted)
    result = CliRunner().invoke(app, ["sweep", "--devices", "3000", "--vary", "rounds.rest=1h", "--out", str(tmp_path)])
    assert result.exit_code == 130
    assert f"finished runs are saved in {tmp_path}/cells" in result.stderr
