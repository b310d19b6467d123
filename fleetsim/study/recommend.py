"""Choosing one cell of a sweep: an objective, limits, and the reasons for the choice.

The rule, applied to the per-cell means over seeds:

1. a cell meets the limits when every limited metric's mean satisfies its limit (a mean
   that is not finite does not);
2. among those, the recommendation has the best mean objective; among exactly equal means a
   cell on the Pareto front goes first, then the lower cell index (the earlier cell of the
   grid);
3. the runner-up is the next best cell that meets the limits. How close it is: the gap in
   mean objective, and the paired 95% interval of the per-seed gap (both cells ran on the
   same seeds, see docs/studies.md on common random numbers).
"""

from __future__ import annotations

import math
import re
from dataclasses import dataclass, field
from typing import Any, Literal

import numpy as np
import pandas as pd

from ..errors import ConfigError
from .stats import Interval, mean_interval, paired_interval

__all__ = ["Objective", "Limit", "Recommendation", "parse_limit", "recommend"]


@dataclass(frozen=True)
class Objective:
    """The metric a recommendation optimises and whether it is maximised."""

    metric: str
    maximise: bool = True

    @property
    def verb(self) -> str:
        return "highest" if self.maximise else "lowest"

    def better(self, a: float, b: float) -> bool:
        return a > b if self.maximise else a < b


@dataclass(frozen=True)
class Limit:
    """A bound a recommended cell's mean must meet: ``metric <= value`` or ``>=``."""

    metric: str
    operator: Literal["<=", ">="]
    value: float

    def holds(self, x: float) -> bool:
        if not math.isfinite(x):
            return False
        return x <= self.value if self.operator == "<=" else x >= self.value

    def margin(self, x: float) -> float:
        """How far ``x`` is inside the limit (negative: outside)."""
        return self.value - x if self.operator == "<=" else x - self.value

    def __str__(self) -> str:
        return f"{self.metric} {self.operator} {self.value:g}"


_LIMIT_RE = re.compile(r"^\s*([^<>=\s]+)\s*(<=|>=)\s*([^\s]+)\s*$")


def parse_limit(text: str) -> Limit:
    """Read ``KEY<=VALUE`` or ``KEY>=VALUE``; VALUE is a number or a percentage (``30%``).

    Raises ConfigError naming ``--limit`` when the text is malformed.
    """
    match = _LIMIT_RE.match(text)
    if not match:
        raise ConfigError(
            [f"--limit {text!r}: expected METRIC<=VALUE or METRIC>=VALUE, e.g. waste_compute_fraction<=0.3"]
        )
    metric, operator, raw = match.groups()
    try:
        value = float(raw[:-1]) / 100.0 if raw.endswith("%") else float(raw)
    except ValueError:
        raise ConfigError([f"--limit {text!r}: {raw!r} is not a number or a percentage"]) from None
    if not math.isfinite(value):
        raise ConfigError([f"--limit {text!r}: the bound must be finite"])
    return Limit(metric=metric, operator=operator, value=value)  # type: ignore[arg-type]


@dataclass
class Recommendation:
    """The chosen cell, why, and the runner-up (``runner_up`` None when it has no rival).

    ``gap`` is best minus runner-up mean objective (sign as the objective: positive is
    better); ``gap_interval`` the paired 95% interval of the per-seed gap.
    """

    objective: Objective
    limits: list[Limit]
    cell: int | None
    label: str | None
    value: Interval | None
    feasible: list[int]
    runner_up: int | None = None
    runner_up_label: str | None = None
    runner_up_value: Interval | None = None
    gap: float = math.nan
    gap_interval: Interval | None = None
    on_front: bool | None = None
    reasons: list[str] = field(default_factory=list)

    def as_dict(self) -> dict[str, Any]:
        def interval(i: Interval | None) -> dict[str, Any] | None:
            if i is None:
                return None
            return {k: (None if isinstance(v, float) and not math.isfinite(v) else v)
                    for k, v in vars(i).items()}

        return {
            "objective": {"metric": self.objective.metric, "maximise": self.objective.maximise},
            "limits": [{"metric": lim.metric, "operator": lim.operator, "value": lim.value} for lim in self.limits],
            "cell": self.cell,
            "label": self.label,
            "value": interval(self.value),
            "cells_meeting_limits": self.feasible,
            "runner_up": self.runner_up,
            "runner_up_label": self.runner_up_label,
            "runner_up_value": interval(self.runner_up_value),
            "gap": None if not math.isfinite(self.gap) else self.gap,
            "gap_interval": interval(self.gap_interval),
            "on_front": self.on_front,
            "reasons": self.reasons,
        }


def _fmt(x: float) -> str:
    if not math.isfinite(x):
        return "n/a"
    return f"{x:.4g}"


