"""A comparison: a baseline and a candidate setting run under the same seeds, paired by seed.

For every summary metric (and every device type's shares) it reports the mean per-seed
difference candidate - baseline with a 95% paired t interval, and a verdict:

- metrics with a direction (see :func:`fleetsim.study.table.direction_of`) are judged on
  their *improvement*: candidate - baseline where higher is better, baseline - candidate
  where lower is better, and the fall in shortfall from 1 (1 - min(r, 1/r)) for
  representation ratios. ``better`` when the improvement's 95% interval lies above 0,
  ``worse`` when below, else ``no detectable change at N seeds``;
- neutral metrics get ``higher (neutral)``, ``lower (neutral)`` or ``no detectable change``.

``seeds_needed`` (metrics with a direction) is how many seeds a paired t test (two-sided,
5% level) needs to detect the observed change with the chosen power, given the observed sd of the paired differences
(:func:`fleetsim.study.stats.seeds_needed`). ``--detect METRIC=CHANGE`` asks the same for a
change of your choosing.

With a stress file, each arm runs as configured and again with the stress file's
disruptions added, and each condition is compared on its own: does the candidate still
beat the baseline when the disruption happens?

Outputs of :func:`write_compare` in the folder: ``cells/`` (resume), ``runs.parquet/.csv``
(every metric per condition, arm and seed), ``differences.parquet/.csv`` (one row per
condition and metric), ``comparison.json`` and ``comparison.md``.
"""

from __future__ import annotations

import json
import math
import time
from collections.abc import Sequence
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import numpy as np
import pandas as pd

from .. import __version__
from ..errors import ConfigError
from ..policies import make_policy
from .executors import Executor, InProcess, Job
from .runs import Progress, gather
from .settings import FleetFile, parse_assignment
from .stats import LEVEL, mean_interval, paired_interval, seeds_needed
from .store import RunStore, atomic_text, run_key
from .sweep import save_frame
from .table import (
    WORST_REPRESENTATION,
    direction_of,
    flatten_summary,
    frame_of_rows,
    improvement_sign,
    metric_columns,
    resolve_metric,
    shortfall,
)

__all__ = [
    "Arm",
    "Detection",
    "ComparisonResult",
    "run_compare",
    "write_compare",
    "render_compare",
    "parse_detect",
    "HEADLINE",
    "AS_CONFIGURED",
]

AS_CONFIGURED = "as configured"

HEADLINE = (
    "rounds.committed_per_hour",
    "waste.compute_fraction",
    "waste.energy_fraction",
    "bias.coverage",
    WORST_REPRESENTATION,
    "bias.gini",
    "rounds.duration_s.p50",
)
"""Metrics the command prints first (every metric is in differences.csv)."""

_TYPE_SHARES = ("eligible_share", "accepted_share", "report_share", "weight_share", "representation_ratio")


@dataclass(frozen=True)
class Arm:
    """One side of a comparison: a name and its ``key.path=value`` settings."""

    name: str
    overrides: tuple[str, ...]

    @property
    def label(self) -> str:
        return ", ".join(self.overrides) or "(the file as it is)"


@dataclass(frozen=True)
class Detection:
    """A change to detect in ``metric``: absolute, or relative to the baseline mean."""

    metric: str
    change: float
    relative: bool

    def __str__(self) -> str:
        return f"{self.metric}={100 * self.change:g}%" if self.relative else f"{self.metric}={self.change:g}"


def parse_detect(text: str) -> Detection:
    """Read ``METRIC=CHANGE`` (``CHANGE`` a number, or a percentage of the baseline mean).

    Raises ConfigError naming ``--detect``.
    """
    metric, raw = parse_assignment(text, "--detect")
    try:
        relative = raw.endswith("%")
        change = float(raw[:-1]) / 100.0 if relative else float(raw)
    except ValueError:
        raise ConfigError([f"--detect {text!r}: {raw!r} is not a number or a percentage"]) from None
    if not math.isfinite(change) or change == 0:
        raise ConfigError([f"--detect {text!r}: the change must be a non-zero finite number"])
    return Detection(metric=metric, change=abs(change), relative=relative)


@dataclass
class ComparisonResult:
    """Everything a comparison found. ``runs``: one row per condition, arm and seed;
    ``differences``: one row per condition and metric; ``detections``: one row per
    condition and ``--detect``."""

    base: FleetFile
    baseline: Arm
    candidate: Arm
    seeds: list[int]
    candidate_seed_offset: int
    conditions: list[str]
    runs: pd.DataFrame
    differences: pd.DataFrame
    detections: pd.DataFrame
    power: float
    caution: str
    executor: str
    reused: int
    wall_s: float
    type_names: list[str] = field(default_factory=list)


