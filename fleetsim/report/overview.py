"""Sections 1, 2 and 11: what was run, the headline figures, and how far to trust them."""

from __future__ import annotations

import json
import math
from typing import Any

from . import figures
from .model import Cell, Chart, Column, Section, Table, Tile, format_value
from .rundir import RunFolder
from .text import STATUS_WORDS, STATUSES, num, opt, pct, seconds, status_counts

__all__ = ["run_section", "headline_section", "caution_section"]


def _workload(r: RunFolder) -> str:
    work = r.config.workload
    limit = "none" if not math.isfinite(work.execution_limit) else seconds(work.execution_limit)
    return (f"model {work.model_size / 1e6:.3g} MB down, update {work.upload_bytes / 1e6:.3g} MB up, "
            f"{work.epochs} epoch(s), needs {', '.join(work.requires) or 'no signal'}, "
            f"battery at least {work.min_battery:g}%, execution limit {limit}")


def _settings_rows(r: RunFolder) -> list[list[Any]]:
    """The round rules and workload as (setting, value) rows, read from the run's typed settings."""
    c = r.config
    rounds, selection = c.rounds, c.selection
    params = f" with {json.dumps(selection.params, sort_keys=True)}" if selection.params else ""
    return [
        ["Selection policy", r.summary["policy"] + params],
        ["Reports a round needs", f"target {rounds.target_reports}, at least {rounds.required_reports}"],
        ["Over-selection", f"{rounds.over_selection:g} (accepts up to {rounds.accept_count} devices per round)"],
        ["Selection timeout", seconds(rounds.selection_timeout)],
        ["Report deadline", seconds(rounds.report_deadline)],
        ["Aggregation time", seconds(rounds.aggregation_time)],
        ["Rest after taking part", seconds(rounds.rest)],
        ["Check-in interval", seconds(rounds.checkin_every)],
        ["Workload", _workload(r)],
        ["Disruptions", ", ".join(f"{d.kind} at {seconds(d.start)} for {seconds(d.duration)}"
                                  for d in c.disruptions) or "none"],
    ]


def run_section(r: RunFolder) -> Section:
    """What was run? The run's settings (config.json) and identity (summary.json)."""
    s = r.summary
    types, regions = r.type_names, r.region_names
    horizon_s = float(r.config.horizon.duration)
    zones = r.config.fleet.regions
    horizon = seconds(horizon_s) + ("" if seconds(horizon_s).endswith(" h") else f" ({s['simulated_hours']:g} h)")
    rows: list[list[Any]] = [
        ["Scenario", s["scenario"]],
        ["Fleet file", (s.get("fleet_file") or "not recorded (the run came from the Python API)")
         + "; config.json beside this report holds the validated file"],
        ["Seed", str(s["seed"])],
        ["Configuration hash", f"{s['config_hash']} (SHA-256 of config.json as canonical JSON, first 16 hex digits)"],
        ["Horizon", f"{horizon} from {s['horizon_start']}"],
        ["Devices", f"{int(s['devices']):,}"],
        [f"Device types ({len(types)})", ", ".join(types)],
        [f"Regions ({len(regions)})",
         ", ".join(f"{name} ({zones[name].timezone})" if name in zones else name for name in regions)],
        *_settings_rows(r),
    ]
    table = Table("run", "The run's settings (config.json, summary.json)",
                  [Column("setting", "Setting", "text"), Column("value", "Value", "text")], rows)
    answer = (
        f"{s['scenario']}: {int(s['devices']):,} devices ({len(types)} device types, {len(regions)} regions) "
        f"for {seconds(horizon_s)} from {s['horizon_start']}; seed {s['seed']}, configuration {s['config_hash']}, "
        f"policy {s['policy']}."
    )
    return Section("run", "What was run?", answer, tables=[table])


