"""``fleetsim impact RUN_DIR``: the replay of a run folder's committed rounds from the command line.

The training itself is checked against closed forms and scipy in tests/test_impact.py; here
the command reads the right rows of the run folder, writes its files beside the run's own
and nowhere else, and refuses bad input in one line.
"""

import json
from pathlib import Path

import pandas as pd
import pytest
from typer.testing import CliRunner

from fleetsim.cli.app import app

runner = CliRunner()
SMALL = ["--devices", "2000", "--days", "1"]


@pytest.fixture(scope="module")
def run_dir(tmp_path_factory):
    out = tmp_path_factory.mktemp("impact") / "run"
    done = runner.invoke(app, ["run", "--out", str(out), "--seed", "2", *SMALL])
    assert done.exit_code == 0, done.output
    return out


def _used_in_committed(folder):
    events, rounds = pd.read_parquet(folder / "events.parquet"), pd.read_parquet(folder / "rounds.parquet")
    committed = rounds.loc[rounds["status"] == "committed", "round"]
    return committed.size, int((events["round"].isin(committed) & events["used"]).sum())


def test_impact_replays_exactly_the_used_reports_of_committed_rounds(run_dir):
    before = {p.relative_to(run_dir): p.read_bytes() for p in run_dir.rglob("*") if p.is_file()}
    done = runner.invoke(app, ["impact", str(run_dir)])
    assert done.exit_code == 0, done.output
    assert "worst served" in done.output and "caution:" in done.output
    record = json.loads((run_dir / "impact.json").read_text())
    rounds, reports = _used_in_committed(run_dir)
    assert rounds > 0
    assert record["impact"]["rounds_trained"] == rounds and record["impact"]["reports_trained"] == reports
    assert record["seed"] == 2 and "invented" in record["caution"]
    curves = pd.read_csv(run_dir / "tables" / "impact_curves.csv")
    assert set(curves["grouping"]) == {"overall", "device_type", "region", "data_quartile"}
    final = pd.read_csv(run_dir / "tables" / "impact_final.csv")
    worst = record["impact"]["worst_group"]
    assert worst["accuracy"] == pytest.approx(final.loc[final["grouping"] != "overall", "accuracy"].min())
    after = {p.relative_to(run_dir): p.read_bytes() for p in run_dir.rglob("*") if p.is_file()}
    new = set(after) - set(before)
    assert {str(p) for p in new} <= {"impact.json", "tables/impact_curves.csv", "tables/impact_final.csv"}
    assert all(after[p] == before[p] for p in before)  # the run's own files are untouched


def test_impact_set_changes_the_task_and_refuses_the_run(run_dir):
    done = runner.invoke(app, ["impact", str(run_dir), "--set", "impact.features=6"])
    assert done.exit_code == 0, done.output
    assert json.loads((run_dir / "impact.json").read_text())["settings"]["features"] == 6
    bad = runner.invoke(app, ["impact", str(run_dir), "--set", "impact.features=0"])
    assert bad.exit_code == 2
    assert bad.output.strip().splitlines() == [
        "error: --set: impact.features: Input should be greater than or equal to 1 (got 0)"]
    run_key = runner.invoke(app, ["impact", str(run_dir), "--set", "rounds.target_reports=5"])
    assert run_key.exit_code == 2 and len(run_key.output.strip().splitlines()) == 1
    assert "only keys under impact." in run_key.output


def test_impact_refuses_what_is_not_a_run_folder(tmp_path):
    (tmp_path / "notes.txt").write_text("mine")
    done = runner.invoke(app, ["impact", str(tmp_path)])
    assert done.exit_code == 2
    assert done.output.strip().splitlines() == [f"error: {tmp_path}: not a run folder written by 'fleetsim run --out'"]
    assert [p.name for p in tmp_path.iterdir()] == ["notes.txt"]
    missing = runner.invoke(app, ["impact", str(tmp_path / "nowhere")])
    assert missing.exit_code == 2 and "no such folder" in missing.output


def test_impact_of_several_workloads_names_one(tmp_path):
    two = Path(__file__).parents[1] / "fleets" / "inkwren-two-models.yaml"
    out = tmp_path / "two"
    done = runner.invoke(app, ["run", str(two), "--out", str(out), "--devices", "2000", "--days", "1"])
    assert done.exit_code == 0, done.output
    unnamed = runner.invoke(app, ["impact", str(out)])
    assert unnamed.exit_code == 2 and "pass --workload NAME" in unnamed.output
    names = list(json.loads((out / "config.json").read_text())["workloads"])
    named = runner.invoke(app, ["impact", str(out), "--workload", names[1]])
    assert named.exit_code == 0, named.output
    sub = out / "workloads" / names[1]
    rounds, reports = _used_in_committed(sub)
    assert json.loads((sub / "impact.json").read_text())["impact"]["reports_trained"] == reports
    unknown = runner.invoke(app, ["impact", str(out), "--workload", "nope"])
    assert unknown.exit_code == 2 and "not a workload of the run" in unknown.output


def test_a_study_run_with_an_impact_section_carries_the_trained_model(tmp_path):
    # The study's copy is the command's summary less the parameters and caution: both replay
    # the same rounds with the same seed, so the figures agree exactly.
    from fleetsim.config import load_config
    from fleetsim.study import run_one
    from fleetsim.study.table import direction_of, flatten_summary

    path = Path(__file__).parents[1] / "fleets" / "inkwren.yaml"
    config = load_config(path, ["fleet.devices=2000", "horizon.duration=86400", "impact={}"])
    payload = run_one(config, 2)
    figures = payload["summary"]["impact"]
    assert "model" not in figures and "caution" not in figures
    plain = run_one(load_config(path, ["fleet.devices=2000", "horizon.duration=86400"]), 2)["summary"]
    assert "impact" not in plain
    out = tmp_path / "run"
    assert runner.invoke(app, ["run", "--out", str(out), "--seed", "2", *SMALL]).exit_code == 0
    assert runner.invoke(app, ["impact", str(out)]).exit_code == 0
    record = json.loads((out / "impact.json").read_text())["impact"]
    assert figures["worst_group"] == record["worst_group"] and figures["gap"] == record["gap"]
    row = flatten_summary(payload["summary"])
    assert row["impact_worst_group_accuracy"] == record["worst_group"]["accuracy"]
    assert direction_of("impact_worst_group_accuracy") == "higher" and direction_of("impact_gap") == "lower"
    assert direction_of("privacy_epsilon_worst") == "lower"
