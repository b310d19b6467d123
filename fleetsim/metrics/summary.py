"""summary.json: the run's headline figures as plain JSON-ready values (docs/metrics.md)."""

from __future__ import annotations

import math
from typing import Any

import numpy as np
import pandas as pd

from ..analysis import quantiles
from ..events import OUTCOMES, ROUND_STATUS, json_key

__all__ = ["clean", "rounds_part", "round_dropout_shares", "participations_part", "waste_part", "bias_map",
           "pair_map"]

BIAS_FIGURES = ["fleet_share", "eligible_share", "accepted_share", "report_share", "weight_share", "example_share",
                "representation_ratio", "ratio_low", "ratio_high", "weight_ratio", "weight_ratio_low",
                "weight_ratio_high", "never_share"]
"""A group's figures in summary.json: ``representation_ratio`` (report share / fleet share) and
``weight_ratio`` (weight share / example share), each with its interval."""


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


def rounds_part(rounds: pd.DataFrame, hours: float, extra: dict[str, Any]) -> dict[str, Any]:
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


def round_dropout_shares(labelled: pd.DataFrame) -> np.ndarray:
    """Per round that accepted any device: its dropouts / the devices it accepted."""
    codes, _ = pd.factorize(labelled["round"].to_numpy())
    accepted = np.bincount(codes).astype(float)
    dropped = np.bincount(codes, weights=(labelled["outcome"] == "dropout").to_numpy(dtype=float),
                          minlength=accepted.size)
    return dropped / accepted


def participations_part(labelled: pd.DataFrame, used: np.ndarray, task_s: np.ndarray) -> dict[str, Any]:
    """``participations``: accepted, used reports and their FedAvg weight, outcomes, dropout
    causes, task duration percentiles, and the share of each round's accepted devices that
    dropped out."""
    drops = labelled[labelled["outcome"] == "dropout"]
    shares = round_dropout_shares(labelled)
    return {
        "accepted": int(len(labelled)),
        "used_reports": int(used.sum()),
        "used_weight": float(labelled.loc[used, "weight"].sum()),
        "by_outcome": {
            json_key(k): int(v) for k, v in labelled["outcome"].value_counts().reindex(OUTCOMES, fill_value=0).items()
        },
        "dropouts_by_cause": {
            json_key(k): int(v) for k, v in drops["dropout_cause"].value_counts().items() if v > 0 and k != "none"
        },
        "task_s": quantiles(task_s),
        "round_dropout_share": {
            "mean": float(shares.mean()) if shares.size else float("nan"),
            "p90": float(np.quantile(shares, 0.9)) if shares.size else float("nan"),
        },
    }


def waste_part(totals: dict[str, float], waste_totals: dict[str, float], by_cause: pd.DataFrame,
               by_type: pd.DataFrame) -> dict[str, Any]:
    """``waste``: the wasted fractions and totals, the examples processed in all, by cause and by
    device type."""
    resources = ("compute_s", "bytes", "energy_wh", "examples")
    return {
        "compute_fraction": _fraction(waste_totals["compute_s"], totals["compute_s"]),
        "bytes_fraction": _fraction(waste_totals["bytes"], totals["bytes"]),
        "energy_fraction": _fraction(waste_totals["energy_wh"], totals["energy_wh"]),
        "examples_fraction": _fraction(waste_totals["examples"], totals["examples"]),
        **{key: waste_totals[key] for key in resources},
        "examples_processed": totals["examples"],
        "by_cause": {
            json_key(row["cause"]): {"participations": row["participations"], **{k: row[k] for k in resources}}
            for row in by_cause.to_dict("records") if row["participations"] > 0
        },
        "by_device_type": {
            row["device_type"]: {f"{k}_fraction": row[f"{k}_fraction"] for k in ("compute", "bytes", "energy",
                                                                                 "examples")}
            for row in by_type.to_dict("records")
        },
    }


def bias_map(table: pd.DataFrame, key: str) -> dict[str, Any]:
    """A bias table as {group name: its shares, ratio and interval, never share}; data quartiles
    also carry the sample counts they hold (``samples_low``, ``samples_high``)."""
    figures = [c for c in ("samples_low", "samples_high") if c in table.columns] + BIAS_FIGURES
    return {row[key]: {c: row[c] for c in figures} for row in table.to_dict("records")}


def pair_map(table: pd.DataFrame) -> dict[str, Any]:
    """The (device type, region) bias table as {type: {region: the figures of :func:`bias_map`}}:
    nested by the fleet file's own names, so that each pair's study columns are its type and
    region written as columns (``bias_by_type_and_region_<type>_<region>_<figure>``)."""
    out: dict[str, dict[str, Any]] = {}
    for row in table.to_dict("records"):
        out.setdefault(row["device_type"], {})[row["region"]] = {c: row[c] for c in BIAS_FIGURES}
    return out
