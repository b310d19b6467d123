"""A sweep: a grid of cells (every combination of the varied values) times seeds, summarised
per cell, its Pareto front and a pick.

:func:`run_sweep` runs it (the cells through :mod:`fleetsim.study.cells`);
:mod:`fleetsim.study.sweep_output` prints it and writes the study folder.

:func:`edge_warnings` says when the recommendation sits on the edge of the grid along an
ordered axis with the objective still improving towards that edge, and which value would
extend the axis (the rule: docs/studies.md, "The edge of the grid").
"""

from __future__ import annotations

import math
import re
import time
from collections.abc import Sequence
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import pandas as pd

from ..config import Config
from ..errors import ConfigError
from .cells import cell_jobs, cell_statistics, runs_table, setting_column, settings_columns
from .executors import Executor, InProcess
from .names import resolve_metric
from .pareto import pareto_front
from .recommend import Limit, Objective, Recommendation, Why, explain, recommend
from .runs import Progress, gather
from .settings import Axis, Cell, FleetFile, check_policies, grid_cells, workload_names
from .stats import Interval, mean_interval
from .store import RunStore
from .table import (
    PARETO_OBJECTIVES,
    PARETO_OBJECTIVES_SEVERAL,
    SEVERAL_COMMITTED,
    USED_EXAMPLES_PER_HOUR,
    WEIGHT_PER_HOUR,
    flatten_summary,
    metric_columns,
)

__all__ = ["SweepResult", "EdgeWarning", "run_sweep", "resolve_goal", "default_objective", "edge_warnings",
           "DEFAULT_OBJECTIVE", "DEFAULT_OBJECTIVE_SEVERAL"]

DEFAULT_OBJECTIVE = Objective("rounds_committed_per_hour", maximise=True)
DEFAULT_OBJECTIVE_SEVERAL = Objective(SEVERAL_COMMITTED, maximise=True)
"""The default objective of a sweep of several workloads: their committed rounds per hour, summed."""


@dataclass
class SweepResult:
    """Everything a sweep found. ``runs``: one row per cell and seed; ``cell_means``: one row
    per cell and metric (long); ``cells``: one row per cell with every metric's mean (wide),
    ``on_front`` and ``meets_limits``."""

    base: FleetFile
    axes: list[Axis]
    seeds: list[int]
    grid: list[Cell]
    configs: list[Config]
    runs: pd.DataFrame
    cell_means: pd.DataFrame
    cells: pd.DataFrame
    front: list[int]
    recommendation: Recommendation
    caution: str
    executor: str
    reused: int
    wall_s: float
    heatmap_metrics: list[str] = field(default_factory=list)
    workloads: list[str] = field(default_factory=list)
    """The names of the workloads when the fleet file lists several (empty for one)."""
    objectives: tuple[tuple[str, bool], ...] = PARETO_OBJECTIVES
    """The front's objectives and whether each is maximised (the totals for several workloads)."""
    edges: list[EdgeWarning] = field(default_factory=list)
    """The recommendation's place on the edge of the grid (:func:`edge_warnings`)."""
    why: Why | None = None
    """The mechanism figures behind the recommendation (:func:`fleetsim.study.recommend.explain`)."""

    def settings_columns(self) -> list[str]:
        return [setting_column(axis.key) for axis in self.axes]


def resolve_goal(objective: Objective, limits: Sequence[Limit], columns: Sequence[str]) -> tuple[Objective,
                                                                                                list[Limit]]:
    """The objective and limits with their metric names resolved against ``columns`` (a count
    by cause no run has seen yet stays as given, and is 0).

    Raises ConfigError with a line for each name that is old, unknown or ambiguous.
    """
    problems: list[str] = []
    goal = objective
    option = "--maximise" if objective.maximise else "--minimise"
    try:
        goal = Objective(_resolve(objective.metric, columns, option), objective.maximise)
    except ConfigError as exc:
        problems.extend(exc.problems)
    bounds = []
    for lim in limits:
        try:
            bounds.append(Limit(_resolve(lim.metric, columns, "--limit"), lim.operator, lim.value))
        except ConfigError as exc:
            problems.extend(exc.problems)
    if problems:
        raise ConfigError(problems)
    return goal, bounds


