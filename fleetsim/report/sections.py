"""The report's sections: each a question a team asks, answered from the run folder.

Every number comes from the run folder (summary.json, config.json, tables/*.csv and the
event log); each figure is drawn from the same arrays its data table shows. Computed here,
because no table holds them: the chi-square tests by region and by data-size quartile (the
method summary.json uses for device type), the Lorenz curve and the busiest-10% share (from
tables/participation_counts.csv), the Kaplan-Meier survival curves (from the event log), and
the correlation of committed rounds with eligible devices by hour (from tables/hourly.csv).
"""

from __future__ import annotations

import json
import math
from collections.abc import Sequence
from datetime import datetime, timezone
from typing import Any

import numpy as np
import pandas as pd
from scipy import stats

from . import figures
from .model import Cell, Chart, Column, Section, Table, Tile, format_value
from .rundir import BIAS_GROUPINGS, RunFolder
from .survival import Survival, kaplan_meier

__all__ = ["build_sections", "lorenz", "survival_curves", "chi_square_tests", "SURVIVAL_MIN_AT_RISK"]

SURVIVAL_MIN_AT_RISK = 10
"""Survival curves and table cells stop where fewer tasks than this remain at risk."""

STATUSES = ("committed", "failed", "abandoned", "outage")
STATUS_WORDS = {"committed": "committed", "failed": "failed", "abandoned": "abandoned",
                "outage": "lost to a server outage"}
GROUPING_LABELS = {"device_type": "device type", "region": "region", "data_quartile": "data-size quartile"}


# ------------------------------------------------------------------------------ small helpers


def _f(value: Any) -> float:
    """A JSON/CSV number as float (None -> NaN)."""
    return float("nan") if value is None else float(value)


def _opt(value: float) -> float | None:
    return float(value) if math.isfinite(value) else None


def pct(value: Any) -> str:
    return format_value(value, "pct")


def seconds(value: Any) -> str:
    """A duration for reading: '95 s', '6 min', '12 h', '7 d'."""
    if value is None:
        return "n/a"
    v = float(value)
    if not math.isfinite(v):
        return "none"
    if v < 60 or (v < 600 and v % 60):
        return f"{v:.0f} s"
    if v < 7200:
        return f"{v / 60:.3g} min"
    if v < 172800:
        return f"{v / 3600:.3g} h"
    return f"{v / 86400:.3g} d"


def _hour_text(text: str) -> str:
    """'2026-03-02T05:00:00Z' -> '2026-03-02 05:00 UTC'."""
    return _instant(text).strftime("%Y-%m-%d %H:%M UTC")


def _instant(text: str) -> datetime:
    moment = datetime.fromisoformat(text.replace("Z", "+00:00"))
    return moment if moment.tzinfo else moment.replace(tzinfo=timezone.utc)


def _column(table: pd.DataFrame, key: str) -> np.ndarray:
    return table[key].to_numpy(dtype=float)


def _records(table: pd.DataFrame, columns: Sequence[Column]) -> list[list[Any]]:
    rows = []
    for record in table.to_dict("records"):
        row: list[Any] = []
        for c in columns:
            v = record[c.key]
            if c.kind == "text":
                row.append(str(v))
            elif c.kind == "int":
                row.append(None if pd.isna(v) else int(v))
            else:
                row.append(None if pd.isna(v) else float(v))
        rows.append(row)
    return rows


# ------------------------------------------------------------------------------ the run


def _run(r: RunFolder) -> Section:
    s, c = r.summary, r.config
    rounds, work, selection = c["rounds"], c["workload"], c["selection"]
    types, regions = r.type_names, r.region_names
    horizon_s = _f(c["horizon"]["duration"])
    upload = work.get("update_size")
    if upload is None:
        upload = _f(work["model_size"]) / _f(work.get("update_compression") or 1.0)
    accept = math.ceil(rounds["target_reports"] * rounds["over_selection"] - 1e-9)
    limit = work.get("execution_limit")
    limit_text = "none" if limit in (None, "Infinity", "inf") else seconds(limit)
    zones = c["fleet"].get("regions", {})
    disruptions = c.get("disruptions") or []
    rows: list[list[Any]] = [
        ["Scenario", s["scenario"]],
        ["Fleet file", (s.get("fleet_file") or "not recorded (the run came from the Python API)")
         + "; config.json beside this report holds the validated file"],
        ["Seed", str(s["seed"])],
        ["Configuration hash", f"{s['config_hash']} (SHA-256 of config.json as canonical JSON, first 16 hex digits)"],
        ["Horizon", f"{seconds(horizon_s)}" + ("" if seconds(horizon_s).endswith(" h") else
                                               f" ({s['simulated_hours']:g} h)") + f" from {s['horizon_start']}"],
        ["Devices", f"{int(s['devices']):,}"],
        [f"Device types ({len(types)})", ", ".join(types)],
        [f"Regions ({len(regions)})",
         ", ".join(f"{name} ({zones[name]['timezone']})" if name in zones else name for name in regions)],
        ["Selection policy", s["policy"] + (f" with {json.dumps(selection.get('params'), sort_keys=True)}"
                                            if selection.get("params") else "")],
        ["Reports a round needs",
         f"target {rounds['target_reports']}, at least {rounds.get('min_reports') or rounds['target_reports']}"],
        ["Over-selection", f"{rounds['over_selection']:g} (accepts up to {accept} devices per round)"],
        ["Selection timeout", seconds(rounds["selection_timeout"])],
        ["Report deadline", seconds(rounds["report_deadline"])],
        ["Aggregation time", seconds(rounds.get("aggregation_time"))],
        ["Rest after taking part", seconds(rounds.get("rest"))],
        ["Check-in interval", seconds(rounds["checkin_every"])],
        ["Workload", f"model {_f(work['model_size']) / 1e6:.3g} MB down, update {upload / 1e6:.3g} MB up, "
                     f"{work.get('epochs', 1)} epoch(s), needs {', '.join(work.get('requires') or []) or 'no signal'}, "
                     f"battery at least {_f(work.get('min_battery')):g}%, OS limit {limit_text}"],
        ["Disruptions", ", ".join(f"{d['kind']} at {seconds(d['start'])} for {seconds(d['duration'])}"
                                  for d in disruptions) or "none"],
    ]
    table = Table("run", "The run's settings (config.json, summary.json)",
                  [Column("setting", "Setting", "text"), Column("value", "Value", "text")], rows)
    answer = (
        f"{s['scenario']}: {int(s['devices']):,} devices ({len(types)} device types, {len(regions)} regions) "
        f"for {seconds(horizon_s)} from {s['horizon_start']}; seed {s['seed']}, configuration {s['config_hash']}, "
        f"policy {s['policy']}."
    )
    return Section("run", "What was run?", answer, tables=[table])


