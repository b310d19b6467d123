"""The fleet mix, battery levels and traits, estimated from the logs' devices and snapshots.

- Mix: counts of devices per (device type, region). A region's ``share`` is its share of the
  devices; a region gets a ``type_mix`` of its own when its type counts differ from the mix of
  the other regions by more than sampling noise (Pearson's chi-square test of the 2 x types
  table, region against the pooled other regions, at :data:`MIX_TEST_LEVEL`;
  scipy.stats.chi2_contingency), found one at a time: the region that differs most gets its
  own mix, and the test is run again among the others, until none differs; the device types'
  ``share`` is then the mix of the regions without one. Shares get exact
  binomial (Clopper-Pearson) 95% intervals.
- Battery levels: the mean and sd of the snapshot battery levels by charging state per
  device type (the moments the fleet file's Beta law is given by). Snapshots of one device
  are correlated, so the mean's interval uses the between-device spread (a cluster-robust
  standard error with the t law on devices - 1 degrees of freedom) and the sd's the
  chi-square law on devices - 1 degrees of freedom.
- Traits: a lognormal per device type by maximum likelihood: median exp(mean of log x),
  spread the sd of log x (n divisor, the MLE); intervals from the t law for the mean of logs
  and the chi-square law for their variance (n - 1 degrees of freedom).
- Held-out devices: a device is held out when the first 8 bytes of the SHA-256 of its id,
  read as a fraction of 2^64, fall below the held-out share: the same devices for any order
  of the rows, and nothing random.
"""

from __future__ import annotations

import hashlib

import numpy as np
import pandas as pd
from scipy import stats

from ..errors import FleetsimError

__all__ = [
    "MIX_TEST_LEVEL", "TRAIT_COLUMNS", "device_table", "fleet_mix", "battery_laws", "trait_laws",
    "held_out_mask",
]

MIX_TEST_LEVEL = 0.01
"""A region gets its own type mix when the chi-square test's p-value is below this."""
TRAIT_COLUMNS = {
    # traits-table column -> (fleet-file key, factor to the key's written unit, unit)
    "sample_cost_s": ("sample_cost", 1000.0, "ms"),
    "memory_gb": ("memory", 1.0, "GB"),
    "battery_wh": ("battery_capacity", 1.0, "Wh"),
    "train_power_w": ("train_power", 1.0, "W"),
    "download_mbps": ("download_rate", 1.0, "Mbit/s"),
    "upload_mbps": ("upload_rate", 1.0, "Mbit/s"),
    "samples": ("samples", 1.0, ""),
}
_Z = stats.norm.ppf(0.975)


def held_out_mask(device_ids: pd.Series | np.ndarray, fraction: float) -> np.ndarray:
    """Whether each device is held out (see the module doc); ``fraction`` from 0 to 1."""
    def draw(name: str) -> float:
        digest = hashlib.sha256(str(name).encode("utf-8", "surrogatepass")).digest()
        return int.from_bytes(digest[:8], "big") / 2.0**64

    return np.array([draw(name) < fraction for name in device_ids], dtype=bool)


def device_table(*frames: pd.DataFrame | None) -> pd.DataFrame:
    """One row per device (``device_id``, ``device_type``, ``region``) from every frame given;
    a device named with two types or regions is refused."""
    parts = [f[["device_id", "device_type", "region"]].astype(str).drop_duplicates() for f in frames if f is not None]
    if not parts:
        raise FleetsimError("no devices: give interval logs or snapshots")
    table = pd.concat(parts).drop_duplicates().sort_values(["device_id", "device_type", "region"])
    twice = table["device_id"].duplicated(keep=False)
    if twice.any():
        rows = table[twice].head(2)
        pairs = zip(rows["device_type"], rows["region"], strict=True)
        raise FleetsimError(f"device {rows['device_id'].iloc[0]!r} appears as "
                            + " and as ".join(f"{t} in {r}" for t, r in pairs))
    return table.reset_index(drop=True)


def _share(count: np.ndarray, total: int) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    count = np.asarray(count, float)
    low = np.where(count > 0, stats.beta.ppf(0.025, count, total - count + 1), 0.0)
    high = np.where(count < total, stats.beta.ppf(0.975, count + 1, total - count), 1.0)
    return count / total, low, high


