"""Participation bias: who is in the fleet, eligible, accepted, reported and weighted (docs/metrics.md)."""

from __future__ import annotations

from typing import Any

import numpy as np
import pandas as pd

from ..analysis import wilson_interval

__all__ = ["QUARTILES", "data_quartile", "quartile_bounds", "bias_tables", "participation_counts", "BIAS_TABLES"]

BIAS_TABLES = {"device_type": "bias_by_device_type", "region": "bias_by_region",
               "data_quartile": "bias_by_data_quartile"}
"""Grouping column -> name of its bias table."""


QUARTILES = ("Q1", "Q2", "Q3", "Q4")


def data_quartile(samples: np.ndarray) -> tuple[np.ndarray, list[str]]:
    """Each device's quartile of local sample counts (0..3) and the quartiles' names ``Q1``..``Q4``.

    A device is in quartile k when k of the fleet's three sample-count quartile points are at or
    below its count; the bounds each quartile holds are in :func:`quartile_bounds`.
    """
    edges = np.quantile(samples, [0.25, 0.5, 0.75])
    return np.searchsorted(edges, samples, side="right"), list(QUARTILES)


def quartile_bounds(samples: np.ndarray, codes: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """The fewest and most samples held by a device of each quartile (NaN for an empty one)."""
    low, high = np.full(4, np.nan), np.full(4, np.nan)
    for k in range(4):
        held = samples[codes == k]
        if held.size:
            low[k], high[k] = held.min(), held.max()
    return low, high


def _share(x: np.ndarray) -> np.ndarray:
    total = x.sum()
    return x / total if total > 0 else np.full(x.size, np.nan)


def _bias_table(
    group_of_device: np.ndarray,
    names: list[str] | tuple[str, ...],
    parts: pd.DataFrame,
    part_group: np.ndarray,
    eligible_by_group: np.ndarray,
    reports_per_device: np.ndarray,
) -> pd.DataFrame:
    k = len(names)
    devices = np.bincount(group_of_device, minlength=k).astype(float)
    accepted = np.bincount(part_group, minlength=k).astype(float)
    used = parts["used"].to_numpy()
    reports = np.bincount(part_group[used], minlength=k).astype(float)
    # FedAvg weight of each used report: the distinct examples it trained on (capped), not the data size.
    weight = np.bincount(part_group[used], weights=parts["weight"].to_numpy(dtype=float)[used], minlength=k)
    covered = np.bincount(group_of_device[reports_per_device > 0], minlength=k).astype(float)
    fleet_share = _share(devices)
    report_share = _share(reports)
    low, high = wilson_interval(reports, reports.sum())
    with np.errstate(divide="ignore", invalid="ignore"):
        ratio = report_share / fleet_share
        ratio_low, ratio_high = low / fleet_share, high / fleet_share
        never = 1.0 - covered / devices
    return pd.DataFrame(
        {
            "group": list(names),
            "devices": devices.astype(np.int64),
            "fleet_share": fleet_share,
            "eligible_share": _share(eligible_by_group),
            "accepted_share": _share(accepted),
            "report_share": report_share,
            "weight_share": _share(weight),
            "representation_ratio": ratio,
            "ratio_low": ratio_low,
            "ratio_high": ratio_high,
            "accepted": accepted.astype(np.int64),
            "reports": reports.astype(np.int64),
            "never_share": never,
        }
    )


def _eligible_share_error(
    estimate: np.ndarray, variance: np.ndarray, drawn: np.ndarray, weight: np.ndarray
) -> tuple[np.ndarray, np.ndarray]:
    """Standard error of each group's eligible share, and the devices it rests on.

    Group g's eligible total is X_g = sum_p w[p, g] E_p over (type, region) pairs p with
    independent estimates E_p of variance V_p; its share is R_g = X_g / T, T = sum_p E_p
    (each pair's weights sum to 1). By the delta method (first-order Taylor expansion,
    common practice) Var R_g = sum_p V_p (w[p, g] - R_g)^2 / T^2. The devices a figure rests
    on: sum_p w[p, g] x devices drawn from p over all counts.
    """
    total = estimate.sum()
    drawn_by_group = drawn @ weight
    if total <= 0:
        return np.full(weight.shape[1], np.nan), drawn_by_group
    share = (estimate @ weight) / total
    se = np.sqrt(((weight - share[None, :]) ** 2 * variance[:, None]).sum(axis=0)) / total
    return se, drawn_by_group


def _census_by_pair(census: pd.DataFrame, n_types: int, n_regions: int) -> tuple[np.ndarray, ...]:
    """Summed eligible estimates (types x regions), their variances and devices drawn, by pair."""
    by_pair = census.groupby(["device_type", "region"], observed=False)
    eligible = by_pair["eligible_est"].sum().to_numpy().reshape(n_types, n_regions)
    # Counts are independent draws: variances of the summed estimates add.
    variance = (census["eligible_se"] ** 2).groupby(
        [census["device_type"], census["region"]], observed=False).sum().to_numpy()
    drawn = by_pair["sampled"].sum().to_numpy().astype(float)
    return eligible, variance, drawn


def bias_tables(fleet: Any, parts: pd.DataFrame, census: pd.DataFrame,
                reports_per_device: np.ndarray) -> dict[str, pd.DataFrame]:
    """The three bias tables, keyed by grouping (``device_type``, ``region``, ``data_quartile``).

    ``fleet`` is the run's :class:`fleetsim.fleet.Fleet`; ``reports_per_device`` counts
    each device's used reports.
    """
    type_names, region_names = list(fleet.type_names), list(fleet.region_names)
    n_types, n_regions = len(type_names), len(region_names)
    eligible, variance, drawn = _census_by_pair(census, n_types, n_regions)
    quartile, quartile_names = data_quartile(fleet.samples)
    # Eligible device-time by data quartile: census counts are by (type, region); spread each
    # pair's eligible count over quartiles by the pair's quartile mix (documented estimate).
    mix = np.zeros((n_types * n_regions, 4))
    np.add.at(mix, (fleet.group, quartile), 1.0)
    with np.errstate(invalid="ignore", divide="ignore"):
        mix = np.nan_to_num(mix / mix.sum(axis=1, keepdims=True))
    part_type = parts["device_type"].cat.codes.to_numpy().astype(np.int64)
    part_region = parts["region"].cat.codes.to_numpy().astype(np.int64)
    part_quartile = quartile[parts["device"].to_numpy()]
    # Each pair's weight in each group of a table: 0/1 for types and regions, the quartile mix.
    pair_type = np.repeat(np.arange(n_types), n_regions)
    pair_region = np.tile(np.arange(n_regions), n_types)
    specs = {
        "device_type": (fleet.device_type.astype(np.int64), type_names, part_type, eligible.sum(axis=1),
                        np.eye(n_types)[pair_type]),
        "region": (fleet.region.astype(np.int64), region_names, part_region, eligible.sum(axis=0),
                   np.eye(n_regions)[pair_region]),
        "data_quartile": (quartile, quartile_names, part_quartile,
                          (eligible.reshape(-1)[:, None] * mix).sum(axis=0), mix),
    }
    tables = {}
    for key, (of_device, names, of_part, eligible_by_group, weight) in specs.items():
        table = _bias_table(of_device, names, parts, of_part, eligible_by_group, reports_per_device)
        se, drawn_by_group = _eligible_share_error(eligible.reshape(-1), variance, drawn, weight)
        at = table.columns.get_loc("eligible_share") + 1
        table.insert(at, "eligible_share_se", se)
        table.insert(at + 1, "eligible_drawn", drawn_by_group)
        tables[key] = table.rename(columns={"group": key})
    low, high = quartile_bounds(fleet.samples, quartile)
    whole = bool(np.isfinite(low).all())  # counts stay integers unless a quartile is empty
    tables["data_quartile"].insert(1, "samples_low", low.astype(np.int64) if whole else low)
    tables["data_quartile"].insert(2, "samples_high", high.astype(np.int64) if whole else high)
    return tables


def participation_counts(reports_per_device: np.ndarray) -> pd.DataFrame:
    """Devices (``devices``) by number of used reports (``reports``), ascending."""
    return (pd.Series(reports_per_device).value_counts().sort_index()
            .rename_axis("reports").reset_index(name="devices"))