# ------------------------------------------------------------------------------ headline


def _headline(r: RunFolder) -> Section:
    s = r.summary
    ro, w, b = s["rounds"], s["waste"], s["bias"]
    attempted = int(ro["attempted"])

    def share(n: Any) -> float:
        return int(n) / attempted if attempted else float("nan")

    status_shares = {k: share(ro[k]) for k in STATUSES}
    fractions = {k: _f(w[f"{k}_fraction"]) for k in ("compute", "bytes", "energy")}
    coverage = _f(b["coverage"])
    rows = [
        ["Committed rounds per hour", Cell(_opt(_f(ro["committed_per_hour"])), "ratio")],
        *[[f"Rounds {STATUS_WORDS[k]}", Cell(int(ro[k]), "int")] for k in STATUSES],
        *[[f"Share of rounds {STATUS_WORDS[k]}", Cell(_opt(v), "pct")] for k, v in status_shares.items()],
        *[[f"Straggler waste: share of {'data (bytes)' if k == 'bytes' else k}", Cell(_opt(v), "pct")]
          for k, v in fractions.items()],
        ["Coverage: devices with at least one committed report", Cell(_opt(coverage), "pct")],
    ]
    table = Table("headline", "Headline figures (summary.json)",
                  [Column("figure", "Figure", "text"), Column("value", "Value", "num")], rows)
    chart_rows: list[tuple[str, list[tuple[str, float]]]] = [
        ("Rounds", [(k, status_shares[k]) for k in STATUSES]),
    ]
    for key, label in (("compute", "Compute"), ("bytes", "Data"), ("energy", "Energy")):
        chart_rows.append((label, [("committed", 1 - fractions[key]), ("wasted", fractions[key])]))
    chart_rows.append(("Devices", [("committed", coverage), ("fleet", 1 - coverage)]))
    legend = {"committed": "committed rounds; work they used; devices that reported", "failed": "failed rounds",
              "abandoned": "abandoned rounds", "outage": "rounds lost to an outage", "wasted": "wasted work",
              "fleet": "devices that never reported"}
    chart = Chart(figures.share_rows(chart_rows, legend, "f-headline"),
                  "Bars of round outcomes, used and wasted compute, data and energy, and coverage.",
                  "Each bar is 100%: round outcomes; device work used or wasted; devices that reported or not.")
    tiles = [
        Tile("committed rounds per hour", format_value(ro["committed_per_hour"], "ratio")),
        Tile(f"rounds committed ({int(ro['committed']):,} of {attempted:,})", pct(status_shares["committed"])),
        Tile("device compute wasted", pct(fractions["compute"])),
        Tile("devices that ever reported", pct(coverage)),
    ]
    answer = (
        f"{int(ro['committed']):,} of {attempted:,} rounds committed ({pct(status_shares['committed'])}, "
        f"{format_value(ro['committed_per_hour'], 'ratio')} per hour); {pct(status_shares['failed'])} failed and "
        f"{pct(status_shares['abandoned'])} were abandoned; {pct(fractions['compute'])} of device compute was "
        f"wasted; {pct(coverage)} of devices reported at least once."
    )
    return Section("headline", "Do the round settings deliver?", answer, charts=[chart], tables=[table], tiles=tiles)


# ------------------------------------------------------------------------------ rounds over time


def _warm_hours(r: RunFolder) -> int:
    """Whole hours of the first rest period: until it has passed, no device is resting yet."""
    rest = _f(r.config["rounds"].get("rest") or 0.0)
    return int(math.ceil(rest / 3600.0)) if rest > 0 else 0


