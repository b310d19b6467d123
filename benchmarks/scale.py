"""Scale benchmark: wall time, peak memory and event throughput of the engine.

Run from the repository root:

    python benchmarks/scale.py                 # every case below (several minutes)
    python benchmarks/scale.py --quick         # the smoke sizes the tests use
    python benchmarks/scale.py --only targets  # one group: targets, devices, days, oracle

Each case runs in a fresh subprocess so that its peak resident memory is its own. The
table printed at the end (and written to benchmarks/out/scale.json) has: devices, days,
wall s (simulate only), peak MB, events (participations + rounds), events per second, and
the ratio of the oracle's wall time to the engine's where the oracle ran on the same case.
Results and the machine they came from are recorded in benchmarks/README.md.
"""

from __future__ import annotations

import argparse
import json
import math
import platform
import subprocess
import sys
import time
from pathlib import Path

ROOT = Path(__file__).resolve().parents[1]

GROUPS = {
    # The issues' targets: (devices, days, limit s, limit MB).
    "targets": [(100_000, 7, 60, 4096), (1_000_000, 7, 20, 6144), (10_000_000, 1, 60, 16384)],
    # Growth with devices at 7 days and with days at 1M devices.
    "devices": [(250_000, 7, None, None), (500_000, 7, None, None), (1_000_000, 7, None, None)],
    "days": [(1_000_000, 1, None, None), (1_000_000, 2, None, None), (1_000_000, 4, None, None),
             (1_000_000, 7, None, None)],
}
QUICK = {"targets": [(5_000, 0.5, None, None)], "devices": [(2_000, 0.5, None, None), (4_000, 0.5, None, None)],
         "days": [(2_000, 0.25, None, None), (2_000, 0.5, None, None)]}


def run_case(devices: int, days: float, seed: int = 1, oracle: bool = False, unpaced: bool = False) -> dict:
    """Simulate the example fleet at this size in this process; return the measurements."""
    import resource

    import fleetsim

    # The oracle models no pacing: for the comparison both run the example unpaced.
    config = fleetsim.load_config(fleetsim.example_path(), [f"fleet.devices={devices}", f"horizon.duration={days}d",
                                                            *(["rounds.pacing=null"] if unpaced else [])])
    start = time.perf_counter()
    if oracle:
        sys.path.insert(0, str(ROOT))
        from tests.oracle import simulate_oracle  # the one-process-per-device simulator of the tests

        out = simulate_oracle(config, seed=seed)
        wall = time.perf_counter() - start
        rounds, parts = out.rounds, out.participations
        summary = None
    else:
        result = fleetsim.simulate(config, seed=seed)
        wall = time.perf_counter() - start
        rounds, parts = result.rounds, result.participations
        summary = result.summary
    peak_mb = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024.0
    events = int(len(parts) + len(rounds))
    row = {
        "devices": devices, "days": days, "engine": "oracle" if oracle else "engine", "wall_s": wall,
        "peak_mb": peak_mb, "events": events, "events_per_s": events / wall if wall > 0 else math.nan,
        "rounds": int(len(rounds)), "participations": int(len(parts)),
    }
    if summary is not None:
        row["committed_per_hour"] = summary["rounds"]["committed_per_hour"]
        row["waste_compute_fraction"] = summary["waste"]["compute_fraction"]
        row["report_share"] = {k: v["report_share"] for k, v in summary["bias"]["by_device_type"].items()}
    else:  # the oracle labels its frames with strings; the same figures from them
        row["committed_per_hour"] = float((rounds["status"] == "committed").sum()) / (days * 24)
        wasted = parts.loc[~parts["used"].astype(bool), "compute_s"].sum()
        row["waste_compute_fraction"] = float(wasted / parts["compute_s"].sum())
        used = parts[parts["used"].astype(bool)]
        row["report_share"] = {str(k): float(v) for k, v in used["device_type"].value_counts(normalize=True).items()}
    return row


def _g(value: float | None) -> str:
    return "n/a" if value is None else f"{value:.4g}"


def run_in_subprocess(devices: int, days: float, oracle: bool = False, unpaced: bool = False) -> dict:
    cmd = [sys.executable, __file__, "--case", str(devices), str(days)] + (["--oracle"] if oracle else []) + (
        ["--unpaced"] if unpaced else [])
    done = subprocess.run(cmd, cwd=ROOT, capture_output=True, text=True, check=False)
    if done.returncode != 0:
        raise SystemExit(f"case {devices} devices x {days} days failed:\n{done.stderr}")
    return json.loads(done.stdout.strip().splitlines()[-1])


def slope(rows: list[dict], key: str) -> float:
    """Least-squares slope of log(wall) on log(key): 1 is linear growth."""
    import numpy as np

    x = np.log([r[key] for r in rows])
    y = np.log([r["wall_s"] for r in rows])
    return float(np.polyfit(x, y, 1)[0])


