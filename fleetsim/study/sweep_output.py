"""What a sweep prints (:func:`render_sweep`) and the files of its study folder, each written
atomically by :func:`write_sweep`::

    cells/                one record per finished cell x seed (resume; see store.py)
    runs.parquet, .csv    every summary metric per cell and seed (study columns)
    cell_means.parquet,   per cell and metric: seeds, mean, sd and 95% t interval
      .csv
    front.csv             per cell: the front's objectives, the objective and limited
                          metrics (<metric>_mean, _low, _high), on_front, meets_limits
    study.json            the design, the cells, the front, the recommendation, its place on
                          the edge of the grid, why, and the caution
    study.md              the text the command prints
    frontier.png          throughput against waste, coloured by worst representation
    heatmaps/*.png        each chosen metric over the two first varied keys (file names are
                          safe slugs of the metric names, see fleetsim.output.safe_name)
    .fleetsim-output      the marker of a fleetsim study folder (kind sweep)
"""

from __future__ import annotations

import json
import math
from collections.abc import Sequence
from functools import partial
from pathlib import Path
from typing import Any

import numpy as np
import pandas as pd

from .. import __version__
from ..config import config_hash
from ..errors import ConfigError
from ..output import claim_study, inside, safe_name, write_csv
from .names import resolve_metric
from .stats import LEVEL
from .store import atomic_save, atomic_text, run_key, save_frame
from .sweep import SweepResult
from .table import (
    ABANDONED_SHARE,
    FAILED_SHARE,
    PARETO_OBJECTIVES,
    SEVERAL_COMMITTED,
    SEVERAL_WASTE,
    USED_EXAMPLES_PER_HOUR,
    USED_REPORTS_PER_HOUR,
    WORST_GROUP,
    WORST_REPRESENTATION,
    metric_columns,
    workload_prefix,
)

__all__ = ["render_sweep", "write_sweep", "study_record", "front_table", "default_heatmaps", "PLOT_FORMATS"]

PLOT_FORMATS = {"png": ["png"], "svg": ["svg"], "both": ["png", "svg"]}
"""``--plot-format`` values and the file formats each writes."""


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


_HEADS = ("committed per hour", "compute waste fraction", "worst representation")
_HEADS_SEVERAL = ("committed per hour, summed", "worst compute waste", "worst representation")


def _several_lines(result: SweepResult) -> list[str]:
    """With several workloads: what the totals are, and the recommended cell's figures by workload."""
    lines = [f"  several workloads ({', '.join(result.workloads)}): {SEVERAL_COMMITTED} sums their committed "
             f"rounds per hour; {SEVERAL_WASTE} and {WORST_REPRESENTATION} are the worst workload's; "
             "each workload's figures are workloads_<name>_<column>"]
    cell = result.recommendation.cell
    if cell is None:
        return lines
    lines.append("  the recommended cell by workload (committed per hour; compute waste fraction; "
                 "worst representation):")
    for name in result.workloads:
        parts = [_interval_text(result, cell, workload_prefix(name) + column) for column, _ in PARETO_OBJECTIVES]
        lines.append(f"    {name}: " + "; ".join(parts))
    return lines


def _why_lines(result: SweepResult) -> list[str]:
    """The mechanism behind the recommendation, against the runner-up or the baseline cell."""
    why = result.why
    if why is None:
        return []
    if why.against is None:
        return ["", "why: " + " ".join(why.lines)]
    head = {"runner-up": "the runner-up", "baseline": "the baseline cell (the first value of every axis)",
            "next best": "the next best cell by the objective"}[why.basis]
    return ["", f"why ({result.recommendation.label} against {head}, {why.against_label}; cell means over "
                f"{len(result.seeds)} seeds):", *(f"  {line}" for line in why.lines)]


