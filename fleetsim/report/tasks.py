"""Sections 8, 9 and 10: how long tasks run before devices drop out, what taking part costs a
device, and whether the server can take the load.

Task survival comes from tables/task_survival.csv (the curves as drawn) and
tables/task_survival_by_minute.csv (the minute-by-minute values); cost from
tables/device_cost.csv; load from tables/hourly.csv and summary.json.
"""

from __future__ import annotations

from typing import Any

import numpy as np
import pandas as pd

from ..survival import MIN_AT_RISK
from . import figures
from .model import Cell, Chart, Column, Section, Table, format_value
from .rounds import warm_hours, warm_note
from .rundir import RunFolder
from .text import BASIS_WORDS, column, hour_text, instant, pct, records, seconds

__all__ = ["survival_section", "cost_section", "load_section"]


def _by_type(table: pd.DataFrame) -> dict[str, pd.DataFrame]:
    """Rows of each device type's curve (the fleet-wide rows left out), in table order."""
    rows = table[table["scope"] == "device_type"]
    return {str(name): part for name, part in rows.groupby("device_type", sort=False)}


def _survival_tables(minutes: dict[str, pd.DataFrame]) -> tuple[Table, Table]:
    grid = [int(t // 60) for t in next(iter(minutes.values()))["time_s"]] if minutes else []
    compact_rows, long_rows = [], []
    for name, part in minutes.items():
        row: list[Any] = [name]
        for record in part.to_dict("records"):
            value = None if pd.isna(record["survival"]) else float(record["survival"])
            low, high = (None, None) if value is None else (float(record["low"]), float(record["high"]))
            long_rows.append([name, int(record["time_s"] // 60), value, low, high, int(record["at_risk"])])
            row.append(value)
        compact_rows.append(row)
    compact = Table("survival", "Share of tasks not dropped out after each minute of work (Kaplan-Meier)",
                    [Column("device_type", "Device type", "text"),
                     *[Column(f"min{m}", f"{m} min", "pct") for m in grid]], compact_rows)
    bands = Table("survival-bands", "Kaplan-Meier estimate with its 95% band and the tasks still at risk",
                  [Column("device_type", "Device type", "text"), Column("minutes", "Minutes", "int"),
                   Column("survival", "Not dropped out", "pct"), Column("low", "95% low", "pct"),
                   Column("high", "95% high", "pct"), Column("at_risk", "At risk", "int")], long_rows, detail=True,
                  source="tables/task_survival_by_minute.csv")
    return compact, bands


def _survival_answer(r: RunFolder, minutes: dict[str, pd.DataFrame]) -> str:
    p = r.summary["participations"]
    dropped = int(p["by_outcome"].get("dropout", int(r.tables["dropouts"]["dropouts"].sum())))
    total = int(p["accepted"])
    p90 = p["task_s"]["p90"]
    if p90 is None or not minutes:
        return "No device was accepted, so no task survival can be shown."
    # A whole minute near the time by which 90% of tasks end: a duration readers can picture.
    ref = max(60.0, round(float(p90) / 60.0) * 60.0)
    at_ref = {}
    for name, part in minutes.items():
        hit = part[np.isclose(part["time_s"].to_numpy(dtype=float), ref) & part["survival"].notna()]
        if len(hit):
            at_ref[name] = float(hit["survival"].iloc[0])
    if not at_ref:
        return f"Too few tasks ran {seconds(ref)} to compare device types; {dropped:,} of {total:,} tasks dropped out."
    lo_name = min(at_ref, key=lambda n: at_ref[n])
    hi_name = max(at_ref, key=lambda n: at_ref[n])
    return (
        f"{pct(at_ref[lo_name])} of {lo_name} tasks would get through {seconds(ref)} of work without "
        f"dropping out, against {pct(at_ref[hi_name])} of {hi_name} tasks (90% of all tasks end within "
        f"{seconds(ref)}); {dropped:,} of {total:,} tasks dropped out in all."
    )


def survival_section(r: RunFolder) -> Section:
    """How long do tasks run before devices drop out? Kaplan-Meier curves per device type."""
    curves = _by_type(r.tables["task_survival"])
    minutes = _by_type(r.tables["task_survival_by_minute"])
    compact, bands = _survival_tables(minutes)
    drops = r.tables["dropouts"]
    drop_columns = [Column("dropout_cause", "Cause", "text"), Column("dropout_phase", "Phase", "text"),
                    Column("dropouts", "Dropouts", "int")]
    drop_table = Table("dropouts", "Dropouts by cause and phase (tables/dropouts.csv)", drop_columns,
                       records(drops, drop_columns))
    charts = []
    if curves:
        drawn = [(name, column(part, "time_s"), column(part, "survival"), column(part, "low"), column(part, "high"))
                 for name, part in curves.items()]
        charts.append(Chart(
            figures.survival(drawn, "f-survival"),
            "Kaplan-Meier curves of the share of tasks not yet dropped out, one panel per device type.",
            "Time runs from the task's start (its acceptance, or the selection's end when tasks are configured "
            "after the selection); a task that reported (on time or late) or was stopped at close counts as "
            "censored. "
            f"Curves end where fewer than {MIN_AT_RISK} tasks remain at risk. Band: pointwise 95% interval "
            "(Greenwood variance on the log(-log) scale).",
        ))
    return Section("survival", "How long do tasks run before devices drop out?", _survival_answer(r, minutes),
                   charts=charts, tables=[compact, bands, drop_table])


def cost_section(r: RunFolder) -> Section:
    """What does taking part cost a device? Battery and data per participation by device type."""
    # Shown in MB (10**6 bytes); the table holds bytes.
    cost = r.tables["device_cost"].assign(megabytes_p50=lambda t: t["bytes_p50"] / 1e6,
                                          megabytes_p90=lambda t: t["bytes_p90"] / 1e6)
    types = list(cost["device_type"])
    battery50, battery90 = column(cost, "battery_pct_p50"), column(cost, "battery_pct_p90")
    mb50, mb90 = column(cost, "megabytes_p50"), column(cost, "megabytes_p90")
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
                  records(cost, columns))
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


def _load_answer(r: RunFolder, checkins: np.ndarray, warm: int) -> str:
    hourly, load, server = r.tables["hourly"], r.summary["load"], r.summary["server_load"]
    n_hours = len(hourly)
    if not n_hours:
        return "The horizon holds no whole hour."
    at = int(np.argmax(checkins))
    answer = (f"Check-ins ({BASIS_WORDS.get(server['basis'], server['basis'])}) peak at "
              f"{format_value(server['checkins_per_s_peak'], 'num')} per second in the hour from "
              f"{hour_text(hourly['hour_utc'].iloc[at])}, {format_value(server['checkins_per_s_mean'], 'num')} "
              "on average")
    if 0 < warm < n_hours and at < warm:
        later = warm + int(np.argmax(checkins[warm:]))
        answer += (f", while no device was resting yet; after the first {warm} h they peak at "
                   f"{format_value(checkins[later], 'num')} per second "
                   f"({hour_text(hourly['hour_utc'].iloc[later])})")
    answer += f"; {pct(server['turned_away_share'])} of them were turned away"
    below = int((column(hourly, "turned_away_share") < 0).sum())
    if below:
        answer += (f" (an estimate that runs low when most check-ins are accepted: below 0 in {below} of "
                   f"{n_hours} hours)")
    if int(server["rounds_held"]):
        answer += (f"; the server held {int(server['rounds_held']):,} rounds before opening them, for "
                   f"{seconds(server['held_s'])} in all ({pct(server['held_share'])} of the horizon)")
    return answer + (f"; at most {int(load['peak_working']):,} devices work at once, "
                     f"{format_value(load['mean_working'], 'num')} on average.")


def _load_figures(r: RunFolder) -> list[list[Any]]:
    """The load table's rows (summary.json ``load``, ``server_load`` and ``rounds``)."""
    load, server, rounds = r.summary["load"], r.summary["server_load"], r.summary["rounds"]
    return [
        ["Peak check-ins per second (hourly mean)", load["checkins_per_s_peak_hour"]],
        ["Peak devices working at once", load["peak_working"]],
        ["Mean devices working (task time / horizon)", load["mean_working"]],
        ["Check-in figures", Cell(BASIS_WORDS.get(server["basis"], server["basis"]), "text")],
        ["Mean check-ins per second over the run", server["checkins_per_s_mean"]],
        ["Hour of the peak (UTC)", Cell(server["peak_hour_utc"], "text")],
        ["Check-ins answered", server["checkins"]],
        ["Of them accepted", server["accepted"]],
        ["Share of check-ins turned away", Cell(server["turned_away_share"], "pct")],
        ["Rounds held before opening", Cell(server["rounds_held"], "int")],
        ["Time rounds were held (s)", server["held_s"]],
        ["Share of the horizon a round was held", Cell(server["held_share"], "pct")],
        ["Rounds in flight allowed (in_flight)", Cell(rounds["in_flight"], "int")],
        ["Most rounds open at once", Cell(rounds["open_peak"], "int")],
        ["Mean rounds open (open to end / horizon)", rounds["open_mean"]],
    ]


def _load_chart(r: RunFolder, checkins: np.ndarray, warm: int) -> Chart:
    hourly, load, rounds = r.tables["hourly"], r.summary["load"], r.summary["rounds"]
    extra = [("Share of check-ins turned away", "turned away", column(hourly, "turned_away_share"), "pct")]
    if rounds["pacing"]:
        extra.append(("Time rounds were held, by the hour they opened", "minutes", column(hourly, "held_s") / 60.0,
                      "num"))
    if int(rounds["in_flight"]) > 1:
        extra.append(("Rounds open at once (mean over the hour)", "rounds", column(hourly, "rounds_open"), "num"))
    title = "Check-ins reaching the server (estimated from the census, mean per hour)"
    basis = ("Check-ins per second: mean eligible, free devices in the hour / "
             + ("(pacing stretch x check-in interval)" if rounds["pacing"] else "check-in interval")
             + ", an estimate from the census, as the server does not count check-ins one by one; turned away: "
             "1 - devices accepted / those check-ins. The census counts the devices waiting to check in, so when "
             "most check-ins are accepted the estimate runs low and the share turned away with it (below 0 in an "
             "hour that accepted more devices than the estimate).")
    return Chart(figures.load(len(hourly), instant(r.summary["horizon_start"]), checkins, title,
                              column(hourly, "peak_working"), load["mean_working"], extra, warm, "f-load"),
                 "Check-ins per second by hour above the peak number of devices working in each hour, then "
                 + ", ".join(t[0].lower() for t in extra) + ".",
                 basis + " Working: devices between the start and the end of their task."
                 + (" Held: the time the server waited before opening a round." if rounds["pacing"] else "")
                 + warm_note(r, warm))


def load_section(r: RunFolder) -> Section:
    """Can the server take the load? Check-ins per second (counted or estimated), the share
    turned away, rounds held and open, and devices working, by hour."""
    hourly = r.tables["hourly"]
    checkins = column(hourly, "checkins_per_s")
    warm = warm_hours(r)
    table = Table("load", "Server load (summary.json)", [Column("figure", "Figure", "text"),
                                                         Column("value", "Value", "num")], _load_figures(r))
    shown = [Column("hour_utc", "Hour (UTC)", "text"), Column("checkins_per_s", "Check-ins per second"),
             Column("turned_away_share", "Turned away", "pct"), Column("accepted", "Devices accepted", "int"),
             Column("peak_working", "Peak working", "int"), Column("held_s", "Held (s)"),
             Column("rounds_open", "Rounds open (mean)")]
    hourly_table = Table("load-hourly", "Server load per hour", shown, records(hourly, shown), detail=True,
                         source="tables/hourly.csv")
    return Section("load", "Can the server take the load?", _load_answer(r, checkins, warm),
                   charts=[_load_chart(r, checkins, warm)], tables=[table, hourly_table])