def machine() -> str:
    cpu = platform.processor() or platform.machine()
    try:
        for line in Path("/proc/cpuinfo").read_text().splitlines():
            if line.startswith("model name"):
                cpu = line.split(":", 1)[1].strip()
                break
    except OSError:
        pass
    import os

    mem = os.sysconf("SC_PAGE_SIZE") * os.sysconf("SC_PHYS_PAGES") / 2**30
    return f"{cpu}, {os.cpu_count()} cores, {mem:.0f} GiB, Python {platform.python_version()}"


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__, formatter_class=argparse.RawDescriptionHelpFormatter)
    parser.add_argument("--case", nargs=2, metavar=("DEVICES", "DAYS"))
    parser.add_argument("--oracle", action="store_true")
    parser.add_argument("--unpaced", action="store_true", help="the example with rounds.pacing=null")
    parser.add_argument("--quick", action="store_true")
    parser.add_argument("--only", choices=[*GROUPS, "oracle"], action="append")
    parser.add_argument("--oracle-devices", type=int, default=100_000)
    args = parser.parse_args()
    if args.case:
        print(json.dumps(run_case(int(args.case[0]), float(args.case[1]), oracle=args.oracle, unpaced=args.unpaced)))
        return

    groups = QUICK if args.quick else GROUPS
    wanted = args.only or [*groups, "oracle"]
    table: list[dict] = []
    report: dict = {"machine": machine(), "rows": table, "slopes": {}, "checks": []}
    for group, cases in groups.items():
        if group not in wanted:
            continue
        rows = []
        for devices, days, limit_s, limit_mb in cases:
            row = run_in_subprocess(devices, days)
            row["group"] = group
            rows.append(row)
            table.append(row)
            print(f"{group:<8} {devices:>11,} devices {days:>5g} d  {row['wall_s']:7.2f} s  {row['peak_mb']:8.0f} MB",
                  flush=True)
            if limit_s is not None:
                report["checks"].append({
                    "case": f"{devices:,} devices x {days:g} d", "wall_s": row["wall_s"], "limit_s": limit_s,
                    "peak_mb": row["peak_mb"], "limit_mb": limit_mb,
                    "ok": row["wall_s"] <= limit_s and row["peak_mb"] <= limit_mb,
                })
        if group == "devices":
            report["slopes"]["wall_vs_devices"] = slope(rows, "devices")
        if group == "days":
            report["slopes"]["wall_vs_days"] = slope(rows, "days")
    if "oracle" in wanted:
        devices = 2_000 if args.quick else args.oracle_devices
        engine = run_in_subprocess(devices, 1 if not args.quick else 0.25, unpaced=True)
        oracle = run_in_subprocess(devices, 1 if not args.quick else 0.25, oracle=True, unpaced=True)
        engine["group"] = oracle["group"] = "oracle"
        engine["oracle_ratio"] = oracle["wall_s"] / engine["wall_s"]
        table.extend([engine, oracle])
        print(f"oracle   {devices:>11,} devices: engine {engine['wall_s']:.2f} s, oracle {oracle['wall_s']:.1f} s, "
              f"ratio {engine['oracle_ratio']:.0f}x", flush=True)
        for key in ("committed_per_hour", "waste_compute_fraction"):
            print(f"  {key}: engine {_g(engine[key])}, oracle {_g(oracle[key])}")
        for name, share in engine["report_share"].items():
            print(f"  report share {name}: engine {_g(share)}, oracle {_g(oracle['report_share'].get(name, 0.0))}")

    print()
    print(f"machine: {report['machine']}")
    header = f"{'group':<8} {'engine':<7} {'devices':>11} {'days':>5} {'wall s':>8} {'peak MB':>8} {'events':>9} " \
             f"{'events/s':>10} {'oracle x':>8}"
    print(header)
    for r in table:
        ratio = f"{r['oracle_ratio']:.0f}" if "oracle_ratio" in r else ""
        print(f"{r['group']:<8} {r['engine']:<7} {r['devices']:>11,} {r['days']:>5g} {r['wall_s']:>8.2f} "
              f"{r['peak_mb']:>8.0f} {r['events']:>9,} {r['events_per_s']:>10,.0f} {ratio:>8}")
    for key, value in report["slopes"].items():
        print(f"slope of log(wall) on log({key.split('_vs_')[1]}): {value:.2f} (1 = linear)")
    for check in report["checks"]:
        print(f"target {check['case']}: {check['wall_s']:.1f} s <= {check['limit_s']} s and "
              f"{check['peak_mb']:.0f} MB <= {check['limit_mb']} MB: {'met' if check['ok'] else 'MISSED'}")
    out = ROOT / "benchmarks" / "out"
    out.mkdir(parents=True, exist_ok=True)
    (out / ("scale-quick.json" if args.quick else "scale.json")).write_text(json.dumps(report, indent=2))
    _plot(report, out / ("scale-quick.png" if args.quick else "scale.png"))


def _plot(report: dict, path: Path) -> None:
    import matplotlib

    matplotlib.use("Agg")
    import matplotlib.pyplot as plt

    fig, axes = plt.subplots(1, 2, figsize=(9, 3.5))
    for ax, group, key in ((axes[0], "devices", "devices"), (axes[1], "days", "days")):
        rows = [r for r in report["rows"] if r.get("group") == group]
        if not rows:
            ax.set_visible(False)
            continue
        ax.loglog([r[key] for r in rows], [r["wall_s"] for r in rows], "o-", color="#0072B2")
        ax.set_xlabel(key)
        ax.set_ylabel("wall s")
        s = report["slopes"].get(f"wall_vs_{key}")
        ax.set_title(f"wall time vs {key} (slope {s:.2f})" if s is not None else key)
    fig.tight_layout()
    fig.savefig(path, dpi=100)


if __name__ == "__main__":
    main()