def render_sweep(result: SweepResult) -> str:
    """The plain-text account of a sweep that ``fleetsim sweep`` prints."""
    n_cells, n_seeds = len(result.grid), len(result.seeds)
    total = len({run_key(c, s) for c in result.configs for s in result.seeds})  # distinct runs
    objectives = ", ".join(f"{name} ({'higher' if up else 'lower'})" for name, up in result.objectives)
    lines = [
        f"sweep of {result.base.source}"
        + (f" under the stress file {result.base.stress_source}" if result.base.stress_source else ""),
        f"  {n_cells} cells x {n_seeds} seeds ({result.seeds[0]}..{result.seeds[-1]}) = {total} runs on "
        f"{result.executor}; {total - result.reused} run now, {result.reused} reused; {result.wall_s:.1f} s",
        "  same seed, same fleet in every cell (common random numbers; see docs/studies.md)",
        "",
        f"Pareto front: {len(result.front)} of {n_cells} cells, those no other cell beats on all of {objectives}:",
    ]
    width = max([len(c.label) for c in result.grid] + [8])
    heads = _HEADS_SEVERAL if result.workloads else _HEADS
    lines.append(f"  {'cell':<{width}}  {heads[0]:<26}  {heads[1]:<26}  {heads[2]}")
    for cell in result.grid:
        if cell.index not in result.front:
            continue
        parts = [_interval_text(result, cell.index, name) for name, _ in result.objectives]
        lines.append(f"  {cell.label:<{width}}  {parts[0]:<26}  {parts[1]:<26}  {parts[2]}")
    lines.append("  (means over seeds, 95% t intervals in brackets)")
    rec = result.recommendation
    lines.append("")
    goal = f"{'maximise' if rec.objective.maximise else 'minimise'} {rec.objective.metric}"
    if rec.limits:
        goal += " subject to " + " and ".join(str(lim) for lim in rec.limits)
    lines.append(f"recommendation ({goal}):")
    lines.append(f"  {rec.label}" if rec.cell is not None else "  none")
    lines.extend(f"  - {reason}" for reason in rec.reasons)
    lines.extend(f"  {'edge of the grid' if edge.vary else 'at the bound of the key'}: {edge.text}"
                 for edge in result.edges)
    if result.workloads:
        lines.extend(_several_lines(result))
    lines.extend(_why_lines(result))
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


def _json_tree(value: Any) -> Any:
    """``value`` with every number JSON can hold (no NaN, numpy scalars as Python ones)."""
    if isinstance(value, dict):
        return {k: _json_tree(v) for k, v in value.items()}
    if isinstance(value, (list, tuple)):
        return [_json_tree(v) for v in value]
    return _json_value(value)


_DERIVED = {
    USED_REPORTS_PER_HOUR: "participations.used_reports / simulated_hours",
    USED_EXAMPLES_PER_HOUR: "(waste.examples_processed - waste.examples) / simulated_hours: examples processed "
                            "by used reports",
    ABANDONED_SHARE: "rounds.ended_by.selection_timeout / rounds.attempted",
    FAILED_SHARE: "(rounds.ended_by.report_deadline + rounds.ended_by.unmasking_failed) / rounds.attempted",
    WORST_GROUP: "min over every group of every grouping (device type, region, data quartile, and type x region "
                 "when the summary holds it) of min(r, 1/r); _grouping and _group name it",
}


