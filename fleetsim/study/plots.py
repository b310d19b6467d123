"""A sweep's frontier plot and heat maps, drawn with matplotlib's Agg canvas (no display).

Figures are built as ``matplotlib.figure.Figure`` objects, never through pyplot, so no
global state or GUI backend is touched and plotting is safe in any process.
"""

from __future__ import annotations

import math
from collections.abc import Sequence
from pathlib import Path
from typing import Any

import numpy as np
from matplotlib.backends.backend_agg import FigureCanvasAgg
from matplotlib.figure import Figure

from .table import direction_of, workload_prefixes

__all__ = ["frontier_plot", "heat_map"]


def _stats(result: Any, metric: str) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Mean, low and high of ``metric`` per cell, in cell order."""
    rows = result.cell_means[result.cell_means["metric"] == metric].set_index("cell")
    cells = [c.index for c in result.grid]
    rows = rows.reindex(cells)
    return (rows["mean"].to_numpy(dtype=float), rows["low"].to_numpy(dtype=float),
            rows["high"].to_numpy(dtype=float))


def _errors(mean: np.ndarray, low: np.ndarray, high: np.ndarray) -> np.ndarray:
    return np.nan_to_num(np.vstack([mean - low, high - mean]), nan=0.0)


def frontier_plot(result: Any, path: Path, fmt: str = "png") -> None:
    """Committed rounds per hour (x) against compute waste fraction (y) for every cell, coloured
    by worst representation on a scale fitted to the cells' values; every cell numbered, front
    cells outlined, cells that miss a limit crossed, the recommendation starred. A limit on
    either axis is drawn as a line with its infeasible side shaded, a limit on the colour as a
    line on the colour bar. Bars are 95% intervals across seeds. With several workloads the
    axes are the front's totals: committed rounds per hour summed over the workloads, the worst
    workload's waste and the worst representation of any workload."""
    (throughput, _), (waste, _), (representation, _) = result.objectives
    several = bool(result.workloads)
    x, xl, xh = _stats(result, throughput)
    y, yl, yh = _stats(result, waste)
    c, _, _ = _stats(result, representation)
    figure = Figure(figsize=(7.5, 5.5), layout="constrained")
    FigureCanvasAgg(figure)
    ax = figure.subplots()
    ax.errorbar(x, y, xerr=_errors(x, xl, xh), yerr=_errors(y, yl, yh), fmt="none",
                ecolor="0.75", elinewidth=0.8, zorder=1)
    on_front = np.array([cell.index in result.front for cell in result.grid])
    known = np.isfinite(c)
    low, high = _colour_range(c)
    rest, best = ~on_front & known, on_front & known
    points = ax.scatter(x[rest], y[rest], c=c[rest], cmap="viridis", vmin=low, vmax=high,
                        s=36, alpha=0.6, zorder=2, label="other cells")
    ax.scatter(x[best], y[best], c=c[best], cmap="viridis", vmin=low, vmax=high, s=90, edgecolors="black",
               linewidths=1.2, zorder=3, label="Pareto front")
    if not known.all():
        ax.scatter(x[~known], y[~known], color="0.8", edgecolors="0.4", s=50, zorder=2,
                   label="no representation (no round committed)")
    feasible = set(result.recommendation.feasible)
    missed = np.array([cell.index not in feasible for cell in result.grid])
    if result.recommendation.limits and missed.any():
        ax.scatter(x[missed], y[missed], marker="x", color="crimson", s=40, linewidths=1.0, zorder=4,
                   label="misses a limit")
    for i, cell in enumerate(result.grid):
        if math.isfinite(x[i]) and math.isfinite(y[i]):
            ax.annotate(str(cell.index), (x[i], y[i]), xytext=(5, 5), textcoords="offset points", fontsize=8,
                        fontweight="bold" if on_front[i] else "normal")
    rec = result.recommendation.cell
    if rec is not None:
        i = [cell.index for cell in result.grid].index(rec)
        ax.scatter([x[i]], [y[i]], marker="*", s=320, facecolors="none", edgecolors="crimson",
                   linewidths=1.5, zorder=5, label=f"recommended: {result.recommendation.label}")
    over = "workloads and types" if several else "types"
    bar = figure.colorbar(points, ax=ax, label=f"worst representation, min over {over} of min(r, 1/r)")
    _fit_to_means(ax, x, y, _bounds(result, throughput), _bounds(result, waste))
    _draw_limits(ax, bar, result, throughput, waste, representation)
    ax.set_xlabel("committed rounds per hour" + (", summed over workloads" if several else "")
                  + " (higher is better)")
    ax.set_ylabel("straggler waste, fraction of compute" + (", worst workload" if several else "")
                  + " (lower is better)")
    ax.set_title(f"{len(result.grid)} cells x {len(result.seeds)} seeds; numbers are cell indices; "
                 "bars are 95% intervals (clipped to the view)", fontsize=9)
    ax.legend(loc="best", fontsize=8)
    ax.grid(True, alpha=0.3)
    figure.savefig(path, format=fmt, dpi=110)


