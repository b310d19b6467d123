"""A comparison's judgement of each metric: paired differences, tests, verdict codes, seeds needed.

For every metric of one condition the per-seed differences candidate - baseline give a 95%
paired t interval. A metric with a direction (:func:`fleetsim.study.table.direction_of`; a
rate made from a count takes its count's) is judged on its *improvement*: candidate -
baseline where higher is better, baseline - candidate where lower is better, and the fall in
shortfall from 1 (1 - min(r, 1/r)) for representation ratios.

What is tested and on what scale is :mod:`fleetsim.study.compare_rules` (constants and
settings are not tested, counts are judged as rates); the tests and the two families, the
primary metrics under Holm's method and the rest under Benjamini-Hochberg's, are
:mod:`fleetsim.study.compare_tests`. The verdict is a code of :data:`VERDICTS`; the seeds it
rests on and the significance level are columns of their own (``seeds``, ``alpha``), and
:func:`verdict_text` words it for the text output.

``seeds_needed`` (metrics with a direction) is how many seeds a paired t test (two-sided, 5%
level, fixed number of seeds) needs to detect the observed change with the chosen power,
given the observed sd of the paired differences (:func:`fleetsim.study.stats.seeds_needed`).
"""

from __future__ import annotations

import math
from collections.abc import Mapping, Sequence
from dataclasses import dataclass
from typing import Any

import numpy as np
import pandas as pd

from .compare_rules import Margin, judged_direction, pinned
from .compare_tests import Design, Tested, decide, examine_metric
from .names import resolve_metric
from .stats import LEVEL, mean_interval, paired_interval, seeds_needed
from .table import improvement_sign, shortfall, workload_prefixes

__all__ = ["VERDICTS", "CONDITIONS", "ALPHA", "ROLES", "Condition", "verdict_text", "differences", "detections",
           "DIFFERENCE_COLUMNS"]

ALPHA = round(1.0 - LEVEL, 12)
"""Significance level of every verdict (two-sided): 1 - the intervals' confidence level."""

VERDICTS: dict[str, str] = {
    "better": "a metric with a direction improved: its test of no change is rejected after adjustment "
              "(Holm for primary, Benjamini-Hochberg for secondary metrics) and the mean improvement is above 0",
    "worse": "a metric with a direction got worse: its test of no change is rejected after adjustment "
             "and the mean improvement is below 0",
    "higher": "a neutral metric rose: its test of no change is rejected after adjustment (secondary metrics only)",
    "lower": "a neutral metric fell: its test of no change is rejected after adjustment (secondary metrics only)",
    "no-change-that-matters": "the metric has a margin and its two one-sided tests (TOST) show the mean "
                              "difference inside it, after adjustment",
    "no-detectable-change": "tested, but neither a change nor (with a margin) equivalence is shown: these seeds "
                            "cannot tell (not the same as no change)",
    "not-tested-constant": "not tested: the figure has one value on every seed in both arms",
    "set-by-arms": "not tested: a setting pins the figure (an input the summary repeats, or a figure constant "
                   "in each arm but different between them, or present in one arm only)",
    "judged-as-rate": "not tested: a raw count or total, judged as its rate instead (column judged_as)",
    "too-few-seeds": "fewer than 2 seeds gave the metric a value in both arms, so there is no test",
}
"""Verdict codes and what each means (docs/studies.md has the same table)."""

NOT_TESTED = ("not-tested-constant", "set-by-arms", "judged-as-rate", "too-few-seeds")

ROLES: dict[str, str] = {
    "primary": "named by --primary (or the default list): decides the overall line; Holm's method",
    "secondary": "every other metric: Benjamini-Hochberg false discovery rate control",
}
"""Role codes (column ``role``)."""

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


def verdict_text(code: str, seeds: int) -> str:
    """A verdict code as the text output words it (``no detectable change at 3 seeds``)."""
    return {
        "higher": "higher (neutral)",
        "lower": "lower (neutral)",
        "no-change-that-matters": "no change that matters",
        "no-detectable-change": f"no detectable change at {seeds} seeds",
        "not-tested-constant": "not tested: constant",
        "set-by-arms": "set by the arms",
        "judged-as-rate": "judged as a rate",
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


def _gain(direction: str | None, b: np.ndarray, c: np.ndarray) -> np.ndarray:
    """The per-seed improvement (the difference for a neutral metric)."""
    if direction == "closer-to-1":
        return shortfall(b) - shortfall(c)
    sign = improvement_sign(direction)  # type: ignore[arg-type]
    return sign * (c - b) if sign else c - b


def _described(metric: str, direction: str | None, b: np.ndarray, c: np.ndarray, power: float) -> dict[str, Any]:
    """The descriptive part of a metric's row: means, difference and its interval, improvement."""
    raw = paired_interval(b, c)
    judged = mean_interval(_gain(direction, b, c))
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
        "seeds_needed": _needed(judged.mean, judged.sd, power) if direction else None,
    }


