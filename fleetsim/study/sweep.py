"""A sweep: a grid of settings times seeds, summarised per cell, its Pareto front and a pick.

Outputs of :func:`write_sweep` in the study folder::

    cells/                one record per finished cell x seed (resume; see store.py)
    runs.parquet, .csv    every summary metric per cell and seed (dotted columns)
    cell_means.parquet,   per cell and metric: seeds, mean, sd and 95% t interval
      .csv
    front.csv             per cell: the front's objectives, on_front, meets_limits
    study.json            the design, the front, the recommendation and the caution
    study.md              the text the command prints
    frontier.png          throughput against waste, coloured by worst representation
    heatmaps/*.png        each chosen metric over the two first varied keys (file names are
                          safe slugs of the metric names, see fleetsim.output.safe_name)
    .fleetsim-output      the marker of a fleetsim study folder (kind sweep)
"""

from __future__ import annotations

import json
import math
import time
from collections.abc import Sequence
from dataclasses import dataclass, field
from functools import partial
from pathlib import Path
from typing import Any

import numpy as np
import pandas as pd
from scipy import stats

from .. import __version__
from ..config import Config, config_hash
from ..errors import ConfigError
from ..output import claim_study, inside, safe_name, write_csv
from .executors import Executor, InProcess, Job
from .pareto import pareto_front
from .recommend import Limit, Objective, Recommendation, recommend
from .runs import Progress, gather
from .settings import Axis, Cell, FleetFile, grid_cells
from .stats import LEVEL
from .store import RunStore, atomic_save, atomic_text, run_key
from .table import PARETO_OBJECTIVES, flatten_summary, frame_of_rows, metric_columns, resolve_metric

__all__ = [
    "SweepResult",
    "run_sweep",
    "write_sweep",
    "render_sweep",
    "cell_statistics",
    "study_record",
    "default_heatmaps",
    "DEFAULT_OBJECTIVE",
]

DEFAULT_OBJECTIVE = Objective("rounds.committed_per_hour", maximize=True)

_ABSENT_IS_ZERO = ("waste.by_cause.", "participations.dropouts_by_cause.")


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

    def settings_columns(self) -> list[str]:
        return [f"setting:{axis.key}" for axis in self.axes]


def _resolve(name: str, columns: Sequence[str], option: str) -> str:
    if name.startswith(_ABSENT_IS_ZERO) and name not in columns:
        return name
    return resolve_metric(name, columns, option)


