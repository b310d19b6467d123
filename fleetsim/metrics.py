"""Rounds, straggler waste and participation bias, computed from the event log only.

Definitions are in docs/metrics.md; every figure in summary.json and the report comes from
the tables built here (one source of truth).
"""

from __future__ import annotations

import html
import math
from dataclasses import dataclass
from datetime import timedelta
from typing import TYPE_CHECKING, Any

import numpy as np
import pandas as pd
from scipy import stats

from .events import OUTCOMES, ROUND_STATUS
from .units import format_instant

if TYPE_CHECKING:
    from .engine import Result

__all__ = ["Metrics", "compute_metrics", "gini", "wilson_interval", "summary_html", "CAUTION"]

CAUTION = (
    "These figures come from a model of a fleet, not from real devices. Fit the fleet from "
    "real telemetry and follow your organisation's review before a change touches real "
    "users' devices, batteries or data plans."
)


@dataclass(frozen=True)
class Metrics:
    summary: dict[str, Any]
    tables: dict[str, pd.DataFrame]


def gini(values: np.ndarray) -> float:
    """Gini coefficient of non-negative values (0: all equal; NaN when all are zero).

    G = sum_i (2 i - n - 1) x_(i) / (n sum x), x sorted ascending, i = 1..n.
    """
    x = np.sort(np.asarray(values, dtype=float))
    n = x.size
    total = x.sum()
    if n == 0 or total <= 0:
        return float("nan")
    ranks = np.arange(1, n + 1)
    return float(np.sum((2 * ranks - n - 1) * x) / (n * total))


def wilson_interval(
    successes: np.ndarray, trials: float, z: float = 1.959963984540054
) -> tuple[np.ndarray, np.ndarray]:
    """Wilson score interval for binomial proportions (Wilson, JASA 22, 1927); 95% by default."""
    k = np.asarray(successes, dtype=float)
    if trials <= 0:
        nan = np.full(k.shape, np.nan)
        return nan, nan
    p = k / trials
    denom = 1 + z * z / trials
    centre = (p + z * z / (2 * trials)) / denom
    half = z * np.sqrt(p * (1 - p) / trials + z * z / (4 * trials * trials)) / denom
    return centre - half, centre + half


def _quantiles(values: pd.Series | np.ndarray) -> dict[str, float | None]:
    v = np.asarray(values, dtype=float)
    v = v[np.isfinite(v)]
    if v.size == 0:
        return {"p50": None, "p90": None, "p99": None}
    q = np.quantile(v, [0.5, 0.9, 0.99])
    return {"p50": float(q[0]), "p90": float(q[1]), "p99": float(q[2])}


def _clean(value: Any) -> Any:
    """JSON-ready: NaN and inf become None, numpy scalars become Python numbers."""
    if isinstance(value, dict):
        return {str(k): _clean(v) for k, v in value.items()}
    if isinstance(value, (list, tuple)):
        return [_clean(v) for v in value]
    if isinstance(value, (np.integer,)):
        return int(value)
    if isinstance(value, (float, np.floating)):
        f = float(value)
        return f if math.isfinite(f) else None
    if isinstance(value, np.bool_):
        return bool(value)
    return value


def _data_quartile(samples: np.ndarray) -> tuple[np.ndarray, list[str]]:
    edges = np.quantile(samples, [0.25, 0.5, 0.75])
    codes = np.searchsorted(edges, samples, side="right")
    names = [
        f"Q1 (<= {edges[0]:.0f} samples)",
        f"Q2 ({edges[0]:.0f}-{edges[1]:.0f})",
        f"Q3 ({edges[1]:.0f}-{edges[2]:.0f})",
        f"Q4 (> {edges[2]:.0f})",
    ]
    return codes, names


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
    weight = np.bincount(part_group[used], weights=parts["samples"].to_numpy()[used], minlength=k)
    covered = np.bincount(group_of_device[reports_per_device > 0], minlength=k).astype(float)

    def share(x: np.ndarray) -> np.ndarray:
        total = x.sum()
        return x / total if total > 0 else np.full(k, np.nan)

    fleet_share = share(devices)
    report_share = share(reports)
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
            "eligible_share": share(eligible_by_group),
            "accepted_share": share(accepted),
            "report_share": report_share,
            "weight_share": share(weight),
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


