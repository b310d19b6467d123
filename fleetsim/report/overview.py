"""Sections 1, 2 and 11: what was run, the headline figures, and how far to trust them."""

from __future__ import annotations

import json
import math
from typing import Any

from . import figures
from .model import Cell, Chart, Column, Section, Table, Tile, format_value
from .rundir import RunFolder
from .text import BASIS_WORDS, STATUS_WORDS, STATUSES, hour_text, num, opt, pct, seconds, status_counts

__all__ = ["run_section", "headline_section", "caution_section", "caution_of"]


def _caps(r: RunFolder) -> str:
    """The local work cap per round in words (max_examples, max_steps)."""
    work = r.config.workload
    caps = [f"at most {work.max_examples:,} examples" if work.max_examples is not None else "",
            f"at most {work.max_steps:,} steps" if work.max_steps is not None else ""]
    shown = " and ".join(c for c in caps if c)
    return f"{shown} per round" if shown else "no cap on examples or steps per round"


def _encoding(r: RunFolder) -> str:
    """The update encoding in words and, with secure aggregation, the masked upload of a full round."""
    enc = r.config.workload.update_encoding
    kept = "every weight kept" if enc.keep_fraction == 1 else f"{enc.keep_fraction:g} of the weights kept"
    text = f"{enc.bits_per_weight} bits per weight, {kept}, rotation {'on' if enc.rotation else 'off'}"
    secure = r.summary["secure_aggregation"]
    if secure is not None and secure.get("masked_upload_bytes") is not None:
        text += (f"; masked upload {secure['masked_upload_bytes'] / 1e6:.3g} MB for a full round of "
                 f"{r.config.rounds.accept_count} devices")
    return text


def _workload(r: RunFolder) -> str:
    work = r.config.workload
    limit = "none" if not math.isfinite(work.execution_limit) else seconds(work.execution_limit)
    return (f"model {work.model_size / 1e6:.3g} MB down, update {work.upload_bytes / 1e6:.3g} MB up "
            f"({_encoding(r)}), {work.epochs} epoch(s) in batches of {work.batch_size}, {_caps(r)}, "
            f"needs {', '.join(work.requires) or 'no signal'}, battery at least {work.min_battery:g}%, "
            f"execution limit {limit}")


def _pacing_text(r: RunFolder) -> str:
    """Pacing's settings in words ('off ...' when it was off)."""
    rounds = r.config.rounds
    pacing = rounds.pacing
    if pacing is None:
        return "off: a device the server does not accept checks in again at its next tick"
    fill = pacing.fill_time if pacing.fill_time is not None else rounds.selection_timeout / 2.0
    least = pacing.min_wait if pacing.min_wait is not None else rounds.checkin_every
    return (f"on: check-ins the server does not accept are told to stay away ({seconds(least)} to "
            f"{seconds(pacing.max_wait)}), planned for a fill in {seconds(fill)} with margin {pacing.margin:g}; "
            f"a round is held while the check-ins of the last {seconds(pacing.lookback)} predict it would not "
            f"fill, looking again every {seconds(pacing.recheck)}")


_CONFIGURE_WORDS = {"at-acceptance": "at-acceptance: each task starts when its device is accepted",
                    "after-selection": "after-selection: accepted devices wait for the selection to end, then "
                                       "every task starts at once"}


def _secure_text(r: RunFolder) -> str:
    """Secure aggregation's settings in words ('off' when it was off)."""
    secure = r.config.rounds.secure_aggregation
    if secure is None:
        return "off"
    accept = r.config.rounds.accept_count
    return (f"on: the server unmasks the sum only if ceil({secure.threshold:g} x accepted) devices answer "
            f"({secure.needed(accept)} of a full round of {accept}); key advertisement "
            f"{seconds(secure.key_advertisement)}, key sharing {seconds(secure.key_sharing)}, unmasking "
            f"{seconds(secure.unmasking)} per device plus transfers; keys {secure.key_bytes:g} B, "
            f"shares {secure.share_bytes:g} B")


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
        ["Task configuration (configure)", _CONFIGURE_WORDS.get(r.summary["rounds"]["configure"],
                                                                r.summary["rounds"]["configure"])],
        ["Secure aggregation", _secure_text(r)],
        ["Pacing", _pacing_text(r)],
        ["Rounds in flight (in_flight)", f"{rounds.in_flight}" + (
            " (the next round's selection opens when the current one's selection ends)"
            if rounds.in_flight > 1 else " (a round opens after the previous one has ended and aggregated)")],
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
        f"policy {s['policy']}; tasks configured {s['rounds']['configure']}, secure aggregation "
        f"{'on' if s['rounds']['secure_aggregation'] else 'off'}."
    )
    return Section("run", "What was run?", answer, tables=[table])


_RESOURCE_LABELS = (("compute", "Compute", "compute"), ("bytes", "Data", "data (bytes)"),
                    ("energy", "Energy", "energy"), ("examples", "Examples", "examples processed"))
"""(summary.json key stem, headline chart row, headline table wording) per kind of device work."""


def _shown_statuses(r: RunFolder) -> list[str]:
    """Round statuses the headline names: failed unmaskings only when secure aggregation was on."""
    return [k for k in STATUSES if k != "unmasking_failed" or r.summary["rounds"]["secure_aggregation"]]


