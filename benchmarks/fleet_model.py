"""What the widened fleet model costs: whole `fleetsim run` commands, this engine against an earlier one.

Run from the repository root, with an earlier checkout of this repository beside it
(e.g. ``git worktree add /tmp/before <commit>``):

    python benchmarks/fleet_model.py --before /tmp/before            # 1M x 7 d both, 10M x 1 d now
    python benchmarks/fleet_model.py --before /tmp/before --quick    # 20,000 x 1 d (a smoke run)

Each case is one `fleetsim run` of the checkout's own bundled example in a fresh process
(imports, warm-up, metrics and writing included), timed by wall clock; its peak resident
memory is the child's maximum RSS. The earlier checkout runs its own example, the current
one its own (the widened Inkwren fleet), in the same invocation, alternating, so the ratio
compares like with like on the machine's load of the moment. Results are recorded in
benchmarks/README.md.
"""

from __future__ import annotations

import argparse
import json
import os
import platform
import subprocess
import sys
import tempfile
import time
from pathlib import Path

ROOT = Path(__file__).resolve().parents[1]


def run_command(checkout: Path, devices: int, days: float, out: Path) -> dict:
    """One whole `fleetsim run` of ``checkout``'s example at this size; wall s and peak MB."""
    code = ("import sys; from fleetsim.cli.app import app; "
            "sys.argv = ['fleetsim'] + sys.argv[1:]; app()")
    env = dict(os.environ, PYTHONPATH=str(checkout))
    args = [sys.executable, "-c", code, "run", str(checkout / "fleets" / "inkwren.yaml"), "--out", str(out),
            "--force", "--set", f"fleet.devices={devices}", "--set", f"horizon.duration={days}d"]
    start = time.perf_counter()
    with tempfile.TemporaryFile("w+") as err:
        child = subprocess.Popen(args, cwd=checkout, env=env, stdout=subprocess.DEVNULL, stderr=err, text=True)
        _, status, usage = os.wait4(child.pid, 0)  # this child's own peak resident memory
        wall = time.perf_counter() - start
        child.returncode = os.waitstatus_to_exitcode(status)
        if child.returncode != 0:
            err.seek(0)
            raise SystemExit(f"{checkout}: fleetsim run failed:\n{err.read()[-2000:]}")
    summary = json.loads((out / "summary.json").read_text())
    return {"devices": devices, "days": days, "wall_s": wall,
            "peak_mb": usage.ru_maxrss / 1024,
            "committed": summary["rounds"]["committed"], "attempted": summary["rounds"]["attempted"]}


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__, formatter_class=argparse.RawDescriptionHelpFormatter)
    parser.add_argument("--before", type=Path, required=True, help="an earlier checkout of this repository")
    parser.add_argument("--quick", action="store_true")
    parser.add_argument("--repeats", type=int, default=2)
    args = parser.parse_args()
    size = (20_000, 1) if args.quick else (1_000_000, 7)
    rows = []
    with tempfile.TemporaryDirectory() as tmp:
        for r in range(args.repeats):
            for label, checkout in (("before", args.before.resolve()), ("now", ROOT)):
                row = run_command(checkout, *size, Path(tmp) / f"{label}{r}")
                rows.append({"engine": label, **row})
                print(json.dumps(rows[-1]), flush=True)
        if not args.quick:
            row = run_command(ROOT, 10_000_000, 1, Path(tmp) / "big")
            rows.append({"engine": "now", **row})
            print(json.dumps(rows[-1]), flush=True)
    best = {label: min(x["wall_s"] for x in rows if x["engine"] == label and x["devices"] == size[0])
            for label in ("before", "now")}
    print(f"machine: {platform.processor() or platform.machine()}, {os.cpu_count()} cores, "
          f"load average {os.getloadavg()[0]:.1f}, Python {platform.python_version()}")
    print(f"{size[0]:,} devices x {size[1]} d, best of {args.repeats}: before {best['before']:.1f} s, "
          f"now {best['now']:.1f} s, ratio {best['now'] / best['before']:.2f}")


if __name__ == "__main__":
    main()
