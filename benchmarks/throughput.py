"""Sweep throughput: the whole `fleetsim sweep` command, this engine against an earlier one.

Run from the repository root, with an earlier copy of this repository beside it (a clean
checkout, e.g. ``git worktree add /tmp/before <commit>``):

    python benchmarks/throughput.py --before /tmp/before                  # 10 cells x 2 seeds, 100,000 x 7 d
    python benchmarks/throughput.py --before /tmp/before --cells 100 --seeds 5   # the full sweep
    python benchmarks/throughput.py --before /tmp/before --devices 5000 --days 0.5   # a smoke run

The full grid is rounds.over_selection 1.0..1.9 by 0.1 (10 values) x rounds.report_deadline
4m..13m by 1m (10 values) = 100 cells of the example fleet (fleets/inkwren.yaml). ``--cells
10`` runs a 5 x 2 sub-grid spread over it (over_selection 1.0, 1.2, 1.4, 1.6, 1.8 x deadline
4m, 10m), so that cheap and dear cells are both in it. Each pass is one `fleetsim sweep` in a
fresh process (imports, worker start-up, every run, metrics, the records and the study folder
with its plots), from an empty study folder, on ``--workers`` local processes, timed by wall
clock, with the CPU time (user + system) of the command and its workers, which other
people's processes disturb less than the wall. The earlier copy and this one run in the same
invocation, alternating, so that the ratio compares them under the same load; the load
average (``uptime``) is recorded before and after each pass. Both passes must give the same
runs table (the figures of every run).

Extrapolation to the full sweep: the pass's fixed part (start-up, imports, the writing at the
end) is its wall time less the runs' time per worker (the sum of the runs' own times, from
the study's records, / workers); the full sweep is then taken as that fixed part + the mean
run's time x 500 / workers. Also printed: the plain scaling wall x 500 / runs, which counts the
fixed part 500 / runs times over and so overstates. Prints a Markdown table for
benchmarks/README.md and writes the figures as JSON (``--json``).
"""

from __future__ import annotations

import argparse
import json
import os
import platform
import resource
import subprocess
import sys
import tempfile
import time
from pathlib import Path

import pandas as pd

ROOT = Path(__file__).resolve().parents[1]

FULL_OVER = "1.0:1.9:0.1"
FULL_DEADLINE = "4m:13m:1m"
SUB_OVER = "1.0,1.2,1.4,1.6,1.8"
SUB_DEADLINE = "4m,10m"
FULL_RUNS = 500


def grid(cells: int) -> list[str]:
    """The --vary options of a sweep of ``cells`` cells (10: the 5 x 2 sub-grid, 100: the full grid)."""
    if cells == 100:
        return ["--vary", f"rounds.over_selection={FULL_OVER}", "--vary", f"rounds.report_deadline={FULL_DEADLINE}"]
    if cells == 10:
        return ["--vary", f"rounds.over_selection={SUB_OVER}", "--vary", f"rounds.report_deadline={SUB_DEADLINE}"]
    if cells == 2:
        return ["--vary", "rounds.over_selection=1.0,1.8"]
    raise SystemExit(f"--cells {cells}: expected 2, 10 or 100")


def uptime() -> str:
    """The machine's ``uptime`` line (load averages over 1, 5 and 15 minutes)."""
    try:
        return subprocess.run(["uptime"], capture_output=True, text=True, check=True).stdout.strip()
    except (OSError, subprocess.CalledProcessError):
        return "load average: {:.2f}, {:.2f}, {:.2f}".format(*os.getloadavg())


def run_sweep(checkout: Path, args: argparse.Namespace, out: Path) -> dict:
    """One whole `fleetsim sweep` of ``checkout`` (its own fleetsim first on the path)."""
    code = "import sys; from fleetsim.cli import main; sys.argv[0] = 'fleetsim'; sys.exit(main())"
    env = dict(os.environ, PYTHONPATH=str(checkout))
    command = [sys.executable, "-c", code, "sweep", str(ROOT / "fleets" / "inkwren.yaml"),
               "--devices", str(args.devices), "--days", str(args.days), *grid(args.cells),
               "--seeds", str(args.seeds), "--workers", str(args.workers), "--out", str(out)]
    load_before = uptime()
    used = resource.getrusage(resource.RUSAGE_CHILDREN)
    start = time.perf_counter()
    done = subprocess.run(command, cwd=checkout, env=env, capture_output=True, text=True)
    wall = time.perf_counter() - start
    after = resource.getrusage(resource.RUSAGE_CHILDREN)  # the command and its workers, once all have ended
    cpu = (after.ru_utime - used.ru_utime) + (after.ru_stime - used.ru_stime)
    if done.returncode != 0:
        raise SystemExit(f"{checkout}: fleetsim sweep failed:\n{done.stderr[-3000:]}")
    records = [json.loads(path.read_text()) for path in (out / "cells").glob("*.json")]
    run_s = [float(r["elapsed_s"]) for r in records if r.get("elapsed_s") is not None]
    return {"wall_s": wall, "cpu_s": cpu, "runs": len(records), "run_s_sum": sum(run_s),
            "run_s_mean": sum(run_s) / len(run_s) if run_s else float("nan"),
            "load_before": load_before, "load_after": uptime()}


