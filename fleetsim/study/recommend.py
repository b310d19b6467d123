"""Choosing one cell of a sweep: an objective, limits, and the reasons for the choice.

The rule, applied to the per-cell means over seeds:

1. a cell meets the limits when every limited metric's mean satisfies its limit (a mean
   that is not finite does not);
2. among those, the recommendation has the best mean objective; among exactly equal means a
   cell on the Pareto front goes first, then the lower cell index (the earlier one);
3. the runner-up is the next best cell that meets the limits. How close it is: the gap in
   mean objective, and the paired 95% interval of the per-seed gap (both cells ran on the
   same seeds, see docs/studies.md on common random numbers).

:func:`explain` then sets the mechanism figures behind the pick (rounds abandoned and failed,
device supply against demand, waste by cause) beside those of the runner-up, or of the
baseline cell when there is none (docs/studies.md, "Why").
"""

from __future__ import annotations

import math
import re
from dataclasses import dataclass, field
from typing import Any, Literal

import numpy as np
import pandas as pd

from ..errors import ConfigError
from ..events import WASTE_CAUSES, json_key
from .stats import Interval, mean_interval, paired_interval
from .table import workload_prefix

__all__ = ["Objective", "Limit", "Recommendation", "Why", "parse_limit", "recommend", "explain"]


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


@dataclass
class Why:
    """The mechanism figures behind a recommendation, beside those of the cell it is held
    against (``basis``: ``runner-up``, ``baseline`` (cell 0) or ``next best`` (the best other
    cell by the objective, limits aside)). ``figures``: one mapping per workload (None for a
    single one) and figure with its cell means, ``recommended`` and ``against``; ``lines``:
    the text printed."""

    against: int | None
    against_label: str | None
    basis: str
    figures: list[dict[str, Any]] = field(default_factory=list)
    lines: list[str] = field(default_factory=list)

    def as_dict(self) -> dict[str, Any]:
        figures = [{k: (None if isinstance(v, float) and not math.isfinite(v) else v) for k, v in f.items()}
                   for f in self.figures]
        return {"against": self.against, "against_label": self.against_label, "basis": self.basis,
                "figures": figures, "lines": self.lines}


def _against(cells: pd.DataFrame, rec: Recommendation) -> tuple[int | None, str]:
    """The cell a recommendation is explained against, and why that one."""
    if rec.runner_up is not None:
        return rec.runner_up, "runner-up"
    others = cells[cells["cell"] != rec.cell]
    if others.empty:
        return None, "none"
    if int(cells["cell"].min()) != rec.cell:
        return int(cells["cell"].min()), "baseline"
    values = others[rec.objective.metric].astype(float) * (1.0 if rec.objective.maximise else -1.0)
    return int(others.loc[values.fillna(-math.inf).idxmax(), "cell"]), "next best"


def _mechanism(runs: pd.DataFrame, p: str) -> dict[str, pd.Series]:
    """Per run, the figures of one workload (column prefix ``p``) the explanation reads."""
    def col(name: str) -> pd.Series:
        return runs[p + name].astype(float) if p + name in runs.columns else pd.Series(math.nan, index=runs.index)

    hours = runs["simulated_hours"].astype(float) if "simulated_hours" in runs.columns else col("simulated_hours")
    with np.errstate(divide="ignore", invalid="ignore"):
        out = {
            "abandoned_share": col("study_abandoned_share"), "failed_share": col("study_failed_share"),
            "checkins_per_hour": 3600.0 * col("server_load_checkins_per_s_mean"),
            "accepted_per_hour": col("server_load_accepted") / hours,
            "accepted_share_of_checkins": 1.0 - col("server_load_turned_away_share"),
            "accepted_per_round": col("participations_accepted") / col("rounds_attempted"),
            "selection_at_timeout": col("rounds_selection_at_timeout"),
            "eligible_correlation": col("rounds_eligible_correlation"),
            "waste_compute_fraction": col("waste_compute_fraction"),
        }
        wasted = col("waste_compute_s")
        for cause in WASTE_CAUSES[1:]:
            spent = col(f"waste_by_cause_{json_key(cause)}_compute_s").fillna(0.0)
            out[f"waste_{json_key(cause)}_compute_share"] = (out["waste_compute_fraction"] * spent / wasted).where(
                wasted > 0, 0.0)
    return out


