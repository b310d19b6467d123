"""Section 5: where device work is wasted (tables/waste_by_cause.csv, tables/waste_by_device_type.csv), and
waste, abandonment and round failure by region and hour of day (tables/outcomes_by_region.csv,
tables/outcomes_by_hour.csv, summary.json ``outcomes``)."""

from __future__ import annotations

from typing import Any

import numpy as np

from . import figures
from .model import Chart, Column, Section, Table, format_value
from .rundir import RunFolder
from .text import column, opt, pct, records

__all__ = ["waste_section"]

_RESOURCES = (("Compute (device hours)", "compute_s", "wasted_compute_s", 3600.0, "compute_fraction"),
              ("Data (GB)", "bytes", "wasted_bytes", 1e9, "bytes_fraction"),
              ("Energy (Wh)", "energy_wh", "wasted_energy_wh", 1.0, "energy_fraction"),
              ("Examples (millions)", "examples", "wasted_examples", 1e6, "examples_fraction"))
"""(panel title, total column, wasted column, unit divisor, fraction column) per resource."""


def _by_cause(r: RunFolder) -> tuple[Chart, Table]:
    by_cause = r.tables["waste_by_cause"]
    causes = list(by_cause["cause"])
    hours = column(by_cause, "compute_s") / 3600.0
    gigabytes = column(by_cause, "bytes") / 1e9
    energy = column(by_cause, "energy_wh")
    examples = column(by_cause, "examples") / 1e6
    chart = Chart(
        figures.waste_by_cause(causes, [("Compute (device hours)", hours), ("Data (GB)", gigabytes),
                                        ("Energy (Wh)", energy), ("Examples (millions)", examples)],
                               "f-waste-cause"),
        "Bars of wasted compute, data, energy and examples processed for each waste cause.",
        "Labels: the cause's share of all wasted compute, data, energy or examples.")
    table = Table(
        "waste-cause", "Wasted work by cause (tables/waste_by_cause.csv)",
        [Column("cause", "Cause", "text"), Column("participations", "Participations", "int"),
         Column("compute_h", "Compute (h)"), Column("data_gb", "Data (GB)"), Column("energy_wh", "Energy (Wh)"),
         Column("examples_m", "Examples (millions)"), Column("compute_share", "Share of wasted compute", "pct")],
        [[c, int(p), float(h), float(g), float(e), float(x), float(sh)] for c, p, h, g, e, x, sh in
         zip(causes, by_cause["participations"], hours, gigabytes, energy, examples, by_cause["compute_share"],
             strict=True)])
    return chart, table


def _by_type(r: RunFolder) -> tuple[Chart, Table]:
    by_type = r.tables["waste_by_device_type"]
    types = list(by_type["device_type"])
    panels = []
    for title, total_column, wasted_column, scale, _ in _RESOURCES:
        t, wa = column(by_type, total_column) / scale, column(by_type, wasted_column) / scale
        panels.append((title, t - wa, wa))
    chart = Chart(figures.waste_by_type(types, panels, "f-waste-type"),
                  "Bars of used and wasted compute, data, energy and examples processed for each device type.",
                  "Labels: the wasted share of the device type's own compute, data, energy or examples.")
    columns = [Column("device_type", "Device type", "text"),
               Column("compute_h", "Compute (h)"), Column("wasted_compute_h", "Wasted compute (h)"),
               Column("compute_fraction", "Compute wasted", "pct"),
               Column("data_gb", "Data (GB)"), Column("wasted_data_gb", "Wasted data (GB)"),
               Column("bytes_fraction", "Data wasted", "pct"),
               Column("energy_wh", "Energy (Wh)"), Column("wasted_energy_wh", "Wasted energy (Wh)"),
               Column("energy_fraction", "Energy wasted", "pct"),
               Column("examples_m", "Examples (millions)"), Column("wasted_examples_m", "Wasted examples (millions)"),
               Column("examples_fraction", "Examples wasted", "pct")]
    rows = []
    for i, name in enumerate(types):
        row: list[Any] = [name]
        for (_, used, wasted), (*_, fraction) in zip(panels, _RESOURCES, strict=True):
            row += [float(used[i] + wasted[i]), float(wasted[i]), opt(float(by_type[fraction].iloc[i]))]
        rows.append(row)
    table = Table("waste-type", "Work used and wasted by device type (tables/waste_by_device_type.csv)",
                  columns, rows)
    return chart, table


