"""Sections 6 and 7: who is represented in the model, and who takes part how often.

Every number comes from tables/bias_by_*.csv, tables/chi_square.csv,
tables/participation_counts.csv, tables/lorenz.csv and summary.json.
"""

from __future__ import annotations

import math

from . import figures
from .model import Chart, Column, Section, Table, format_value
from .rundir import BIAS_GROUPINGS, RunFolder
from .text import GROUPING_LABELS, column, num, opt, p_text, pct, records

__all__ = ["bias_section", "participation_section", "SHARE_COLUMNS"]

SHARE_COLUMNS = ("fleet_share", "eligible_share", "accepted_share", "report_share", "weight_share")

_Extreme = tuple[float, str, str, float, float]
"""(representation ratio, group, grouping label, 95% low, 95% high)."""


def _grouping(r: RunFolder, key: str, name: str) -> tuple[Chart, Table, list[_Extreme]]:
    table = r.tables[name]
    names = list(table[key])
    shares = {c: column(table, c) for c in SHARE_COLUMNS}
    ratio, low, high = (column(table, c) for c in ("representation_ratio", "ratio_low", "ratio_high"))
    label = GROUPING_LABELS[key]
    chart = Chart(figures.bias(label, names, shares, ratio, low, high, f"f-bias-{key}"),
                  f"Grouped bars of fleet, eligible, accepted, report and weight shares by {label}, "
                  "and each group's representation ratio with its 95% interval.",
                  f"By {label}. Right: report share over fleet share; 1 means represented as in the fleet; "
                  "bars: 95% Wilson interval of the report share (Wilson 1927), divided by the fleet share; "
                  "it treats reports as independent, so repeat participation makes it somewhat narrow.")
    columns = [Column(key, label.capitalize(), "text"), Column("devices", "Devices", "int"),
               *[Column(c, c.replace("_", " "), "pct") for c in SHARE_COLUMNS],
               Column("representation_ratio", "Ratio", "ratio"), Column("ratio_low", "95% low", "ratio"),
               Column("ratio_high", "95% high", "ratio"), Column("reports", "Reports", "int")]
    shown = Table(f"bias-{key}", f"Participation by {label} (tables/{name}.csv)", columns, records(table, columns))
    extremes = [(float(q), n, label, float(lo), float(hi))
                for n, q, lo, hi in zip(names, ratio, low, high, strict=True) if math.isfinite(q)]
    return chart, shown, extremes


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


def bias_section(r: RunFolder) -> Section:
    """Who is represented in the model? Shares and representation ratios per grouping, chi-square tests."""
    charts, tables, extremes = [], [], []
    for key, name in BIAS_GROUPINGS.items():
        chart, table, found = _grouping(r, key, name)
        charts.append(chart)
        tables.append(table)
        extremes += found
    chi_table, device_test = _chi_square(r)
    tables.append(chi_table)
    if extremes:
        low_q, high_q = min(extremes), max(extremes)
        p = device_test["p"]
        verdict = "differ from fleet shares" if p is not None and p < 0.05 else "are consistent with fleet shares"
        answer = (
            f"The {low_q[2]} {low_q[1]} is the most under-represented, at {low_q[0]:.2f} times its fleet share "
            f"(95% interval {low_q[3]:.2f} to {low_q[4]:.2f}), and the {high_q[2]} {high_q[1]} the most "
            f"over-represented at {high_q[0]:.2f}; report counts by device type {verdict} (chi-square "
            f"{format_value(device_test['chi_square'], 'num')}, {p_text(p)})."
        )
    else:
        answer = "No committed reports, so no group is represented in the model."
    return Section("bias", "Who is represented in the model?", answer, charts=charts, tables=tables,
                   notes=["Shares: of fleet devices, of eligible device-time (15-minute counts), of accepted devices, "
                          "of committed reports, and of aggregation weight (the FedAvg weights of committed reports: "
                          "the distinct examples each trained on, at most the examples and steps a round allows)."])


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