def recommend(
    cells: pd.DataFrame,
    runs: pd.DataFrame,
    objective: Objective,
    limits: list[Limit],
    front: set[int] | None = None,
) -> Recommendation:
    """Pick a cell by the rule in the module docstring.

    ``cells``: one row per cell with columns ``cell``, ``label`` and the mean of each metric
    (named as the metric); ``runs``: one row per cell and seed with ``cell``, ``seed`` and the
    metrics. ``front``: cells on the Pareto front (for the reasons given).

    Long because it reads the rule's steps in order (limits, best, reasons, runner-up):
    splitting it would scatter them.
    """
    metric = objective.metric
    means = cells.set_index("cell")
    labels = means["label"].to_dict()
    feasible: list[int] = []
    failures: dict[str, int] = {str(lim): 0 for lim in limits}
    for cell, row in means.iterrows():
        ok = math.isfinite(float(row[metric]))
        for lim in limits:
            if not lim.holds(float(row[lim.metric])):
                failures[str(lim)] += 1
                ok = False
        if ok:
            feasible.append(int(cell))  # type: ignore[arg-type]
    sign = 1.0 if objective.maximise else -1.0
    # Best first; among equal means, front cells first, then the lower cell index.
    on_front = front or set()
    ranked = sorted(feasible, key=lambda c: (-sign * float(means.at[c, metric]), c not in on_front, c))

    def per_seed(cell: int, column: str) -> pd.Series:
        return runs[runs["cell"] == cell].set_index("seed")[column].sort_index()

    rec = Recommendation(objective=objective, limits=list(limits), cell=None, label=None, value=None,
                         feasible=sorted(feasible))
    total = len(means)
    if not ranked:
        rec.reasons.append(f"no cell meets every limit ({total} cells tried)")
        for text, count in failures.items():
            if count:
                rec.reasons.append(f"{count} of {total} cells miss {text}")
        closest = _closest(means, limits)
        if closest is not None:
            cell, worst = closest
            rec.reasons.append(
                f"closest: {labels[cell]} misses by {_fmt(-worst.margin(float(means.at[cell, worst.metric])))} "
                f"on {worst.metric}"
            )
        return rec

    best = ranked[0]
    rec.cell, rec.label = best, labels[best]
    rec.value = mean_interval(per_seed(best, metric).to_numpy())
    rec.on_front = None if front is None else best in front
    where = "meet every limit" if limits else "were tried"
    rec.reasons.append(
        f"{objective.verb} mean {metric}: {_fmt(rec.value.mean)} "
        f"(95% interval {_fmt(rec.value.low)} to {_fmt(rec.value.high)}, {rec.value.n} seeds) "
        f"among the {len(feasible)} of {total} cells that {where}"
    )
    for lim in limits:
        values = per_seed(best, lim.metric).to_numpy(dtype=float)
        spread = mean_interval(values)
        every = bool(np.all([lim.holds(v) for v in values]))
        inside = lim.holds(spread.low if lim.operator == ">=" else spread.high) if spread.n >= 2 else None
        note = "on every seed" if every else "on average, not on every seed"
        if inside is False:
            note += "; its 95% interval reaches past the bound, so more seeds would make this surer"
        rec.reasons.append(f"{lim}: mean {_fmt(spread.mean)} holds {note}")
    for text, count in failures.items():
        if count:
            rec.reasons.append(f"{count} of {total} cells were ruled out by {text}")
    if front is not None:
        rec.reasons.append(
            "it is on the Pareto front" if rec.on_front
            else "it is not on the Pareto front: another cell is at least as good on all three "
                 "front objectives, but misses a limit or the objective"
        )
    if len(ranked) > 1:
        second = ranked[1]
        rec.runner_up, rec.runner_up_label = second, labels[second]
        rec.runner_up_value = mean_interval(per_seed(second, metric).to_numpy())
        a, b = per_seed(best, metric), per_seed(second, metric)
        common = a.index.intersection(b.index)
        rec.gap_interval = paired_interval(b.loc[common].to_numpy(), a.loc[common].to_numpy())
        rec.gap = sign * (rec.value.mean - rec.runner_up_value.mean)
        relative = rec.gap / abs(rec.runner_up_value.mean) if rec.runner_up_value.mean else math.nan
        g = rec.gap_interval
        lo, hi = sorted((sign * g.low, sign * g.high))
        tied = bool(np.all(a.loc[common].to_numpy() == b.loc[common].to_numpy()))
        told = (
            "the two tie on every seed" + (" (the recommendation is on the Pareto front, the runner-up is not)"
                                            if rec.on_front and second not in on_front else "")
            if tied
            else "the paired 95% interval of the gap excludes 0, so the lead is real under these seeds"
            if g.excludes_zero()
            else "the paired 95% interval of the gap includes 0: at this number of seeds the two are "
                 "not distinguishable"
        )
        rec.reasons.append(
            f"runner-up: {labels[second]} with {_fmt(rec.runner_up_value.mean)}; the gap is {_fmt(rec.gap)}"
            + (f" ({100 * relative:.1f}%)" if math.isfinite(relative) else "")
            + f", paired interval {_fmt(lo)} to {_fmt(hi)}; {told}"
        )
    else:
        rec.reasons.append("no other cell meets every limit, so there is no runner-up")
    return rec


def _closest(means: pd.DataFrame, limits: list[Limit]) -> tuple[int, Limit] | None:
    """The cell whose worst relative miss of a limit is smallest, and that limit."""
    best: tuple[float, int, Limit] | None = None
    for cell, row in means.iterrows():
        misses = []
        for lim in limits:
            x = float(row[lim.metric])
            if not math.isfinite(x):
                misses.append((math.inf, lim))
                continue
            scale = abs(lim.value) or 1.0
            misses.append((max(0.0, -lim.margin(x)) / scale, lim))
        if not misses:
            continue
        worst = max(misses, key=lambda m: m[0])
        if best is None or worst[0] < best[0]:
            best = (worst[0], int(cell), worst[1])  # type: ignore[arg-type]
    return None if best is None else (best[1], best[2])
