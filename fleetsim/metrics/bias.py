"""Participation bias: who is in the fleet, eligible, accepted, reported and weighted (docs/metrics.md)."""

from __future__ import annotations

from typing import Any

import numpy as np
import pandas as pd

from ..analysis import Z_95, wilson_interval

__all__ = ["QUARTILES", "data_quartile", "quartile_bounds", "bias_tables", "pair_bias_table", "pair_name",
           "weight_share_interval", "participation_counts", "BIAS_TABLES", "PAIR_TABLE", "PAIR_KEY"]

BIAS_TABLES = {"device_type": "bias_by_device_type", "region": "bias_by_region",
               "data_quartile": "bias_by_data_quartile"}
"""Grouping column -> name of its bias table."""

PAIR_TABLE = "bias_by_device_type_region"
"""The bias table of (device type, region) pairs; its summary.json map is ``bias.by_<PAIR_KEY>``."""
PAIR_KEY = "type_and_region"


def pair_name(device_type: str, region: str) -> str:
    """A (device type, region) pair's name in text (reports, study labels): ``type / region``."""
    return f"{device_type} / {region}"


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


def weight_share_interval(weight_per_device: np.ndarray, group_of_device: np.ndarray, k: int,
                          z: float = Z_95) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Each group's share of the FedAvg weight, with a 95% interval that takes devices as the units.

    The share is the ratio of two sums over devices, W_g = A_g / B, a_i = w_i [i in g], b_i = w_i
    (w_i: the weight of device i's used reports). Its variance by the linearisation (delta
    method) of a ratio estimator (Cochran, Sampling Techniques, 1977, section 6.4, with
    replacement: the fleet taken as n draws of the devices such a fleet could hold) is
    v = n / (n - 1) x sum_i (a_i - W_g b_i)^2 / B^2
      = n / (n - 1) x ((1 - W_g)^2 S_g + W_g^2 (S - S_g)) / B^2,
    S_g the sum of the group's w_i^2. A device's repeated reports move together in w_i, so
    repeat participation widens the interval (the Wilson interval of the report share takes
    reports as independent). Returns (share, low, high): share -/+ z sqrt(v) clipped to
    [0, 1]; NaN when no weight was used or the fleet has fewer than two devices.
    """
    w = np.asarray(weight_per_device, dtype=float)
    n, total = w.size, float(w.sum())
    if n < 2 or total <= 0:
        nan = np.full(k, np.nan)
        return nan, nan.copy(), nan.copy()
    own = np.bincount(group_of_device, weights=w, minlength=k)
    squares = np.bincount(group_of_device, weights=w * w, minlength=k)
    share = own / total
    variance = n / (n - 1) * ((1 - share) ** 2 * squares + share ** 2 * (float((w * w).sum()) - squares)) / total ** 2
    half = z * np.sqrt(np.maximum(variance, 0.0))
    return share, np.clip(share - half, 0.0, 1.0), np.clip(share + half, 0.0, 1.0)


def _bias_table(
    group_of_device: np.ndarray,
    names: list[str] | tuple[str, ...],
    parts: pd.DataFrame,
    part_group: np.ndarray,
    eligible_by_group: np.ndarray,
    reports_per_device: np.ndarray,
    samples: np.ndarray,
    weight_per_device: np.ndarray,
) -> pd.DataFrame:
    """One bias table: shares, the two ratios and their intervals, counts (docs/metrics.md)."""
    k = len(names)
    devices = np.bincount(group_of_device, minlength=k).astype(float)
    examples = np.bincount(group_of_device, weights=samples.astype(float), minlength=k)
    accepted = np.bincount(part_group, minlength=k).astype(float)
    used = parts["used"].to_numpy()
    reports = np.bincount(part_group[used], minlength=k).astype(float)
    # FedAvg weight of each used report: the distinct examples it trained on (capped), not the data size.
    weight = np.bincount(part_group[used], weights=parts["weight"].to_numpy(dtype=float)[used], minlength=k)
    covered = np.bincount(group_of_device[reports_per_device > 0], minlength=k).astype(float)
    fleet_share = _share(devices)
    report_share = _share(reports)
    low, high = wilson_interval(reports, reports.sum())
    example_share = _share(examples)
    _, weight_low, weight_high = weight_share_interval(weight_per_device, group_of_device, k)
    with np.errstate(divide="ignore", invalid="ignore"):
        # Reports against devices (Wilson interval) and weight against examples (delta method).
        ratio = report_share / fleet_share
        ratio_low, ratio_high = low / fleet_share, high / fleet_share
        weight_ratio = _share(weight) / example_share
        weight_ratio_low, weight_ratio_high = weight_low / example_share, weight_high / example_share
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
            "example_share": example_share,
            "weight_ratio": weight_ratio,
            "weight_ratio_low": weight_ratio_low,
            "weight_ratio_high": weight_ratio_high,
            "accepted": accepted.astype(np.int64),
            "reports": reports.astype(np.int64),
            "never_share": never,
            "examples": examples.astype(np.int64),
            "weight": weight,
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


def _device_weight(fleet: Any, parts: pd.DataFrame) -> np.ndarray:
    """Each device's FedAvg weight over the run: the summed ``weight`` of its used reports."""
    used = parts["used"].to_numpy()
    return np.bincount(parts["device"].to_numpy()[used], weights=parts["weight"].to_numpy(dtype=float)[used],
                       minlength=len(fleet.samples))


