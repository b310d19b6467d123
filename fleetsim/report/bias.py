"""Sections 6 and 7: who is represented in the model, and who takes part how often.

Every number comes from tables/bias_by_*.csv (tables/bias_by_device_type_region.csv too),
tables/chi_square.csv, tables/participation_counts.csv, tables/lorenz.csv and summary.json.
Each ratio names its baseline: report share / fleet share (reports against devices) and
weight share / example share (FedAvg weight against the examples the devices hold).
"""

from __future__ import annotations

import math

import pandas as pd

from . import figures
from .model import Chart, Column, Section, Table, format_value
from .rundir import BIAS_GROUPINGS, PAIR_TABLE, RunFolder
from .text import GROUPING_LABELS, column, num, opt, p_text, pct, records

__all__ = ["bias_section", "participation_section", "SHARE_COLUMNS"]

SHARE_COLUMNS = ("fleet_share", "eligible_share", "accepted_share", "report_share", "weight_share")

_Extreme = tuple[float, str, str, float, float]
"""(ratio, group, grouping label, 95% low, 95% high)."""

_RATIO_COLUMNS = [Column("representation_ratio", "Reports / devices", "ratio"), Column("ratio_low", "95% low", "ratio"),
                  Column("ratio_high", "95% high", "ratio"), Column("weight_ratio", "Weight / examples", "ratio"),
                  Column("weight_ratio_low", "95% low (weight)", "ratio"),
                  Column("weight_ratio_high", "95% high (weight)", "ratio")]
"""The two ratios, each named by its baseline, with their intervals."""


def _extremes(table: pd.DataFrame, key: str, label: str, columns: tuple[str, str, str]) -> list[_Extreme]:
    ratio, low, high = (column(table, c) for c in columns)
    return [(float(q), n, label, float(lo), float(hi))
            for n, q, lo, hi in zip(table[key], ratio, low, high, strict=True) if math.isfinite(q)]


def _grouping(r: RunFolder, key: str, name: str) -> tuple[Chart, Table, list[_Extreme], list[_Extreme]]:
    """A grouping's chart and table, and its groups' (report, weight) ratios for the answer."""
    table = r.tables[name]
    names = list(table[key])
    shares = {c: column(table, c) for c in SHARE_COLUMNS}
    ratio, low, high = (column(table, c) for c in ("representation_ratio", "ratio_low", "ratio_high"))
    weight = (column(table, "weight_ratio"), column(table, "weight_ratio_low"), column(table, "weight_ratio_high"))
    label = GROUPING_LABELS[key]
    chart = Chart(figures.bias(label, names, shares, ratio, low, high, f"f-bias-{key}", weight=weight),
                  f"Grouped bars of fleet, eligible, accepted, report and weight shares by {label}, "
                  "each group's report share over its fleet share, and its weight share over its example share, "
                  "each ratio with its 95% interval.",
                  f"By {label}. Middle: report share over fleet share (reports against devices); 1 means reporting "
                  "as often as its devices' part of the fleet; bars: 95% Wilson interval of the report share "
                  "(Wilson 1927), divided by the fleet share; it treats reports as independent, so repeat "
                  "participation makes it somewhat narrow. Right: weight share over example share (FedAvg weight "
                  "against the examples the group's devices hold); 1 means weighted as its data; bars: 95% "
                  "interval of the weight share by the delta method with devices as the units, divided by the "
                  "example share.")
    columns = [Column(key, label.capitalize(), "text"), Column("devices", "Devices", "int"),
               *[Column(c, c.replace("_", " "), "pct") for c in SHARE_COLUMNS],
               Column("example_share", "example share", "pct"), *_RATIO_COLUMNS, Column("reports", "Reports", "int")]
    shown = Table(f"bias-{key}", f"Participation by {label} (tables/{name}.csv)", columns, records(table, columns))
    return (chart, shown, _extremes(table, key, label, ("representation_ratio", "ratio_low", "ratio_high")),
            _extremes(table, key, label, ("weight_ratio", "weight_ratio_low", "weight_ratio_high")))


def _pairs(r: RunFolder) -> Table:
    """Every (device type, region) pair's shares and both ratios (tables/bias_by_device_type_region.csv)."""
    columns = [Column("device_type", "Device type", "text"), Column("region", "Region", "text"),
               Column("devices", "Devices", "int"), Column("fleet_share", "fleet share", "pct"),
               Column("report_share", "report share", "pct"), Column("example_share", "example share", "pct"),
               Column("weight_share", "weight share", "pct"), *_RATIO_COLUMNS, Column("reports", "Reports", "int")]
    return Table("bias-device_type_region", "Participation by device type and region "
                 "(tables/bias_by_device_type_region.csv)", columns,
                 records(r.tables[PAIR_TABLE], columns), detail=True, source=f"tables/{PAIR_TABLE}.csv")


def _chi_square(r: RunFolder) -> tuple[Table, dict[str, float | None]]:
    """The chi-square table as shown, and the device-type test (p None when not computed)."""
    tests = r.tables["chi_square"]
    rows = [[GROUPING_LABELS.get(t["grouping"], t["grouping"]), int(t["groups"]), int(t["reports"]),
             opt(num(t["statistic"])), int(t["dof"]), opt(num(t["p"]))] for t in tests.to_dict("records")]
    table = Table(
        "chi-square", "Chi-square test of report counts against fleet shares (tables/chi_square.csv)",
        [Column("grouping", "Grouping", "text"), Column("groups", "Groups", "int"), Column("reports", "Reports", "int"),
         Column("chi_square", "Chi-square"), Column("dof", "Degrees of freedom", "int"), Column("p", "p-value", "p")],
        rows)
    b = r.summary["bias"]
    return table, {"chi_square": b["chi_square_device_type"], "p": b["chi_square_device_type_p"]}