def _pct(x: float) -> str:
    return "n/a" if not math.isfinite(x) else f"{100 * x:.1f}%"


def _num(x: float) -> str:
    return "n/a" if not math.isfinite(x) else f"{x:,.0f}" if abs(x) >= 100 else f"{x:.3g}"


def _lines(f: dict[str, tuple[float, float]], asked: tuple[float, float], head: str) -> list[str]:
    """The printed lines of one workload: each figure as recommended, then ``against`` the other."""
    def pair(name: str, show: Any = _pct) -> str:
        a, b = f[name]
        return f"{show(a)} against {show(b)}"

    (ar, ab), (sr, sb) = f["accepted_per_hour"], f["accepted_share_of_checkins"]
    (pr, pb), (qr, qb) = f["accepted_per_round"], asked
    peak = {k: max(v if math.isfinite(v) else 0.0 for v in f[k]) for k in f
            if k.startswith("waste_") and k.endswith("_compute_share")}
    causes = sorted((k for k in peak if peak[k] > 0), key=lambda k: -peak[k])
    top = [f"{k[6:-14].replace('_', ' ')} {pair(k)}" for k in causes[:3]]
    return [
        f"{head}rounds: abandoned at the selection timeout {pair('abandoned_share')}; failed (report deadline "
        f"or unmasking) {pair('failed_share')}",
        f"{head}supply: {pair('checkins_per_hour', _num)} eligible check-ins per hour; committed rounds follow "
        f"eligible devices by hour with r = {pair('eligible_correlation', _num)}",
        f"{head}demand: {_num(ar)} accepted per hour ({_pct(sr)} of the estimated check-ins) against {_num(ab)} "
        f"({_pct(sb)}); "
        f"{_num(pr)} accepted per round of {_num(qr)} asked against {_num(pb)} of {_num(qb)}; selections "
        f"that ran to the timeout {pair('selection_at_timeout')}",
        f"{head}waste: {pair('waste_compute_fraction')} of compute" + ("; by cause: " + ", ".join(top) if top else ""),
    ]


def explain(cells: pd.DataFrame, runs: pd.DataFrame, rec: Recommendation, workloads: list[str],
            asked: dict[int, dict[str, float]]) -> Why | None:
    """The mechanism figures behind ``rec`` against the runner-up or baseline (None without a
    recommendation). ``cells``/``runs`` as for :func:`recommend`; ``workloads`` the names of
    several (empty for one); ``asked[cell][name]`` the devices a full round of that workload
    asks for (``""`` for a single workload). Every figure is the cell's mean over its seeds of
    the per-run figure (runs where it is undefined left out)."""
    if rec.cell is None:
        return None
    other, basis = _against(cells, rec)
    labels = cells.set_index("cell")["label"].to_dict()
    why = Why(against=other, against_label=labels.get(other), basis=basis)
    if other is None:
        why.lines.append("no other cell to set it against")
        return why
    for name in workloads or [""]:
        p = workload_prefix(name) if name else ""
        per_run = _mechanism(runs, p)
        figures: dict[str, tuple[float, float]] = {}
        for figure, values in per_run.items():
            pair = tuple(float(values[runs["cell"] == c].mean()) for c in (rec.cell, other))
            figures[figure] = pair  # type: ignore[assignment]
            why.figures.append({"workload": name or None, "figure": figure, "recommended": pair[0],
                                "against": pair[1]})
        need = (asked.get(rec.cell, {}).get(name, math.nan), asked.get(other, {}).get(name, math.nan))
        why.figures.append({"workload": name or None, "figure": "asked_per_round", "recommended": need[0],
                            "against": need[1]})
        why.lines.extend(_lines(figures, need, f"{name}: " if name else ""))
    return why
