"""What the round protocol's options do on the bundled example: pacing on and off, pipelining.

Run from the repository root:

    python benchmarks/round_protocol.py            # 50,000 x 7 d and 1,000,000 x 1 d, 3 seeds
    python benchmarks/round_protocol.py --quick    # 5,000 x 0.5 d, 1 seed (a smoke run)

Pacing: the example as bundled (pacing on) against the same file with ``rounds.pacing=null``,
same seeds: committed rounds per hour, rounds ended at the selection timeout, the time held,
and the server's load by hour (check-ins per second: the census's eligible estimate / (the
stretch in force x the check-in period), the basis both modes share; docs/fleet-file.md,
"`pacing`"): its mean and its peak hour.

Pipelining: a fleet with spare supply (the example with ``rest`` 0 and 200,000 devices, so
that eligible devices are plentiful and a round's report phase, not its selection, is what
takes time), ``in_flight`` 1 against 2; the invariants are those of tests/test_invariants.py
(no device in two rounds at once, rest after each) and are checked here too.

Several workloads: the example alone against fleets/inkwren-two-models.yaml (a second, smaller
model on the same devices, priority to the first): each workload's committed rounds per hour
and rounds ended at the selection timeout, its part of the horizon at the server, and the
cross-workload invariants (a device rests after any round before any workload takes it).

Results are recorded in benchmarks/README.md.
"""

from __future__ import annotations

import argparse
import os
import platform
import sys
import time
from pathlib import Path

import numpy as np

ROOT = Path(__file__).resolve().parents[1]
sys.path.insert(0, str(ROOT))

import fleetsim  # noqa: E402


