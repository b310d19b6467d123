"""Straggler waste, dropouts and the cost of a participation to a device (docs/metrics.md)."""

from __future__ import annotations

import numpy as np
import pandas as pd

__all__ = ["labelled_frame", "waste_sums", "waste_by_cause", "waste_by_device_type", "work_by_group", "dropout_table",
           "device_cost", "WORK_COLUMNS"]

_RESOURCES = ["compute_s", "bytes", "energy_wh", "examples"]
"""The work a participation costs, as columns of a labelled frame (see :func:`labelled_frame`)."""


def labelled_frame(parts: pd.DataFrame) -> pd.DataFrame:
    """The participations with the work columns the waste tables sum: ``bytes`` (download +
    upload) and ``examples`` (``examples_processed``)."""
    return parts.assign(bytes=parts["download_bytes"] + parts["upload_bytes"], examples=parts["examples_processed"])


def waste_sums(frame: pd.DataFrame) -> dict[str, float]:
    """Training seconds, bytes (down + up), Wh and examples processed of the participations in ``frame``."""
    return {
        "compute_s": float(frame["compute_s"].sum()),
        "bytes": float((frame["download_bytes"] + frame["upload_bytes"]).sum()),
        "energy_wh": float(frame["energy_wh"].sum()),
        "examples": float(frame["examples_processed"].sum()),
    }


def waste_by_cause(wasted: pd.DataFrame) -> pd.DataFrame:
    """Wasted work per waste cause: ``cause``, the resources (compute, bytes, energy,
    examples), ``participations``, ``compute_share``.

    ``wasted`` holds the unused participations of a :func:`labelled_frame`.
    """
    total_compute = float(wasted["compute_s"].sum())
    by_cause = (
        wasted.groupby("waste_cause", observed=False)[_RESOURCES].sum()
        .assign(participations=wasted.groupby("waste_cause", observed=False).size())
        .drop(index="used", errors="ignore")
        .reset_index()
        .rename(columns={"waste_cause": "cause"})
    )
    by_cause["compute_share"] = by_cause["compute_s"] / max(total_compute, 1e-300)
    return by_cause


def work_by_group(labelled: pd.DataFrame, wasted: pd.DataFrame, by: pd.Series | np.ndarray,
                  wasted_by: pd.Series | np.ndarray, k: int) -> pd.DataFrame:
    """All and wasted compute, bytes, energy and examples per group, and the wasted fractions.

    ``by`` and ``wasted_by`` give the group code (0 .. k-1) of each row of ``labelled`` and of
    ``wasted``; the columns are :data:`WORK_COLUMNS`, one row per group.
    """
    every = range(k)
    done = labelled[_RESOURCES].groupby(np.asarray(by, dtype=np.int64)).sum().reindex(every, fill_value=0.0)
    lost = wasted[_RESOURCES].groupby(np.asarray(wasted_by, dtype=np.int64)).sum().reindex(every, fill_value=0.0)
    table = pd.DataFrame(index=every)
    for col in _RESOURCES:
        table[col] = done[col].to_numpy(dtype=float)
        table[f"wasted_{col}"] = lost[col].to_numpy(dtype=float)
    with np.errstate(divide="ignore", invalid="ignore"):
        for key, col in (("compute", "compute_s"), ("bytes", "bytes"), ("energy", "energy_wh"),
                         ("examples", "examples")):
            table[f"{key}_fraction"] = table[f"wasted_{col}"] / table[col]
    return table


WORK_COLUMNS = ["compute_s", "wasted_compute_s", "bytes", "wasted_bytes", "energy_wh", "wasted_energy_wh",
                "examples", "wasted_examples", "compute_fraction", "bytes_fraction", "energy_fraction",
                "examples_fraction"]
"""The work columns of :func:`work_by_group`, in order."""


def waste_by_device_type(labelled: pd.DataFrame, wasted: pd.DataFrame, type_names: list[str]) -> pd.DataFrame:
    """All and wasted compute, bytes, energy and examples per device type, and the wasted fractions."""
    table = work_by_group(labelled, wasted, labelled["device_type"].cat.codes, wasted["device_type"].cat.codes,
                          len(type_names))
    table.insert(0, "device_type", type_names)
    return table[["device_type", *WORK_COLUMNS]]


def dropout_table(drops: pd.DataFrame) -> pd.DataFrame:
    """Dropouts by ``dropout_cause`` and ``dropout_phase`` (only the pairs that occurred)."""
    if not len(drops):
        return pd.DataFrame(columns=["dropout_cause", "dropout_phase", "dropouts"])
    return drops.groupby(["dropout_cause", "dropout_phase"], observed=True).size().rename("dropouts").reset_index()


def _p90(values: pd.Series) -> float:
    return float(values.quantile(0.9)) if len(values) else np.nan


def device_cost(labelled: pd.DataFrame) -> pd.DataFrame:
    """Per device type: participations, battery % and bytes (down + up) p50/p90 per participation, mean Wh."""
    return (
        labelled.groupby("device_type", observed=False)
        .agg(
            participations=("device", "size"),
            battery_pct_p50=("battery_used_pct", "median"),
            battery_pct_p90=("battery_used_pct", _p90),
            bytes_p50=("bytes", "median"),
            bytes_p90=("bytes", _p90),
            energy_wh_mean=("energy_wh", "mean"),
        )
        .reset_index()
    )