def _arm_config(base: FleetFile, arm: Arm, option: str) -> Any:
    try:
        config = base.config(arm.overrides)
        make_policy(config.selection.policy, config.selection.params)
    except ConfigError as exc:
        raise ConfigError([f"{option} {arm.label}: {line}" for line in exc.problems]) from None
    return config


def run_compare(
    base: FleetFile,
    baseline: Arm,
    candidate: Arm,
    seeds: Sequence[int],
    stress: str | Path | None = None,
    detect: Sequence[Detection] = (),
    power: float = 0.8,
    executor: Executor | None = None,
    folder: str | Path | None = None,
    progress: Progress | None = None,
    candidate_seed_offset: int = 0,
) -> ComparisonResult:
    """Run both arms under ``seeds`` (and under ``stress`` if given) and compare them.

    ``candidate_seed_offset`` runs the candidate under seed + offset instead of the same seed;
    0 (the default) pairs runs on common random numbers, anything else breaks the pairing on
    purpose (for checking the method). Raises ConfigError for a bad setting, stress file,
    ``--detect`` metric or power; FleetsimError when a run fails.
    """
    if not seeds:
        raise ConfigError(["--seeds: expected at least 1"])
    if not 0.0 < power < 1.0:
        raise ConfigError([f"--power {power}: expected a number between 0 and 1, e.g. 0.8"])
    for arm, option in ((baseline, "--baseline"), (candidate, "--candidate")):
        for item in arm.overrides:
            parse_assignment(item, option)
    started = time.perf_counter()
    conditions: list[tuple[str, FleetFile]] = [(AS_CONFIGURED, base)]
    if stress is not None:
        conditions.append((f"stressed by {stress}", base.with_stress(stress)))
    jobs: list[Job] = []
    plan: list[tuple[str, str, int, int, str]] = []  # condition, arm, seed, run seed, key
    for condition, fleet_file in conditions:
        for arm, option, offset in ((baseline, "--baseline", 0), (candidate, "--candidate", candidate_seed_offset)):
            config = _arm_config(fleet_file, arm, option)
            for seed in seeds:
                key = run_key(config, seed + offset)
                jobs.append(Job(key=key, config=config, seed=seed + offset, label=f"{arm.name} ({condition})"))
                plan.append((condition, arm.name, seed, seed + offset, key))
    store = RunStore(Path(folder) / "cells") if folder is not None else None
    runner = executor or InProcess()
    summaries, reused = gather(jobs, runner, store, progress)

    rows = []
    for condition, arm_name, seed, run_seed, key in plan:
        flat = flatten_summary(summaries[key])
        flat.pop("seed", None)
        rows.append({"condition": condition, "arm": arm_name, "seed": seed, "run_seed": run_seed, **flat})
    runs = frame_of_rows(rows)
    metrics = metric_columns(runs, exclude=["run_seed"])
    differences = _differences(runs, [c for c, _ in conditions], metrics, baseline.name, candidate.name, power)
    detections = _detections(runs, [c for c, _ in conditions], metrics, baseline.name, candidate.name, detect, power)
    first = summaries[plan[0][4]]
    type_names = list(first.get("bias", {}).get("by_device_type", {}))
    return ComparisonResult(
        base=base, baseline=baseline, candidate=candidate, seeds=list(seeds),
        candidate_seed_offset=candidate_seed_offset, conditions=[c for c, _ in conditions], runs=runs,
        differences=differences, detections=detections, power=power, caution=first.get("caution", ""),
        executor=runner.description, reused=reused, wall_s=time.perf_counter() - started, type_names=type_names,
    )


def _blocks(runs: pd.DataFrame, condition: str, base: str, cand: str,
            metrics: list[str]) -> tuple[np.ndarray, np.ndarray]:
    """Baseline and candidate values (seeds x metrics) of one condition, rows paired by seed."""
    part = runs[runs["condition"] == condition]
    b = part[part["arm"] == base].set_index("seed")
    c = part[part["arm"] == cand].set_index("seed")
    seeds = b.index.intersection(c.index).sort_values()
    return (b.loc[seeds, metrics].to_numpy(dtype=float), c.loc[seeds, metrics].to_numpy(dtype=float))


def _verdict(direction: str | None, judged: Any, n_seeds: int) -> str:
    if judged.n < 2:
        return "too few seeds to tell"
    if not judged.excludes_zero():
        return f"no detectable change at {n_seeds} seeds"
    up = judged.low > 0
    if direction is None:
        return "higher (neutral)" if up else "lower (neutral)"
    return "better" if up else "worse"