def _colour_range(values: np.ndarray) -> tuple[float, float]:
    """The colour scale: the cells' smallest to largest finite value (a little either side of
    a single value), so that differences between the cells show."""
    finite = values[np.isfinite(values)]
    if finite.size == 0:
        return 0.0, 1.0
    low, high = float(finite.min()), float(finite.max())
    if high - low < 1e-12:
        pad = 0.05 * max(abs(high), 1e-3)
        return low - pad, high + pad
    return low, high


def _bounds(result: Any, metric: str) -> list[float]:
    return [lim.value for lim in result.recommendation.limits if lim.metric == metric]


def _draw_limits(ax: Any, bar: Any, result: Any, x_metric: str, y_metric: str, colour_metric: str) -> None:
    """Each limit on a plotted figure: a dashed line at the bound, the infeasible side shaded."""
    for lim in result.recommendation.limits:
        label = f"limit {lim}"
        axes = {x_metric: (ax.get_xlim, ax.axvline, ax.axvspan, ax.set_xlim),
                y_metric: (ax.get_ylim, ax.axhline, ax.axhspan, ax.set_ylim)}
        if lim.metric in (x_metric, y_metric):
            get_lim, line, span, set_lim = axes[lim.metric]
            low, high = get_lim()
            line(lim.value, color="crimson", linestyle="--", linewidth=1.0, label=label)
            span(*((low, lim.value) if lim.operator == ">=" else (lim.value, high)), color="crimson", alpha=0.08,
                 zorder=0)
            set_lim(low, high)
        elif lim.metric == colour_metric:
            bar.ax.axhline(lim.value, color="crimson", linestyle="--", linewidth=1.5)
            low, high = bar.ax.get_ylim()
            if lim.operator == ">=" and lim.value > low:
                bar.ax.axhspan(low, min(lim.value, high), color="crimson", alpha=0.25)
            elif lim.operator == "<=" and lim.value < high:
                bar.ax.axhspan(max(lim.value, low), high, color="crimson", alpha=0.25)
            bar.ax.set_ylim(low, high)
            ax.plot([], [], color="crimson", linestyle="--", label=f"{label} (on the colour bar)")


def _fit_to_means(ax: object, x: np.ndarray, y: np.ndarray, x_bounds: Sequence[float] = (),
                  y_bounds: Sequence[float] = ()) -> None:
    """Frame the means (not the interval bars, which may be far wider with few seeds), and a
    limit's bound when it lies within one span of the means (a farther one stays out of view)."""
    for values, bounds, setter in ((x, x_bounds, ax.set_xlim), (y, y_bounds, ax.set_ylim)):  # type: ignore[attr-defined]
        finite = values[np.isfinite(values)]
        if finite.size == 0:
            continue
        low, high = float(finite.min()), float(finite.max())
        reach = max(high - low, 0.1 * max(abs(high), 1e-3))
        near = [b for b in bounds if low - reach <= b <= high + reach]
        low, high = min([low, *near]), max([high, *near])
        pad = 0.15 * (high - low) if high > low else 0.1 * max(abs(high), 1e-3)
        setter(low - pad, high + pad)


