"""The opening section of a run of several workloads: how they shared the fleet.

Every number comes from the top of the run folder: summary.json's ``sharing`` block and
each workload's ``rounds`` and ``participations`` under ``workloads``, and
tables/competition_by_device_type.csv and tables/competition_by_region.csv (docs/metrics.md
computes them; this module only reads and formats them).
"""

from __future__ import annotations

from typing import Any

import numpy as np

from . import figures
from .model import Cell, Chart, Column, Section, Table, Tile, format_value
from .several import COMPETITION_GROUPINGS, SeveralFolder
from .text import GROUPING_LABELS, num, opt, pct

__all__ = ["sharing_section", "rule_words"]


def rule_words(sharing: dict[str, Any], names: list[str]) -> str:
    """The sharing rule in words, with the order (priority) or each workload's share (shares)."""
    if sharing["rule"] == "shares":
        shares = sharing["shares"] if isinstance(sharing["shares"], dict) else {}
        parts = ", ".join(f"{n} {pct(shares.get(n))}" for n in names)
        return f"shares of the selection desk ({parts})"
    return "priority order (" + ", then ".join(names) + ")"


def _workload_table(f: SeveralFolder) -> Table:
    """One row per workload: its place under the rule, its part of the desk and its rounds and reports."""
    s, sharing = f.summary, f.summary["sharing"]
    shares = sharing["shares"] if isinstance(sharing["shares"], dict) else {}
    by_shares = sharing["rule"] == "shares"
    rule_column = (Column("share", "Share of the desk", "pct") if by_shares
                   else Column("priority", "Priority (1 opens first)", "int"))
    columns = [Column("workload", "Workload", "text"), rule_column,
               Column("desk_share", "Part of the horizon at the selection desk", "pct"),
               Column("committed", "Committed rounds", "int"),
               Column("committed_per_hour", "Committed rounds per hour", "ratio"),
               Column("accepted", "Participations accepted", "int"),
               Column("used_reports", "Reports used by committed rounds", "int")]
    rows = []
    for i, name in enumerate(f.names):
        block = s["workloads"][name]
        parts = block.get("participations", {})
        rows.append([name, opt(num(shares.get(name))) if by_shares else i + 1,
                     opt(num(sharing["desk_share"][name])), int(block["rounds"]["committed"]),
                     opt(num(block["rounds"]["committed_per_hour"])),
                     None if parts.get("accepted") is None else int(parts["accepted"]),
                     None if parts.get("used_reports") is None else int(parts["used_reports"])])
    return Table("sharing", "The workloads: place under the rule, time at the selection desk, rounds and reports "
                 "(summary.json: sharing, workloads)", columns, rows)


def _devices_table(f: SeveralFolder) -> Table:
    sharing = f.summary["sharing"]
    rows = [["Rule", Cell(rule_words(sharing, f.names), "text")],
            ["Devices with at least one used report", Cell(int(sharing["reporting_devices"]), "int")],
            ["Share of them that reported for more than one workload",
             Cell(opt(num(sharing["reported_for_several"])), "pct")]]
    return Table("sharing-devices", "Devices shared by the workloads (summary.json: sharing)",
                 [Column("figure", "Figure", "text"), Column("value", "Value", "num")], rows)


