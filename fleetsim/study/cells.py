"""Running a sweep's cells: one job per cell and seed, the per-run table, per-cell statistics.

A cell is one combination of the varied values (:func:`fleetsim.study.settings.grid_cells`).
Its settings are columns named ``setting_`` and the key path written as a study column
(``setting_rounds_over_selection`` for ``--vary rounds.over_selection=...``).
"""

from __future__ import annotations

from collections.abc import Sequence
from typing import Any

import numpy as np
import pandas as pd
from scipy import stats

from ..config import Config
from ..errors import ConfigError
from .executors import Job
from .settings import Axis, Cell
from .stats import LEVEL
from .store import run_key
from .table import column_name, flatten_summary, frame_of_rows

__all__ = ["setting_column", "settings_columns", "cell_jobs", "runs_table", "cell_statistics"]


def setting_column(key: str) -> str:
    """The column of a varied key: ``setting_`` and the key path written as a study column."""
    return "setting_" + column_name(key.split("."))


def settings_columns(axes: Sequence[Axis]) -> list[str]:
    """The setting column of each axis, in order.

    Raises ConfigError naming both ``--vary`` keys when two would give one column.
    """
    seen: dict[str, str] = {}
    for axis in axes:
        column = setting_column(axis.key)
        if column in seen:
            raise ConfigError([f"--vary {seen[column]} and --vary {axis.key}: both would be the column "
                               f"{column}; vary one of them"])
        seen[column] = axis.key
    return list(seen)


def cell_jobs(grid: Sequence[tuple[Cell, Config]], seeds: Sequence[int]) -> tuple[dict[tuple[int, int], str],
                                                                               list[Job]]:
    """The run key of every (cell index, seed) and one job per cell and seed (first cell first)."""
    keys = {(cell.index, seed): run_key(config, seed) for cell, config in grid for seed in seeds}
    jobs = [Job(key=keys[cell.index, seed], config=config, seed=seed, label=cell.label)
            for cell, config in grid for seed in seeds]
    return keys, jobs


def runs_table(cells: Sequence[Cell], axes: Sequence[Axis], seeds: Sequence[int],
               keys: dict[tuple[int, int], str], summaries: dict[str, dict[str, Any]]) -> pd.DataFrame:
    """One row per cell and seed: ``cell``, ``label``, the setting columns, ``seed``, then every
    flattened summary column. A setting column of an axis whose values are not all numbers is text."""
    columns = settings_columns(axes)
    rows = []
    for cell in cells:
        for seed in seeds:
            flat = flatten_summary(summaries[keys[cell.index, seed]])
            head: dict[str, Any] = {"cell": cell.index, "label": cell.label}
            for column, (_, value) in zip(columns, cell.settings, strict=True):
                head[column] = value
            head["seed"] = seed
            flat.pop("seed", None)
            rows.append({**head, **flat})
    runs = frame_of_rows(rows)
    for axis, column in zip(axes, columns, strict=True):
        if not all(isinstance(v, (int, float)) and not isinstance(v, bool) for v in axis.values):
            runs[column] = runs[column].map(str)
    return runs


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
