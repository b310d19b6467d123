"""Common random numbers: how well paired runs of one seed cancel noise, keyed draws against
shared streams and independent seeds; and what keyed draws cost in run time.

Run from the repository root, with an earlier checkout (the engine of shared streams) beside it:

    python benchmarks/crn.py --before /tmp/before            # about 9 minutes on 2 cores
    python benchmarks/crn.py --before /tmp/before --quick    # a smoke run, under 2 minutes
    python benchmarks/crn.py --before /tmp/before --only timing   # or --only pairing

Two regimes. **example**: the example fleet as configured (``--set``-style overrides scale
it to 10,000 devices x 2 days; paced rounds, one in flight, a day's rest), 24 seeds, with
(a) a policy change, ``first-come`` to ``lottery``, and (b) a deadline change,
``rounds.report_deadline`` 6m to 5m. **always selecting**: the classic round protocol with
up to 64 rounds in flight and no rest (a selection is open at every moment, so every free
device's ticks are looked at in both runs of a seed: the setting of tests/test_keyed.py),
3,000 devices x 12 hours, 12 seeds, with (b') a deadline change 6m to 2m. For each seed
s the baseline runs at s and the candidate at s (paired) and at s + 1000 (independent).
The paired differences of committed rounds per hour and of each device type's report share
are taken under (1) independent seeds (this engine, candidate at s + 1000), (2) shared
streams (the earlier engine, same seed) and (3) keyed draws (this engine, same seed). Per
figure: the variance of the differences under each, the reduction of (3) and (2) against
(1), and the seeds needed to detect a 2 % change (two-sided 5 % test, 80 % power):
n = ((z_0.975 + z_0.8) sd / delta)^2, delta = 2 % of the baseline mean.

Run time: whole ``simulate`` wall time, this engine against the earlier one, each run in a
fresh process of this invocation, alternating, best of 3 (the ratio then compares like with
like on the machine's load of the moment). Results go to stdout as Markdown; they are
recorded in benchmarks/README.md.
"""

from __future__ import annotations

import argparse
import json
import os
import platform
import subprocess
import sys
from pathlib import Path

import numpy as np
from scipy import stats

ROOT = Path(__file__).resolve().parents[1]
INDEPENDENT = 1000  # the candidate's seed offset for independent pairs

CHANGES = {
    "policy": (["selection.policy=first-come"], ["selection.policy=lottery"]),
    "deadline": (["rounds.report_deadline=6m"], ["rounds.report_deadline=5m"]),
}

CLASSIC = ["rounds.pacing=null", "rounds.in_flight=1", "rounds.secure_aggregation=null",
           "rounds.configure=at-acceptance", "rounds.over_selection=1.3", "workload.max_examples=null",
           "workload.crash_rate=0.05/h"]  # tests.CLASSIC_ROUNDS
ALWAYS_SELECTING = CLASSIC + ["rounds.in_flight=64", "rounds.rest=0s", "rounds.target_reports=20",
                              "rounds.min_reports=10", "fleet.devices=3000", "horizon.duration=12h"]
PIPELINED_CHANGES = {"deadline 6m -> 2m": (["rounds.report_deadline=6m"], ["rounds.report_deadline=2m"])}

_WORKER = r"""
import json, sys, time
from fleetsim import simulate
from fleetsim.config import load_config
jobs = json.loads(sys.stdin.read())
out = []
for job in jobs:
    config = load_config(job["fleet"], job["overrides"])
    start = time.perf_counter()
    result = simulate(config, seed=job["seed"])
    wall = time.perf_counter() - start
    summary = result.summary
    shares = {name: row["report_share"] for name, row in summary["bias"]["by_device_type"].items()}
    out.append({"wall_s": wall, "per_hour": summary["rounds"]["committed_per_hour"], "shares": shares})
print(json.dumps(out))
"""


def run_jobs(checkout: Path, jobs: list[dict]) -> list[dict]:
    """Run ``jobs`` (fleet file, overrides, seed) in one fresh process on ``checkout``'s engine."""
    env = dict(os.environ, PYTHONPATH=str(checkout))
    done = subprocess.run([sys.executable, "-c", _WORKER], input=json.dumps(jobs), capture_output=True, text=True,
                          env=env, cwd=checkout)
    if done.returncode != 0:
        raise SystemExit(f"{checkout}: simulate failed:\n{done.stderr[-2000:]}")
    return json.loads(done.stdout.strip().splitlines()[-1])


def figures(row: dict) -> dict[str, float]:
    return {"committed rounds per hour": row["per_hour"],
            **{f"report share {name}": share for name, share in row["shares"].items()}}


def differences(base: list[dict], cand: list[dict]) -> dict[str, np.ndarray]:
    rows = [(figures(b), figures(c)) for b, c in zip(base, cand, strict=True)]
    return {key: np.array([c[key] - b[key] for b, c in rows]) for key in rows[0][0]}