def _with_eligible(table: pd.DataFrame, key: str, estimate: np.ndarray, variance: np.ndarray,
                   drawn: np.ndarray, weight: np.ndarray) -> pd.DataFrame:
    """``table`` with the eligible share's standard error and devices drawn after ``eligible_share``,
    and its group column named ``key``."""
    se, drawn_by_group = _eligible_share_error(estimate, variance, drawn, weight)
    at = table.columns.get_loc("eligible_share") + 1
    table.insert(at, "eligible_share_se", se)
    table.insert(at + 1, "eligible_drawn", drawn_by_group)
    return table.rename(columns={"group": key})


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
    device_weight = _device_weight(fleet, parts)
    tables = {}
    for key, (of_device, names, of_part, eligible_by_group, weight) in specs.items():
        table = _bias_table(of_device, names, parts, of_part, eligible_by_group, reports_per_device,
                            fleet.samples, device_weight)
        tables[key] = _with_eligible(table, key, eligible.reshape(-1), variance, drawn, weight)
    low, high = quartile_bounds(fleet.samples, quartile)
    whole = bool(np.isfinite(low).all())  # counts stay integers unless a quartile is empty
    tables["data_quartile"].insert(1, "samples_low", low.astype(np.int64) if whole else low)
    tables["data_quartile"].insert(2, "samples_high", high.astype(np.int64) if whole else high)
    return tables


def pair_bias_table(fleet: Any, parts: pd.DataFrame, census: pd.DataFrame,
                    reports_per_device: np.ndarray) -> pd.DataFrame:
    """The bias table of every (device type, region) pair, types outer, regions inner.

    Columns ``device_type`` and ``region``, then those of the other bias tables; a pair
    without devices keeps its row (zero counts, NaN ratios), so summing a share or a count
    over a type's regions gives the type's figure in the device-type table, and likewise
    over a region's types.
    """
    type_names, region_names = list(fleet.type_names), list(fleet.region_names)
    n_types, n_regions = len(type_names), len(region_names)
    eligible, variance, drawn = _census_by_pair(census, n_types, n_regions)
    part_pair = (parts["device_type"].cat.codes.to_numpy().astype(np.int64) * n_regions
                 + parts["region"].cat.codes.to_numpy().astype(np.int64))
    names = [pair_name(t, r) for t in type_names for r in region_names]
    table = _bias_table(np.asarray(fleet.group, dtype=np.int64), names, parts, part_pair, eligible.reshape(-1),
                        reports_per_device, fleet.samples, _device_weight(fleet, parts))
    table = _with_eligible(table, "pair", eligible.reshape(-1), variance, drawn, np.eye(n_types * n_regions))
    table.insert(0, "device_type", np.repeat(type_names, n_regions))
    table.insert(1, "region", np.tile(region_names, n_types))
    return table.drop(columns="pair")


def participation_counts(reports_per_device: np.ndarray) -> pd.DataFrame:
    """Devices (``devices``) by number of used reports (``reports``), ascending."""
    return (pd.Series(reports_per_device).value_counts().sort_index()
            .rename_axis("reports").reset_index(name="devices"))
