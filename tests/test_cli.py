"""The command line, through typer's CliRunner: outputs, errors, no tracebacks."""

import json

import pandas as pd
import pytest
from typer.testing import CliRunner

import fleetsim
from fleetsim.cli.app import app
from fleetsim.config import example_path

runner = CliRunner()
SMALL = ["--devices", "3000", "--days", "0.5"]


def test_run_writes_summary_events_and_tables(tmp_path):
    out = tmp_path / "run"
    result = runner.invoke(app, ["run", "--out", str(out), "--seed", "4", *SMALL])
    assert result.exit_code == 0, result.output
    assert "rounds:" in result.output and "caution:" in result.output
    summary = json.loads((out / "summary.json").read_text())
    assert summary["seed"] == 4 and summary["devices"] == 3000 and summary["simulated_hours"] == 12
    events = pd.read_parquet(out / "events.parquet")
    assert len(events) == summary["participations"]["accepted"]
    assert str(events["accepted_utc"].dt.tz) == "UTC"
    for name in ("rounds", "bias_by_device_type", "waste_by_cause", "hourly"):
        assert (out / "tables" / f"{name}.csv").exists()


def test_run_set_overrides_are_applied_and_validated(tmp_path):
    out = tmp_path / "run"
    ok = runner.invoke(app, ["run", "--out", str(out), *SMALL, "--set", "rounds.over_selection=1.7"])
    assert ok.exit_code == 0, ok.output
    config = json.loads((out / "config.json").read_text())
    assert config["rounds"]["over_selection"] == 1.7
    bad = runner.invoke(app, ["run", "--out", str(tmp_path / "bad"), *SMALL, "--set", "rounds.over_selection=0.5"])
    assert bad.exit_code == 2
    assert bad.output.strip().splitlines() == [
        f"error: {example_path()}: rounds.over_selection: Input should be greater than or equal to 1 (got 0.5)"
    ]
    assert not (tmp_path / "bad").exists()


@pytest.mark.parametrize(
    ("edit", "fragment"),
    [
        (lambda t: t.replace("share: 0.38", "share: 0.48"), "shares must sum to 1"),
        (lambda t: t.replace("timezone: Asia/Tokyo", "timezone: Asia/Atlantis"),
         "unknown IANA time zone 'Asia/Atlantis'"),
        (lambda t: t.replace("epochs: 2", "epochs: 2\n  epoch_count: 2"), "workload.epoch_count: unknown key"),
        (lambda t: t.replace("aggregation_time: 45s", "aggregation_time: -45s"), "non-negative duration"),
        (lambda t: t.replace("policy: first-come", "policy: nowhere.module:Policy"), "cannot import plug-in"),
        (lambda t: t.replace("epochs: 2", "epochs: two"), "workload.epochs"),
    ],
)
def test_bad_files_fail_in_one_line_without_output(tmp_path, edit, fragment):
    bad = tmp_path / "fleet.yaml"
    bad.write_text(edit(example_path().read_text()))
    for command in (["check", str(bad)], ["run", str(bad), "--out", str(tmp_path / "out")]):
        result = runner.invoke(app, command)
        assert result.exit_code == 2, result.output
        lines = result.output.strip().splitlines()
        assert len(lines) == 1 and lines[0].startswith(f"error: {bad}") and fragment in lines[0], lines
        assert "Traceback" not in result.output
    assert not (tmp_path / "out").exists()


def test_failed_run_leaves_a_previous_output_untouched(tmp_path):
    out = tmp_path / "run"
    assert runner.invoke(app, ["run", "--out", str(out), *SMALL]).exit_code == 0
    before = (out / "summary.json").read_text()
    bad = runner.invoke(app, ["run", "--out", str(out), *SMALL, "--set", "rounds.target_reports=0"])
    assert bad.exit_code == 2
    assert (out / "summary.json").read_text() == before
    assert [p.name for p in tmp_path.iterdir()] == ["run"]


def test_check_accepts_the_example_and_schema_is_json():
    assert runner.invoke(app, ["check", str(example_path())]).exit_code == 0
    schema = json.loads(runner.invoke(app, ["schema"]).output)
    assert schema["title"] == "fleetsim fleet file"


def test_policies_lists_every_builtin():
    output = runner.invoke(app, ["policies"]).output
    for name in fleetsim.BUILTIN_POLICIES:
        assert name in output


def test_missing_file_is_one_line(tmp_path):
    result = runner.invoke(app, ["check", str(tmp_path / "nope.yaml")])
    assert result.exit_code == 2 and result.output.startswith("error: ") and "cannot read" in result.output


def test_check_stress_validates_a_stress_file_against_the_example_or_a_fleet(tmp_path):
    good = tmp_path / "stress.yaml"
    good.write_text("disruptions:\n  - {kind: server-outage, start: 3h, duration: 2h}\n"
                    "  - {kind: crash-surge, start: 1h, duration: 2h, factor: 3}\n")
    ok = runner.invoke(app, ["check", "--stress", str(good)])
    assert ok.exit_code == 0, ok.output
    assert ok.output.strip() == f"{good}: ok (2 disruptions, checked against {example_path()})"
    fleet = tmp_path / "fleet.yaml"
    fleet.write_text(example_path().read_text(encoding="utf-8"), encoding="utf-8")
    assert runner.invoke(app, ["check", "--stress", str(good), str(fleet)]).exit_code == 0
    bad = tmp_path / "bad.yaml"
    bad.write_text("disruptions:\n  - kind: crash-surge\n    start: 1h\n    duration: 2h\n    factor: -3\n")
    refused = runner.invoke(app, ["check", "--stress", str(bad)])
    lines = refused.output.strip().splitlines()
    assert refused.exit_code == 2 and len(lines) == 1, refused.output
    assert lines[0].startswith(f"error: {bad}: disruptions.0.factor")
    # A device type the fleet does not have is refused naming the stress file.
    other = tmp_path / "other.yaml"
    other.write_text("disruptions:\n  - {kind: crash-surge, start: 1h, duration: 2h, factor: 3, "
                     "device_types: [no-such-device]}\n")
    unknown = runner.invoke(app, ["check", "--stress", str(other)])
    assert unknown.exit_code == 2 and unknown.output.startswith(f"error: {other}: disruptions.0")


def test_check_without_a_file_or_stress_is_a_usage_line():
    result = runner.invoke(app, ["check"])
    assert result.exit_code == 2 and result.output == "error: file: missing; see --help\n"


def test_first_seed_out_of_range_is_one_line(tmp_path):
    result = runner.invoke(app, ["sweep", "--first-seed", "-1", "--vary", "rounds.over_selection=1.1",
                                 "--out", str(tmp_path / "s")])
    assert result.exit_code == 2
    assert result.output == "error: --first-seed: expected a whole number from 0 to 2**63 - 1 (got -1)\n"
    assert not (tmp_path / "s").exists()


def test_summary_names_the_fleet_file_by_its_absolute_path(tmp_path, monkeypatch):
    fleet = tmp_path / "f.yaml"
    fleet.write_text(example_path().read_text(encoding="utf-8"), encoding="utf-8")
    monkeypatch.chdir(tmp_path)
    result = runner.invoke(app, ["run", "f.yaml", "--out", "run", "--devices", "800", "--days", "0.25"])
    assert result.exit_code == 0, result.output
    assert json.loads((tmp_path / "run" / "summary.json").read_text())["fleet_file"] == str(fleet.resolve())