_OUTCOME_COLUMNS = [Column("accepted", "Accepted", "int"),
                    Column("abandoned_share", "In abandoned rounds", "pct"),
                    Column("failed_share", "In failed rounds", "pct"),
                    Column("compute_fraction", "Compute wasted", "pct"), Column("bytes_fraction", "Data wasted", "pct"),
                    Column("energy_fraction", "Energy wasted", "pct"),
                    Column("examples_fraction", "Examples wasted", "pct")]
"""Per region or hour: accepted participations, the shares of them in abandoned (selection
timeout) and failed rounds, and the wasted shares of their work."""

def _outcomes(r: RunFolder) -> tuple[list[Table], str]:
    """The region and hour-of-day tables, and a clause naming the region and UTC hour that lost most."""
    by_region = r.tables["outcomes_by_region"]
    region_columns = [Column("region", "Region", "text"), *_OUTCOME_COLUMNS]
    region_table = Table("outcomes-region", "Participations in abandoned and failed rounds, and work wasted, by "
                         "region (tables/outcomes_by_region.csv)", region_columns, records(by_region, region_columns))
    by_hour = r.tables["outcomes_by_hour"]
    hour_columns = [Column("clock", "Clock", "text"), Column("hour_of_day", "Hour of day", "int"),
                    Column("rounds", "Rounds opened", "int"), Column("rounds_committed", "Committed", "int"),
                    Column("rounds_abandoned", "Abandoned", "int"), Column("rounds_failed", "Failed", "int"),
                    *_OUTCOME_COLUMNS]
    hour_table = Table("outcomes-hour", "Rounds and participations by hour of day: clock utc, the UTC hour the "
                       "round opened; local, the device's local hour at acceptance (tables/outcomes_by_hour.csv)",
                       hour_columns, records(by_hour, hour_columns), detail=True,
                       source="tables/outcomes_by_hour.csv")
    lost = column(by_region, "abandoned_share") + column(by_region, "failed_share")
    clause = ""
    if np.isfinite(lost).any() and np.nanmax(lost) > 0:
        i = int(np.nanargmax(lost))
        clause = (f"; by region, {by_region['region'].iloc[i]} had the most of its accepted devices in rounds that "
                  f"were abandoned or failed ({pct(by_region['abandoned_share'].iloc[i])} abandoned, "
                  f"{pct(by_region['failed_share'].iloc[i])} failed)")
    peak = r.summary["outcomes"]["by_hour_utc"]
    if peak.get("compute_fraction_peak") is not None:
        clause += (f"; rounds opening at {peak['compute_fraction_peak_hour']:02d}:00 UTC wasted the largest share of "
                   f"their compute ({pct(peak['compute_fraction_peak'])})")
    return [region_table, hour_table], clause


def waste_section(r: RunFolder) -> Section:
    """Where is device work wasted? By cause and by device type."""
    by_cause, by_type, w = r.tables["waste_by_cause"], r.tables["waste_by_device_type"], r.summary["waste"]
    causes = list(by_cause["cause"])
    share = column(by_cause, "compute_share")
    hours = column(by_cause, "compute_s")
    order = np.argsort(-np.nan_to_num(hours), kind="stable")
    leaders = [f"{causes[i]} ({pct(share[i])})" for i in order[:2] if np.nansum(hours) > 0 and hours[i] > 0]
    types = list(by_type["device_type"])
    fractions = column(by_type, "compute_fraction")
    worst = types[int(np.nanargmax(fractions))] if np.isfinite(fractions).any() else None
    outcome_tables, outcome_clause = _outcomes(r)
    answer = (
        f"{pct(w['examples_fraction'])} of the examples devices processed ({format_value(w['examples'], 'num')} of "
        f"{format_value(w['examples_processed'], 'num')}), {pct(w['compute_fraction'])} of device compute, "
        f"{pct(w['bytes_fraction'])} of data and {pct(w['energy_fraction'])} of energy went into no committed round"
        + (f"; the largest causes of wasted compute are {' and '.join(leaders)}" if leaders else "")
        + (f"; {worst} wastes the largest share of its own compute ({pct(np.nanmax(fractions))})" if worst else "")
        + outcome_clause + "."
    )
    cause_chart, cause_table = _by_cause(r)
    type_chart, type_table = _by_type(r)
    return Section("waste", "Where is device work wasted?", answer, charts=[cause_chart, type_chart],
                   tables=[cause_table, type_table, *outcome_tables],
                   notes=["A round has no region: a region's (or a local hour's) share in abandoned rounds is the "
                          "share of its accepted participations whose round the selection timeout ended, and its "
                          "share in failed rounds those whose round had its devices but did not commit (report "
                          "deadline, server outage or failed unmasking). By UTC hour, rows follow the hour each "
                          "round opened, with its participations; by local hour, the hour in the device's time "
                          "zone when it was accepted (no round counts)."])
