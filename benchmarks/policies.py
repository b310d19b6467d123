"""What a selection policy costs: built-ins and the three forms of the worked plug-in.

Run from the repository root:  python benchmarks/policies.py [--devices N] [--days D] [--repeats R]

Each policy runs R times, interleaved, in this one process; the table gives the best wall
time, the number of collection windows (calls to choose), and the time per window relative
to the numpy form of the plug-in (the same choice), so the figures compare within one run.
"""

from __future__ import annotations

import argparse
import sys
import time
from pathlib import Path

ROOT = Path(__file__).resolve().parents[1]
sys.path.insert(0, str(ROOT / "docs" / "examples"))

import fleetsim  # noqa: E402
from fleetsim import policies as policy_module  # noqa: E402

POLICIES = ["first-come", "lottery", "quick-finish", "share-quota", "rested-first",
            "charge_first:ChargeFirst", "charge_first:ChargeFirstPandas", "charge_first:ChargeFirstLoop"]


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__)
    parser.add_argument("--devices", type=int, default=100_000)
    parser.add_argument("--days", type=float, default=7)
    parser.add_argument("--repeats", type=int, default=2)
    args = parser.parse_args()
    best: dict[str, float] = {}
    windows: dict[str, int] = {}
    for _ in range(args.repeats):
        for name in POLICIES:
            config = fleetsim.load_config(fleetsim.example_path(), [
                f"fleet.devices={args.devices}", f"horizon.duration={args.days}d", f"selection.policy={name}"])
            calls = {"n": 0}
            original = policy_module.make_policy

            def counting(*a, original=original, calls=calls, **k):
                policy = original(*a, **k)
                inner = policy.choose

                def choose(*ca, **ck):
                    calls["n"] += 1
                    return inner(*ca, **ck)

                policy.choose = choose
                return policy

            fleetsim.engine.make_policy = counting
            start = time.perf_counter()
            fleetsim.simulate(config, seed=3)
            wall = time.perf_counter() - start
            fleetsim.engine.make_policy = original
            best[name] = min(best.get(name, float("inf")), wall)
            windows[name] = calls["n"]
    base = best["charge_first:ChargeFirst"]
    print(f"{args.devices:,} devices, {args.days:g} days, best of {args.repeats}")
    print(f"{'policy':<32} {'wall s':>8} {'windows':>9} {'extra ms/window vs numpy plug-in':>34}")
    for name in POLICIES:
        extra = (best[name] - base) / max(windows[name], 1) * 1000 if name.startswith("charge_first") else float("nan")
        shown = f"{extra:34.3f}" if extra == extra else f"{'':>34}"
        print(f"{name:<32} {best[name]:8.2f} {windows[name]:9,} {shown}")


if __name__ == "__main__":
    main()