def extrapolate(row: dict, workers: int) -> dict:
    """The full sweep's wall time from one pass (the module's rule), s."""
    fixed = max(row["wall_s"] - row["run_s_sum"] / workers, 0.0)
    return {"fixed_s": fixed, "full_s": fixed + row["run_s_mean"] * FULL_RUNS / workers,
            "full_linear_s": row["wall_s"] * FULL_RUNS / row["runs"]}


IGNORED = ("config_hash",)
"""Columns left out of the agreement: the hash of the validated configuration changes whenever
the fleet-file schema gains a key (a default then appears in it), whatever the engine."""


def same_runs(a: Path, b: Path) -> str:
    """Whether two study folders hold the same runs table (every figure of every run but
    :data:`IGNORED`)."""
    left, right = pd.read_parquet(a / "runs.parquet"), pd.read_parquet(b / "runs.parquet")
    shared = [c for c in left.columns if c in right.columns and c not in IGNORED]
    extra = sorted(set(left.columns) ^ set(right.columns))
    differing = [c for c in shared if not left[c].equals(right[c])]
    if differing:
        return f"DIFFERENT in {len(differing)} columns: {', '.join(differing[:8])}"
    ignored = [c for c in IGNORED if c in left.columns and not left[c].equals(right.get(c, left[c]))]
    return ("identical" + (f" (columns in one only: {', '.join(extra[:8])})" if extra else "")
            + (f"; {', '.join(ignored)} differs (the configuration schema, not the engine)" if ignored else ""))


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__, formatter_class=argparse.RawDescriptionHelpFormatter)
    parser.add_argument("--before", type=Path, required=True, help="an earlier copy of this repository")
    parser.add_argument("--cells", type=int, default=10, help="2, 10 (a sub-grid) or 100 (the full grid)")
    parser.add_argument("--seeds", type=int, default=2)
    parser.add_argument("--devices", type=int, default=100_000)
    parser.add_argument("--days", type=float, default=7.0)
    parser.add_argument("--workers", type=int, default=2)
    parser.add_argument("--repeats", type=int, default=1)
    parser.add_argument("--json", type=Path, default=None, help="write the figures here as JSON")
    args = parser.parse_args()
    rows = []
    with tempfile.TemporaryDirectory() as tmp:
        for r in range(args.repeats):
            for label, checkout in (("before", args.before.resolve()), ("now", ROOT)):
                row = {"engine": label, "repeat": r, **run_sweep(checkout, args, Path(tmp) / f"{label}{r}")}
                row.update(extrapolate(row, args.workers))
                rows.append(row)
                print(json.dumps(row), flush=True)
        agreement = same_runs(Path(tmp) / "before0", Path(tmp) / "now0")
    machine = (f"{platform.processor() or platform.machine()}, nproc {os.cpu_count()}, "
               f"Python {platform.python_version()}")
    size = f"{args.cells} cells x {args.seeds} seeds at {args.devices:,} devices x {args.days:g} d"
    lines = [f"`python benchmarks/throughput.py --before {args.before} --cells {args.cells} --seeds {args.seeds}"
             f"{'' if args.devices == 100_000 else f' --devices {args.devices}'}"
             f"{'' if args.days == 7 else f' --days {args.days:g}'}` ({size}, {args.workers} workers; {machine})",
             "", "| pass | engine | runs | wall s | CPU s | mean run s | fixed s | full 100 x 5, s (min) "
             "| load before | load after |", "| ---: | --- | ---: | ---: | ---: | ---: | ---: | ---: | --- | --- |"]
    for row in rows:
        load = [text.split("load average:")[-1].strip() for text in (row["load_before"], row["load_after"])]
        lines.append(f"| {row['repeat'] + 1} | {row['engine']} | {row['runs']} | {row['wall_s']:.1f} | "
                     f"{row['cpu_s']:.1f} | {row['run_s_mean']:.2f} | {row['fixed_s']:.1f} | {row['full_s']:.0f} "
                     f"({row['full_s'] / 60:.1f}) | {load[0]} | {load[1]} |")
    for r in range(args.repeats):
        pair = {row["engine"]: row for row in rows if row["repeat"] == r}
        lines.append("")
        lines.append(f"Pass {r + 1}: wall before / now = **{pair['before']['wall_s'] / pair['now']['wall_s']:.2f}**, "
                     f"mean run before / now = {pair['before']['run_s_mean'] / pair['now']['run_s_mean']:.2f}, "
                     f"CPU before / now = {pair['before']['cpu_s'] / pair['now']['cpu_s']:.2f}; "
                     f"plain scaling of the wall to 500 runs: before {pair['before']['full_linear_s'] / 60:.1f} min, "
                     f"now {pair['now']['full_linear_s'] / 60:.1f} min.")
    lines.append(f"Runs tables of the first pass, before against now: {agreement}.")
    print("\n".join(lines))
    if args.json is not None:
        args.json.write_text(json.dumps({"rows": rows, "agreement": agreement, "machine": machine}, indent=1))


if __name__ == "__main__":
    main()
