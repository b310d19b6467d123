"""Start-up benchmark: how long the quick commands take, and what they import.

Run from the repository root:

    python benchmarks/startup.py            # 7 runs of each command
    python benchmarks/startup.py --runs 3

Each run is a fresh ``python -c`` process that loads the ``fleetsim`` command and runs it
(``--help``, ``check`` on the bundled example, ``schema``), as the console script does; the
figures are the median wall time from process start to exit (with the fastest and slowest
run) and the median CPU time (user + system), in seconds. One more run per
command lists the heavy libraries (plotting, statistics, data frames) left in
``sys.modules`` at exit: it should be none. The limit the project keeps is 0.5 s
(benchmarks/README.md records the figures and the machine).
"""

from __future__ import annotations

import argparse
import json
import os
import platform
import resource
import statistics
import subprocess
import sys
import time
from pathlib import Path

ROOT = Path(__file__).resolve().parents[1]

HEAVY = ("matplotlib", "scipy", "pandas", "pyarrow", "dask", "statsmodels")
"""Libraries the quick commands must not load."""

COMMANDS = {
    "--help": ["--help"],
    "check": ["check", str(ROOT / "fleetsim" / "data" / "inkwren.yaml")],
    "schema": ["schema"],
}

_RUN = "import sys; sys.argv = ['fleetsim', *sys.argv[1:]]; from fleetsim.cli import main; main()"

# Runs the command, then prints on stderr (last line) the heavy modules it imported.
_PROBE = """
import json, sys
sys.argv = ['fleetsim', *sys.argv[1:]]
from fleetsim.cli import main
try:
    main()
except SystemExit:
    pass
heavy = sorted({name.split('.')[0] for name in sys.modules} & set(HEAVY_NAMES))
print(json.dumps(heavy), file=sys.stderr)
""".replace("HEAVY_NAMES", repr(HEAVY))


def timed(args: list[str]) -> tuple[float, float]:
    """Wall time and CPU time (user + system) of one fresh process running the command, s.

    The CPU time depends less on what else the machine is doing; raises if the command fails.
    """
    before = resource.getrusage(resource.RUSAGE_CHILDREN)
    start = time.perf_counter()
    subprocess.run([sys.executable, "-c", _RUN, *args], check=True, stdout=subprocess.DEVNULL, cwd=ROOT)
    wall = time.perf_counter() - start
    after = resource.getrusage(resource.RUSAGE_CHILDREN)
    return wall, (after.ru_utime - before.ru_utime) + (after.ru_stime - before.ru_stime)


def heavy_modules(args: list[str]) -> list[str]:
    """The heavy libraries a fresh process running the command has loaded when it ends."""
    done = subprocess.run([sys.executable, "-c", _PROBE, *args], capture_output=True, text=True, cwd=ROOT)
    return list(json.loads(done.stderr.strip().splitlines()[-1]))


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    parser.add_argument("--runs", type=int, default=7, help="fresh processes per command (default 7)")
    args = parser.parse_args()
    load = os.getloadavg()[0] if hasattr(os, "getloadavg") else float("nan")
    print(f"python {platform.python_version()} on {platform.machine()}, {os.cpu_count()} cores, "
          f"load average {load:.2f} at start, {args.runs} runs each")
    print(f"{'command':<10} {'wall s':>7} {'min s':>7} {'max s':>7} {'CPU s':>7}  heavy modules imported")
    for name, command in COMMANDS.items():
        runs = [timed(command) for _ in range(args.runs)]
        wall = [w for w, _ in runs]
        cpu = statistics.median(c for _, c in runs)
        heavy = heavy_modules(command)
        print(f"{name:<10} {statistics.median(wall):>7.3f} {min(wall):>7.3f} {max(wall):>7.3f} {cpu:>7.3f}  "
              f"{', '.join(heavy) or 'none'}")


if __name__ == "__main__":
    main()