def _waste_sums(frame: pd.DataFrame) -> dict[str, float]:
    return {
        "compute_s": float(frame["compute_s"].sum()),
        "bytes": float((frame["bytes_down"] + frame["bytes_up"]).sum()),
        "energy_wh": float(frame["energy_wh"].sum()),
    }


def compute_metrics(result: Result) -> Metrics:
    """Every table and the summary of one run."""
    config = result.config
    fleet = result.fleet
    parts = result.participations
    rounds = result.rounds.copy()
    census = result.census
    start = config.horizon.start
    hours = result.horizon_s / 3600.0
    n_devices = fleet.size
    type_names = list(fleet.type_names)
    region_names = list(fleet.region_names)

    # ---------------------------------------------------------------- rounds
    rounds["selection_s"] = rounds["selected_s"] - rounds["opened_s"]
    rounds["report_s"] = rounds["closed_s"] - rounds["selected_s"]
    rounds["duration_s"] = rounds["closed_s"] - rounds["opened_s"]
    rounds["opened_utc"] = pd.Timestamp(start) + pd.to_timedelta(rounds["opened_s"], unit="s")
    counts = rounds["status"].value_counts()
    committed = rounds[rounds["status"] == "committed"]

    # ---------------------------------------------------------------- participations (labelled)
    labelled = parts.assign(bytes=parts["bytes_down"] + parts["bytes_up"])

    # ---------------------------------------------------------------- waste
    wasted = labelled[~labelled["used"]]
    totals = _waste_sums(labelled)
    waste_totals = _waste_sums(wasted)

    def fraction(part: float, whole: float) -> float:
        return part / whole if whole > 0 else float("nan")

    by_cause = (
        wasted.groupby("waste_cause", observed=False)[["compute_s", "bytes", "energy_wh"]].sum()
        .assign(participations=wasted.groupby("waste_cause", observed=False).size())
        .drop(index="used", errors="ignore")
        .reset_index()
        .rename(columns={"waste_cause": "cause"})
    )
    by_cause["compute_share"] = by_cause["compute_s"] / max(waste_totals["compute_s"], 1e-300)
    by_type_all = labelled.groupby("device_type", observed=False)[["compute_s", "bytes", "energy_wh"]].sum()
    by_type_waste = wasted.groupby("device_type", observed=False)[["compute_s", "bytes", "energy_wh"]].sum()
    waste_by_type = pd.DataFrame(
        {
            "device_type": type_names,
            "compute_s": by_type_all["compute_s"].to_numpy(),
            "wasted_compute_s": by_type_waste["compute_s"].to_numpy(),
            "bytes": by_type_all["bytes"].to_numpy(),
            "wasted_bytes": by_type_waste["bytes"].to_numpy(),
            "energy_wh": by_type_all["energy_wh"].to_numpy(),
            "wasted_energy_wh": by_type_waste["energy_wh"].to_numpy(),
        }
    )
    with np.errstate(divide="ignore", invalid="ignore"):
        for key in ("compute", "bytes", "energy"):
            col = {"compute": "compute_s", "bytes": "bytes", "energy": "energy_wh"}[key]
            waste_by_type[f"{key}_fraction"] = waste_by_type[f"wasted_{col}"] / waste_by_type[col]

    # ---------------------------------------------------------------- bias
    used = parts["used"].to_numpy()
    reports_per_device = np.bincount(parts["device"].to_numpy()[used], minlength=n_devices)
    n_regions = len(region_names)
    by_pair = census.groupby(["device_type", "region"], observed=False)
    eligible_by_pair = by_pair["eligible_est"].sum().to_numpy().reshape(len(type_names), n_regions)
    # Counts are independent draws: variances of the summed estimates add.
    variance_by_pair = (census["eligible_se"] ** 2).groupby(
        [census["device_type"], census["region"]], observed=False).sum().to_numpy()
    drawn_by_pair = by_pair["sampled"].sum().to_numpy().astype(float)
    quartile, quartile_names = _data_quartile(fleet.samples)
    # Eligible device-time by data quartile: census counts are by (type, region); spread each
    # pair's eligible count over quartiles by the pair's quartile mix (documented estimate).
    pair = fleet.group
    mix = np.zeros((len(type_names) * n_regions, 4))
    np.add.at(mix, (pair, quartile), 1.0)
    with np.errstate(invalid="ignore", divide="ignore"):
        mix = np.nan_to_num(mix / mix.sum(axis=1, keepdims=True))
    eligible_by_quartile = (eligible_by_pair.reshape(-1)[:, None] * mix).sum(axis=0)
    part_device = parts["device"].to_numpy()
    part_type = parts["device_type"].cat.codes.to_numpy().astype(np.int64)
    part_region = parts["region"].cat.codes.to_numpy().astype(np.int64)
    bias_type = _bias_table(fleet.device_type.astype(np.int64), type_names, parts,
                            part_type, eligible_by_pair.sum(axis=1),
                            reports_per_device)
    bias_region = _bias_table(fleet.region.astype(np.int64), region_names, parts,
                              part_region, eligible_by_pair.sum(axis=0),
                              reports_per_device)
    bias_quartile = _bias_table(quartile, quartile_names, parts, quartile[part_device],
                                eligible_by_quartile, reports_per_device)
    # Each pair's weight in each group of a table: 0/1 for types and regions, the quartile mix.
    pair_type = np.repeat(np.arange(len(type_names)), n_regions)
    pair_region = np.tile(np.arange(n_regions), len(type_names))
    weights = (np.eye(len(type_names))[pair_type], np.eye(n_regions)[pair_region], mix)
    for table, weight in zip((bias_type, bias_region, bias_quartile), weights, strict=True):
        se, drawn = _eligible_share_error(eligible_by_pair.reshape(-1), variance_by_pair, drawn_by_pair, weight)
        at = table.columns.get_loc("eligible_share") + 1
        table.insert(at, "eligible_share_se", se)
        table.insert(at + 1, "eligible_drawn", drawn)
    for table, name in ((bias_type, "device_type"), (bias_region, "region"), (bias_quartile, "data_quartile")):
        table.rename(columns={"group": name}, inplace=True)

    report_counts = bias_type["reports"].to_numpy().astype(float)
    expected = bias_type["fleet_share"].to_numpy() * report_counts.sum()
    if report_counts.sum() > 0 and (expected > 0).all():
        chi2 = stats.chisquare(report_counts, expected)
        chi_square_p = float(chi2.pvalue)
        chi_square_stat = float(chi2.statistic)
    else:
        chi_square_p = chi_square_stat = float("nan")
    coverage = float((reports_per_device > 0).mean()) if n_devices else float("nan")
    participation_counts = (
        pd.Series(reports_per_device).value_counts().sort_index().rename_axis("reports").reset_index(name="devices")
    )

    # ---------------------------------------------------------------- dropouts and device cost
    drops = labelled[labelled["outcome"] == "dropout"]
    dropouts = (
        drops.groupby(["cause", "phase"], observed=True).size().rename("dropouts").reset_index()
        if len(drops) else pd.DataFrame(columns=["cause", "phase", "dropouts"])
    )
    cost = (
        labelled.assign(megabytes=labelled["bytes"] / 1e6)
        .groupby("device_type", observed=False)
        .agg(
            participations=("device", "size"),
            battery_pct_p50=("battery_used_pct", "median"),
            battery_pct_p90=("battery_used_pct", lambda v: v.quantile(0.9) if len(v) else np.nan),
            megabytes_p50=("megabytes", "median"),
            megabytes_p90=("megabytes", lambda v: v.quantile(0.9) if len(v) else np.nan),
            energy_wh_mean=("energy_wh", "mean"),
        )
        .reset_index()
    )

    # ---------------------------------------------------------------- hourly view
    n_hours = int(math.ceil(hours))
    hour_index = np.arange(n_hours)
    # A round that opened before the horizon ended but closed after it counts in the last hour.
    closed_hour = np.minimum(np.floor(rounds["closed_s"].to_numpy() / 3600.0).astype(np.int64), max(n_hours - 1, 0))
    hourly = pd.DataFrame({"hour": hour_index})
    hourly["hour_utc"] = [format_instant(start + timedelta(hours=int(h))) for h in hour_index]
    for status in ROUND_STATUS:
        mask = (rounds["status"] == status).to_numpy() & (closed_hour < n_hours)
        hourly[status] = np.bincount(closed_hour[mask], minlength=n_hours)[:n_hours]
    chour = np.floor(census["time_s"].to_numpy() / 3600.0).astype(np.int64)
    census_h = census.assign(hour=chour)
    per_hour_region = census_h.groupby(["hour", "region"], observed=False)["eligible_est"].sum().unstack("region")
    samples_per_hour = census_h.groupby("hour")["time_s"].nunique()
    per_hour_region = per_hour_region.div(samples_per_hour, axis=0).reindex(hour_index).fillna(0.0)
    for region in region_names:
        hourly[f"eligible:{region}"] = per_hour_region[region].to_numpy()
    hourly["eligible"] = per_hour_region.sum(axis=1).to_numpy()
    # Mean of independent counts: variance = sum of the counts' variances / counts^2.
    per_hour_var = census_h.assign(v=census_h["eligible_se"] ** 2).groupby("hour")["v"].sum()
    per_hour_var = per_hour_var.div(samples_per_hour ** 2).reindex(hour_index).fillna(0.0)
    hourly["eligible_se"] = np.sqrt(per_hour_var.to_numpy())
    per_hour_drawn = census_h.groupby("hour")["sampled"].sum().div(samples_per_hour)
    hourly["eligible_drawn"] = per_hour_drawn.reindex(hour_index).fillna(0.0).to_numpy()
    hourly["checkins_per_s"] = hourly["eligible"] / config.rounds.checkin_every
    accept_hour = np.floor(parts["accepted_s"].to_numpy() / 3600.0).astype(np.int64)
    ok = accept_hour < n_hours
    hourly["accepted"] = np.bincount(accept_hour[ok], minlength=n_hours)[:n_hours]
    # Devices in training at once: sweep over task starts and ends.
    starts = parts["accepted_s"].to_numpy()
    ends = parts["ended_s"].to_numpy()
    peak, hourly_peak = _concurrency(starts, ends, n_hours)
    hourly["peak_working"] = hourly_peak
    little = _little(starts, ends, result.horizon_s)

    tables = {
        "rounds": rounds,
        "waste_by_cause": by_cause,
        "waste_by_device_type": waste_by_type,
        "bias_by_device_type": bias_type,
        "bias_by_region": bias_region,
        "bias_by_data_quartile": bias_quartile,
        "participation_counts": participation_counts,
        "dropouts": dropouts,
        "device_cost": cost,
        "hourly": hourly,
    }

    def bias_map(table: pd.DataFrame, key: str) -> dict[str, Any]:
        cols = ["fleet_share", "eligible_share", "accepted_share", "report_share", "weight_share",
                "representation_ratio", "ratio_low", "ratio_high", "never_share"]
        return {row[key]: {c: row[c] for c in cols} for row in table.to_dict("records")}

    summary = {
        "scenario": config.scenario,
        "fleet_file": result.source,
        "seed": result.seed,
        "config_hash": result.config_hash,
        "policy": result.policy,
        "devices": n_devices,
        "horizon_start": format_instant(start),
        "simulated_hours": hours,
        "rounds": {
            "attempted": int(len(rounds)),
            "committed": int(counts.get("committed", 0)),
            "failed": int(counts.get("failed", 0)),
            "abandoned": int(counts.get("abandoned", 0)),
            "outage": int(counts.get("outage", 0)),
            "committed_per_hour": int(counts.get("committed", 0)) / hours,
            "duration_s": _quantiles(committed["duration_s"]),
            "selection_s": _quantiles(rounds.loc[rounds["status"] != "abandoned", "selection_s"]),
            "report_s": _quantiles(committed["report_s"]),
        },
        "participations": {
            "accepted": int(len(parts)),
            "used_reports": int(used.sum()),
            "by_outcome": {
                k: int(v) for k, v in labelled["outcome"].value_counts().reindex(OUTCOMES, fill_value=0).items()
            },
            "dropouts_by_cause": {k: int(v) for k, v in drops["cause"].value_counts().items() if v > 0 and k != "none"},
        },
        "waste": {
            "compute_fraction": fraction(waste_totals["compute_s"], totals["compute_s"]),
            "bytes_fraction": fraction(waste_totals["bytes"], totals["bytes"]),
            "energy_fraction": fraction(waste_totals["energy_wh"], totals["energy_wh"]),
            "compute_s": waste_totals["compute_s"],
            "bytes": waste_totals["bytes"],
            "energy_wh": waste_totals["energy_wh"],
            "by_cause": {
                row["cause"]: {"participations": row["participations"], "compute_s": row["compute_s"],
                               "bytes": row["bytes"], "energy_wh": row["energy_wh"]}
                for row in by_cause.to_dict("records") if row["participations"] > 0
            },
            "by_device_type": {
                row["device_type"]: {"compute_fraction": row["compute_fraction"],
                                     "bytes_fraction": row["bytes_fraction"],
                                     "energy_fraction": row["energy_fraction"]}
                for row in waste_by_type.to_dict("records")
            },
        },
        "bias": {
            "by_device_type": bias_map(bias_type, "device_type"),
            "by_region": bias_map(bias_region, "region"),
            "by_data_quartile": bias_map(bias_quartile, "data_quartile"),
            "coverage": coverage,
            "gini": gini(reports_per_device),
            "chi_square": chi_square_stat,
            "chi_square_p": chi_square_p,
        },
        "load": {
            "peak_working": int(peak),
            "mean_working": little["mean_working"],
            "checkins_per_s_peak_hour": float(hourly["checkins_per_s"].max()) if n_hours else None,
        },
        "caution": CAUTION,
    }
    return Metrics(summary=_clean(summary), tables=tables)