def run_sweep(
    base: FleetFile,
    axes: Sequence[Axis],
    seeds: Sequence[int],
    objective: Objective = DEFAULT_OBJECTIVE,
    limits: Sequence[Limit] = (),
    executor: Executor | None = None,
    folder: str | Path | None = None,
    progress: Progress | None = None,
) -> SweepResult:
    """(Long because it reads one study's steps in order: splitting it would scatter them.) Run every cell of the grid under every seed and summarise.

    ``folder``: the study folder; finished runs are saved under ``folder/cells`` as they end
    and reused when the sweep runs again. Metric names in ``objective`` and ``limits`` may be
    short (``committed_per_hour``). Raises ConfigError for a bad axis, cell, metric name or
    empty seed list, FleetsimError when a run fails.
    """
    if not axes:
        raise ConfigError(["--vary: give at least one key to vary"])
    if not seeds:
        raise ConfigError(["--seeds: expected at least 1"])
    started = time.perf_counter()
    grid = grid_cells(base, axes)
    cells = [cell for cell, _ in grid]
    configs = [config for _, config in grid]
    keys = {(cell.index, seed): run_key(config, seed) for cell, config in grid for seed in seeds}
    jobs = [
        Job(key=keys[cell.index, seed], config=config, seed=seed, label=cell.label)
        for cell, config in grid for seed in seeds
    ]
    store = RunStore(Path(folder) / "cells") if folder is not None else None
    resolved: dict[str, Any] = {}

    def check(summary: dict[str, Any]) -> None:
        columns = list(flatten_summary(summary))
        problems = []
        try:
            resolved["objective"] = Objective(_resolve(objective.metric, columns, "--maximize/--minimize"),
                                              objective.maximize)
        except ConfigError as exc:
            problems.extend(exc.problems)
        limits_out = []
        for lim in limits:
            try:
                limits_out.append(Limit(_resolve(lim.metric, columns, "--limit"), lim.operator, lim.value))
            except ConfigError as exc:
                problems.extend(exc.problems)
        if problems:
            raise ConfigError(problems)
        resolved["limits"] = limits_out

    runner = executor or InProcess()
    summaries, reused = gather(jobs, runner, store, progress, check)

    rows = []
    for cell in cells:
        for seed in seeds:
            flat = flatten_summary(summaries[keys[cell.index, seed]])
            head: dict[str, Any] = {"cell": cell.index, "label": cell.label}
            for key, value in cell.settings:
                head[f"setting:{key}"] = value
            head["seed"] = seed
            flat.pop("seed", None)
            rows.append({**head, **flat})
    runs = frame_of_rows(rows)
    for axis in axes:
        column = f"setting:{axis.key}"
        if not all(isinstance(v, (int, float)) and not isinstance(v, bool) for v in axis.values):
            runs[column] = runs[column].map(str)
    metrics = metric_columns(runs)
    goal: Objective = resolved.get("objective", objective)
    bounds: list[Limit] = resolved.get("limits", list(limits))
    # Resolve again against the whole table (a by-cause count may appear only in later runs).
    check_columns = list(runs.columns)
    goal = Objective(_resolve(goal.metric, check_columns, "--maximize/--minimize"), goal.maximize)
    bounds = [Limit(_resolve(b.metric, check_columns, "--limit"), b.operator, b.value) for b in bounds]
    for name in [goal.metric, *(b.metric for b in bounds)]:
        if name not in runs.columns:
            runs[name] = 0.0
            metrics.append(name)

    long, wide = cell_statistics(runs, metrics, [f"setting:{a.key}" for a in axes])
    points = wide[[name for name, _ in PARETO_OBJECTIVES]].to_numpy(dtype=float)
    mask = pareto_front(points, [up for _, up in PARETO_OBJECTIVES])
    wide["on_front"] = mask
    front = [int(c) for c in wide.loc[mask, "cell"]]
    rec = recommend(wide, runs, goal, bounds, front=set(front))
    wide["meets_limits"] = wide["cell"].isin(rec.feasible)
    caution = next(iter(summaries.values())).get("caution", "")
    return SweepResult(
        base=base, axes=list(axes), seeds=list(seeds), grid=cells, configs=configs, runs=runs,
        cell_means=long, cells=wide, front=front, recommendation=rec, caution=caution,
        executor=runner.description, reused=reused, wall_s=time.perf_counter() - started,
    )


def cell_statistics(
    runs: pd.DataFrame, metrics: Sequence[str], settings: Sequence[str]
) -> tuple[pd.DataFrame, pd.DataFrame]:
    """Per cell and metric: number of finite seeds, mean, sd and the 95% t interval.

    Returns the long table (one row per cell and metric) and the wide table of means (one
    row per cell, a column per metric).
    """
    keys = ["cell", "label", *settings]
    heads = runs[keys].drop_duplicates("cell").reset_index(drop=True)
    values = runs[list(metrics)].to_numpy(dtype=float)
    cell_of_row = runs["cell"].to_numpy()
    long_parts, wide_rows = [], []
    critical_cache: dict[int, float] = {}
    for _, head in heads.iterrows():
        block = values[cell_of_row == head["cell"]]
        finite = np.isfinite(block)
        n = finite.sum(axis=0)
        filled = np.where(finite, block, 0.0)
        with np.errstate(invalid="ignore", divide="ignore"):
            mean = np.where(n > 0, filled.sum(axis=0) / np.maximum(n, 1), np.nan)
            centred = np.where(finite, block - mean, 0.0)
            sd = np.where(n > 1, np.sqrt((centred ** 2).sum(axis=0) / np.maximum(n - 1, 1)), np.nan)
        for k in np.unique(n):
            if k > 1 and k not in critical_cache:
                critical_cache[int(k)] = float(stats.t.ppf(0.5 + LEVEL / 2, k - 1))
        critical = np.array([critical_cache.get(int(k), np.nan) for k in n])
        with np.errstate(invalid="ignore"):
            half = critical * sd / np.sqrt(np.maximum(n, 1))
        part = pd.DataFrame({
            "metric": list(metrics), "seeds": n.astype(np.int64), "mean": mean, "sd": sd,
            "low": mean - half, "high": mean + half,
        })
        for key in reversed(keys):
            part.insert(0, key, head[key])
        long_parts.append(part)
        wide_rows.append({**{k: head[k] for k in keys}, **dict(zip(metrics, mean, strict=True))})
    return pd.concat(long_parts, ignore_index=True), pd.DataFrame(wide_rows)


