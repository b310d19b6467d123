"""The model-impact section (only when the run folder has impact.json): how the invented model
trained on the run's committed rounds serves each group of devices.

Every number comes from impact.json and tables/impact_curves.csv (tables/impact_final.csv
too when present), which ``fleetsim impact`` writes (docs/impact.md); this module only reads
and words them.
"""

from __future__ import annotations

import json
from typing import Any

import numpy as np
import pandas as pd

from . import figures
from .model import Cell, Chart, Column, Section, Table, Tile
from .rundir import IMPACT_FILE, RunFolder
from .text import GROUPING_LABELS, column, pct, records

__all__ = ["impact_section"]

_GROUPINGS = (("device_type", "by_device_type"), ("region", "by_region"), ("data_quartile", "by_data_quartile"))

_STAND_IN = ("The task, the data and the model are invented stand-ins, not the team's model or its users' data: "
             "the run's committed rounds trained them on exactly the devices whose reports they used, so read how "
             "far apart the groups are, not the accuracies themselves.")


def _grouping_words(grouping: str) -> str:
    return GROUPING_LABELS.get(grouping, grouping)


def _answer(s: dict[str, Any]) -> str:
    worst, best = s["worst_group"], s["best_group"]
    reports = s.get("reports_trained")
    trained = f"{int(s['rounds_trained']):,} committed rounds" + (
        f" ({int(reports):,} used reports)" if isinstance(reports, int) else "")
    return (f"Trained on {trained}, the invented model labels {pct(s['overall']['accuracy'])} of held-out examples "
            f"right over the fleet; it serves the {_grouping_words(worst['grouping'])} {worst['group']} worst at "
            f"{pct(worst['accuracy'])} and the {_grouping_words(best['grouping'])} {best['group']} best at "
            f"{pct(best['accuracy'])}, a gap of {100 * float(s['gap']):.1f} percentage points.")


def _final_table(r: RunFolder, s: dict[str, Any]) -> Table:
    """Final accuracy per group (impact.json), with loss, devices and reports from impact_final.csv if present."""
    final: dict[tuple[str, str], dict[str, Any]] = {}
    if "impact_final" in r.tables:
        final = {(str(row["grouping"]), str(row["group"])): row for row in r.tables["impact_final"].to_dict("records")}

    given = s["overall"].get("loss")
    overall_loss = given if isinstance(given, int | float) and not isinstance(given, bool) else None

    def row(grouping: str, group: str, accuracy: Any) -> list[Any]:
        extra = final.get((grouping, group), {})
        loss = extra.get("loss", overall_loss if grouping == "overall" else None)
        counts = [None if extra.get(k) is None or pd.isna(extra[k]) else int(extra[k]) for k in ("devices", "reports")]
        shown_loss = None if loss is None or pd.isna(loss) else float(loss)
        return [_grouping_words(grouping), group, accuracy, *counts, shown_loss]

    rows = [row("overall", "overall", s["overall"]["accuracy"])]
    for grouping, key in _GROUPINGS:
        rows += [row(grouping, str(name), value) for name, value in s[key].items()]
    columns = [Column("grouping", "Grouping", "text"), Column("group", "Group", "text"),
               Column("accuracy", "Held-out accuracy", "pct"), Column("devices", "Devices", "int"),
               Column("reports", "Reports trained on", "int"), Column("loss", "Loss (cross-entropy)")]
    return Table("impact-final", f"Final held-out accuracy by group ({IMPACT_FILE}"
                 + (", tables/impact_final.csv)" if final else ")"), columns, rows)


def _about_table(r: RunFolder, s: dict[str, Any]) -> Table:
    data = r.impact or {}
    settings = data.get("settings")
    rows: list[list[Any]] = [["Committed rounds trained", Cell(s["rounds_trained"], "int")]]
    if isinstance(s.get("reports_trained"), int):
        rows.append(["Used reports trained on", Cell(s["reports_trained"], "int")])
    if "model" in s:
        rows.append(["Model", Cell(str(s["model"]), "text")])
    if "private" in s:
        rows.append(["Clipped and noised (workload.privacy)", Cell("yes" if s["private"] else "no", "text")])
    if "seed" in data:
        rows.append(["Seed", Cell(str(data["seed"]), "text")])
    rows.append(["Task and model settings", Cell("the defaults (no impact section)" if settings is None
                                                 else json.dumps(settings, sort_keys=True), "text")])
    rows += [["Worst served group", Cell(f"{_grouping_words(s['worst_group']['grouping'])} "
                                         f"{s['worst_group']['group']}", "text")],
             ["Best served group", Cell(f"{_grouping_words(s['best_group']['grouping'])} "
                                        f"{s['best_group']['group']}", "text")],
             ["Gap (best - worst accuracy, percentage points)", Cell(100 * float(s["gap"]), "num")]]
    return Table("impact", f"Model impact ({IMPACT_FILE})",
                 [Column("figure", "Figure", "text"), Column("value", "Value", "num")], rows)