def _concurrency(starts: np.ndarray, ends: np.ndarray, n_hours: int) -> tuple[int, np.ndarray]:
    """Peak number of devices working at once, overall and per hour of the horizon."""
    if starts.size == 0:
        return 0, np.zeros(n_hours, dtype=np.int64)
    times = np.concatenate([starts, ends])
    delta = np.concatenate([np.ones(starts.size, np.int64), -np.ones(ends.size, np.int64)])
    order = np.lexsort((delta, times))  # ends before starts at equal times
    level = np.cumsum(delta[order])
    t_sorted = times[order]
    hour = np.clip(np.floor(t_sorted / 3600.0).astype(np.int64), 0, max(n_hours - 1, 0))
    per_hour = np.zeros(n_hours, dtype=np.int64)
    np.maximum.at(per_hour, hour, level)
    return int(level.max()), per_hour


def _little(starts: np.ndarray, ends: np.ndarray, horizon_s: float) -> dict[str, float]:
    """Time-average number of working devices over the horizon: sum of task time / horizon."""
    clipped = np.clip(ends, 0, horizon_s) - np.clip(starts, 0, horizon_s)
    return {"mean_working": float(clipped.sum() / horizon_s) if horizon_s > 0 else float("nan")}


def summary_html(result: Result) -> str:
    """A compact HTML summary (notebooks render it); names are escaped, never markup."""
    s = result.summary
    r, w, b = s["rounds"], s["waste"], s["bias"]

    def pct(x: float | None) -> str:
        return "n/a" if x is None else f"{100 * x:.1f}%"

    rows = "".join(
        f"<tr><td>{html.escape(name)}</td><td>{pct(v['fleet_share'])}</td><td>{pct(v['report_share'])}</td>"
        f"<td>{'n/a' if v['representation_ratio'] is None else format(v['representation_ratio'], '.2f')}</td></tr>"
        for name, v in b["by_device_type"].items()
    )
    return (
        "<div class='fleetsim-summary'>"
        f"<b>{html.escape(s['scenario'])}</b> &middot; seed {s['seed']} &middot; config {s['config_hash']} "
        f"&middot; {s['devices']:,} devices &middot; {s['simulated_hours']:g} h<br>"
        f"rounds committed {r['committed']} of {r['attempted']} ({r['committed_per_hour']:.2f}/h); "
        f"failed {r['failed']}, abandoned {r['abandoned']}<br>"
        f"straggler waste: compute {pct(w['compute_fraction'])}, bytes {pct(w['bytes_fraction'])}, "
        f"energy {pct(w['energy_fraction'])}; coverage {pct(b['coverage'])}<br>"
        "<table><tr><th>device type</th><th>fleet share</th><th>report share</th><th>ratio</th></tr>"
        f"{rows}</table><small>{html.escape(CAUTION)}</small></div>"
    )
