"""The report of one set of settings run under several seeds, from the combined summary.

The combined summary (:mod:`fleetsim.output.seeds`: the top summary.json of a multi-seed run
folder, or computed from several run folders of the same settings) holds every figure's
mean over the seeds, its between-seed interval (Student t, 95%) and the seeds it rests on,
and per group the representation ratio of the pooled counts with its Wilson interval. The
report computes no figure; it only chooses, by :func:`chosen_interval`, which of a ratio's
two intervals to show.
"""

from __future__ import annotations

import json
from pathlib import Path
from typing import Any

from ..errors import FleetsimError
from .model import Cell, Column, Section, Table, Tile, format_value
from .text import GROUPING_LABELS

__all__ = ["is_seeds", "read_seeds_summary", "check_seeds_summary", "chosen_interval", "build_seed_sections",
           "seeds_header", "SEED_KEYS"]

SEED_KEYS = ("scenario", "config_hash", "policy", "devices", "horizon_start", "simulated_hours", "seeds",
             "folders", "between_seeds", "figures", "representation", "caution")
"""Keys a combined summary must hold."""

_FIGURE_KEYS = ("path", "values", "seeds", "mean", "sd", "low", "high")
_GROUP_KEYS = ("grouping", "group", "pooled", "wilson_low", "wilson_high", "seeds", "mean", "low", "high")

_HEADLINE = (
    ("rounds.committed_per_hour", "Committed rounds per hour", "ratio"),
    ("rounds.attempted", "Rounds attempted", "num"),
    ("rounds.committed", "Rounds committed", "num"),
    ("rounds.ended_by.selection_timeout", "Rounds ended by the selection timeout", "num"),
    ("rounds.ended_by.report_deadline", "Rounds ended by the report deadline", "num"),
    ("waste.compute_fraction", "Straggler waste: share of compute", "pct"),
    ("waste.bytes_fraction", "Straggler waste: share of data (bytes)", "pct"),
    ("waste.energy_fraction", "Straggler waste: share of energy", "pct"),
    ("waste.examples_fraction", "Straggler waste: share of examples processed", "pct"),
    ("participations.round_dropout_share.mean", "Dropouts per round: mean share of its accepted devices", "pct"),
    ("bias.coverage", "Coverage: devices with at least one committed report", "pct"),
    ("bias.gini", "Gini coefficient of reports over devices", "ratio"),
    ("server_load.checkins_per_s_peak", "Peak check-ins per second (estimated from the census)", "num"),
    ("server_load.turned_away_share", "Share of check-ins turned away (estimated from the census)", "pct"),
)
"""(dotted summary key, label, format) of the headline figures shown with their between-seed intervals."""


def is_seeds(folder: str | Path) -> bool:
    """Whether ``folder`` holds a combined summary of several seeds (summary.json with
    ``between_seeds``); anything unreadable answers False, leaving the error to the run reader."""
    try:
        data = json.loads((Path(folder) / "summary.json").read_text(encoding="utf-8"))
    except (OSError, ValueError):
        return False
    return isinstance(data, dict) and "between_seeds" in data


def read_seeds_summary(folder: str | Path) -> dict[str, Any]:
    """The combined summary of a multi-seed run folder, checked; each seed's folder under
    ``seeds/`` must be there. Raises FleetsimError naming the file and the problem."""
    path = Path(folder) / "summary.json"
    try:
        data = json.loads(path.read_text(encoding="utf-8"))
    except OSError as exc:
        raise FleetsimError(f"{path}: cannot read ({exc.strerror or exc})") from None
    except json.JSONDecodeError as exc:
        raise FleetsimError(f"{path}: not valid JSON ({exc.msg} at line {exc.lineno})") from None
    check_seeds_summary(data, path)
    for name in data["folders"]:
        sub = Path(folder) / name
        if not Path(name).is_absolute() and not (sub / "summary.json").is_file():
            raise FleetsimError(f"{sub}: missing; {path} lists it as the run folder of a seed")
    return data


