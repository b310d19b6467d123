"""The whole fit: logs in, a validated fleet-file dict with its estimates' rows out.

:func:`fit_fleet` takes the telemetry reader's frames (any of them may be missing but one of
intervals and snapshots), a template fleet file's mapping (its ``workload``, ``rounds`` and
``selection`` sections, and its ``workloads`` and ``sharing`` if any, are copied; a device
type's values the logs do not hold, such as ``radio_power``, come from the template's type of
the same name, else its first type) and each region's weekend days. Signals come from the
interval logs when there are any (:mod:`fleetsim.fit.stats`, :mod:`fleetsim.fit.rates`), else
from the snapshots (:mod:`fleetsim.fit.snapshots`).
"""

from __future__ import annotations

import copy
import math
from collections.abc import Callable, Mapping
from dataclasses import dataclass, field
from datetime import datetime, timezone
from typing import Any

import numpy as np
import pandas as pd

from ..config import SIGNALS, build_config
from ..errors import ConfigError, FleetsimError
from .fleetfile import MIN_SETTLED, Collector, settled_probability, signal_patterns, weekend_names
from .mix import TRAIT_COLUMNS, battery_laws, device_table, fleet_mix, trait_laws
from .rates import estimate_rates
from .snapshots import fit_snapshots
from .stats import DEFAULT_WEEKEND, interval_statistics, region_zones

__all__ = ["FitResult", "fit_fleet", "COPIED_SECTIONS"]

COPIED_SECTIONS = ("workload", "rounds", "selection", "workloads", "sharing")
"""Sections taken from the template as they are."""
_SHARE_DIGITS = 6


@dataclass
class FitResult:
    """The fitted fleet file (``fleet``, a mapping :func:`fleetsim.config.build_config` takes),
    one row per estimate (``rows``), the YAML comments by key path, the warnings, and the
    estimate tables the signals were read from (``estimates``)."""

    fleet: dict[str, Any]
    rows: list[dict[str, Any]]
    comments: dict[tuple[str, ...], tuple[list[str], str]]
    warnings: list[str] = field(default_factory=list)
    estimates: pd.DataFrame | None = None
    source: str = "intervals"


def _shares(values: dict[str, float]) -> dict[str, float]:
    """Shares rounded to 6 decimals that still sum to 1 (the rounding error on the largest)."""
    out = {k: round(float(v), _SHARE_DIGITS) for k, v in values.items()}
    largest = max(out, key=lambda k: (out[k], k))
    out[largest] = round(out[largest] + 1.0 - sum(out.values()), _SHARE_DIGITS + 3)
    return out


def _horizon(intervals: pd.DataFrame | None, snapshots: pd.DataFrame | None) -> dict[str, str]:
    times = []
    if intervals is not None and len(intervals):
        times += [intervals["start_s"].min(), intervals["end_s"].max()]
    if snapshots is not None and len(snapshots):
        times += [snapshots["time_s"].min(), snapshots["time_s"].max()]
    first, last = math.floor(min(times) / 60) * 60, math.ceil(max(times) / 60) * 60
    start = datetime.fromtimestamp(first, tz=timezone.utc).strftime("%Y-%m-%dT%H:%M:%SZ")
    return {"start": start, "duration": f"{max(last - first, 60) / 3600:.6g}h"}


def _template_type(template: dict[str, Any], name: str) -> dict[str, Any]:
    types = (template.get("fleet") or {}).get("device_types") or {}
    if not types:
        raise FleetsimError("template: fleet.device_types: missing; the template must be a complete fleet file")
    kind = types.get(name, next(iter(types.values())))
    return copy.deepcopy({k: v for k, v in kind.items() if k not in ("by_region", "signals", "settled", "share")})