@dataclass(frozen=True)
class EdgeWarning:
    """The recommendation on the edge of an ordered axis with the objective still improving
    towards it. ``side``: ``smallest`` or ``largest``; ``gain``: the paired interval over seeds
    of the objective's improvement from ``neighbour`` to ``value`` (positive is better);
    ``extension`` the next value in the axis's step pattern and ``vary`` the ``--vary`` text
    that adds it, or ``problem`` (and ``vary`` None) when the key does not allow it."""

    key: str
    side: str
    value: Any
    neighbour: Any
    value_mean: float
    neighbour_mean: float
    gain: Interval
    extension: Any
    vary: str | None
    problem: str | None
    text: str

    def as_dict(self) -> dict[str, Any]:
        gain = {k: (v if not isinstance(v, float) or math.isfinite(v) else None) for k, v in vars(self.gain).items()}
        return {"key": self.key, "side": self.side, "value": self.value, "neighbour": self.neighbour,
                "value_mean": self.value_mean, "neighbour_mean": self.neighbour_mean, "gain": gain,
                "extension": self.extension, "vary": self.vary, "problem": self.problem, "text": self.text}


_QUANTITY = re.compile(r"^\s*([-+]?\d+(?:\.\d+)?)\s*([A-Za-z%][A-Za-z/%]*)\s*$")


def _ordered(axis: Axis) -> tuple[list[float], str] | None:
    """An axis's values as numbers and the unit they are written with (``""`` for numbers):
    numbers, or quantities written with one unit (``4m,6m,8m``); None for any other axis."""
    values = axis.values
    if all(isinstance(v, (int, float)) and not isinstance(v, bool) and math.isfinite(v) for v in values):
        return [float(v) for v in values], ""
    found = [_QUANTITY.match(v) if isinstance(v, str) else None for v in values]
    if all(found) and len({m.group(2) for m in found if m}) == 1:
        return [float(m.group(1)) for m in found if m], found[0].group(2)  # type: ignore[union-attr]
    return None


def _next_value(numbers: list[float], top: bool) -> float:
    """The value after the largest (``top``) or before the smallest: the common step when the
    values are evenly spaced, the common ratio when they grow by one (3 or more positive
    values), else the gap between the edge value and its neighbour."""
    xs = sorted(numbers)
    gaps = [b - a for a, b in zip(xs, xs[1:], strict=False)]
    even = all(math.isclose(g, gaps[0], rel_tol=1e-6, abs_tol=1e-12) for g in gaps)
    ratios = [b / a for a, b in zip(xs, xs[1:], strict=False)] if xs[0] > 0 else []
    if not even and len(xs) >= 3 and ratios and all(math.isclose(r, ratios[0], rel_tol=1e-6) for r in ratios):
        return float(f"{(xs[-1] * ratios[0] if top else xs[0] / ratios[0]):.12g}")
    step = gaps[0] if even else (gaps[-1] if top else gaps[0])
    return float(f"{(xs[-1] + step if top else xs[0] - step):.12g}")


def _written(value: Any) -> str:
    return repr(value) if isinstance(value, float) else str(value)


def _extension(base: FleetFile, axis: Axis, cell: Cell, numbers: list[float], unit: str,
               top: bool) -> tuple[Any, str | None, str | None]:
    """The next value of ``axis`` beyond the edge, the ``--vary`` text that adds it, and the
    first problem when the cell with that value does not validate (then no text)."""
    x = _next_value(numbers, top)
    whole = not unit and all(isinstance(v, int) for v in axis.values) and x.is_integer()
    value: Any = f"{x:g}{unit}" if unit else int(x) if whole else x
    overrides = [Axis(k, (value,)).override(value) if k == axis.key else Axis(k, (v,)).override(v)
                 for k, v in cell.settings]
    try:
        check_policies(base.config(overrides), base.source)
    except ConfigError as exc:
        return value, None, exc.problems[0] if exc.problems else "not a valid value"
    listed = [value, *axis.values] if not top else [*axis.values, value]
    return value, f"--vary {axis.key}={','.join(_written(v) for v in listed)}", None


