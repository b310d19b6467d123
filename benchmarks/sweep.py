"""Benchmark: a 48-cell x 5-seed sweep of the example fleet, on 1 and on 2 local processes.

The grid: rounds.over_selection 1.0..1.5 by 0.1 (6 values) x rounds.report_deadline 4m..10m
by 2m (4 values) x selection.policy first-come, quick-finish (2 values) = 48 cells, each
under seeds 0..4, with the example fleet (fleets/inkwren.yaml) at 20,000 devices for 3
simulated days: 240 runs per pass. Each pass starts from an empty study folder (nothing is
reused), and the passes must give identical tables.

    python benchmarks/sweep.py                      # the full benchmark (about half an hour on 2 cores)
    python benchmarks/sweep.py --devices 3000 --days 0.5 --seeds 2   # a quick smoke run

Prints a Markdown section with the wall times, the speed-up of 2 processes over 1 and the
machine, for benchmarks/sweep-results.md, and writes the same figures as JSON (--json).
"""

from __future__ import annotations

import argparse
import json
import os
import platform
import shutil
import subprocess
import sys
import tempfile
import time
from datetime import datetime, timezone
from pathlib import Path

import pandas as pd

import fleetsim
from fleetsim.study import FleetFile, make_executor, parse_axis, run_sweep, write_sweep
from fleetsim.study.store import engine_fingerprint

VARY = [
    "rounds.over_selection=1.0:1.5:0.1",
    "rounds.report_deadline=4m:10m:2m",
    "selection.policy=first-come,quick-finish",
]


def machine() -> dict[str, object]:
    """CPU count, CPU model, memory and load, read from the operating system."""
    model = platform.processor() or "unknown"
    try:
        for line in Path("/proc/cpuinfo").read_text().splitlines():
            if line.startswith("model name"):
                model = line.split(":", 1)[1].strip()
                break
    except OSError:
        pass
    memory_gb = None
    try:
        for line in Path("/proc/meminfo").read_text().splitlines():
            if line.startswith("MemTotal"):
                memory_gb = round(int(line.split()[1]) / 1024 / 1024, 1)
    except OSError:
        pass
    return {
        "nproc": os.cpu_count(),
        "cpu_model": model,
        "memory_gib": memory_gb,
        "load_average_before": os.getloadavg() if hasattr(os, "getloadavg") else None,
        "python": platform.python_version(),
        "fleetsim": fleetsim.__version__,
        "system": f"{platform.system()} {platform.release()}",
    }


def source_state() -> dict[str, object]:
    """The git commit of the source tree, whether fleetsim/ has uncommitted changes, and the
    engine fingerprint the study keys its runs by."""
    root = Path(__file__).resolve().parents[1]

    def git(*args: str) -> str | None:
        try:
            return subprocess.run(["git", *args], cwd=root, capture_output=True, text=True, check=True).stdout.strip()
        except (OSError, subprocess.CalledProcessError):
            return None

    status = git("status", "--porcelain", "--", "fleetsim")
    return {"commit": git("rev-parse", "--short", "HEAD"), "fleetsim_dirty": bool(status),
            "engine": engine_fingerprint.__wrapped__()}


def one_pass(base: FleetFile, seeds: range, workers: int, folder: Path) -> tuple[float, pd.DataFrame, object]:
    axes = [parse_axis(text) for text in VARY]
    started = time.perf_counter()
    result = run_sweep(base, axes, seeds, executor=make_executor(workers), folder=folder)
    write_sweep(result, folder)
    return time.perf_counter() - started, pd.read_parquet(folder / "runs.parquet"), result


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    parser.add_argument("--devices", type=int, default=20_000)
    parser.add_argument("--days", type=float, default=3.0)
    parser.add_argument("--seeds", type=int, default=5)
    parser.add_argument("--json", type=Path, default=None, help="also write the figures here")
    parser.add_argument("--keep", type=Path, default=None, help="keep the 2-process study folder here")
    args = parser.parse_args()

    file = Path(__file__).resolve().parents[1] / "fleets" / "inkwren.yaml"
    base = FleetFile.read(file, [f"fleet.devices={args.devices}", f"horizon.duration={args.days}d"])
    seeds = range(args.seeds)
    host = machine()
    before = source_state()
    scratch = Path(tempfile.mkdtemp(prefix="fleetsim-sweep-bench-"))
    try:
        times: dict[int, float] = {}
        tables: dict[int, pd.DataFrame] = {}
        result = None
        for workers in (1, 2):
            seconds, table, result = one_pass(base, seeds, workers, scratch / f"workers-{workers}")
            times[workers], tables[workers] = seconds, table
            print(f"{workers} process(es): {seconds:.1f} s", file=sys.stderr)
        pd.testing.assert_frame_equal(tables[1], tables[2])
        if args.keep is not None:
            shutil.copytree(scratch / "workers-2", args.keep, dirs_exist_ok=True)
    finally:
        shutil.rmtree(scratch, ignore_errors=True)

    after = source_state()
    if after["engine"] != before["engine"]:
        sys.exit("the engine's source changed during the benchmark; run it again on a quiet tree")
    runs = len(tables[1])
    figures = {
        "date_utc": datetime.now(timezone.utc).strftime("%Y-%m-%dT%H:%M:%SZ"),
        "grid": VARY,
        "cells": runs // args.seeds,
        "seeds": args.seeds,
        "runs": runs,
        "devices": args.devices,
        "days": args.days,
        "wall_s_1_process": round(times[1], 1),
        "wall_s_2_processes": round(times[2], 1),
        "speedup_2_over_1": round(times[1] / times[2], 2),
        "tables_identical": True,
        "load_average_after": os.getloadavg() if hasattr(os, "getloadavg") else None,
        "recommendation": getattr(getattr(result, "recommendation", None), "label", None),
        "machine": host,
        "source": before,
    }
    if args.json is not None:
        args.json.write_text(json.dumps(figures, indent=2) + "\n")
    print(f"""## Sweep benchmark ({figures['date_utc'][:10]})

{figures['cells']} cells x {args.seeds} seeds = {runs} runs of the example fleet at {args.devices:,} devices for
{args.days:g} simulated days; grid {', '.join(VARY)}.

| processes | wall time | per run |
|---|---|---|
| 1 | {times[1]:.1f} s | {times[1] / runs:.2f} s |
| 2 | {times[2]:.1f} s | {times[2] / runs:.2f} s |

Speed-up of 2 processes over 1: {times[1] / times[2]:.2f}x. The two passes gave identical tables.

Machine: {host['nproc']} CPUs ({host['cpu_model']}), {host['memory_gib']} GiB RAM, {host['system']},
Python {host['python']}, fleetsim {host['fleetsim']}; load average before {host['load_average_before']},
after {figures['load_average_after']}. Source: commit {before['commit']}
{'with uncommitted changes in fleetsim/' if before['fleetsim_dirty'] else '(clean)'},
engine fingerprint {before['engine']}.
""")


if __name__ == "__main__":
    main()