def load_by_hour(result) -> np.ndarray:
    """Check-ins per second in each hour: census eligible / (stretch x check-in period)."""
    census = result.census.groupby("time_s")["eligible_est"].sum()
    rounds = result.rounds
    times = census.index.to_numpy()
    last = np.searchsorted(rounds["opened_s"].to_numpy(), times, side="right") - 1
    stretch = np.where(last >= 0, rounds["stretch"].to_numpy()[np.maximum(last, 0)], 1)
    rate = census.to_numpy() / (stretch * result.config.rounds.checkin_every)
    hours = (times // 3600).astype(int)
    return np.bincount(hours, weights=rate) / np.maximum(np.bincount(hours), 1)


def case(overrides: list[str], seed: int) -> dict:
    config = fleetsim.load_config(fleetsim.example_path(), overrides)
    start = time.perf_counter()
    result = fleetsim.simulate(config, seed=seed)
    wall = time.perf_counter() - start
    rounds = result.rounds
    hours = config.horizon.duration / 3600.0
    load = load_by_hour(result)
    status = rounds["status"].astype(str)
    return {
        "wall_s": wall,
        "committed_per_hour": float((status == "committed").sum() / hours),
        "selection_timeouts": int((status == "selection-timeout").sum()),
        "held_h": float(rounds["held_s"].sum() / 3600.0),
        "load_mean": float(load.mean()),
        "load_peak": float(load.max()),
        "stretch_mean": float(rounds["stretch"].mean()),
        "result": result,
    }


def overlap_ok(result) -> bool:
    """No device in two rounds at once, and none accepted during its rest."""
    parts = result.participations.sort_values(["device", "accepted_s"])
    device = parts["device"].to_numpy()
    same = device[1:] == device[:-1]
    rest = result.config.rounds.rest
    start, end = parts["accepted_s"].to_numpy(), parts["ended_s"].to_numpy()
    return bool(np.all(start[1:][same] >= end[:-1][same] + rest - 1e-6))


def pacing_table(devices: int, days: float, seeds: list[int]) -> None:
    base = [f"fleet.devices={devices}", f"horizon.duration={days}d"]
    print(f"\npacing on against off, {devices:,} devices x {days:g} d, seeds {seeds}")
    print(f"{'pacing':8} {'rounds/h':>9} {'sel-timeout':>11} {'held h':>7} {'load/s mean':>11} {'peak hour':>9} "
          f"{'stretch':>7} {'wall s':>7}")
    for label, extra in (("on", []), ("off", ["rounds.pacing=null"])):
        rows = [case(base + extra, seed) for seed in seeds]
        mean = {k: float(np.mean([r[k] for r in rows])) for k in rows[0] if k != "result"}
        spread = float(np.std([r["committed_per_hour"] for r in rows], ddof=1)) if len(rows) > 1 else float("nan")
        print(f"{label:8} {mean['committed_per_hour']:9.2f} {mean['selection_timeouts']:11.1f} {mean['held_h']:7.2f} "
              f"{mean['load_mean']:11.2f} {mean['load_peak']:9.2f} {mean['stretch_mean']:7.1f} {mean['wall_s']:7.1f}"
              f"   (rounds/h sd over seeds {spread:.2f})")


def pipelining_table(devices: int, days: float, seeds: list[int]) -> None:
    base = [f"fleet.devices={devices}", f"horizon.duration={days}d", "rounds.rest=0s", "rounds.pacing=null"]
    print(f"\npipelining on a fleet with spare supply ({devices:,} devices, rest 0), {days:g} d, seeds {seeds}")
    print(f"{'in_flight':9} {'rounds/h':>9} {'sel-timeout':>11} {'invariants':>10}")
    for flight in (1, 2):
        rows = [case(base + [f"rounds.in_flight={flight}"], seed) for seed in seeds]
        ok = all(overlap_ok(r["result"]) for r in rows)
        print(f"{flight:9} {np.mean([r['committed_per_hour'] for r in rows]):9.2f} "
              f"{np.mean([r['selection_timeouts'] for r in rows]):11.1f} {'hold' if ok else 'BROKEN':>10}")


def workloads_table(devices: int, days: float, seeds: list[int]) -> None:
    """The example alone against fleets/inkwren-two-models.yaml (a second model on the same
    fleet, priority to ranking): what the second workload costs the first."""
    base = [f"fleet.devices={devices}", f"horizon.duration={days}d"]
    print(f"\none model against two on the same fleet, {devices:,} devices x {days:g} d, seeds {seeds}")
    print(f"{'fleet file':22} {'workload':11} {'rounds/h':>9} {'sel-timeout':>11} {'desk share':>10} "
          f"{'wall s':>7} {'invariants':>10}")
    for label, path in (("inkwren.yaml", fleetsim.example_path()),
                        ("inkwren-two-models.yaml", ROOT / "fleets" / "inkwren-two-models.yaml")):
        config = fleetsim.load_config(path, base)
        runs = []
        for seed in seeds:
            start = time.perf_counter()
            runs.append((fleetsim.simulate(config, seed=seed), time.perf_counter() - start))
        for job in config.jobs:
            figures = [run.workloads[job.name].summary["rounds"] for run, _ in runs]
            desk = [run.summary.get("sharing", {}).get("desk_share", {}).get(job.name) for run, _ in runs]
            ok = all(overlap_ok(run.workloads[job.name]) for run, _ in runs)
            shown = "" if desk[0] is None else f"{np.mean(desk):.3f}"
            print(f"{label:22} {job.name:11} {np.mean([f['committed_per_hour'] for f in figures]):9.2f} "
                  f"{np.mean([f['ended_by']['selection_timeout'] for f in figures]):11.1f} {shown:>10} "
                  f"{np.mean([wall for _, wall in runs]):7.1f} {'hold' if ok else 'BROKEN':>10}")


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__, formatter_class=argparse.RawDescriptionHelpFormatter)
    parser.add_argument("--quick", action="store_true")
    args = parser.parse_args()
    print(f"machine: {platform.processor() or platform.machine()}, {os.cpu_count()} cores, "
          f"load average {os.getloadavg()[0]:.2f}; python {platform.python_version()}")
    if args.quick:
        pacing_table(5_000, 0.5, [0])
        pipelining_table(5_000, 0.25, [0])
        workloads_table(5_000, 0.25, [0])
        return
    pacing_table(50_000, 7, [0, 1, 2])
    pacing_table(1_000_000, 1, [0, 1, 2])
    pipelining_table(200_000, 1, [0, 1, 2])
    workloads_table(50_000, 7, [0, 1, 2])


if __name__ == "__main__":
    main()