def check_seeds_summary(data: Any, path: Path | str) -> None:
    """Raise FleetsimError unless ``data`` has the keys of a combined summary."""
    if not isinstance(data, dict):
        raise FleetsimError(f"{path}: expected a JSON object")
    for key in SEED_KEYS:
        if key not in data:
            raise FleetsimError(f"{path}: lacks '{key}'; was it written by this version of fleetsim?")
    seeds, folders, method = data["seeds"], data["folders"], data["between_seeds"]
    if not isinstance(seeds, list) or not seeds or not all(_whole(x) for x in seeds):
        raise FleetsimError(f"{path}: 'seeds' should list the seeds (got {json.dumps(seeds)[:60]})")
    if not isinstance(folders, list) or len(folders) != len(seeds) or not all(isinstance(f, str) for f in folders):
        raise FleetsimError(f"{path}: 'folders' should name one run folder per seed in 'seeds'")
    if not isinstance(method, dict) or not isinstance(method.get("method"), str) \
            or not _number(method.get("level")):
        raise FleetsimError(f"{path}: 'between_seeds' should hold 'method' and 'level'")
    for key in ("devices", "simulated_hours"):
        if not _number(data[key]):
            raise FleetsimError(f"{path}: '{key}' should be a number (got {json.dumps(data[key])[:60]})")
    for block, keys in (("figures", _FIGURE_KEYS), ("representation", _GROUP_KEYS)):
        records = data[block]
        if not isinstance(records, list):
            raise FleetsimError(f"{path}: '{block}' should be a list")
        for i, record in enumerate(records):
            lacking = [k for k in keys if not isinstance(record, dict) or k not in record]
            if lacking:
                raise FleetsimError(f"{path}: '{block}[{i}]' lacks '{lacking[0]}'")
            wrong = [k for k in ("mean", "low", "high", "pooled", "wilson_low", "wilson_high", "sd")
                     if k in record and record[k] is not None and not _number(record[k])]
            if not _whole(record["seeds"]) or wrong:
                raise FleetsimError(f"{path}: '{block}[{i}].{wrong[0] if wrong else 'seeds'}' should be a number")
            if block == "figures" and (not isinstance(record["path"], list) or not isinstance(record["values"], list)
                                       or len(record["values"]) != len(seeds)):
                raise FleetsimError(f"{path}: 'figures[{i}]' should hold a 'path' list and one value per seed")


def _number(value: Any) -> bool:
    return isinstance(value, (int, float)) and not isinstance(value, bool)


def _whole(value: Any) -> bool:
    return isinstance(value, int) and not isinstance(value, bool)


def chosen_interval(row: dict[str, Any]) -> tuple[float | None, float | None, str]:
    """The interval the report shows for a group's representation ratio: (low, high, which).

    The rule: the between-seed interval (``between seeds``) replaces the pooled Wilson
    interval when it is wider, or when it does not contain the pooled estimate; it is also
    shown when the Wilson interval is missing. Otherwise the Wilson interval stays
    (``Wilson``). With neither, (None, None, ``none``).
    """
    low, high, w_low, w_high = row["low"], row["high"], row["wilson_low"], row["wilson_high"]
    between = low is not None and high is not None
    if not between:
        return (w_low, w_high, "Wilson") if w_low is not None and w_high is not None else (None, None, "none")
    if w_low is None or w_high is None:
        return low, high, "between seeds"
    pooled = row["pooled"]
    if high - low > w_high - w_low or pooled is None or not low <= pooled <= high:
        return low, high, "between seeds"
    return w_low, w_high, "Wilson"


def seeds_header(s: dict[str, Any]) -> dict[str, Any]:
    """The combined summary with a ``seed`` field in words, for the page's masthead."""
    seeds = s["seeds"]
    return {**s, "seed": f"{seeds[0]} to {seeds[-1]} ({len(seeds)} seeds)" if seeds else "none"}


def _figures(s: dict[str, Any]) -> dict[str, dict[str, Any]]:
    return {".".join(f["path"]): f for f in s["figures"]}