def fleet_mix(devices: pd.DataFrame) -> dict:
    """Counts and shares: ``regions`` {name: (share, low, high, n)}, ``types`` {name: ...} (the
    mix of the regions without their own), ``type_mix`` {region: {type: ...}} where it differs,
    ``tests`` {region: chi-square p-value}."""
    counts = pd.crosstab(devices["device_type"], devices["region"]).sort_index().sort_index(axis=1)
    total = int(counts.to_numpy().sum())
    types, regions = list(counts.index), list(counts.columns)
    by_region = counts.sum(axis=0).to_numpy()
    share, low, high = _share(by_region, total)
    out: dict = {"regions": {r: (share[i], low[i], high[i], int(by_region[i])) for i, r in enumerate(regions)},
                 "type_mix": {}, "tests": {}, "counts": counts}
    own: list[str] = []
    while len(regions) - len(own) > 1:  # the most different region first, against the others left
        base = [r for r in regions if r not in own]
        tests = {r: _mix_test(counts[r].to_numpy(), counts[[o for o in base if o != r]].sum(axis=1).to_numpy())
                 for r in base}
        out["tests"].update(tests)
        worst = min(base, key=lambda r: (tests[r], r))
        if tests[worst] >= MIX_TEST_LEVEL:
            break
        own.append(worst)
    rest_regions = [r for r in regions if r not in own] or regions
    base = counts[rest_regions].sum(axis=1).to_numpy()
    share, low, high = _share(base, int(base.sum()))
    out["types"] = {t: (share[i], low[i], high[i], int(base[i])) for i, t in enumerate(types)}
    for r in own:
        here = counts[r].to_numpy()
        share, low, high = _share(here, int(here.sum()))
        out["type_mix"][r] = {t: (share[i], low[i], high[i], int(here[i])) for i, t in enumerate(types)}
    return out


def _mix_test(here: np.ndarray, rest: np.ndarray) -> float:
    """p-value of Pearson's chi-square test that two rows of type counts share one mix."""
    table = np.vstack([here, rest])
    table = table[:, table.sum(axis=0) > 0]
    if table.shape[1] < 2 or (table.sum(axis=1) == 0).any():
        return 1.0
    return float(stats.chi2_contingency(table, correction=False).pvalue)


def battery_laws(snapshots: pd.DataFrame | None) -> dict:
    """{device type: {"charging" | "unplugged": (mean, low, high, sd, sd_low, sd_high, n, devices)}} in %."""
    if snapshots is None or not len(snapshots):
        return {}
    out: dict = {}
    frame = snapshots[["device_id", "device_type", "charging", "battery"]].dropna(subset=["battery"])
    for (tname, charging), part in frame.groupby(["device_type", "charging"], sort=True, observed=True):
        x = part["battery"].to_numpy(float)
        n = x.size
        devices = part["device_id"].nunique()
        if devices < 2:
            continue
        mean, sd = float(x.mean()), float(x.std(ddof=1)) if n > 1 else 0.0
        # cluster-robust variance of the mean: devices' summed residuals
        resid = pd.Series(x - mean).groupby(part["device_id"].to_numpy()).sum().to_numpy()
        se = float(np.sqrt(np.sum(resid**2)) / n)
        t = stats.t.ppf(0.975, devices - 1)
        dof = devices - 1
        sd_low = sd * np.sqrt(dof / stats.chi2.ppf(0.975, dof))
        sd_high = sd * np.sqrt(dof / stats.chi2.ppf(0.025, dof))
        key = "charging" if bool(charging) else "unplugged"
        out.setdefault(str(tname), {})[key] = (mean, mean - t * se, mean + t * se, sd, sd_low, sd_high, n, devices)
    return out


def trait_laws(traits: pd.DataFrame | None) -> dict:
    """{device type: {fleet-file key: (median, low, high, spread, s_low, s_high, n)}} in the
    key's written unit (:data:`TRAIT_COLUMNS`)."""
    if traits is None or not len(traits):
        return {}
    out: dict = {}
    for tname, part in traits.groupby("device_type", sort=True, observed=True):
        for column, (key, factor, _unit) in TRAIT_COLUMNS.items():
            if column not in part:
                continue
            x = part[column].to_numpy(float) * factor
            x = x[np.isfinite(x)]
            if column == "samples":
                x = np.maximum(x, 1.0)  # the engine gives every device at least one sample
            x = x[x > 0]
            n = x.size
            if n < 2:
                continue
            logs = np.log(x)
            m, s_mle, s = logs.mean(), logs.std(ddof=0), logs.std(ddof=1)
            t = stats.t.ppf(0.975, n - 1)
            out.setdefault(str(tname), {})[key] = (
                float(np.exp(m)), float(np.exp(m - t * s / np.sqrt(n))), float(np.exp(m + t * s / np.sqrt(n))),
                float(s_mle), float(s * np.sqrt((n - 1) / stats.chi2.ppf(0.975, n - 1))),
                float(s * np.sqrt((n - 1) / stats.chi2.ppf(0.025, n - 1))), n,
            )
    return out
