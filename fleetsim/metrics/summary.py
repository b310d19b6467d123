"""summary.json: the run's headline figures as plain JSON-ready values (docs/metrics.md)."""

from __future__ import annotations

import math
from typing import Any

import numpy as np
import pandas as pd

from ..analysis import quantiles
from ..events import OUTCOMES, ROUND_STATUS, json_key

__all__ = ["clean", "rounds_part", "participations_part", "waste_part", "bias_map"]

BIAS_FIGURES = ["fleet_share", "eligible_share", "accepted_share", "report_share", "weight_share",
                "representation_ratio", "ratio_low", "ratio_high", "never_share"]


def clean(value: Any) -> Any:
    """JSON-ready: NaN and inf become None, numpy scalars become Python numbers."""
    if isinstance(value, dict):
        return {str(k): clean(v) for k, v in value.items()}
    if isinstance(value, (list, tuple)):
        return [clean(v) for v in value]
    if isinstance(value, (np.integer,)):
        return int(value)
    if isinstance(value, (float, np.floating)):
        f = float(value)
        return f if math.isfinite(f) else None
    if isinstance(value, np.bool_):
        return bool(value)
    return value


def _fraction(part: float, whole: float) -> float:
    return part / whole if whole > 0 else float("nan")


def rounds_part(rounds: pd.DataFrame, hours: float, extra: dict[str, float]) -> dict[str, Any]:
    """``rounds``: counts by status, rate and duration percentiles; ``extra`` figures appended."""
    counts = rounds["status"].value_counts()
    committed = rounds[rounds["status"] == "committed"]
    return {
        "attempted": int(len(rounds)),
        "committed": int(counts.get("committed", 0)),
        "ended_by": {json_key(s): int(counts.get(s, 0)) for s in ROUND_STATUS[1:]},
        "committed_per_hour": int(counts.get("committed", 0)) / hours,
        "duration_s": quantiles(committed["duration_s"]),
        "selection_s": quantiles(rounds.loc[rounds["status"] != "selection-timeout", "selection_s"]),
        "report_s": quantiles(committed["report_s"]),
        **extra,
    }


def participations_part(labelled: pd.DataFrame, used: np.ndarray, task_s: np.ndarray) -> dict[str, Any]:
    """``participations``: accepted, used reports, outcomes, dropout causes, task duration percentiles."""
    drops = labelled[labelled["outcome"] == "dropout"]
    return {
        "accepted": int(len(labelled)),
        "used_reports": int(used.sum()),
        "by_outcome": {
            json_key(k): int(v) for k, v in labelled["outcome"].value_counts().reindex(OUTCOMES, fill_value=0).items()
        },
        "dropouts_by_cause": {
            json_key(k): int(v) for k, v in drops["dropout_cause"].value_counts().items() if v > 0 and k != "none"
        },
        "task_s": quantiles(task_s),
    }


def waste_part(totals: dict[str, float], waste_totals: dict[str, float], by_cause: pd.DataFrame,
               by_type: pd.DataFrame) -> dict[str, Any]:
    """``waste``: the wasted fractions and totals, by cause and by device type."""
    return {
        "compute_fraction": _fraction(waste_totals["compute_s"], totals["compute_s"]),
        "bytes_fraction": _fraction(waste_totals["bytes"], totals["bytes"]),
        "energy_fraction": _fraction(waste_totals["energy_wh"], totals["energy_wh"]),
        "compute_s": waste_totals["compute_s"],
        "bytes": waste_totals["bytes"],
        "energy_wh": waste_totals["energy_wh"],
        "by_cause": {
            json_key(row["cause"]): {"participations": row["participations"], "compute_s": row["compute_s"],
                           "bytes": row["bytes"], "energy_wh": row["energy_wh"]}
            for row in by_cause.to_dict("records") if row["participations"] > 0
        },
        "by_device_type": {
            row["device_type"]: {"compute_fraction": row["compute_fraction"],
                                 "bytes_fraction": row["bytes_fraction"],
                                 "energy_fraction": row["energy_fraction"]}
            for row in by_type.to_dict("records")
        },
    }


def bias_map(table: pd.DataFrame, key: str) -> dict[str, Any]:
    """A bias table as {group name: its shares, ratio and interval, never share}; data quartiles
    also carry the sample counts they hold (``samples_low``, ``samples_high``)."""
    figures = [c for c in ("samples_low", "samples_high") if c in table.columns] + BIAS_FIGURES
    return {row[key]: {c: row[c] for c in figures} for row in table.to_dict("records")}
