"""Smoke versions of the benchmarks (scale.py, fleet_model.py): their code paths at a small size, untimed."""

import importlib.util
import json
import subprocess
import sys
from pathlib import Path

ROOT = Path(__file__).resolve().parents[1]


def load_scale():
    spec = importlib.util.spec_from_file_location("scale", ROOT / "benchmarks" / "scale.py")
    module = importlib.util.module_from_spec(spec)
    spec.loader.exec_module(module)
    return module


def test_a_case_reports_every_column():
    row = load_scale().run_case(3000, 0.25)
    for key in ("devices", "days", "wall_s", "peak_mb", "events", "events_per_s", "rounds", "participations"):
        assert key in row
    assert row["events"] == row["rounds"] + row["participations"] > 0


def test_the_command_runs_its_quick_table(tmp_path):
    done = subprocess.run([sys.executable, str(ROOT / "benchmarks" / "scale.py"), "--quick", "--only", "devices"],
                          cwd=ROOT, capture_output=True, text=True, timeout=300, check=False)
    assert done.returncode == 0, done.stderr
    assert "slope of log(wall) on log(devices)" in done.stdout
    report = json.loads((ROOT / "benchmarks" / "out" / "scale-quick.json").read_text())
    assert {r["devices"] for r in report["rows"]} == {2000, 4000}


def test_the_fleet_model_benchmark_times_a_whole_run_of_a_checkout(tmp_path):
    # Smoke version of benchmarks/fleet_model.py: one whole `fleetsim run` of this checkout.
    spec = importlib.util.spec_from_file_location("fleet_model", ROOT / "benchmarks" / "fleet_model.py")
    module = importlib.util.module_from_spec(spec)
    spec.loader.exec_module(module)
    row = module.run_command(ROOT, 2000, 0.25, tmp_path / "run")
    assert row["wall_s"] > 0 and row["peak_mb"] > 50 and row["attempted"] >= row["committed"] >= 0
    assert (tmp_path / "run" / "summary.json").is_file()


def test_the_round_protocol_benchmark_runs_its_quick_tables():
    done = subprocess.run([sys.executable, str(ROOT / "benchmarks" / "round_protocol.py"), "--quick"],
                          cwd=ROOT, capture_output=True, text=True, timeout=600, check=False)
    assert done.returncode == 0, done.stderr
    out = done.stdout
    assert "pacing on against off" in out and "pipelining" in out and "one model against two" in out
    # Every table row checked the invariants (no device in two rounds at once, rest after each).
    assert out.count("hold") >= 5 and "BROKEN" not in out
    assert "highlights" in out and "ranking" in out


def test_the_telemetry_benchmark_runs_its_quick_steps():
    # Smoke version of benchmarks/telemetry.py: every step at 2,000 devices x 1 day, untimed.
    spec = importlib.util.spec_from_file_location("telemetry_bench", ROOT / "benchmarks" / "telemetry.py")
    module = importlib.util.module_from_spec(spec)
    spec.loader.exec_module(module)
    figures = module.main(["--quick", "--snapshot-rows", "20000"])
    assert figures["interval_rows"] > 10_000 and figures["snapshot_rows"] > figures["snapshot_rows_fitted"] > 0
    assert figures["replay_ratio"] > 0