def edge_warnings(base: FleetFile, axes: Sequence[Axis], grid: Sequence[Cell], cells: pd.DataFrame,
                  runs: pd.DataFrame, objective: Objective, chosen: int | None) -> list[EdgeWarning]:
    """For each ordered axis (:func:`_ordered`) with 2 or more values: a warning when the
    chosen cell's value is the axis's smallest or largest and its mean objective is strictly
    better than that of the cell one value inwards with every other axis held (both means
    finite). ``cells``: the per-cell means; ``runs``: the per-run table (for the paired gain)."""
    if chosen is None:
        return []
    means = cells.set_index("cell")[objective.metric].astype(float)
    rec = next(c for c in grid if c.index == chosen)
    sign = 1.0 if objective.maximise else -1.0
    found = []
    for k, axis in enumerate(axes):
        shape = _ordered(axis)
        if shape is None or len(axis.values) < 2:
            continue
        numbers, unit = shape
        where = {v: x for v, x in zip(map(_written, axis.values), numbers, strict=True)}
        line = sorted((c for c in grid if all(c.settings[j][1] == rec.settings[j][1]
                                              for j in range(len(axes)) if j != k)),
                      key=lambda c: where[_written(c.settings[k][1])])
        position = line.index(rec)
        if position not in (0, len(line) - 1):
            continue
        top = position == len(line) - 1
        inner = line[-2] if top else line[1]
        a, b = float(means[chosen]), float(means[inner.index])
        if not (math.isfinite(a) and math.isfinite(b) and objective.better(a, b)):
            continue
        per = runs.set_index(["cell", "seed"])[objective.metric].astype(float)
        gain = mean_interval(sign * (per[chosen].sort_index() - per[inner.index].sort_index()).to_numpy())
        value, vary, problem = _extension(base, axis, rec, numbers, unit, top)
        found.append(_edge(axis, "largest" if top else "smallest", rec.settings[k][1], inner.settings[k][1],
                           a, b, gain, value, vary, problem, objective.metric))
    return found


def _edge(axis: Axis, side: str, value: Any, neighbour: Any, a: float, b: float, gain: Interval,
          extension: Any, vary: str | None, problem: str | None, metric: str) -> EdgeWarning:
    """The warning with its text."""
    shown = (f"{x:.4g}" for x in (b, a, gain.low, gain.high))
    before, after, low, high = shown
    interval = (f"; paired 95% interval of the gain {low} to {high}"
                + ("" if gain.excludes_zero() else ", so at these seeds it may be noise")) \
        if math.isfinite(gain.low) else ""
    text = (f"{axis.key}={_written(value)} is the {side} value tried and {metric} still improves towards it "
            f"({before} at {_written(neighbour)}, {after} at {_written(value)}{interval}): ")
    text += (f"the best may lie beyond the grid; extend it with {vary}" if vary is not None
             else f"the next value, {_written(extension)}, is not allowed ({problem}), so the grid is at the "
                  "key's bound")
    return EdgeWarning(axis.key, side, value, neighbour, a, b, gain, extension, vary, problem, text)


def _resolve(name: str, columns: Sequence[str], option: str) -> str:
    """:func:`resolve_metric`, with a line of its own for the FedAvg weight per hour, which the
    runs' summaries do not yet make possible."""
    if name.endswith("weight_per_hour") and not any(c.endswith(WEIGHT_PER_HOUR) for c in columns):
        raise ConfigError([f"{option} {name}: the runs' summaries do not hold participations.used_weight (the "
                           f"FedAvg weight of used reports), so there is no {WEIGHT_PER_HOUR}; "
                           f"{USED_EXAMPLES_PER_HOUR} (examples processed by used reports per hour) is there"])
    return resolve_metric(name, columns, option, absent_zero=True)


def default_objective(workloads: Sequence[str]) -> Objective:
    """The objective of a sweep that names none: committed rounds per hour, summed over the
    workloads when there are several (:data:`DEFAULT_OBJECTIVE_SEVERAL`)."""
    return DEFAULT_OBJECTIVE_SEVERAL if workloads else DEFAULT_OBJECTIVE