def study_record(result: SweepResult) -> dict[str, Any]:
    """The JSON-ready description of a sweep written to ``study.json``."""
    objectives = [{"metric": name, "maximise": up} for name, up in result.objectives]
    several = {"workloads": result.workloads, WORST_REPRESENTATION: (
        "min over workloads and device types of min(r, 1/r), r = report share / fleet share "
        "(1 is proportional)"), SEVERAL_COMMITTED: "the workloads' committed rounds per hour, summed",
        SEVERAL_WASTE: "the largest compute waste fraction of any workload"} if result.workloads else {}
    return {
        "kind": "sweep",
        "fleetsim": __version__,
        "fleet_file": result.base.source,
        "stress_file": result.base.stress_source,
        "overrides": list(result.base.overrides),
        "axes": [{"key": a.key, "column": column, "values": [_json_value(v) for v in a.values]}
                 for a, column in zip(result.axes, result.settings_columns(), strict=True)],
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
        WORST_REPRESENTATION: (
            "min over device types of min(r, 1/r), r = report share / fleet share (1 is proportional)"
        ),
        **several,
        "front": result.front,
        "recommendation": result.recommendation.as_dict(),
        "edges": [_json_tree(edge.as_dict()) for edge in result.edges],
        "why": _json_tree(result.why.as_dict()) if result.why is not None else None,
        "derived": _DERIVED,
        "executor": result.executor,
        "runs_reused": result.reused,
        "wall_s": result.wall_s,
        "caution": result.caution,
    }


def default_heatmaps(result: SweepResult) -> list[str]:
    """The metrics drawn by default: the front's objectives, the objective and limits, and a
    few headline figures."""
    names = [name for name, _ in result.objectives]
    names.append(result.recommendation.objective.metric)
    names.extend(lim.metric for lim in result.recommendation.limits)
    headline = [*(name for name, _ in PARETO_OBJECTIVES), "bias_coverage", "waste_energy_fraction",
                "rounds_duration_s_p90"]
    if result.workloads:
        names.extend(workload_prefix(w) + name for w in result.workloads for name in headline)
    else:
        names.extend(headline[3:])
    out: list[str] = []
    for name in names:
        if name in result.runs.columns and name not in out:
            out.append(name)
    return out


def front_table(result: SweepResult) -> pd.DataFrame:
    """``front.csv``: per cell its settings, ``<metric>_mean``, ``_low`` and ``_high`` of the
    front's objectives, the objective and the limited metrics (with several workloads also each
    workload's own three figures), ``on_front`` and ``meets_limits``."""
    rec = result.recommendation
    wanted = [name for name, _ in result.objectives]
    own = [workload_prefix(w) + name for w in result.workloads for name, _ in PARETO_OBJECTIVES]
    for name in [rec.objective.metric, *(lim.metric for lim in rec.limits), *own]:
        if name not in wanted:
            wanted.append(name)
    table = result.cells[["cell", "label", *result.settings_columns()]].copy()
    for name in wanted:
        rows = result.cell_means[result.cell_means["metric"] == name].set_index("cell")
        for figure in ("mean", "low", "high"):
            table[f"{name}_{figure}"] = table["cell"].map(rows[figure])
    table["on_front"] = result.cells["on_front"].to_numpy()
    table["meets_limits"] = result.cells["meets_limits"].to_numpy()
    return table


def _chosen(result: SweepResult, heatmaps: Sequence[str] | None) -> list[str]:
    metrics = metric_columns(result.runs)
    if heatmaps is None:
        return default_heatmaps(result)
    if list(heatmaps) == ["all"]:
        return metrics
    chosen: list[str] = []
    for name in heatmaps:
        metric = resolve_metric(name, metrics, "--heatmap")
        if metric not in chosen:
            chosen.append(metric)
    return chosen


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
    formats = PLOT_FORMATS.get(plot_format)
    if formats is None:
        raise ConfigError([f"--plot-format {plot_format}: expected png, svg or both"])
    chosen = _chosen(result, heatmaps)
    result.heatmap_metrics = chosen
    claim_study(folder, "sweep")
    written: list[Path] = []
    for frame, stem in ((result.runs, "runs"), (result.cell_means, "cell_means")):
        written.extend(save_frame(frame, inside(folder, folder / stem)))
    atomic_save(folder / "front.csv", partial(write_csv, front_table(result)))
    atomic_text(folder / "study.json", json.dumps(study_record(result), indent=2, default=str) + "\n")
    atomic_text(folder / "study.md", render_sweep(result) + "\n")
    written.extend([folder / "front.csv", folder / "study.json", folder / "study.md"])

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