# ------------------------------------------------------------------------------------- output


def _interval_text(result: SweepResult, cell: int, metric: str) -> str:
    row = result.cell_means[(result.cell_means["cell"] == cell) & (result.cell_means["metric"] == metric)]
    if row.empty:
        return "n/a"
    r = row.iloc[0]
    if not math.isfinite(r["mean"]):
        return "n/a"
    if not math.isfinite(r["low"]):
        return f"{r['mean']:.4g}"
    return f"{r['mean']:.4g} [{r['low']:.4g}, {r['high']:.4g}]"


def render_sweep(result: SweepResult) -> str:
    """The plain-text account of a sweep that ``fleetsim sweep`` prints."""
    n_cells, n_seeds = len(result.grid), len(result.seeds)
    total = len({run_key(c, s) for c in result.configs for s in result.seeds})  # distinct runs
    lines = [
        f"sweep of {result.base.source}"
        + (f" under the stress file {result.base.stress_source}" if result.base.stress_source else ""),
        f"  {n_cells} settings x {n_seeds} seeds ({result.seeds[0]}..{result.seeds[-1]}) = {total} runs on "
        f"{result.executor}; {total - result.reused} run now, {result.reused} reused; {result.wall_s:.1f} s",
        "  same seed, same fleet in every setting (common random numbers; see docs/studies.md)",
        "",
        f"Pareto front: {len(result.front)} of {n_cells} settings, those no other setting beats on all of "
        "committed_per_hour (higher), waste.compute_fraction (lower) and worst_representation (higher):",
    ]
    width = max([len(c.label) for c in result.grid] + [8])
    lines.append(f"  {'setting':<{width}}  {'committed per hour':<26}  {'compute waste fraction':<26}  "
                 "worst representation")
    for cell in result.grid:
        if cell.index not in result.front:
            continue
        parts = [_interval_text(result, cell.index, name) for name, _ in PARETO_OBJECTIVES]
        lines.append(f"  {cell.label:<{width}}  {parts[0]:<26}  {parts[1]:<26}  {parts[2]}")
    lines.append("  (means over seeds, 95% t intervals in brackets)")
    rec = result.recommendation
    lines.append("")
    goal = f"{'maximise' if rec.objective.maximize else 'minimise'} {rec.objective.metric}"
    if rec.limits:
        goal += " subject to " + " and ".join(str(lim) for lim in rec.limits)
    lines.append(f"recommendation ({goal}):")
    if rec.cell is None:
        lines.append("  none")
    else:
        lines.append(f"  {rec.label}")
    lines.extend(f"  - {reason}" for reason in rec.reasons)
    lines.append("")
    lines.append(f"caution: {result.caution}")
    return "\n".join(lines)


def _json_value(value: Any) -> Any:
    if isinstance(value, float) and not math.isfinite(value):
        return None
    if isinstance(value, (np.integer,)):
        return int(value)
    if isinstance(value, (np.floating,)):
        return _json_value(float(value))
    if isinstance(value, (np.bool_,)):
        return bool(value)
    return value


def study_record(result: SweepResult) -> dict[str, Any]:
    """The JSON-ready description of a sweep written to ``study.json``."""
    objectives = [{"metric": name, "maximize": up} for name, up in PARETO_OBJECTIVES]
    return {
        "kind": "sweep",
        "fleetsim": __version__,
        "fleet_file": result.base.source,
        "stress_file": result.base.stress_source,
        "overrides": list(result.base.overrides),
        "axes": [{"key": a.key, "values": [_json_value(v) for v in a.values]} for a in result.axes],
        "seeds": result.seeds,
        "interval": f"{int(LEVEL * 100)}% Student t across seeds",
        "cells": [
            {
                "cell": cell.index,
                "label": cell.label,
                "settings": {k: _json_value(v) for k, v in cell.settings},
                "config_hash": config_hash(config),
                "on_front": cell.index in result.front,
                "meets_limits": cell.index in result.recommendation.feasible,
            }
            for cell, config in zip(result.grid, result.configs, strict=True)
        ],
        "pareto_objectives": objectives,
        "worst_representation": (
            "min over device types of min(r, 1/r), r = report share / fleet share (1 is proportional)"
        ),
        "front": result.front,
        "recommendation": result.recommendation.as_dict(),
        "executor": result.executor,
        "runs_reused": result.reused,
        "wall_s": result.wall_s,
        "caution": result.caution,
    }