def _run_section(s: dict[str, Any]) -> Section:
    seeds = s["seeds"]
    method = s["between_seeds"]
    rows = [["Scenario", s["scenario"]],
            ["Fleet file", s.get("fleet_file") or "not recorded (the runs came from the Python API)"],
            ["Seeds", ", ".join(str(x) for x in seeds)],
            ["Configuration hash", f"{s['config_hash']} (the same in every seed's config.json)"],
            ["Horizon", f"{s['simulated_hours']:g} h from {s['horizon_start']}"],
            ["Devices", f"{int(s['devices']):,}"], ["Policy", str(s["policy"])],
            ["Between-seed interval", f"{method['method']}: mean +- t({0.5 + method['level'] / 2:g}, n - 1) x sd / "
                                      f"sqrt(n) over the n seeds whose figure is finite ({method['level']:.0%})"]]
    table = Table("run", "The runs' settings (summary.json)",
                  [Column("setting", "Setting", "text"), Column("value", "Value", "text")], rows)
    figures = _figures(s)
    columns = [Column("seed", "Seed", "text"), Column("folder", "Run folder", "text")]
    picks = [k for k in ("rounds.committed_per_hour", "waste.compute_fraction", "bias.coverage") if k in figures]
    labels = {k: label for k, label, _ in _HEADLINE}
    kinds = {k: kind for k, _, kind in _HEADLINE}
    columns += [Column(k, labels[k], kinds[k]) for k in picks]
    per_seed = [[str(seed), folder, *[figures[k]["values"][i] for k in picks]]
                for i, (seed, folder) in enumerate(zip(seeds, s["folders"], strict=True))]
    folders = Table("seeds", "Each seed's run folder, with its own report (fleetsim report FOLDER)", columns, per_seed)
    answer = (f"{s['scenario']}: {int(s['devices']):,} devices for {s['simulated_hours']:g} h from "
              f"{s['horizon_start']} under {len(seeds)} seeds ({', '.join(str(x) for x in seeds)}), configuration "
              f"{s['config_hash']}, policy {s['policy']}; each figure below is the mean over the seeds with its 95% "
              "Student t interval between seeds.")
    return Section("run", "What was run?", answer, tables=[table, folders])


def _interval_text(f: dict[str, Any], kind: str) -> str:
    if f["low"] is None:
        return f"{format_value(f['mean'], kind)} (no interval: {f['seeds']} seed(s))"
    return (f"{format_value(f['mean'], kind)} (95% {format_value(f['low'], kind)} to "
            f"{format_value(f['high'], kind)}, {f['seeds']} seeds)")


def _headline_section(s: dict[str, Any]) -> Section:
    figures = _figures(s)
    shown = [(k, label, kind) for k, label, kind in _HEADLINE if k in figures]
    columns = [Column("figure", "Figure", "text"), Column("mean", "Mean over seeds", "num"),
               Column("low", "95% low (between seeds)", "num"), Column("high", "95% high (between seeds)", "num"),
               Column("seeds", "Seeds", "int")]
    rows = [[label, Cell(figures[k]["mean"], kind), Cell(figures[k]["low"], kind), Cell(figures[k]["high"], kind),
             figures[k]["seeds"]] for k, label, kind in shown]
    table = Table("headline", "Headline figures: mean over seeds and the 95% between-seed interval (summary.json)",
                  columns, rows)
    tiles = [Tile(label.lower(), _interval_text(figures[k], kind)) for k, label, kind in shown
             if k in ("rounds.committed_per_hour", "waste.compute_fraction", "bias.coverage")]
    parts = [f"{label.lower()} {_interval_text(figures[k], kind)}" for k, label, kind in shown
             if k in ("rounds.committed_per_hour", "waste.compute_fraction", "bias.coverage")]
    answer = ("; ".join(parts) + ".") if parts else "The seeds' summaries hold none of the headline figures."
    return Section("headline", "Do the round settings deliver, across seeds?", answer[:1].upper() + answer[1:],
                   tables=[table], tiles=tiles)