DIFFERENCE_COLUMNS = [
    "condition", "stress_file", "metric", "role", "direction", "judged_as", "seeds", "alpha", "baseline_mean",
    "candidate_mean", "difference", "low", "high", "relative", "improvement", "improvement_low",
    "improvement_high", "sd_of_differences", "p_value", "adjustment", "p_adjusted", "margin", "margin_value",
    "tost_p", "tost_p_adjusted", "verdict", "seeds_needed",
]
"""The columns of ``differences.csv``, in order (docs/studies.md says what each holds)."""


def _code(row: dict[str, Any], changed: bool, equivalent: bool) -> str:
    if changed:
        up = row["improvement"] > 0 if row["direction"] != "neutral" else row["difference"] > 0
        if row["direction"] == "neutral":
            return "higher" if up else "lower"
        return "better" if up else "worse"
    return "no-change-that-matters" if equivalent else "no-detectable-change"


def _condition_rows(b_block: np.ndarray, c_block: np.ndarray, metrics: list[str], power: float,
                    primary: Sequence[str], margins: Mapping[str, Margin], rate_of: Mapping[str, str],
                    design: Design, exact: bool, prefixes: Sequence[str]) -> list[dict[str, Any]]:
    """The rows of one condition: describe, classify and test every metric, then adjust and
    decide each family."""
    rows: list[dict[str, Any]] = []
    tested: dict[str, list[tuple[int, Tested]]] = {"primary": [], "secondary": []}
    for j, metric in enumerate(metrics):
        b, c = b_block[:, j], c_block[:, j]
        direction = judged_direction(metric, prefixes, dict(rate_of))
        row = _described(metric, direction, b, c, power)
        role = "primary" if metric in primary else "secondary"
        margin = margins.get(metric)
        row.update(role=role, judged_as=rate_of.get(metric), p_value=math.nan, adjustment=None,
                   p_adjusted=math.nan, margin=margin.text if margin else None, margin_value=math.nan,
                   tost_p=math.nan, tost_p_adjusted=math.nan)
        code = "judged-as-rate" if metric in rate_of else pinned(metric, b, c, prefixes)
        if code is None and row["seeds"] < 2:
            code = "too-few-seeds"
        row["verdict"] = code
        if code is None:
            result = examine_metric(_gain(direction, b, c), c - b, b, design, margin, exact and role == "primary")
            row.update(p_value=result.p, margin_value=result.margin, tost_p=result.tost_p)
            tested[role].append((len(rows), result))
        rows.append(row)
    for role, found in tested.items():
        decisions = decide([t for _, t in found], role == "primary", design, ALPHA)
        for k, (i, _) in enumerate(found):
            rows[i].update(adjustment=decisions.adjustment, p_adjusted=decisions.p_adjusted[k],
                           tost_p_adjusted=decisions.tost_adjusted[k])
            rows[i]["verdict"] = _code(rows[i], bool(decisions.changed[k]), bool(decisions.equivalent[k]))
    return rows


def differences(runs: pd.DataFrame, conditions: Sequence[Condition], metrics: list[str], base: str, cand: str,
                power: float, primary: Sequence[str] = (), margins: Mapping[str, Margin] | None = None,
                rate_of: Mapping[str, str] | None = None, design: Design | None = None,
                exact: bool = True) -> pd.DataFrame:
    """One row per condition and metric (``differences.csv``, columns :data:`DIFFERENCE_COLUMNS`).

    ``primary``: the primary metrics; ``margins``: margins by metric; ``rate_of``: each
    count's rate column; ``design``: the looks of a sequential comparison (default one look
    at every seed); ``exact``: solve the primary metrics' repeated p-values exactly.
    """
    out = []
    prefixes = workload_prefixes(runs.columns)
    for condition in conditions:
        base_block, cand_block = _blocks(runs, condition.code, base, cand, metrics)
        look = design or Design((base_block.shape[0],))
        rows = _condition_rows(base_block, cand_block, metrics, power, primary, margins or {}, rate_of or {},
                               look, exact, prefixes)
        out += [{"condition": condition.code, "stress_file": condition.stress_file, **row} for row in rows]
    frame = pd.DataFrame(out, columns=DIFFERENCE_COLUMNS)
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