def _data_clause(by_weight: list[_Extreme]) -> str:
    """The data-size quartiles' weight against their examples, in words ('' without weight)."""
    if not by_weight:
        return ""
    low_w, high_w = min(by_weight), max(by_weight)
    return (f" By data size, FedAvg weight against the examples held runs from {low_w[1]} at {low_w[0]:.2f} times "
            f"its example share (95% interval {low_w[3]:.2f} to {low_w[4]:.2f}) to {high_w[1]} at "
            f"{high_w[0]:.2f}.")


def bias_section(r: RunFolder) -> Section:
    """Who is represented in the model? Shares and both ratios per grouping, chi-square tests.

    The answer names each ratio's baseline: device types and regions by reports against
    devices; data-size quartiles by FedAvg weight against the examples they hold (a quartile
    holding more data is meant to weigh more, so its weight against its devices says nothing).
    """
    charts, tables, by_reports, by_weight = [], [], [], []
    for key, name in BIAS_GROUPINGS.items():
        chart, table, reports, weight = _grouping(r, key, name)
        charts.append(chart)
        tables.append(table)
        if key == "data_quartile":
            by_weight += weight
        else:
            by_reports += reports
    tables.append(_pairs(r))
    chi_table, device_test = _chi_square(r)
    tables.append(chi_table)
    if by_reports:
        low_q, high_q = min(by_reports), max(by_reports)
        p = device_test["p"]
        verdict = "differ from fleet shares" if p is not None and p < 0.05 else "are consistent with fleet shares"
        answer = (
            f"By reports against devices, the {low_q[2]} {low_q[1]} is the most under-represented, its report share "
            f"{low_q[0]:.2f} times its fleet share (95% interval {low_q[3]:.2f} to {low_q[4]:.2f}), and the "
            f"{high_q[2]} {high_q[1]} the most over-represented at {high_q[0]:.2f}; report counts by device type "
            f"{verdict} (chi-square {format_value(device_test['chi_square'], 'num')}, {p_text(p)})."
            + _data_clause(by_weight)
        )
    else:
        answer = "No committed reports, so no group is represented in the model."
    return Section("bias", "Who is represented in the model?", answer, charts=charts, tables=tables,
                   notes=["Shares: of fleet devices, of eligible device-time (15-minute counts), of accepted devices, "
                          "of committed reports, and of aggregation weight (the FedAvg weights of committed reports: "
                          "the distinct examples each trained on, at most the examples and steps a round allows).",
                          "Two ratios, each against its own baseline: reports / devices is the report share over the "
                          "fleet share (device count); weight / examples is the weight share over the example share "
                          "(the share of the fleet's examples its devices hold), the one to read for data-size "
                          "quartiles. A work cap (max_examples, max_steps) holds the weight of large-data devices "
                          "below their data, so their weight / examples falls below 1 even when they report as "
                          "often as any device."])


def _never(r: RunFolder) -> tuple[Chart, Table, tuple[float, str, str] | None]:
    groupings, never_rows, never_all = [], [], []
    for key, name in BIAS_GROUPINGS.items():
        table = r.tables[name]
        names = list(table[key])
        never = column(table, "never_share")
        groupings.append((GROUPING_LABELS[key].capitalize(), names, never))
        for n, d, v in zip(names, table["devices"], never, strict=True):
            never_rows.append([GROUPING_LABELS[key], n, int(d), opt(float(v))])
            if math.isfinite(v):
                never_all.append((float(v), n, GROUPING_LABELS[key]))
    chart = Chart(figures.never_reported(groupings, "f-never"),
                  "Bars of each group's devices that reported at least once and that never reported.",
                  "Labels: the share of the group's devices that never had a report in a committed round.")
    table = Table("never", "Devices that never reported, by group (never_share in tables/bias_by_*.csv)",
                  [Column("grouping", "Grouping", "text"), Column("group", "Group", "text"),
                   Column("devices", "Devices", "int"), Column("never_share", "Never reported", "pct")],
                  never_rows)
    return chart, table, max(never_all) if never_all else None


def participation_section(r: RunFolder) -> Section:
    """Who takes part, and how often? Reports per device, the Lorenz curve, never-reported shares."""
    counts_table, curve = r.tables["participation_counts"], r.tables["lorenz"]
    counts = column(counts_table, "reports").astype(int)
    devices = column(counts_table, "devices").astype(int)
    x, y = column(curve, "device_share"), column(curve, "report_share")
    b = r.summary["bias"]
    chart = Chart(figures.participation(counts, devices, x, y, b["gini"], "f-participation"),
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
                         [[float(a), float(c)] for a, c in zip(x, y, strict=True)], detail=True,
                         source="tables/lorenz.csv")
    gini_table = Table("gini", "Concentration of reports (summary.json)",
                       [Column("figure", "Figure", "text"), Column("value", "Value", "num")],
                       [["Gini coefficient (summary.json)", b["gini"]],
                        ["Share of reports from the busiest 10% of devices", b["top_tenth_share"]],
                        ["Coverage (devices with at least one report)", b["coverage"]]])
    never_chart, never_table, worst = _never(r)
    answer = (
        f"{pct(b['coverage'])} of devices reported at least once; the busiest 10% of devices gave "
        f"{pct(b['top_tenth_share'])} of the reports (Gini {format_value(b['gini'], 'ratio')})"
        + (f"; never reporting is most common in the {worst[2]} {worst[1]} ({pct(worst[0])})." if worst else ".")
    )
    return Section("participation", "Who takes part, and how often?", answer, charts=[chart, never_chart],
                   tables=[count_table, gini_table, never_table, lorenz_table])