def _traits(kind: dict[str, Any], tname: str, laws: dict, path: tuple[str, ...], collect: Collector,
            warnings: list[str], template_has: bool) -> None:
    """Lay the fitted lognormal traits over ``kind`` (the template's values elsewhere)."""
    fitted = laws.get(tname, {})
    for key, _factor, unit in TRAIT_COLUMNS.values():
        if key not in fitted:
            where = "the template's type of that name" if template_has else "the template's first device type"
            warnings.append(f"{tname}: {key}: not in the traits table; copied from {where}")
            continue
        median, low, high, spread, s_low, s_high, n = fitted[key]
        if spread > 3.0:
            warnings.append(f"{tname}: {key}: spread {spread:.3g} above the fleet file's limit of 3; written as 3")
        text = f"{median:.4g}{unit}" if unit else float(f"{median:.4g}")
        kind[key] = {"median": text, "spread": round(min(spread, 3.0), 4)}
        collect.scalar(path + (key, "median"), median, low, high, n, unit or "count", "devices")
        collect.scalar(path + (key, "spread"), spread, s_low, s_high, n, "log", "devices")


def _battery(kind: dict[str, Any], tname: str, laws: dict, path: tuple[str, ...], collect: Collector) -> None:
    levels = kind.setdefault("battery_level", {})
    for state, (mean, low, high, sd, sd_low, sd_high, n, _devices) in sorted(laws.get(tname, {}).items()):
        mean = min(max(mean, 0.5), 99.5)
        sd = min(max(sd, 0.1), 49.9, 0.999 * math.sqrt(mean * (100.0 - mean)))
        levels[state] = {"mean": f"{mean:.4g}%", "sd": f"{sd:.4g}%"}
        collect.scalar(path + ("battery_level", state, "mean"), mean, low, high, n, "%", "snapshots")
        collect.scalar(path + ("battery_level", state, "sd"), sd, sd_low, sd_high, n, "%", "snapshots")


def _signal_estimates(intervals, snapshots, weekend_days, on_progress) -> tuple[pd.DataFrame, pd.DataFrame | None,
                                                                               list[str], str]:
    """Estimates of every chain, each chain's on-share per cell (interval logs only: from
    snapshots the settled state is decided by :func:`fleetsim.fit.snapshots.fit_snapshots`),
    warnings, and the source."""
    if intervals is not None and len(intervals):
        statistics = interval_statistics(intervals, weekend_days)
        estimates, warnings = estimate_rates(statistics)
        occupancy = statistics[["device_type", "region", "chain", "day", "hour"]].assign(
            occupancy=statistics["on_ms"] / (statistics["on_ms"] + statistics["off_ms"]).where(
                lambda t: t > 0))
        if on_progress is not None:
            on_progress(1.0)
        return estimates, occupancy, warnings, "intervals"
    if snapshots is None or not len(snapshots):
        raise FleetsimError("no interval logs and no snapshots: nothing to fit the signals from")
    estimates, warnings = fit_snapshots(snapshots, weekend_days, on_progress=on_progress)
    return estimates, None, warnings, "snapshots"


def _settled_types(occupancy: pd.DataFrame) -> set[str]:
    """Device types whose settled p, solved from the chains' on-shares, averages at least
    MIN_SETTLED over their cells (on-shares rather than rates: for signals that are
    independent, the on-share of all three is the product of theirs in every hour, as the
    rates' ratios are not in hours where the rates change)."""
    out = set()
    for tname, part in occupancy.groupby("device_type", sort=True):
        wide = part.pivot_table(index=["region", "day", "hour"], columns="chain", values="occupancy", dropna=False)
        if not {"settled", *SIGNALS} <= set(wide.columns):
            continue
        wide = wide.dropna(subset=["settled", *SIGNALS])
        x = settled_probability(wide["settled"].to_numpy(), [wide[s].to_numpy() for s in SIGNALS])
        if x.size and float(np.mean(x)) >= MIN_SETTLED:
            out.add(str(tname))
    return out


