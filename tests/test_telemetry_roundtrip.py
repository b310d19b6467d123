"""Telemetry end to end: logs drawn from a known fleet, fitted back, simulated and replayed."""

from __future__ import annotations

import json
import subprocess
import sys

import numpy as np
import pytest

import fleetsim
from fleetsim.config import build_config, example_path, load_config, read_yaml
from fleetsim.fit import fit_fleet
from fleetsim.replay import replay_from_frame
from fleetsim.telemetry.generate import generate_telemetry


@pytest.fixture(scope="module")
def known():
    config = load_config(example_path(), ["fleet.devices=10000", "horizon.duration=3d"])
    logs = generate_telemetry(config, 0)
    fitted = build_config(fit_fleet(logs.intervals, None, logs.traits, read_yaml(example_path())).fleet)
    return config, logs, fitted


def figures(config, seeds=range(2), **extra):
    runs = [fleetsim.simulate(config, seed=s, **extra).summary for s in seeds]
    return {
        "committed_per_hour": np.mean([r["rounds"]["committed_per_hour"] for r in runs]),
        "accepted": np.mean([r["participations"]["accepted"] for r in runs]),
        "shares": {t: np.mean([r["bias"]["by_device_type"][t]["report_share"] for r in runs])
                   for t in config.fleet.device_types},
    }


def test_the_fitted_fleet_runs_like_the_fleet_its_logs_came_from(known):
    config, _, fitted = known
    original, refit = figures(config), figures(fitted)
    # Stated tolerances (10,000 devices, 3 days, 2 seeds; measured over 3: -3.5% and -1.2%): committed
    # rounds per hour within 10%, accepted participations within 5%, every type's report share
    # within 0.02. A fit that lost the settled state or the hourly profiles misses these.
    assert refit["committed_per_hour"] == pytest.approx(original["committed_per_hour"], rel=0.10)
    assert refit["accepted"] == pytest.approx(original["accepted"], rel=0.05)
    for kind, share in original["shares"].items():
        assert refit["shares"][kind] == pytest.approx(share, abs=0.02), kind


def test_replaying_the_generated_logs_runs_like_the_generating_model(known):
    config, logs, _ = known
    replay = replay_from_frame(logs.intervals, config.horizon.start.timestamp())
    model = figures(config, **{})
    replayed = figures(config, replay=replay)
    # The logs start at the horizon: the replay has no warm-up history (no one rests at the
    # start), so its first hours accept more; within 5% over three days.
    assert replayed["accepted"] == pytest.approx(model["accepted"], rel=0.05)
    assert replayed["committed_per_hour"] == pytest.approx(model["committed_per_hour"], rel=0.10)
    for kind, share in model["shares"].items():
        assert replayed["shares"][kind] == pytest.approx(share, abs=0.02), kind


def test_the_commands_chain_from_logs_to_a_fitted_file_and_a_replayed_run(tmp_path):
    def fleetsim_cli(*args: str) -> subprocess.CompletedProcess:
        return subprocess.run([sys.executable, "-m", "fleetsim.cli.app", *args], capture_output=True, text=True,
                              timeout=300, check=False)

    logs, fitted, run = tmp_path / "logs", tmp_path / "fitted.yaml", tmp_path / "run"
    done = fleetsim_cli("telemetry", str(example_path()), "--devices", "1500", "--days", "1", "--out", str(logs),
                        "--snapshots-every", "1h")
    assert done.returncode == 0, done.stderr
    done = fleetsim_cli("fit", str(logs), "--out", str(fitted), "--held-out", "0")  # goodness: tests/test_goodness.py
    assert done.returncode == 0, done.stderr
    assert "wrote" in done.stdout
    side = json.loads(fitted.with_name("fitted.yaml.fit.json").read_text())
    assert side and fitted.read_text().startswith("# fleetsim fit")
    for source in ("intervals.csv", "snapshots.csv"):
        out = run / source
        done = fleetsim_cli("run", str(fitted), "--replay", str(logs / source), "--out", str(out))
        assert done.returncode == 0, done.stderr
        summary = json.loads((out / "summary.json").read_text())
        assert summary["replay"]["devices"] == 1500 and summary["devices"] == 1500
    # A horizon the logs do not cover is refused in one line, exit 2, nothing written.
    done = fleetsim_cli("run", str(fitted), "--days", "2", "--replay", str(logs), "--out", str(run / "two"))
    assert done.returncode == 2 and "not within the logs' span" in done.stderr
    assert not (run / "two").exists()