def _headline_chart(statuses: list[str], status_shares: dict[str, float], fractions: dict[str, float],
                    coverage: float) -> Chart:
    chart_rows: list[tuple[str, list[tuple[str, float]]]] = [
        ("Rounds", [(k, status_shares[k]) for k in statuses]),
    ]
    for key, label, _ in _RESOURCE_LABELS:
        chart_rows.append((label, [("committed", 1 - fractions[key]), ("wasted", fractions[key])]))
    chart_rows.append(("Devices", [("committed", coverage), ("fleet", 1 - coverage)]))
    legend = {"committed": "committed rounds; work they used; devices that reported",
              "report_deadline": "rounds ended by the report deadline",
              "selection_timeout": "rounds ended by the selection timeout",
              "server_outage": "rounds cut by a server outage",
              "unmasking_failed": "rounds ended by a failed unmasking", "wasted": "wasted work",
              "fleet": "devices that never reported"}
    return Chart(figures.share_rows(chart_rows, legend, "f-headline"),
                 "Bars of round outcomes, used and wasted compute, data, energy and examples, and coverage.",
                 "Each bar is 100%: round outcomes; device work used or wasted; devices that reported or not.")


def _load_rows(load: dict[str, Any]) -> list[list[Any]]:
    """The headline's server-load rows: peak check-ins per second and the share turned away, with their basis."""
    basis = BASIS_WORDS.get(load["basis"], load["basis"])
    return [[f"Peak check-ins per second (highest hourly mean, {basis})",
             Cell(opt(num(load["checkins_per_s_peak"])), "num")],
            [f"Share of check-ins turned away ({basis})", Cell(opt(num(load["turned_away_share"])), "pct")]]


def _load_words(load: dict[str, Any]) -> str:
    """The headline answer's clause on the server's load."""
    if load["peak_hour_utc"] is None:
        return ""
    return (f"; check-ins peaked at {format_value(load['checkins_per_s_peak'], 'num')} per second (hour from "
            f"{hour_text(load['peak_hour_utc'])}) and {pct(load['turned_away_share'])} were turned away "
            f"({BASIS_WORDS.get(load['basis'], load['basis'])})")


def headline_section(r: RunFolder) -> Section:
    """Do the round settings deliver? Round outcomes, straggler waste, dropouts per round and
    coverage (summary.json)."""
    ro, w, b = r.summary["rounds"], r.summary["waste"], r.summary["bias"]
    drops = r.summary["participations"]["round_dropout_share"]
    attempted = int(ro["attempted"])
    counts = status_counts(ro)
    statuses = _shown_statuses(r)
    status_shares = {k: counts[k] / attempted if attempted else float("nan") for k in statuses}
    fractions = {k: num(w[f"{k}_fraction"]) for k, _, _ in _RESOURCE_LABELS}
    coverage = num(b["coverage"])
    rows = [
        ["Committed rounds per hour", Cell(opt(num(ro["committed_per_hour"])), "ratio")],
        *[[f"Rounds {STATUS_WORDS[k]}", Cell(counts[k], "int")] for k in statuses],
        *[[f"Share of rounds {STATUS_WORDS[k]}", Cell(opt(v), "pct")] for k, v in status_shares.items()],
        *[[f"Straggler waste: share of {words}", Cell(opt(fractions[k]), "pct")] for k, _, words in _RESOURCE_LABELS],
        ["Dropouts per round: mean share of its accepted devices", Cell(opt(num(drops["mean"])), "pct")],
        ["Dropouts per round: p90 share of its accepted devices", Cell(opt(num(drops["p90"])), "pct")],
        ["Coverage: devices with at least one committed report", Cell(opt(coverage), "pct")],
        *_load_rows(r.summary["server_load"]),
    ]
    table = Table("headline", "Headline figures (summary.json)",
                  [Column("figure", "Figure", "text"), Column("value", "Value", "num")], rows)
    tiles = [
        Tile("committed rounds per hour", format_value(ro["committed_per_hour"], "ratio")),
        Tile(f"rounds committed ({int(ro['committed']):,} of {attempted:,})", pct(status_shares["committed"])),
        Tile("device compute wasted", pct(fractions["compute"])),
        Tile("devices that ever reported", pct(coverage)),
        Tile(f"peak check-ins per second ({r.summary['server_load']['basis']})",
             format_value(r.summary["server_load"]["checkins_per_s_peak"], "num")),
    ]
    answer = (
        f"{int(ro['committed']):,} of {attempted:,} rounds committed ({pct(status_shares['committed'])}, "
        f"{format_value(ro['committed_per_hour'], 'ratio')} per hour); {pct(status_shares['selection_timeout'])} were "
        f"ended by the selection timeout"
        + (f", {pct(status_shares['report_deadline'])} by the report deadline and "
           f"{pct(status_shares['unmasking_failed'])} by a failed unmasking" if "unmasking_failed" in statuses
           else f" and {pct(status_shares['report_deadline'])} by the report deadline")
        + f"; {pct(fractions['compute'])} of device compute and {pct(fractions['examples'])} of examples processed "
        f"were wasted; a round lost {pct(drops['mean'])} of its accepted devices to dropouts on average "
        f"(p90 {pct(drops['p90'])}); {pct(coverage)} of devices reported at least once"
        + _load_words(r.summary["server_load"]) + "."
    )
    return Section("headline", "Do the round settings deliver?", answer,
                   charts=[_headline_chart(statuses, status_shares, fractions, coverage)], tables=[table], tiles=tiles)


def caution_section(r: RunFolder) -> Section:
    """How far can these figures be trusted? The caution with the run's identity."""
    return caution_of(r.summary)


def caution_of(s: dict[str, Any]) -> Section:
    """The caution section from a summary.json (of one workload or of several)."""
    return Section("caution", "How far can these figures be trusted?", s["caution"],
                   notes=[f"Seed {s['seed']}, configuration {s['config_hash']}, scenario {s['scenario']}. Rerun with "
                          "other seeds to see how much the figures move by chance alone; the 95% intervals above "
                          "cover sampling within this one run, not the model's assumptions."])
