"""Telemetry at scale: generating logs, fitting a fleet from them, replaying them.

Run from the repository root:

    python benchmarks/telemetry.py            # 100,000 devices x 7 days
    python benchmarks/telemetry.py --quick    # 2,000 devices x 1 day (a smoke run)

Steps, each timed in this process (the example fleet file; seed 0):

1. synthetic telemetry of the example (``fleetsim.telemetry.generate_telemetry``): interval
   logs and check-in snapshots (one kept check-in every 10 minutes on average in the smoke run)
   (the full run keeps one check-in every 100 minutes: about 10 million snapshot rows);
2. the fit from the interval logs alone and from the snapshots alone (``fleetsim.fit.fit_fleet``);
3. ``simulate`` of the example against ``simulate`` with the interval logs replayed
   (``fleetsim.replay``) on the same devices and horizon, twice each, alternating.

Rows and seconds are printed; results are recorded in benchmarks/README.md.

    python benchmarks/telemetry.py --fit-command LOGS [--before DIR]

times instead the whole command ``fleetsim fit LOGS --signals-from snapshots --out ...`` (reading,
validation, the fit, the goodness of fit, writing) in a subprocess, with this checkout and,
given ``--before``, with another checkout of the repository (e.g. the snapshots of
``fleetsim telemetry --devices 100000 --days 7 --snapshots-every 100min --format parquet``:
about 10 million rows; ``--devices 10000``: about 1 million).
"""

from __future__ import annotations

import argparse
import os
import platform
import subprocess
import sys
import tempfile
import time
from pathlib import Path

ROOT = Path(__file__).resolve().parents[1]
sys.path.insert(0, str(ROOT))

import fleetsim  # noqa: E402


def timed(label: str, work):
    start = time.perf_counter()
    out = work()
    wall = time.perf_counter() - start
    print(f"{label:44} {wall:8.1f} s", flush=True)
    return out, wall


def fit_command(logs: str, checkout: Path) -> float:
    """Wall seconds of the whole ``fleetsim fit`` command on ``logs`` with the code in ``checkout``."""
    with tempfile.TemporaryDirectory() as out:
        code = "import sys; from fleetsim.cli import main; sys.argv = ['fleetsim'] + sys.argv[1:]; main()"
        env = dict(os.environ, PYTHONPATH=str(checkout))
        start = time.perf_counter()
        subprocess.run([sys.executable, "-c", code, "fit", logs, "--signals-from", "snapshots", "--out",
                        str(Path(out) / "fitted.yaml")], env=env, check=True, stdout=subprocess.DEVNULL)
        return time.perf_counter() - start


def main(argv: list[str] | None = None) -> dict:
    parser = argparse.ArgumentParser(description=__doc__, formatter_class=argparse.RawDescriptionHelpFormatter)
    parser.add_argument("--quick", action="store_true")
    parser.add_argument("--snapshot-rows", type=int, default=None,
                        help="fit from only the first N snapshot rows (whole devices), to time a smaller fit")
    parser.add_argument("--fit-command", metavar="LOGS", help="time the whole fleetsim fit command on LOGS")
    parser.add_argument("--before", metavar="DIR", help="with --fit-command: also time the checkout in DIR")
    args = parser.parse_args(argv)
    if args.fit_command:
        figures = {}
        for label, checkout in [("after", ROOT)] + ([("before", Path(args.before))] if args.before else []):
            load = os.getloadavg()[0]
            figures[label] = fit_command(args.fit_command, checkout)
            print(f"fleetsim fit {args.fit_command} ({label}, {checkout}): {figures[label]:.1f} s; load average "
                  f"{load:.2f} before, {os.getloadavg()[0]:.2f} after", flush=True)
        return figures
    from fleetsim.config import read_yaml
    from fleetsim.fit import fit_fleet
    from fleetsim.replay import replay_from_frame
    from fleetsim.telemetry.generate import generate_telemetry

    devices, days = (2_000, 1) if args.quick else (100_000, 7)
    print(f"machine: {platform.processor() or platform.machine()}, {os.cpu_count()} cores, "
          f"load average {os.getloadavg()[0]:.2f}; python {platform.python_version()}; "
          f"{devices:,} devices x {days} d")
    config = fleetsim.load_config(fleetsim.example_path(), [f"fleet.devices={devices}", f"horizon.duration={days}d",
                                                            "horizon.warmup=0s"])
    # Snapshots: a kept check-in every 10 minutes in the smoke run; in the full run one every
    # 100 minutes, about 10 million rows (the size the fit is timed at).
    every = 600.0 if args.quick else 6000.0
    logs, _ = timed("generate intervals and snapshots", lambda: generate_telemetry(config, 0, snapshots_every=every))
    print(f"  {len(logs.intervals):,} interval rows, {len(logs.snapshots):,} snapshot rows")
    template = read_yaml(fleetsim.example_path())
    figures = {"interval_rows": len(logs.intervals), "snapshot_rows": len(logs.snapshots)}
    _, figures["fit_intervals_s"] = timed("fit from interval logs",
                                          lambda: fit_fleet(logs.intervals, None, logs.traits, template))
    snapshots = logs.snapshots
    if args.snapshot_rows is not None:  # whole devices: cut at a device boundary
        last = snapshots["device_id"].iloc[min(args.snapshot_rows, len(snapshots)) - 1]
        snapshots = snapshots[snapshots["device_id"] <= last]
    figures["snapshot_rows_fitted"] = len(snapshots)
    _, figures["fit_snapshots_s"] = timed(f"fit from snapshots ({len(snapshots):,} rows)",
                                          lambda: fit_fleet(None, snapshots, logs.traits, template))
    replay = replay_from_frame(logs.intervals, config.horizon.start.timestamp())
    model, replayed = [], []
    for _ in range(2):
        model.append(timed("simulate, the model's signals", lambda: fleetsim.simulate(config, seed=0))[1])
        replayed.append(timed("simulate, the logs replayed", lambda: fleetsim.simulate(config, seed=0,
                                                                                   replay=replay))[1])
    figures["replay_ratio"] = min(replayed) / min(model)
    print(f"replay / model, best of 2: {figures['replay_ratio']:.2f}")
    return figures


if __name__ == "__main__":
    main()
