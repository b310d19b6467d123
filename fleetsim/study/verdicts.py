"""A comparison's judgement of each metric: paired differences, verdict codes, seeds needed.

For every metric of one condition the per-seed differences candidate - baseline give a 95%
paired t interval. A metric with a direction (:func:`fleetsim.study.table.direction_of`) is
judged on its *improvement*: candidate - baseline where higher is better, baseline -
candidate where lower is better, and the fall in shortfall from 1 (1 - min(r, 1/r)) for
representation ratios. The verdict is a code of :data:`VERDICTS`; the seeds it rests on and
the significance level are columns of their own (``seeds``, ``alpha``), and
:func:`verdict_text` words it for the text output.

``seeds_needed`` (metrics with a direction) is how many seeds a paired t test (two-sided, 5%
level) needs to detect the observed change with the chosen power, given the observed sd of
the paired differences (:func:`fleetsim.study.stats.seeds_needed`).
"""

from __future__ import annotations

import math
from collections.abc import Sequence
from dataclasses import dataclass
from typing import Any

import numpy as np
import pandas as pd

from .names import resolve_metric
from .stats import LEVEL, Interval, mean_interval, paired_interval, seeds_needed
from .table import direction_of, improvement_sign, shortfall, workload_prefixes

__all__ = ["VERDICTS", "CONDITIONS", "ALPHA", "Condition", "verdict", "verdict_text", "differences", "detections"]

ALPHA = round(1.0 - LEVEL, 12)
"""Significance level of every verdict (two-sided): 1 - the intervals' confidence level."""

VERDICTS: dict[str, str] = {
    "better": "a metric with a direction improved: the 95% interval of the improvement lies above 0",
    "worse": "a metric with a direction got worse: the 95% interval of the improvement lies below 0",
    "higher": "a neutral metric rose: the 95% interval of the difference lies above 0",
    "lower": "a neutral metric fell: the 95% interval of the difference lies below 0",
    "no-detectable-change": "the 95% interval includes 0: these seeds cannot tell (not the same as no change)",
    "too-few-seeds": "fewer than 2 seeds gave the metric a value in both arms, so there is no interval",
}
"""Verdict codes and what each means (docs/studies.md has the same table)."""

CONDITIONS: dict[str, str] = {
    "as-configured": "both arms as the fleet file and their settings say",
    "stressed": "both arms with the stress file's disruptions added (column stress_file)",
}
"""Condition codes and what each means."""


@dataclass(frozen=True)
class Condition:
    """One condition of a comparison: its code and the stress file it adds (None as configured)."""

    code: str
    stress_file: str | None = None

    @property
    def text(self) -> str:
        return "as configured" if self.stress_file is None else f"stressed by {self.stress_file}"


def verdict(direction: str | None, judged: Interval) -> str:
    """The code of :data:`VERDICTS` for a metric of ``direction`` whose judged interval
    (improvement, or difference for a neutral metric) is ``judged``."""
    if judged.n < 2:
        return "too-few-seeds"
    if not judged.excludes_zero():
        return "no-detectable-change"
    up = judged.low > 0
    if direction is None:
        return "higher" if up else "lower"
    return "better" if up else "worse"


def verdict_text(code: str, seeds: int) -> str:
    """A verdict code as the text output words it (``no detectable change at 3 seeds``)."""
    return {
        "higher": "higher (neutral)",
        "lower": "lower (neutral)",
        "no-detectable-change": f"no detectable change at {seeds} seeds",
        "too-few-seeds": "too few seeds to tell",
    }.get(code, code)


def _blocks(runs: pd.DataFrame, condition: str, base: str, cand: str,
            metrics: list[str]) -> tuple[np.ndarray, np.ndarray]:
    """Baseline and candidate values (seeds x metrics) of one condition, rows paired by seed."""
    part = runs[runs["condition"] == condition]
    b = part[part["arm"] == base].set_index("seed")
    c = part[part["arm"] == cand].set_index("seed")
    seeds = b.index.intersection(c.index).sort_values()
    return (b.loc[seeds, metrics].to_numpy(dtype=float), c.loc[seeds, metrics].to_numpy(dtype=float))


def _needed(change: float, sd: float, power: float) -> int | None:
    if not (math.isfinite(change) and math.isfinite(sd)):
        return None
    return seeds_needed(change, sd, power=power)


def _judged(metric: str, b: np.ndarray, c: np.ndarray, power: float,
            prefixes: Sequence[str] = ()) -> dict[str, Any]:
    """The row of one metric: means, difference and its interval, improvement, verdict.
    ``prefixes``: the workloads' column prefixes, so a workload's column is judged as its own."""
    raw = paired_interval(b, c)
    direction = direction_of(metric, prefixes)
    sign = improvement_sign(direction)
    if direction == "closer-to-1":
        gain = shortfall(b) - shortfall(c)
    elif sign:
        gain = sign * (c - b)
    else:
        gain = c - b
    judged = mean_interval(gain)
    base_mean = mean_interval(b).mean
    return {
        "metric": metric,
        "direction": direction or "neutral",
        "seeds": raw.n,
        "alpha": ALPHA,
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
        "verdict": verdict(direction, judged),
        "seeds_needed": _needed(judged.mean, judged.sd, power) if direction else None,
    }


def differences(runs: pd.DataFrame, conditions: Sequence[Condition], metrics: list[str], base: str, cand: str,
                power: float) -> pd.DataFrame:
    """One row per condition and metric (``differences.csv``)."""
    out = []
    prefixes = workload_prefixes(runs.columns)
    for condition in conditions:
        base_block, cand_block = _blocks(runs, condition.code, base, cand, metrics)
        for j, metric in enumerate(metrics):
            row = _judged(metric, base_block[:, j], cand_block[:, j], power, prefixes)
            out.append({"condition": condition.code, "stress_file": condition.stress_file, **row})
    frame = pd.DataFrame(out)
    frame["seeds_needed"] = frame["seeds_needed"].astype("Int64")
    return frame


DETECTION_COLUMNS = ["condition", "stress_file", "metric", "requested", "change", "sd_of_differences", "power",
                     "alpha", "seeds_needed"]


def detections(runs: pd.DataFrame, conditions: Sequence[Condition], metrics: list[str], base: str, cand: str,
               detect: Sequence[Any], power: float) -> pd.DataFrame:
    """One row per condition and ``--detect``: the seeds a paired t test needs for that change."""
    out = []
    for wanted in detect:
        metric = resolve_metric(wanted.metric, metrics, "--detect")
        for condition in conditions:
            b, c = (block[:, 0] for block in _blocks(runs, condition.code, base, cand, [metric]))
            diff = mean_interval(c - b)
            base_mean = mean_interval(b).mean
            change = wanted.change * abs(base_mean) if wanted.relative else wanted.change
            needed = seeds_needed(change, diff.sd, power=power) if math.isfinite(diff.sd) and change else None
            out.append({
                "condition": condition.code, "stress_file": condition.stress_file, "metric": metric,
                "requested": str(wanted), "change": change, "sd_of_differences": diff.sd, "power": power,
                "alpha": ALPHA, "seeds_needed": needed,
            })
    frame = pd.DataFrame(out, columns=DETECTION_COLUMNS)
    frame["seeds_needed"] = frame["seeds_needed"].astype("Int64")
    return frame