def _differences(runs: pd.DataFrame, conditions: list[str], metrics: list[str], base: str, cand: str,
                 power: float) -> pd.DataFrame:
    out = []
    for condition in conditions:
        base_block, cand_block = _blocks(runs, condition, base, cand, metrics)
        for j, metric in enumerate(metrics):
            b, c = base_block[:, j], cand_block[:, j]
            raw = paired_interval(b, c)
            direction = direction_of(metric)
            sign = improvement_sign(direction)
            if direction == "closer-to-1":
                gain = shortfall(b) - shortfall(c)
            elif sign:
                gain = sign * (c - b)
            else:
                gain = c - b
            judged = mean_interval(gain)
            base_mean = mean_interval(b).mean
            out.append({
                "condition": condition,
                "metric": metric,
                "direction": direction or "neutral",
                "seeds": raw.n,
                "baseline_mean": base_mean,
                "candidate_mean": mean_interval(c).mean,
                "difference": raw.mean,
                "low": raw.low,
                "high": raw.high,
                "relative": raw.mean / abs(base_mean) if base_mean and math.isfinite(base_mean) else math.nan,
                "improvement": judged.mean if direction else math.nan,
                "improvement_low": judged.low if direction else math.nan,
                "improvement_high": judged.high if direction else math.nan,
                "sd_of_differences": judged.sd,
                "verdict": _verdict(direction, judged, raw.n),
                "seeds_needed": _needed(judged.mean, judged.sd, power) if direction else None,
            })
    frame = pd.DataFrame(out)
    frame["seeds_needed"] = frame["seeds_needed"].astype("Int64")
    return frame


def _needed(change: float, sd: float, power: float) -> int | None:
    if not (math.isfinite(change) and math.isfinite(sd)):
        return None
    return seeds_needed(change, sd, power=power)


def _detections(runs: pd.DataFrame, conditions: list[str], metrics: list[str], base: str, cand: str,
                detect: Sequence[Detection], power: float) -> pd.DataFrame:
    out = []
    for wanted in detect:
        metric = resolve_metric(wanted.metric, metrics, "--detect")
        for condition in conditions:
            b, c = (block[:, 0] for block in _blocks(runs, condition, base, cand, [metric]))
            diff = mean_interval(c - b)
            base_mean = mean_interval(b).mean
            change = wanted.change * abs(base_mean) if wanted.relative else wanted.change
            needed = seeds_needed(change, diff.sd, power=power) if math.isfinite(diff.sd) and change else None
            out.append({
                "condition": condition, "metric": metric, "requested": str(wanted), "change": change,
                "sd_of_differences": diff.sd, "power": power, "alpha": 1 - LEVEL, "seeds_needed": needed,
            })
    frame = pd.DataFrame(out, columns=["condition", "metric", "requested", "change", "sd_of_differences",
                                       "power", "alpha", "seeds_needed"])
    frame["seeds_needed"] = frame["seeds_needed"].astype("Int64")
    return frame


# ------------------------------------------------------------------------------------- output


def _num(x: Any) -> str:
    if x is None or (isinstance(x, float) and not math.isfinite(x)) or x is pd.NA:
        return "n/a"
    return f"{x:.4g}"


def _signed(x: float) -> str:
    return "n/a" if not math.isfinite(x) else f"{x:+.4g}"


def _row_text(row: pd.Series, name: str, width: int) -> str:
    interval = "" if not math.isfinite(row["low"]) else f" [{_signed(row['low'])}, {_signed(row['high'])}]"
    return (f"  {name:<{width}} {_num(row['baseline_mean']):>10} {_num(row['candidate_mean']):>10}  "
            f"{(_signed(row['difference']) + interval):<34} {row['verdict']}")