def _x(curves: pd.DataFrame) -> tuple[str, str]:
    """The column the figure's rounds come from, and its axis label."""
    if "rounds_trained" in curves.columns and pd.api.types.is_numeric_dtype(curves["rounds_trained"]):
        return "rounds_trained", "committed rounds trained"
    return "round", "round (the run's number of the last round trained; -1: the starting model)"


def _chart(r: RunFolder, s: dict[str, Any]) -> Chart:
    curves = r.tables["impact_curves"]
    x_key, x_label = _x(curves)
    worst = (s["worst_group"]["grouping"], s["worst_group"]["group"])
    best = (s["best_group"]["grouping"], s["best_group"]["group"])
    lines = []
    for (grouping, group), part in curves.groupby(["grouping", "group"], sort=False):
        part = part.sort_values(x_key, kind="stable")
        key = (str(grouping), str(group))
        role = ("overall" if grouping == "overall" else "worst" if key == worst else "best" if key == best
                else "other")
        label = {"overall": "whole fleet", "worst": f"worst served: {_grouping_words(key[0])} {key[1]}",
                 "best": f"best served: {_grouping_words(key[0])} {key[1]}"}.get(role, key[1])
        lines.append((label, column(part, x_key), column(part, "accuracy"), role))
    return Chart(figures.accuracy_over_rounds(lines, x_label, "f-impact"),
                 "Lines of held-out accuracy at each evaluation over the rounds trained: the whole fleet, the worst "
                 "and best served groups, and every other group in grey.",
                 "Each line passes through exactly the evaluations in tables/impact_curves.csv; a group's figure is "
                 "that of a device of the group drawn at random.")


def _curves_table(r: RunFolder) -> Table:
    curves = r.tables["impact_curves"]
    columns = [Column("round", "Round", "int"), Column("time_s", "Simulated time (s)"),
               *([Column("rounds_trained", "Rounds trained", "int")] if "rounds_trained" in curves.columns else []),
               Column("grouping", "Grouping", "text"), Column("group", "Group", "text"),
               Column("accuracy", "Held-out accuracy", "pct"), Column("loss", "Loss (cross-entropy)")]
    return Table("impact-curves", "Held-out accuracy and loss by group at each evaluation", columns,
                 records(curves, columns), detail=True, source="tables/impact_curves.csv")


def impact_section(r: RunFolder) -> Section | None:
    """Whom does the invented model trained on the run's rounds serve worse? (None without impact.json.)"""
    if r.impact is None:
        return None
    s = r.impact["impact"]
    worst, best = s["worst_group"], s["best_group"]
    tiles = [Tile("held-out accuracy, whole fleet", pct(s["overall"]["accuracy"])),
             Tile(f"worst served: {_grouping_words(worst['grouping'])} {worst['group']}", pct(worst["accuracy"])),
             Tile(f"best served: {_grouping_words(best['grouping'])} {best['group']}", pct(best["accuracy"])),
             Tile("gap (percentage points)", f"{100 * float(s['gap']):.1f}")]
    empty = not np.any(r.tables["impact_curves"]["grouping"] == "overall")
    notes = [_STAND_IN, f"Caution ({IMPACT_FILE}): {r.impact['caution']}"]
    if empty:
        notes.insert(0, "tables/impact_curves.csv holds no evaluation of the whole fleet.")
    return Section("impact", "Model impact: whom does the model trained on these rounds serve worse?", _answer(s),
                   charts=[_chart(r, s)], tables=[_final_table(r, s), _about_table(r, s), _curves_table(r)],
                   tiles=tiles, notes=notes)