def _slice(result: Any) -> dict[str, object]:
    """Values of the axes beyond the first two: those of the recommended cell (else cell 0)."""
    chosen = result.recommendation.cell if result.recommendation.cell is not None else result.grid[0].index
    cell = next(c for c in result.grid if c.index == chosen)
    return dict(cell.settings[2:])


def heat_map(result: Any, metric: str, path: Path, fmt: str = "png") -> None:
    """Mean of ``metric`` over the first varied key (columns) and the second (rows).

    With one varied key the map is a single row; with more than two, the others are held at
    the recommended cell's values (named in the title). Brighter is better where the metric
    has a direction; neutral metrics use a neutral palette.
    """
    mean, _, _ = _stats(result, metric)
    by_cell = {cell.index: mean[i] for i, cell in enumerate(result.grid)}
    first = result.axes[0]
    second = result.axes[1] if len(result.axes) > 1 else None
    held = _slice(result)
    grid = np.full((len(second.values) if second else 1, len(first.values)), np.nan)
    for cell in result.grid:
        settings = dict(cell.settings)
        if any(settings[k] != v for k, v in held.items()):
            continue
        col = first.values.index(settings[first.key])
        row = second.values.index(settings[second.key]) if second else 0
        grid[row, col] = by_cell[cell.index]
    direction = direction_of(metric, workload_prefixes(result.runs.columns))
    cmap = {"higher": "viridis", "lower": "viridis_r", "closer-to-1": "viridis_r", None: "cividis"}[direction]
    if direction == "closer-to-1":
        shown = np.abs(np.log(np.where(grid > 0, grid, np.nan)))
        note = "colour: distance from 1 on the log scale, brighter is closer"
    else:
        shown = grid
        notes = {"higher": "brighter is better", "lower": "brighter is better (lower)", None: "neutral metric"}
        note = notes[direction]
    title = f"{metric} (mean over {len(result.seeds)} seeds)\n{note}"
    if held:
        title += "\nheld at " + ", ".join(f"{k}={_tick(v)}" for k, v in held.items())
    # Wide enough for the title (about 0.07 inch a character at 9 points) and the colour bar.
    width = max(1.2 + 1.1 * len(first.values), 1.4 + 0.07 * max(len(line) for line in title.splitlines()))
    figure = Figure(figsize=(width, 1.6 + 0.7 * grid.shape[0]), layout="constrained")
    FigureCanvasAgg(figure)
    ax = figure.subplots()
    image = ax.imshow(np.ma.masked_invalid(shown), cmap=cmap, aspect="auto")
    finite = grid[np.isfinite(grid)]
    scale = np.nanmax(np.abs(finite)) if finite.size else 1.0
    for (row, col), value in np.ndenumerate(grid):
        text = "n/a" if not math.isfinite(value) else f"{value:.3g}" if scale < 1e4 else f"{value:.3e}"
        ax.text(col, row, text, ha="center", va="center", fontsize=8, color="white",
                path_effects=_outline())
    ax.set_xticks(range(len(first.values)), [_tick(v) for v in first.values], fontsize=8)
    ax.set_xlabel(first.key)
    if second:
        ax.set_yticks(range(len(second.values)), [_tick(v) for v in second.values], fontsize=8)
        ax.set_ylabel(second.key)
    else:
        ax.set_yticks([])
    ax.set_title(title, fontsize=9)
    figure.colorbar(image, ax=ax)
    figure.savefig(path, format=fmt, dpi=110)


def _tick(value: object) -> str:
    return f"{value:g}" if isinstance(value, float) else str(value)


def _outline() -> list[object]:
    from matplotlib import patheffects

    return [patheffects.withStroke(linewidth=2, foreground="black")]