def render_compare(result: ComparisonResult, every_metric: bool = False) -> str:
    """The plain-text account of a comparison that ``fleetsim compare`` prints."""
    seeds = result.seeds
    pairing = ("the same seed for both arms (common random numbers)" if result.candidate_seed_offset == 0
               else f"candidate seeds offset by {result.candidate_seed_offset} (unpaired randomness)")
    runs = len({(r.condition, r.arm, r.run_seed) for r in result.runs.itertuples()})
    lines = [
        f"compare on {result.base.source}: {len(seeds)} seeds ({seeds[0]}..{seeds[-1]}), {pairing}",
        f"  baseline:  {result.baseline.label}",
        f"  candidate: {result.candidate.label}",
        f"  {runs} runs on {result.executor}; {result.reused} reused; {result.wall_s:.1f} s",
        "  differences are candidate - baseline, mean over seeds with 95% paired t intervals",
    ]
    d = result.differences
    for condition in result.conditions:
        part = d[d["condition"] == condition].set_index("metric", drop=False)
        shown: list[tuple[str, str]] = []  # (metric, name printed)
        if every_metric:
            shown = [(m, m) for m in part.index]
        else:
            shown = [(m, m) for m in HEADLINE if m in part.index]
            for name in result.type_names:
                for share in _TYPE_SHARES:
                    metric = f"bias.by_device_type.{name}.{share}"
                    if metric in part.index:
                        shown.append((metric, f"{name}: {share}"))
        width = max([len(n) for _, n in shown] + [20])
        lines += ["", f"{condition}:",
                  f"  {'metric':<{width}} {'baseline':>10} {'candidate':>10}  "
                  f"{'difference [95% interval]':<34} verdict"]
        for i, (metric, name) in enumerate(shown):
            if not every_metric and i == len([m for m in HEADLINE if m in part.index]):
                lines.append("  by device type (bias.by_device_type.<type>.<figure>):")
            lines.append(_row_text(part.loc[metric], name, width))
        counts = part["verdict"].map(lambda v: v.split(" at ")[0]).value_counts()
        lines.append("  all metrics: " + ", ".join(f"{v} {k}" for k, v in counts.items())
                     + " (every metric in differences.csv, or rerun with --all)")
    if len(result.conditions) > 1:
        lines += ["", "does the candidate still win under stress?"]
        for metric in HEADLINE:
            verdicts = []
            for condition in result.conditions:
                rows = d[(d["condition"] == condition) & (d["metric"] == metric)]
                if not rows.empty:
                    verdicts.append(f"{rows.iloc[0]['verdict']} {condition}")
            if verdicts and direction_of(metric):
                lines.append(f"  {metric}: " + "; ".join(verdicts))
    if not result.detections.empty:
        lines += ["", f"seeds needed (paired t test, two-sided 5% level, power {result.power:g}; "
                      "noncentral t, Cohen 1988):"]
        for row in result.detections.itertuples():
            needed = "more than a million" if row.seeds_needed is pd.NA else f"{row.seeds_needed}"
            if not math.isfinite(row.sd_of_differences):
                needed = "unknown (needs at least 2 seeds to estimate the spread)"
            lines.append(f"  {row.metric} by {_num(row.change)} ({row.condition}): {needed} "
                         f"(sd of paired differences {_num(row.sd_of_differences)})")
    lines += ["", f"caution: {result.caution}"]
    return "\n".join(lines)


def comparison_record(result: ComparisonResult) -> dict[str, Any]:
    """The JSON-ready description of a comparison written to ``comparison.json``."""
    def verdicts(condition: str) -> dict[str, str]:
        part = result.differences[result.differences["condition"] == condition]
        return dict(zip(part["metric"], part["verdict"], strict=True))

    return {
        "kind": "compare",
        "fleetsim": __version__,
        "fleet_file": result.base.source,
        "overrides": list(result.base.overrides),
        "baseline": list(result.baseline.overrides),
        "candidate": list(result.candidate.overrides),
        "seeds": result.seeds,
        "candidate_seed_offset": result.candidate_seed_offset,
        "conditions": result.conditions,
        "interval": f"{int(LEVEL * 100)}% paired Student t across seeds",
        "power": result.power,
        "verdicts": {c: verdicts(c) for c in result.conditions},
        "detections": json.loads(result.detections.to_json(orient="records")),
        "executor": result.executor,
        "runs_reused": result.reused,
        "wall_s": result.wall_s,
        "caution": result.caution,
    }


def write_compare(result: ComparisonResult, folder: str | Path) -> list[Path]:
    """Write runs, differences, comparison.json and comparison.md into ``folder``, each atomically.

    Raises FleetsimError when ``folder`` is not empty and not a fleetsim comparison folder (see
    :func:`fleetsim.output.claim_study`) or a file cannot be written.
    """
    from ..output import claim_study

    folder = Path(folder)
    claim_study(folder, "compare")
    written = []
    for frame, stem in ((result.runs, "runs"), (result.differences, "differences")):
        written += save_frame(frame, folder / stem)
    atomic_text(folder / "comparison.json", json.dumps(comparison_record(result), indent=2, default=str) + "\n")
    atomic_text(folder / "comparison.md", render_compare(result, every_metric=True) + "\n")
    return written + [folder / "comparison.json", folder / "comparison.md"]