def _bias_section(s: dict[str, Any]) -> Section:
    columns = [Column("group", "Group", "text"), Column("pooled", "Reports / devices (pooled)", "ratio"),
               Column("wilson_low", "Wilson 95% low", "ratio"), Column("wilson_high", "Wilson 95% high", "ratio"),
               Column("mean", "Mean over seeds", "ratio"), Column("low", "Between seeds 95% low", "ratio"),
               Column("high", "Between seeds 95% high", "ratio"), Column("seeds", "Seeds", "int"),
               Column("shown_low", "Shown 95% low", "ratio"), Column("shown_high", "Shown 95% high", "ratio"),
               Column("shown", "Interval shown", "text")]
    tables, used, ranked = [], 0, []
    for grouping, label in GROUPING_LABELS.items():
        rows = []
        for r in (r for r in s["representation"] if r["grouping"] == grouping):
            low, high, which = chosen_interval(r)
            used += which == "between seeds"
            rows.append([r["group"], r["pooled"], r["wilson_low"], r["wilson_high"], r["mean"], r["low"], r["high"],
                         r["seeds"], low, high, which])
            if r["pooled"] is not None and grouping != "data_quartile":
                ranked.append((r["pooled"], r["group"], label, low, high, which))
        if rows:
            tables.append(Table(f"bias-{grouping}", f"Reports against devices by {label}, across seeds "
                                "(summary.json 'representation')", columns, rows))
    total = sum(len(t.rows) for t in tables)
    if ranked:
        low_q, high_q = min(ranked), max(ranked)
        answer = (f"Pooled over the seeds, the {low_q[2]} {low_q[1]} is the most under-represented, its report share "
                  f"{low_q[0]:.2f} times its fleet share (95% {format_value(low_q[3], 'ratio')} to "
                  f"{format_value(low_q[4], 'ratio')}, {low_q[5]}), and the {high_q[2]} {high_q[1]} the most "
                  f"over-represented at {high_q[0]:.2f}; the between-seed interval replaces the Wilson interval for "
                  f"{used} of {total} groups.")
    else:
        answer = "No committed reports in any seed, so no group is represented in the model."
    rule = ("Which interval is shown: the between-seed interval (Student t over the seeds' ratios) replaces the "
            "Wilson interval of the pooled counts when it is wider, or when it does not contain the pooled "
            "estimate; otherwise the Wilson interval stays. The Wilson interval treats every report as an "
            "independent draw from one fleet; the seeds also redraw the fleet and repeat participation, which "
            "only the between-seed interval sees.")
    return Section("bias", "Who is represented in the model, across seeds?", answer, tables=tables,
                   notes=["Pooled: the group's used reports summed over the seeds over all used reports, divided by "
                          "the group's devices summed over the seeds over all devices.", rule])


def _all_section(s: dict[str, Any]) -> Section:
    rows = [[".".join(f["path"]), f["mean"], f["sd"], f["low"], f["high"], f["seeds"]] for f in s["figures"]]
    n = len(s["seeds"])
    fewer = sum(1 for f in s["figures"] if f["seeds"] < n)
    with_interval = sum(1 for f in s["figures"] if f["low"] is not None)
    table = Table("figures", "Every numeric figure of the seeds' summaries, across seeds (summary.json 'figures')",
                  [Column("figure", "Figure (summary.json key)", "text"), Column("mean", "Mean over seeds", "num"),
                   Column("sd", "Sd between seeds", "num"), Column("low", "95% low", "num"),
                   Column("high", "95% high", "num"), Column("seeds", "Seeds", "int")], rows, detail=True,
                  source="summary.json")
    answer = (f"{len(rows):,} figures; {with_interval:,} have a between-seed interval; {fewer:,} rest on fewer than "
              f"all {n} seeds (a seed could not measure them).")
    return Section("figures", "How far does each figure move between seeds?", answer, tables=[table])


def _caution(s: dict[str, Any]) -> Section:
    seeds = ", ".join(str(x) for x in s["seeds"])
    return Section("caution", "How far can these figures be trusted?", s["caution"] or "",
                   notes=[f"Seeds {seeds}, configuration {s['config_hash']}, scenario {s['scenario']}. The 95% "
                          "intervals between seeds cover how much the figures move by chance from seed to seed "
                          "under these settings, not the model's assumptions."])


def build_seed_sections(s: dict[str, Any]) -> list[Section]:
    """The sections of a report over several seeds, from their combined summary."""
    return [_run_section(s), _headline_section(s), _bias_section(s), _all_section(s), _caution(s)]