def _warm_note(r: RunFolder, warm: int) -> str:
    if not 0 < warm < len(r.tables["hourly"]):
        return ""
    return (f" Until the first rest period ({seconds(r.config['rounds']['rest'])}) has passed no device is resting, "
            "so more devices are eligible than later; the hours after it set the scale and higher values are "
            "marked off scale.")


def _over_time(r: RunFolder) -> Section:
    hourly = r.tables["hourly"]
    n_hours = len(hourly)
    start = _instant(r.summary["horizon_start"])
    present = [k for k in STATUSES if k in hourly.columns and (k != "outage" or hourly[k].sum() > 0)]
    statuses = {k: _column(hourly, k) for k in present}
    eligible = {name: _column(hourly, f"eligible:{name}") for name in r.region_names}
    total = _column(hourly, "eligible")
    committed = statuses["committed"]
    columns = [Column("hour_utc", "Hour (UTC)", "text")] + [Column(k, k, "int") for k in present]
    columns += [Column(f"eligible:{name}", f"eligible: {name}", "num") for name in r.region_names]
    columns.append(Column("eligible", "eligible: all", "num"))
    rows = [[hourly["hour_utc"].iloc[i], *[int(statuses[k][i]) for k in present],
             *[float(eligible[n][i]) for n in r.region_names], float(total[i])] for i in range(n_hours)]
    hourly_table = Table("over-time", "Rounds closed and mean eligible devices, per hour", columns, rows,
                         detail=True, source="tables/hourly.csv")
    day = (np.arange(n_hours) // 24) if n_hours else np.zeros(0, dtype=int)
    day_rows = []
    for d in np.unique(day):
        mask = day == d
        day_rows.append([hourly["hour_utc"].iloc[int(np.flatnonzero(mask)[0])][:10],
                         *[int(statuses[k][mask].sum()) for k in present],
                         float(total[mask].min()), float(total[mask].mean()), float(total[mask].max())])
    day_table = Table("over-time-days", "Per day (24 hours from the horizon start): rounds closed and eligible devices",
                      [Column("day", "Day from", "text"), *[Column(k, k, "int") for k in present],
                       Column("eligible_min", "eligible: lowest hour", "num"),
                       Column("eligible_mean", "eligible: mean", "num"),
                       Column("eligible_max", "eligible: highest hour", "num")], day_rows)
    warm = _warm_hours(r)
    chart = Chart(figures.rounds_over_time(n_hours, start, statuses, eligible, warm, "f-time"),
                  "Stacked bars of rounds closed per hour by outcome, above one panel of eligible devices per region.",
                  "Top: rounds by the hour they closed. Below: eligible devices (mean of the 15-minute counts in "
                  "each hour), one panel per region on a shared scale." + _warm_note(r, warm))
    if n_hours and np.std(committed) > 0 and np.std(total) > 0:
        corr = float(np.corrcoef(committed, total)[0, 1])
        link = f"and move with eligible devices (hourly correlation {corr:.2f})"
    else:
        link = "and do not vary from hour to hour"
    steady = slice(warm if warm < n_hours else 0, None)
    lo_e, hi_e = (float(total[steady].min()), float(total[steady].max())) if n_hours else (0.0, 0.0)
    peaks = [float(v[steady].max()) if v[steady].size else 0.0 for v in eligible.values()]
    busiest = r.region_names[int(np.argmax(peaks))] if r.region_names else "no region"
    after = f"after the first {warm} h, " if 0 < warm < n_hours else ""
    eligible_words = (f"{after}eligible devices swung between {lo_e:,.0f} and {hi_e:,.0f} an hour, with the "
                      f"highest peak in {busiest}.")
    if n_hours and committed.max() > 0:
        answer = (f"Committed rounds per hour ranged from {int(committed.min())} to {int(committed.max())} {link}; "
                  + eligible_words)
    else:
        answer = "No round committed in any hour; " + eligible_words
    return Section("over-time", "When do rounds commit, and who is eligible then?", answer, charts=[chart],
                   tables=[day_table, hourly_table])


# ------------------------------------------------------------------------------ round duration


def _durations(r: RunFolder) -> Section:
    rounds = r.tables["rounds"]
    settings = r.config["rounds"]
    s = r.summary["rounds"]
    status = rounds["status"]
    selection = rounds.loc[status != "abandoned", "selection_s"].to_numpy(dtype=float)
    report = rounds.loc[status == "committed", "report_s"].to_numpy(dtype=float)
    timeout, deadline = _f(settings["selection_timeout"]), _f(settings["report_deadline"])
    at_timeout = float(np.mean(selection >= timeout - 1e-6)) if selection.size else float("nan")
    rows = []
    for label, values, pcts in (("Selection time (rounds not abandoned)", selection, s["selection_s"]),
                                ("Report time (committed rounds)", report, s["report_s"])):
        rows.append([label, int(values.size), pcts["p50"], pcts["p90"], pcts["p99"]])
    table = Table("durations", "Round duration percentiles, seconds (summary.json; distributions: tables/rounds.csv)",
                  [Column("measure", "Measure", "text"), Column("rounds", "Rounds", "int"),
                   Column("p50", "p50 (s)"), Column("p90", "p90 (s)"), Column("p99", "p99 (s)")], rows)
    chart = Chart(
        figures.durations([
            ("Selection time: open to selection closed", "accepted", selection, s["selection_s"], timeout, "timeout"),
            ("Report time: selection closed to round closed", "committed", report, s["report_s"], deadline,
             "deadline"),
        ], "f-durations"),
        "Histograms of selection time and report time with p50, p90 and p99 marked.",
        "Thick grey line: the setting that caps the time. Abandoned rounds are left out of selection time (they all "
        "end at the timeout); report time counts committed rounds.",
    )
    sel, rep = s["selection_s"], s["report_s"]
    if not selection.size:
        answer = (f"Every round was abandoned at the selection timeout ({seconds(timeout)}) before enough devices "
                  "were accepted, so no round reached its report phase.")
    else:
        abandoned = int(s["abandoned"])
        answer = (
            f"Selection takes {seconds(sel['p50'])} at the median and {seconds(sel['p90'])} at p90 "
            f"(timeout {seconds(timeout)}, reached by {pct(at_timeout)} of rounds that went ahead"
            + (f", and by every one of the {abandoned:,} abandoned rounds); " if abandoned else "); ")
        )
        if report.size:
            answer += (f"committed rounds gather their reports in {seconds(rep['p50'])} at the median, "
                       f"{seconds(rep['p90'])} at p90 (deadline {seconds(deadline)}).")
        else:
            answer += f"no round committed, so none has a report time (deadline {seconds(deadline)})."
    return Section("durations", "How long does a round take?", answer, charts=[chart], tables=[table])


# ------------------------------------------------------------------------------ waste


def _waste(r: RunFolder) -> Section:
    by_cause = r.tables["waste_by_cause"]
    by_type = r.tables["waste_by_device_type"]
    w = r.summary["waste"]
    causes = list(by_cause["cause"])
    hours = _column(by_cause, "compute_s") / 3600.0
    gigabytes = _column(by_cause, "bytes") / 1e9
    energy = _column(by_cause, "energy_wh")
    cause_chart = Chart(
        figures.waste_by_cause(causes, [("Compute (device hours)", hours), ("Data (GB)", gigabytes),
                                        ("Energy (Wh)", energy)], "f-waste-cause"),
        "Bars of wasted compute, data and energy for each waste cause.",
        "Labels: the cause's share of all wasted compute, data or energy.")
    cause_table = Table(
        "waste-cause", "Wasted work by cause (tables/waste_by_cause.csv)",
        [Column("cause", "Cause", "text"), Column("participations", "Participations", "int"),
         Column("compute_h", "Compute (h)"), Column("data_gb", "Data (GB)"), Column("energy_wh", "Energy (Wh)"),
         Column("compute_share", "Share of wasted compute", "pct")],
        [[c, int(p), float(h), float(g), float(e), float(sh)] for c, p, h, g, e, sh in
         zip(causes, by_cause["participations"], hours, gigabytes, energy, by_cause["compute_share"], strict=True)])
    types = list(by_type["device_type"])
    panels = []
    for title, total_column, wasted_column, scale in (
            ("Compute (device hours)", "compute_s", "wasted_compute_s", 3600.0),
            ("Data (GB)", "bytes", "wasted_bytes", 1e9),
            ("Energy (Wh)", "energy_wh", "wasted_energy_wh", 1.0)):
        t, wa = _column(by_type, total_column) / scale, _column(by_type, wasted_column) / scale
        panels.append((title, t - wa, wa))
    type_chart = Chart(figures.waste_by_type(types, panels, "f-waste-type"),
                       "Bars of used and wasted compute, data and energy for each device type.",
                       "Labels: the wasted share of the device type's own compute, data or energy.")
    type_columns = [Column("device_type", "Device type", "text"),
                    Column("compute_h", "Compute (h)"), Column("wasted_compute_h", "Wasted compute (h)"),
                    Column("compute_fraction", "Compute wasted", "pct"),
                    Column("data_gb", "Data (GB)"), Column("wasted_data_gb", "Wasted data (GB)"),
                    Column("bytes_fraction", "Data wasted", "pct"),
                    Column("energy_wh", "Energy (Wh)"), Column("wasted_energy_wh", "Wasted energy (Wh)"),
                    Column("energy_fraction", "Energy wasted", "pct")]
    type_rows = []
    for i, name in enumerate(types):
        row: list[Any] = [name]
        fractions_of_type = ("compute_fraction", "bytes_fraction", "energy_fraction")
        for (_, used, wasted), frac in zip(panels, fractions_of_type, strict=True):
            row += [float(used[i] + wasted[i]), float(wasted[i]), _opt(float(by_type[frac].iloc[i]))]
        type_rows.append(row)
    type_table = Table("waste-type", "Work used and wasted by device type (tables/waste_by_device_type.csv)",
                       type_columns, type_rows)
    order = np.argsort(-np.nan_to_num(hours), kind="stable")
    total_h = float(np.nansum(hours))
    leaders = [f"{causes[i]} ({pct(hours[i] / total_h)})" for i in order[:2] if total_h > 0 and hours[i] > 0]
    fractions = _column(by_type, "compute_fraction")
    worst = types[int(np.nanargmax(fractions))] if np.isfinite(fractions).any() else None
    answer = (
        f"{pct(w['compute_fraction'])} of device compute, {pct(w['bytes_fraction'])} of data and "
        f"{pct(w['energy_fraction'])} of energy went into no committed round"
        + (f"; the largest causes of wasted compute are {' and '.join(leaders)}" if leaders else "")
        + (f"; {worst} wastes the largest share of its own compute ({pct(np.nanmax(fractions))})." if worst else ".")
    )
    return Section("waste", "Where is device work wasted?", answer, charts=[cause_chart, type_chart],
                   tables=[cause_table, type_table])


# ------------------------------------------------------------------------------ bias

SHARE_COLUMNS = ("fleet_share", "eligible_share", "accepted_share", "report_share", "weight_share")


def chi_square_tests(r: RunFolder) -> list[dict[str, Any]]:
    """Chi-square goodness of fit of report counts against fleet shares, per grouping.

    The device-type test is the one in summary.json; region and data-size quartile use the
    same method (scipy.stats.chisquare on the bias tables' report counts and fleet shares).
    """
    out = []
    for key, name in BIAS_GROUPINGS.items():
        table = r.tables[name]
        reports = _column(table, "reports")
        expected = _column(table, "fleet_share") * reports.sum()
        if key == "device_type":
            stat, p = _f(r.summary["bias"]["chi_square"]), _f(r.summary["bias"]["chi_square_p"])
        elif reports.sum() > 0 and (expected > 0).all() and len(reports) > 1:
            test = stats.chisquare(reports, expected)
            stat, p = float(test.statistic), float(test.pvalue)
        else:
            stat = p = float("nan")
        out.append({"grouping": key, "groups": len(reports), "reports": int(reports.sum()),
                    "chi_square": _opt(stat), "dof": len(reports) - 1, "p": _opt(p)})
    return out


def _p_text(p: float | None) -> str:
    if p is None:
        return "p n/a"
    return "p < 1e-300" if p < 1e-300 else f"p = {p:.2g}"


def _bias(r: RunFolder) -> Section:
    charts, tables = [], []
    extremes: list[tuple[float, str, str, float, float]] = []
    for key, name in BIAS_GROUPINGS.items():
        table = r.tables[name]
        names = list(table[key])
        shares = {c: _column(table, c) for c in SHARE_COLUMNS}
        ratio, low, high = (_column(table, c) for c in ("representation_ratio", "ratio_low", "ratio_high"))
        label = GROUPING_LABELS[key]
        charts.append(Chart(figures.bias(label, names, shares, ratio, low, high, f"f-bias-{key}"),
                            f"Grouped bars of fleet, eligible, accepted, report and weight shares by {label}, "
                            "and each group's representation ratio with its 95% interval.",
                            f"By {label}. Right: report share over fleet share; 1 means represented as in the fleet; "
                            "bars: 95% Wilson interval of the report share (Wilson 1927), divided by the fleet share; "
                            "it treats reports as independent, so repeat participation makes it somewhat narrow."))
        columns = [Column(key, label.capitalize(), "text"), Column("devices", "Devices", "int"),
                   *[Column(c, c.replace("_", " "), "pct") for c in SHARE_COLUMNS],
                   Column("representation_ratio", "Ratio", "ratio"), Column("ratio_low", "95% low", "ratio"),
                   Column("ratio_high", "95% high", "ratio"), Column("reports", "Reports", "int")]
        tables.append(Table(f"bias-{key}", f"Participation by {label} (tables/{name}.csv)", columns,
                            _records(table, columns)))
        for n, q, lo, hi in zip(names, ratio, low, high, strict=True):
            if math.isfinite(q):
                extremes.append((float(q), n, label, float(lo), float(hi)))
    tests = chi_square_tests(r)
    tables.append(Table(
        "chi-square", "Chi-square test of report counts against fleet shares",
        [Column("grouping", "Grouping", "text"), Column("groups", "Groups", "int"), Column("reports", "Reports", "int"),
         Column("chi_square", "Chi-square"), Column("dof", "Degrees of freedom", "int"), Column("p", "p-value", "p")],
        [[GROUPING_LABELS[t["grouping"]], t["groups"], t["reports"], t["chi_square"], t["dof"], t["p"]]
         for t in tests]))
    device_test = tests[0]
    if extremes:
        low_q = min(extremes)
        high_q = max(extremes)
        verdict = ("differ from fleet shares" if device_test["p"] is not None and device_test["p"] < 0.05
                   else "are consistent with fleet shares")
        answer = (
            f"The {low_q[2]} {low_q[1]} is the most under-represented, at {low_q[0]:.2f} times its fleet share "
            f"(95% interval {low_q[3]:.2f} to {low_q[4]:.2f}), and the {high_q[2]} {high_q[1]} the most "
            f"over-represented at {high_q[0]:.2f}; report counts by device type {verdict} (chi-square "
            f"{format_value(device_test['chi_square'], 'num')}, {_p_text(device_test['p'])})."
        )
    else:
        answer = "No committed reports, so no group is represented in the model."
    return Section("bias", "Who is represented in the model?", answer, charts=charts, tables=tables,
                   notes=["Shares: of fleet devices, of eligible device-time (15-minute counts), of accepted devices, "
                          "of committed reports, and of aggregation weight (sample counts of committed reports)."])


# ------------------------------------------------------------------------------ participation


def lorenz(reports: np.ndarray, devices: np.ndarray) -> tuple[np.ndarray, np.ndarray, float]:
    """Lorenz curve of reports over devices from (reports per device, number of devices) pairs.

    Returns cumulative device shares and report shares (from (0, 0), fewest reports first)
    and the Gini coefficient 1 - 2 * area under the curve (trapezoids; exact here because
    the curve is straight within a group of devices with equal counts). NaN Gini when no
    device reported.
    """
    order = np.argsort(reports, kind="stable")
    c, m = np.asarray(reports, float)[order], np.asarray(devices, float)[order]
    total_devices, total_reports = m.sum(), (c * m).sum()
    if total_devices <= 0 or total_reports <= 0:
        return np.array([0.0, 1.0]), np.array([0.0, 1.0]), float("nan")
    x = np.concatenate([[0.0], np.cumsum(m) / total_devices])
    y = np.concatenate([[0.0], np.cumsum(c * m) / total_reports])
    area = float(np.sum(np.diff(x) * (y[1:] + y[:-1]) / 2))
    return x, y, 1.0 - 2.0 * area


def _participation(r: RunFolder) -> Section:
    counts_table = r.tables["participation_counts"]
    counts = _column(counts_table, "reports").astype(int)
    devices = _column(counts_table, "devices").astype(int)
    x, y, gini = lorenz(counts, devices)
    top10 = 1.0 - float(np.interp(0.9, x, y)) if math.isfinite(gini) else float("nan")
    summary_gini = r.summary["bias"]["gini"]
    chart = Chart(figures.participation(counts, devices, x, y, summary_gini, "f-participation"),
                  "Histogram of devices by committed reports, and the Lorenz curve of reports over devices.",
                  "Lorenz curve: the share of all committed reports given by the devices with the fewest reports; "
                  "the diagonal is every device reporting equally often. Gini = 1 - 2 x the area under the curve.")
    total = devices.sum()
    count_table = Table("participation-counts", "Devices by number of committed reports "
                        "(tables/participation_counts.csv)",
                        [Column("reports", "Reports", "int"), Column("devices", "Devices", "int"),
                         Column("device_share", "Share of devices", "pct")],
                        [[int(c), int(d), d / total if total else None] for c, d in zip(counts, devices, strict=True)])
    lorenz_table = Table("lorenz", "Lorenz curve points",
                         [Column("device_share", "Cumulative share of devices", "pct"),
                          Column("report_share", "Cumulative share of reports", "pct")],
                         [[float(a), float(b)] for a, b in zip(x, y, strict=True)], detail=True, source="")
    gini_table = Table("gini", "Concentration of reports",
                       [Column("figure", "Figure", "text"), Column("value", "Value", "num")],
                       [["Gini coefficient (summary.json)", _opt(_f(summary_gini))],
                        ["Gini from the Lorenz curve above", _opt(gini)],
                        ["Share of reports from the busiest 10% of devices", _opt(top10)],
                        ["Coverage (devices with at least one report)", _opt(_f(r.summary["bias"]["coverage"]))]])
    groupings, never_rows, never_all = [], [], []
    for key, name in BIAS_GROUPINGS.items():
        table = r.tables[name]
        names = list(table[key])
        never = _column(table, "never_share")
        groupings.append((GROUPING_LABELS[key].capitalize(), names, never))
        for n, d, v in zip(names, table["devices"], never, strict=True):
            never_rows.append([GROUPING_LABELS[key], n, int(d), _opt(float(v))])
            if math.isfinite(v):
                never_all.append((float(v), n, GROUPING_LABELS[key]))
    never_chart = Chart(figures.never_reported(groupings, "f-never"),
                        "Bars of each group's devices that reported at least once and that never reported.",
                        "Labels: the share of the group's devices that never had a report in a committed round.")
    never_table = Table("never", "Devices that never reported, by group (never_share in tables/bias_by_*.csv)",
                        [Column("grouping", "Grouping", "text"), Column("group", "Group", "text"),
                         Column("devices", "Devices", "int"), Column("never_share", "Never reported", "pct")],
                        never_rows)
    worst = max(never_all) if never_all else None
    answer = (
        f"{pct(r.summary['bias']['coverage'])} of devices reported at least once; the busiest 10% of devices gave "
        f"{pct(top10)} of the reports (Gini {format_value(summary_gini, 'ratio')})"
        + (f"; never reporting is most common in the {worst[2]} {worst[1]} ({pct(worst[0])})." if worst else ".")
    )
    return Section("participation", "Who takes part, and how often?", answer, charts=[chart, never_chart],
                   tables=[count_table, gini_table, never_table, lorenz_table])


# ------------------------------------------------------------------------------ survival


def task_durations(r: RunFolder) -> tuple[np.ndarray, np.ndarray, np.ndarray, int]:
    """(duration s, dropped out, device type, rows left out) of the event log's participations.

    A row whose end precedes its acceptance (or is not a number) has no duration to analyse;
    it is left out and counted, and the report says so.
    """
    events = r.events
    duration = (events["ended_s"] - events["accepted_s"]).to_numpy(dtype=float)
    ok = np.isfinite(duration) & (duration >= 0)
    dropped = (events["outcome"] == "dropout").to_numpy()
    kind = events["device_type"].to_numpy()
    return duration[ok], dropped[ok], kind[ok], int((~ok).sum())


def survival_curves(r: RunFolder) -> dict[str, Survival]:
    """Kaplan-Meier curve of time to dropout per device type, from the event log."""
    duration, dropped, kind, _ = task_durations(r)
    return {name: kaplan_meier(duration[kind == name], dropped[kind == name]) for name in r.type_names
            if (kind == name).any()}


def _last_time(s: Survival) -> float:
    """The last time with at least SURVIVAL_MIN_AT_RISK tasks at risk (the curve is drawn to here)."""
    ok = np.flatnonzero(s.at_risk >= SURVIVAL_MIN_AT_RISK)
    return float(s.time[ok[-1]]) if ok.size else 0.0


def survival_grid(curves: dict[str, Survival]) -> np.ndarray:
    """Whole minutes (s) from 1 to the last time any curve still has enough tasks at risk."""
    end = max((_last_time(s) for s in curves.values()), default=0.0)
    return np.arange(1, int(end // 60) + 1) * 60.0


def _survival(r: RunFolder) -> Section:
    curves = survival_curves(r)
    duration, _, _, left_out = task_durations(r)
    notes = [f"{left_out:,} participations in the event log end before they were accepted (ended_s < accepted_s) "
             "and are left out of the survival curves."] if left_out else []
    grid = survival_grid(curves)
    minutes = [int(t // 60) for t in grid]
    compact_rows, long_rows = [], []
    for name, s in curves.items():
        row: list[Any] = [name]
        for t in grid:
            i = int(np.searchsorted(s.time, t, side="left"))
            at_risk = int(s.at_risk[i]) if i < s.time.size else 0
            if t <= _last_time(s):
                low, high = s.band_at(t)
                value = float(s.at(t))
                long_rows.append([name, int(t // 60), value, float(low), float(high), at_risk])
            else:
                value = None
                long_rows.append([name, int(t // 60), None, None, None, at_risk])
            row.append(value)
        compact_rows.append(row)
    compact = Table("survival", "Share of tasks not dropped out after each minute of work (Kaplan-Meier)",
                    [Column("device_type", "Device type", "text"),
                     *[Column(f"min{m}", f"{m} min", "pct") for m in minutes]], compact_rows)
    bands = Table("survival-bands", "Kaplan-Meier estimate with its 95% band and the tasks still at risk",
                  [Column("device_type", "Device type", "text"), Column("minutes", "Minutes", "int"),
                   Column("survival", "Not dropped out", "pct"), Column("low", "95% low", "pct"),
                   Column("high", "95% high", "pct"), Column("at_risk", "At risk", "int")], long_rows, detail=True)
    drops = r.tables["dropouts"]
    drop_columns = [Column("cause", "Cause", "text"), Column("phase", "Phase", "text"),
                    Column("dropouts", "Dropouts", "int")]
    drop_table = Table("dropouts", "Dropouts by cause and phase (tables/dropouts.csv)", drop_columns,
                       _records(drops, drop_columns))
    charts = []
    if curves:
        charts.append(Chart(
            figures.survival([(n, s, _last_time(s)) for n, s in curves.items()], "f-survival"),
            "Kaplan-Meier curves of the share of tasks not yet dropped out, one panel per device type.",
            "Time runs from acceptance; a task that reported, was late or was stopped at close counts as censored. "
            f"Curves end where fewer than {SURVIVAL_MIN_AT_RISK} tasks remain at risk. Band: pointwise 95% interval "
            "(Greenwood variance on the log(-log) scale).",
        ))
    dropped = int(r.summary["participations"].get("by_outcome", {}).get("dropout", int(drops["dropouts"].sum())))
    total = int(r.summary["participations"]["accepted"])
    answer = "No device was accepted, so no task survival can be shown."
    if duration.size and curves:
        ref = max(60.0, round(float(np.quantile(duration, 0.9)) / 60.0) * 60.0)
        at_ref = {n: float(s.at(ref)) for n, s in curves.items() if ref <= _last_time(s)}
        answer = (f"Too few tasks ran {seconds(ref)} to compare device types; "
                  f"{dropped:,} of {total:,} tasks dropped out.")
        if at_ref:
            lo_name = min(at_ref, key=lambda n: at_ref[n])
            hi_name = max(at_ref, key=lambda n: at_ref[n])
            answer = (
                f"{pct(at_ref[lo_name])} of {lo_name} tasks would get through {seconds(ref)} of work without "
                f"dropping out, against {pct(at_ref[hi_name])} of {hi_name} tasks (90% of all tasks end within "
                f"{seconds(ref)}); {dropped:,} of {total:,} tasks dropped out in all."
            )
    return Section("survival", "How long do tasks run before devices drop out?", answer, charts=charts,
                   tables=[compact, bands, drop_table], notes=notes)


# ------------------------------------------------------------------------------ cost


def _cost(r: RunFolder) -> Section:
    cost = r.tables["device_cost"]
    types = list(cost["device_type"])
    battery50, battery90 = _column(cost, "battery_pct_p50"), _column(cost, "battery_pct_p90")
    mb50, mb90 = _column(cost, "megabytes_p50"), _column(cost, "megabytes_p90")
    chart = Chart(figures.cost(types, [("Battery per participation (% of capacity)", battery50, battery90),
                                       ("Data per participation (MB)", mb50, mb90)], "f-cost"),
                  "Bars of median battery and data per participation by device type, with p90 ticks.",
                  "Bar: median; line to tick: p90. Labels: median / p90. Every accepted participation counts, "
                  "including those whose work was wasted.")
    columns = [Column("device_type", "Device type", "text"), Column("participations", "Participations", "int"),
               Column("battery_pct_p50", "Battery % p50"), Column("battery_pct_p90", "Battery % p90"),
               Column("megabytes_p50", "MB p50"), Column("megabytes_p90", "MB p90"),
               Column("energy_wh_mean", "Energy Wh mean")]
    table = Table("cost", "Cost per participation by device type (tables/device_cost.csv)", columns,
                  _records(cost, columns))
    if np.isfinite(battery90).any():
        heavy = types[int(np.nanargmax(battery90))]

        def span(values: np.ndarray, digits: int, unit: str) -> str:
            lo, hi = f"{np.nanmin(values):.{digits}g}", f"{np.nanmax(values):.{digits}g}"
            return f"{lo}{unit}" if lo == hi else f"{lo}{unit} to {hi}{unit}"

        answer = (
            f"A participation costs a median {span(battery50, 2, '%')} of battery and {span(mb50, 3, ' MB')} of data, "
            f"depending on device type; {heavy} spends the most battery (p90 {np.nanmax(battery90):.2g}%)."
        )
    else:
        answer = "No participation, so no cost on devices."
    return Section("cost", "What does taking part cost a device?", answer, charts=[chart], tables=[table])


# ------------------------------------------------------------------------------ load


def _load(r: RunFolder) -> Section:
    hourly = r.tables["hourly"]
    load = r.summary["load"]
    n_hours = len(hourly)
    start = _instant(r.summary["horizon_start"])
    checkins = _column(hourly, "checkins_per_s")
    peak = _column(hourly, "peak_working")
    mean_working = load["mean_working"]
    warm = _warm_hours(r)
    chart = Chart(figures.load(n_hours, start, checkins, peak, mean_working, warm, "f-load"),
                  "Check-ins per second by hour above the peak number of devices working in each hour.",
                  "Check-ins per second: mean eligible devices in the hour / check-in interval. Working: devices "
                  "between acceptance and the end of their task." + _warm_note(r, warm))
    table = Table("load", "Server load (summary.json)", [Column("figure", "Figure", "text"),
                                                         Column("value", "Value", "num")],
                  [["Peak check-ins per second (hourly mean)", load["checkins_per_s_peak_hour"]],
                   ["Peak devices working at once", load["peak_working"]],
                   ["Mean devices working (task time / horizon)", mean_working]])
    hourly_table = Table("load-hourly", "Server load per hour",
                         [Column("hour_utc", "Hour (UTC)", "text"), Column("checkins_per_s", "Check-ins per second"),
                          Column("accepted", "Devices accepted", "int"), Column("peak_working", "Peak working", "int")],
                         _records(hourly, [Column("hour_utc", "", "text"), Column("checkins_per_s", ""),
                                           Column("accepted", "", "int"), Column("peak_working", "", "int")]),
                         detail=True, source="tables/hourly.csv")
    if n_hours:
        at = int(np.argmax(checkins))
        answer = (
            f"Check-ins peak at {format_value(load['checkins_per_s_peak_hour'], 'num')} per second in the hour from "
            f"{_hour_text(hourly['hour_utc'].iloc[at])}"
        )
        if 0 < warm < n_hours and at < warm:
            later = warm + int(np.argmax(checkins[warm:]))
            answer += (f", while no device was resting yet; after the first {warm} h they peak at "
                       f"{format_value(checkins[later], 'num')} per second "
                       f"({_hour_text(hourly['hour_utc'].iloc[later])})")
        answer += (f"; at most {int(load['peak_working']):,} devices work at once, "
                   f"{format_value(mean_working, 'num')} on average.")
    else:
        answer = "The horizon holds no whole hour."
    return Section("load", "Can the server take the load?", answer, charts=[chart], tables=[table, hourly_table])


# ------------------------------------------------------------------------------ caution


def _caution(r: RunFolder) -> Section:
    s = r.summary
    return Section("caution", "How far can these figures be trusted?", s["caution"],
                   notes=[f"Seed {s['seed']}, configuration {s['config_hash']}, scenario {s['scenario']}. Rerun with "
                          "other seeds to see how much the figures move by chance alone; the 95% intervals above "
                          "cover sampling within this one run, not the model's assumptions."])


def build_sections(r: RunFolder) -> list[Section]:
    """Every section of the report, in reading order."""
    return [_run(r), _headline(r), _over_time(r), _durations(r), _waste(r), _bias(r), _participation(r),
            _survival(r), _cost(r), _load(r), _caution(r)]
