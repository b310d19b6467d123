"""A sweep: a grid of cells (every combination of the varied values) times seeds, summarised
per cell, its Pareto front and a pick.

:func:`run_sweep` runs it (the cells through :mod:`fleetsim.study.cells`);
:mod:`fleetsim.study.sweep_output` prints it and writes the study folder.
"""

from __future__ import annotations

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
from .recommend import Limit, Objective, Recommendation, recommend
from .runs import Progress, gather
from .settings import Axis, Cell, FleetFile, grid_cells, workload_names
from .store import RunStore
from .table import PARETO_OBJECTIVES, PARETO_OBJECTIVES_SEVERAL, SEVERAL_COMMITTED, flatten_summary, metric_columns

__all__ = ["SweepResult", "run_sweep", "resolve_goal", "default_objective", "DEFAULT_OBJECTIVE",
           "DEFAULT_OBJECTIVE_SEVERAL"]

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
    try:
        option = "--maximise" if objective.maximise else "--minimise"
        goal = Objective(resolve_metric(objective.metric, columns, option, absent_zero=True), objective.maximise)
    except ConfigError as exc:
        problems.extend(exc.problems)
    bounds = []
    for lim in limits:
        try:
            bounds.append(Limit(resolve_metric(lim.metric, columns, "--limit", absent_zero=True), lim.operator,
                                lim.value))
        except ConfigError as exc:
            problems.extend(exc.problems)
    if problems:
        raise ConfigError(problems)
    return goal, bounds


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
    caution = next(iter(summaries.values())).get("caution", "")
    return SweepResult(
        base=base, axes=list(axes), seeds=list(seeds), grid=cells, configs=[config for _, config in grid],
        runs=runs, cell_means=long, cells=wide, front=front, recommendation=rec, caution=caution,
        executor=runner.description, reused=reused, wall_s=time.perf_counter() - started,
        workloads=workloads, objectives=objectives,
    )