def seeds_needed(sd: float, mean: float) -> float:
    """Seeds for a two-sided 5 % paired test to detect a 2 % change with 80 % power."""
    z = stats.norm.ppf(0.975) + stats.norm.ppf(0.8)
    delta = 0.02 * abs(mean)
    return float((z * sd / delta) ** 2) if delta > 0 else float("nan")


def measure(before: Path, fleet: str, scale: list[str], seeds: list[int],
            changes: dict[str, tuple[list[str], list[str]]]) -> dict[str, list[str]]:
    """Markdown rows per change: each figure's variances, reductions and seeds needed."""
    tables = {}
    for change, (base_set, cand_set) in changes.items():
        def jobs(settings: list[str], offset: int = 0) -> list[dict]:
            return [{"fleet": fleet, "overrides": scale + settings, "seed": s + offset} for s in seeds]
        new_base = run_jobs(ROOT, jobs(base_set))
        new_cand = run_jobs(ROOT, jobs(cand_set))
        new_indep = run_jobs(ROOT, jobs(cand_set, INDEPENDENT))
        old_base = run_jobs(before, jobs(base_set))
        old_cand = run_jobs(before, jobs(cand_set))
        kinds = {"independent": differences(new_base, new_indep), "shared": differences(old_base, old_cand),
                 "keyed": differences(new_base, new_cand)}
        means = {key: float(np.mean([figures(r)[key] for r in new_base])) for key in kinds["keyed"]}
        rows = []
        for key in kinds["keyed"]:
            var = {kind: float(np.var(d[key], ddof=1)) for kind, d in kinds.items()}
            cut = {kind: 1.0 - var[kind] / var["independent"] for kind in ("shared", "keyed")}
            need = {kind: seeds_needed(np.sqrt(var[kind]), means[key]) for kind in ("shared", "keyed")}
            rows.append(f"| {key} | {means[key]:.4g} | {var['independent']:.3g} | {var['shared']:.3g} | "
                        f"{var['keyed']:.3g} | {100 * cut['shared']:.0f}% | **{100 * cut['keyed']:.0f}%** | "
                        f"{need['shared']:.1f} | {need['keyed']:.1f} | {need['keyed'] / need['shared']:.2f} |")
        tables[change] = rows
    return tables


def timing(before: Path, fleet: str, scale: list[str], repeats: int = 3) -> tuple[list[float], list[float]]:
    """Whole simulate wall times (s) of the earlier and this engine, alternating."""
    old, new = [], []
    for _ in range(repeats):
        old.append(run_jobs(before, [{"fleet": fleet, "overrides": scale, "seed": 1}])[0]["wall_s"])
        new.append(run_jobs(ROOT, [{"fleet": fleet, "overrides": scale, "seed": 1}])[0]["wall_s"])
    return old, new


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__, formatter_class=argparse.RawDescriptionHelpFormatter)
    parser.add_argument("--before", type=Path, required=True, help="an earlier checkout (shared streams)")
    parser.add_argument("--quick", action="store_true")
    parser.add_argument("--seeds", type=int, default=None)
    parser.add_argument("--only", choices=("pairing", "timing"), default=None, help="run one half only")
    args = parser.parse_args()
    devices, days, count, pipelined = (4_000, 1, 4, 3) if args.quick else (10_000, 2, 24, 12)
    count = args.seeds or count
    fleet = str(ROOT / "fleets" / "inkwren.yaml")
    scale = [f"fleet.devices={devices}", f"horizon.duration={days}d"]
    print(f"machine: {platform.processor() or platform.machine()}, {os.cpu_count()} cores, Python "
          f"{platform.python_version()}, numpy {np.__version__}; load {os.getloadavg()}")
    head = ("| figure | baseline mean | var independent | var shared | var keyed | cut shared | cut keyed | "
            "seeds shared | seeds keyed | keyed / shared |\n| --- | ---: | ---: | ---: | ---: | ---: | ---: | "
            "---: | ---: | ---: |")
    regimes = (("example", scale, count, CHANGES), ("always selecting", ALWAYS_SELECTING, pipelined, PIPELINED_CHANGES))
    for regime, settings, seeds, changes in regimes if args.only != "timing" else ():
        print(f"## {regime}: {' '.join(settings)}; seeds 0..{seeds - 1} (independent: +{INDEPENDENT})\n")
        tables = measure(args.before.resolve(), fleet, settings, list(range(seeds)), changes)
        for change, rows in tables.items():
            print(f"### {change}: {' -> '.join(' '.join(s) for s in changes[change])}\n\n{head}")
            print("\n".join(rows) + "\n", flush=True)
    for size in (scale, ["fleet.devices=200000", f"horizon.duration={days}d"]) if args.only != "pairing" else ():
        old, new = timing(args.before.resolve(), fleet, size)
        print(f"run time {' '.join(size)}: earlier {[round(x, 2) for x in old]} s, keyed "
              f"{[round(x, 2) for x in new]} s; best of 3 ratio **{min(new) / min(old):.2f}x**")
    print(f"load after: {os.getloadavg()}")


if __name__ == "__main__":
    main()