def default_heatmaps(result: SweepResult) -> list[str]:
    """The metrics drawn by default: the front's objectives, the objective and limits, and a
    few headline figures."""
    names = [name for name, _ in PARETO_OBJECTIVES]
    names.append(result.recommendation.objective.metric)
    names.extend(lim.metric for lim in result.recommendation.limits)
    names.extend(["bias.coverage", "waste.energy_fraction", "rounds.duration_s.p90"])
    out: list[str] = []
    for name in names:
        if name in result.runs.columns and name not in out:
            out.append(name)
    return out


def save_frame(frame: pd.DataFrame, stem: Path) -> list[Path]:
    """Write ``frame`` as ``stem.parquet`` (raw values) and ``stem.csv`` (formula-like text escaped,
    :func:`fleetsim.output.write_csv`), each atomically; return both paths."""
    parquet, csv = stem.with_name(stem.name + ".parquet"), stem.with_name(stem.name + ".csv")
    atomic_save(parquet, partial(frame.to_parquet, index=False))
    atomic_save(csv, partial(write_csv, frame))
    return [parquet, csv]


def write_sweep(
    result: SweepResult,
    folder: str | Path,
    heatmaps: Sequence[str] | None = None,
    plot_format: str = "png",
) -> list[Path]:
    """Write the tables, study.json, study.md and plots into ``folder`` (each file atomically).

    ``heatmaps``: metric names to draw (short names allowed; ``["all"]`` draws every metric);
    None draws :func:`default_heatmaps`. ``plot_format``: ``png``, ``svg`` or ``both``.
    Returns the paths written. Raises ConfigError for an unknown heat-map metric or format,
    FleetsimError when ``folder`` is not empty and not a fleetsim sweep folder (see
    :func:`fleetsim.output.claim_study`) or a file cannot be written.
    """
    from .plots import frontier_plot, heat_map

    folder = Path(folder)
    formats = {"png": ["png"], "svg": ["svg"], "both": ["png", "svg"]}.get(plot_format)
    if formats is None:
        raise ConfigError([f"--plot-format {plot_format!r}: expected png, svg or both"])
    metrics = metric_columns(result.runs)
    if heatmaps is None:
        chosen = default_heatmaps(result)
    elif list(heatmaps) == ["all"]:
        chosen = metrics
    else:
        chosen = []
        for name in heatmaps:
            metric = resolve_metric(name, metrics, "--heatmap")
            if metric not in chosen:
                chosen.append(metric)
    result.heatmap_metrics = chosen
    claim_study(folder, "sweep")
    written: list[Path] = []

    def save_table(frame: pd.DataFrame, stem: str) -> None:
        written.extend(save_frame(frame, inside(folder, folder / stem)))

    save_table(result.runs, "runs")
    save_table(result.cell_means, "cell_means")
    front_columns = ["cell", "label", *result.settings_columns()]
    wanted = [name for name, _ in PARETO_OBJECTIVES]
    for name in [result.recommendation.objective.metric, *(lim.metric for lim in result.recommendation.limits)]:
        if name not in wanted:
            wanted.append(name)
    front_table = result.cells[front_columns].copy()
    for name in wanted:
        rows = result.cell_means[result.cell_means["metric"] == name].set_index("cell")
        front_table[f"{name}:mean"] = front_table["cell"].map(rows["mean"])
        front_table[f"{name}:low"] = front_table["cell"].map(rows["low"])
        front_table[f"{name}:high"] = front_table["cell"].map(rows["high"])
    front_table["on_front"] = result.cells["on_front"].to_numpy()
    front_table["meets_limits"] = result.cells["meets_limits"].to_numpy()
    atomic_save(folder / "front.csv", partial(write_csv, front_table))
    written.append(folder / "front.csv")

    record = study_record(result)
    atomic_text(folder / "study.json", json.dumps(record, indent=2, default=str) + "\n")
    atomic_text(folder / "study.md", render_sweep(result) + "\n")
    written.extend([folder / "study.json", folder / "study.md"])

    taken: set[str] = set()
    stems = {metric: safe_name(metric, taken) for metric in chosen}  # metric names hold device type names
    for extension in formats:
        path = folder / f"frontier.{extension}"
        atomic_save(path, partial(frontier_plot, result, fmt=extension))
        written.append(path)
        for metric in chosen:
            path = inside(folder, folder / "heatmaps" / f"{stems[metric]}.{extension}")
            atomic_save(path, partial(heat_map, result, metric, fmt=extension))
            written.append(path)
    return written