def fit_fleet(
    intervals: pd.DataFrame | None, snapshots: pd.DataFrame | None, traits: pd.DataFrame | None,
    template: dict[str, Any], weekend_days: Mapping[str, frozenset[int]] | None = None,
    devices: int | None = None, on_progress: Callable[[float], None] | None = None,
) -> FitResult:
    """Fit the fleet model to the logs; see the module doc. Raises FleetsimError."""
    weekend_days = dict(weekend_days or {})
    table = device_table(intervals, snapshots)
    zones = region_zones(pd.concat([f[["region", "timezone"]] for f in (intervals, snapshots) if f is not None]),
                         "logs")
    estimates, occupancy, warnings, source = _signal_estimates(intervals, snapshots, weekend_days, on_progress)
    mix = fleet_mix(table)
    joint = source == "snapshots"  # the settled chain fitted with the others, and kept by a test
    settled = set(estimates.loc[estimates["chain"] == "settled", "device_type"]) if joint else _settled_types(occupancy)
    collect = Collector()
    fleet_types: dict[str, Any] = {}
    counts = mix["counts"]
    batteries, trait_fits = battery_laws(snapshots), trait_laws(traits)
    template_types = (template.get("fleet") or {}).get("device_types") or {}
    for tname in counts.index:
        path = ("fleet", "device_types", tname)
        kind: dict[str, Any] = {"share": 0.0}
        kind.update(_template_type(template, tname))
        _traits(kind, tname, trait_fits, path, collect, warnings, tname in template_types)
        _battery(kind, tname, batteries, path, collect)
        fitted = set(estimates.loc[estimates["device_type"] == tname, "region"])
        seen = [r for r in counts.columns if counts.loc[tname, r] > 0 and r in fitted]
        if not seen:
            raise FleetsimError(f"device type {tname!r}: no {source} rows to fit its signals from (it is only in "
                                f"the {'snapshots' if source == 'intervals' else 'interval logs'}); try "
                                f"--signals-from {'snapshots' if source == 'intervals' else 'intervals'}")
        home = max(seen, key=lambda r: (counts.loc[tname, r], r))
        kind.update(signal_patterns(estimates, tname, home, path, tname in settled, collect, joint))
        others = {r: signal_patterns(estimates, tname, r, path + ("by_region", r), tname in settled, collect, joint)
                  for r in seen if r != home}
        if others:
            kind["by_region"] = others
        fleet_types[tname] = kind
    for tname, share in _shares({t: v[0] for t, v in mix["types"].items()}).items():
        fleet_types[tname]["share"] = share
        _, low, high, n = mix["types"][tname]
        collect.scalar(("fleet", "device_types", tname, "share"), share, low, high, n, "fraction", "devices")
    regions: dict[str, Any] = {}
    for rname, share in _shares({r: v[0] for r, v in mix["regions"].items()}).items():
        _, low, high, n = mix["regions"][rname]
        region: dict[str, Any] = {"share": share, "timezone": zones[rname],
                                  "weekend_days": weekend_names(weekend_days.get(rname, DEFAULT_WEEKEND))}
        collect.scalar(("fleet", "regions", rname, "share"), share, low, high, n, "fraction", "devices")
        if rname in mix["type_mix"]:
            own = mix["type_mix"][rname]
            region["type_mix"] = _shares({t: v[0] for t, v in own.items()})
            for tname, (_, lo, hi, k) in own.items():
                collect.scalar(("fleet", "regions", rname, "type_mix", tname), region["type_mix"][tname], lo, hi,
                               k, "fraction", "devices")
        regions[rname] = region
    fleet = {
        "scenario": "Fleet fitted from telemetry",
        "horizon": _horizon(intervals, snapshots),
        "fleet": {"devices": int(devices or len(table)), "device_types": fleet_types, "regions": regions},
    }
    for section in COPIED_SECTIONS:
        if section in template:
            fleet[section] = copy.deepcopy(template[section])
    try:
        build_config(fleet, source="fitted fleet")
    except ConfigError as exc:
        raise FleetsimError("the fitted fleet does not validate (please report this): " + exc.problems[0]) from None
    return FitResult(fleet, collect.rows, collect.comments, warnings, estimates, source)