def _headline_chart(status_shares: dict[str, float], fractions: dict[str, float], coverage: float) -> Chart:
    chart_rows: list[tuple[str, list[tuple[str, float]]]] = [
        ("Rounds", [(k, status_shares[k]) for k in STATUSES]),
    ]
    for key, label in (("compute", "Compute"), ("bytes", "Data"), ("energy", "Energy")):
        chart_rows.append((label, [("committed", 1 - fractions[key]), ("wasted", fractions[key])]))
    chart_rows.append(("Devices", [("committed", coverage), ("fleet", 1 - coverage)]))
    legend = {"committed": "committed rounds; work they used; devices that reported",
              "report_deadline": "rounds ended by the report deadline",
              "selection_timeout": "rounds ended by the selection timeout",
              "server_outage": "rounds cut by a server outage", "wasted": "wasted work",
              "fleet": "devices that never reported"}
    return Chart(figures.share_rows(chart_rows, legend, "f-headline"),
                 "Bars of round outcomes, used and wasted compute, data and energy, and coverage.",
                 "Each bar is 100%: round outcomes; device work used or wasted; devices that reported or not.")


def headline_section(r: RunFolder) -> Section:
    """Do the round settings deliver? Round outcomes, straggler waste and coverage (summary.json)."""
    ro, w, b = r.summary["rounds"], r.summary["waste"], r.summary["bias"]
    attempted = int(ro["attempted"])
    counts = status_counts(ro)
    status_shares = {k: counts[k] / attempted if attempted else float("nan") for k in STATUSES}
    fractions = {k: num(w[f"{k}_fraction"]) for k in ("compute", "bytes", "energy")}
    coverage = num(b["coverage"])
    rows = [
        ["Committed rounds per hour", Cell(opt(num(ro["committed_per_hour"])), "ratio")],
        *[[f"Rounds {STATUS_WORDS[k]}", Cell(counts[k], "int")] for k in STATUSES],
        *[[f"Share of rounds {STATUS_WORDS[k]}", Cell(opt(v), "pct")] for k, v in status_shares.items()],
        *[[f"Straggler waste: share of {'data (bytes)' if k == 'bytes' else k}", Cell(opt(v), "pct")]
          for k, v in fractions.items()],
        ["Coverage: devices with at least one committed report", Cell(opt(coverage), "pct")],
    ]
    table = Table("headline", "Headline figures (summary.json)",
                  [Column("figure", "Figure", "text"), Column("value", "Value", "num")], rows)
    tiles = [
        Tile("committed rounds per hour", format_value(ro["committed_per_hour"], "ratio")),
        Tile(f"rounds committed ({int(ro['committed']):,} of {attempted:,})", pct(status_shares["committed"])),
        Tile("device compute wasted", pct(fractions["compute"])),
        Tile("devices that ever reported", pct(coverage)),
    ]
    answer = (
        f"{int(ro['committed']):,} of {attempted:,} rounds committed ({pct(status_shares['committed'])}, "
        f"{format_value(ro['committed_per_hour'], 'ratio')} per hour); {pct(status_shares['selection_timeout'])} were "
        f"ended by the selection timeout and {pct(status_shares['report_deadline'])} by the report deadline; "
        f"{pct(fractions['compute'])} of device compute was wasted; {pct(coverage)} of devices reported at least once."
    )
    return Section("headline", "Do the round settings deliver?", answer,
                   charts=[_headline_chart(status_shares, fractions, coverage)], tables=[table], tiles=tiles)


def caution_section(r: RunFolder) -> Section:
    """How far can these figures be trusted? The caution with the run's identity."""
    s = r.summary
    return Section("caution", "How far can these figures be trusted?", s["caution"],
                   notes=[f"Seed {s['seed']}, configuration {s['config_hash']}, scenario {s['scenario']}. Rerun with "
                          "other seeds to see how much the figures move by chance alone; the 95% intervals above "
                          "cover sampling within this one run, not the model's assumptions."])