def _same_workloads(grid: Sequence[tuple[Cell, Config]]) -> list[str]:
    """The workload names every cell shares; raises ConfigError when cells differ in them."""
    first = workload_names(grid[0][1])
    for cell, config in grid[1:]:
        names = workload_names(config)
        if names != first:
            ours, theirs = (", ".join(found) or "one workload" for found in (first, names))
            raise ConfigError([f"--vary cell {cell.label}: the cells train different workloads ({grid[0][0].label}: "
                               f"{ours}; {cell.label}: {theirs}); every cell of a sweep needs the same workloads"])
    return first


def run_sweep(
    base: FleetFile,
    axes: Sequence[Axis],
    seeds: Sequence[int],
    objective: Objective | None = None,
    limits: Sequence[Limit] = (),
    executor: Executor | None = None,
    folder: str | Path | None = None,
    progress: Progress | None = None,
) -> SweepResult:
    """Run every cell of the grid under every seed and summarise.

    ``folder``: the study folder; finished runs are saved under ``folder/cells`` as they end
    and reused when the sweep runs again. Metric names in ``objective`` and ``limits`` are
    study columns, or short (``committed_per_hour``); they are checked on the first summary,
    before the other runs. ``objective`` None is :func:`default_objective`; with several
    workloads the front's objectives are :data:`PARETO_OBJECTIVES_SEVERAL`. Raises ConfigError
    for a bad axis, cell, metric name or empty seed list, or cells that differ in their
    workloads; FleetsimError when a run fails.
    """
    if not axes:
        raise ConfigError(["--vary: give at least one key to vary"])
    if not seeds:
        raise ConfigError(["--seeds: expected at least 1"])
    started = time.perf_counter()
    settings = settings_columns(axes)
    grid = grid_cells(base, axes)
    workloads = _same_workloads(grid)
    objective = objective if objective is not None else default_objective(workloads)
    objectives = PARETO_OBJECTIVES_SEVERAL if workloads else PARETO_OBJECTIVES
    keys, jobs = cell_jobs(grid, seeds)
    store = RunStore(Path(folder) / "cells") if folder is not None else None

    def check(summary: dict[str, Any]) -> None:
        resolve_goal(objective, limits, list(flatten_summary(summary)))

    runner = executor or InProcess()
    summaries, reused = gather(jobs, runner, store, progress, check)
    cells = [cell for cell, _ in grid]
    runs = runs_table(cells, axes, seeds, keys, summaries)
    metrics = metric_columns(runs)
    # Resolved against the whole table: a count by cause may appear only in later runs.
    goal, bounds = resolve_goal(objective, limits, list(runs.columns))
    for name in [goal.metric, *(b.metric for b in bounds)]:
        if name not in runs.columns:
            runs[name] = 0.0
            metrics.append(name)

    long, wide = cell_statistics(runs, metrics, settings)
    points = wide[[name for name, _ in objectives]].to_numpy(dtype=float)
    mask = pareto_front(points, [up for _, up in objectives])
    wide["on_front"] = mask
    front = [int(c) for c in wide.loc[mask, "cell"]]
    rec = recommend(wide, runs, goal, bounds, front=set(front))
    wide["meets_limits"] = wide["cell"].isin(rec.feasible)
    asked = {cell.index: {job.name if workloads else "": float(job.config.rounds.accept_count) for job in config.jobs}
             for cell, config in grid}
    why = explain(wide, runs, rec, workloads, asked)
    edges = edge_warnings(base, axes, cells, wide, runs, goal, rec.cell)
    caution = next(iter(summaries.values())).get("caution", "")
    return SweepResult(
        base=base, axes=list(axes), seeds=list(seeds), grid=cells, configs=[config for _, config in grid],
        runs=runs, cell_means=long, cells=wide, front=front, recommendation=rec, caution=caution,
        executor=runner.description, reused=reused, wall_s=time.perf_counter() - started,
        workloads=workloads, objectives=objectives, edges=edges, why=why,
    )