def _competition(f: SeveralFolder, key: str, name: str) -> tuple[Chart, Table, dict[str, tuple[str, float]]]:
    """The wide table (one row per group, three columns per workload), its figure, and each
    workload's group with its largest part of the group's accepted devices."""
    table = f.tables[name]
    label = GROUPING_LABELS[key]
    groups = list(dict.fromkeys(table[key]))
    cells = {(r[key], r["workload"]): r for r in table.to_dict("records")}
    columns = [Column(key, label.capitalize(), "text"), Column("devices", "Devices", "int"),
               Column("fleet_share", "Fleet share", "pct")]
    for w in f.names:
        columns += [Column("accepted", "Accepted", "int", w),
                    Column("accepted_share", "Share of the group's accepted", "pct", w),
                    Column("report_share", "Share of the workload's reports", "pct", w)]
    rows: list[list[Any]] = []
    largest: dict[str, tuple[str, float]] = {}
    for g in groups:
        first = next(cells[(g, w)] for w in f.names if (g, w) in cells)
        row: list[Any] = [g, int(first["devices"]), opt(num(first["fleet_share"]))]
        for w in f.names:
            cell = cells.get((g, w))
            if cell is None:
                row += [None, None, None]
                continue
            row += [int(cell["accepted"]), opt(num(cell["accepted_share"])), opt(num(cell["report_share"]))]
            share = opt(num(cell["accepted_share"]))
            if share is not None and share > 0 and (w not in largest or share > largest[w][1]):
                largest[w] = (g, share)
        rows.append(row)
    fleet = np.array([num(cells[next((g, w) for w in f.names if (g, w) in cells)]["fleet_share"]) for g in groups])
    reports = [(w, np.array([num(cells[(g, w)]["report_share"]) if (g, w) in cells else np.nan for g in groups]))
               for w in f.names]
    chart = Chart(figures.competition(label, groups, fleet, reports, f"f-competition-{key}"),
                  f"For each workload, bars of each {label}'s share of the fleet beside its share of the "
                  "workload's used reports.",
                  f"By {label}, one panel per workload: a green bar longer than the grey one beside it means the "
                  f"{label} gave that workload more of its reports than its share of the fleet.")
    shown = Table(f"competition-{key}", f"Which workload took each {label}'s devices (tables/{name}.csv)",
                  columns, rows)
    return chart, shown, largest


def _answer(f: SeveralFolder) -> str:
    s, sharing = f.summary, f.summary["sharing"]
    names = f.names
    desk = ", ".join(f"{n} {pct(sharing['desk_share'][n])}" for n in names)
    hourly = ", ".join(f"{n} {format_value(s['workloads'][n]['rounds']['committed_per_hour'], 'ratio')}"
                       for n in names)
    return (f"{len(names)} workloads shared the fleet by {rule_words(sharing, names)}. Part of the horizon each "
            f"workload's selections held the selection desk: {desk}; committed rounds per hour: {hourly}; "
            f"{pct(sharing['reported_for_several'])} of the {int(sharing['reporting_devices']):,} devices that "
            "reported did so for more than one workload.")


def sharing_section(f: SeveralFolder) -> Section:
    """How did the workloads share the fleet? The rule, the desk, rounds per hour and the competition for devices."""
    s, sharing = f.summary, f.summary["sharing"]
    charts, tables = [], [_workload_table(f), _devices_table(f)]
    notes = [
        "The server selects for one round at a time: a workload's part of the horizon at the selection desk is "
        "the time its rounds' selections held the desk, over the whole horizon. The parts need not add up to "
        "100%: the desk stands idle while no workload is selecting. "
        + ("Under priority order, whenever several workloads are ready the first in the order opens its round."
           if sharing["rule"] != "shares" else
           "Under shares, whenever several workloads are ready the one whose selections have held the desk least "
           "for its share opens its round; a workload that wants less leaves its time to the others."),
        "A device takes part in at most one round at a time, of any workload, and its rest after taking part "
        "holds for every workload. In the tables by group, a workload's share of the group's accepted devices "
        "is its part of the participations accepted from that group (the parts of one group add up to 100%); "
        "the group's share of the workload's reports (used by committed rounds) reads against the group's "
        "share of the fleet.",
    ]
    for key, name in COMPETITION_GROUPINGS.items():
        chart, table, largest = _competition(f, key, name)
        charts.append(chart)
        tables.append(table)
        if largest:
            notes.append(f"Largest part of a {GROUPING_LABELS[key]}'s accepted devices: " + "; ".join(
                f"{w} {pct(share)} in {g}" for w, (g, share) in largest.items()) + ".")
    tiles = [Tile(f"committed rounds per hour ({n})",
                  format_value(s["workloads"][n]["rounds"]["committed_per_hour"], "ratio")) for n in f.names]
    tiles.append(Tile("reporting devices that reported for more than one workload",
                      pct(sharing["reported_for_several"])))
    return Section("sharing", "How did the workloads share the fleet?", _answer(f), charts=charts, tables=tables,
                   tiles=tiles, notes=notes)
