"""The privacy section (only when the workload had ``workload.privacy``): what taking part cost
each device, beside what a uniform-sampling analysis would claim.

Every number comes from summary.json (``privacy``) and tables/privacy_by_device_type.csv and
tables/privacy_by_region.csv, which the metrics compute (docs/metrics.md, "Privacy
accounting"); this module only reads and words them.
"""

from __future__ import annotations

from typing import Any

from ..metrics.privacy import PRIVACY_CAUTION
from . import figures
from .figures.impact import EpsilonRow
from .model import Cell, Chart, Column, Section, Table, Tile, format_value
from .rundir import PRIVACY_TABLES, RunFolder
from .text import GROUPING_LABELS, column, num, opt, pct, records

__all__ = ["privacy_section"]

_GROUP_COLUMNS = [Column("devices", "Devices", "int"), Column("reporting_devices", "Reported", "int"),
                  Column("participations_max", "Most reports of a device", "int"),
                  Column("epsilon_median", "Epsilon median"), Column("epsilon_p90", "Epsilon p90"),
                  Column("epsilon_p99", "Epsilon p99"), Column("epsilon_worst", "Epsilon worst"),
                  Column("devices_over_uniform_claim", "Devices over the claim", "pct")]

_WHY = ("Why the two figures differ: the uniform-sampling claim assumes every committed round picked each device "
        "at random with the same small probability q, and that nobody learned who was picked; that secret random "
        "sample is what lowers the claim. In the fleet, who takes part follows who is idle, charging and on an "
        "unmetered network, the rest period and the selection policy, and the server knows every participant, so "
        "there is nothing to amplify: each device's own figure composes the rounds that actually used its report, "
        "and a device that is often available spends far more than the claim. The claim is one bound for every "
        "device under an assumption about sampling; the per-device figures are what each device spent given how "
        "the fleet took part.")
_FORMAL = ("A device's own figure is a formal bound for it only if whether it takes part does not depend on its "
           "data; a selection policy that prefers devices by their sample counts breaks that. Devices that never "
           "reported were in no release (epsilon 0) and are left out of the median, p90 and p99.")


def _eps(value: Any) -> str:
    return format_value(value, "num")


def delta_words(p: dict[str, Any]) -> str:
    """The delta every epsilon is quoted at, naming 1 / devices when it is that default."""
    delta, devices = num(p["delta"]), num(p["devices"])
    words = f"{delta:.3g}"
    return words + (" (1 / devices)" if devices > 0 and abs(delta * devices - 1.0) < 1e-9 else "")


def _worst_words(worst: dict[str, Any] | None) -> str:
    if not worst:
        return ""
    reports = int(worst["participations"])
    tied = int(worst.get("tied", 1))
    others = f"; {tied - 1:,} other devices used as often" if tied > 1 else ""
    return (f" (device {int(worst['device'])}, a {worst['device_type']} in {worst['region']}, "
            f"{reports:,} report{'s' if reports != 1 else ''} used{others})")


def _answer(p: dict[str, Any]) -> str:
    e = p["epsilon"]
    claim = (f"a uniform-sampling analysis would claim {_eps(p['epsilon_uniform_sampling'])} for every device over "
             f"the {int(p['committed_rounds']):,} committed rounds (sampling rate q = {_eps(p['sampling_rate'])})")
    if not int(p["reporting_devices"]):
        return (f"No device had a report used by a committed round, so none spent any privacy (epsilon 0); {claim}.")
    return (f"Each device's own epsilon at delta {delta_words(p)}: median {_eps(e['median'])}, p90 {_eps(e['p90'])}, "
            f"p99 {_eps(e['p99'])} over the {int(p['reporting_devices']):,} devices that reported, worst "
            f"{_eps(e['worst'])}{_worst_words(p['worst_device'])}; {claim}, and "
            f"{pct(p['devices_over_uniform_claim'])} of all {int(p['devices']):,} devices spent more than that.")


def _figures_table(p: dict[str, Any]) -> Table:
    e, worst = p["epsilon"], p["worst_device"] or {}
    rows = [
        ["Delta every epsilon is quoted at", Cell(p["delta"], "p")],
        ["Noise multiplier (noise std / clipping norm)", Cell(p["noise_multiplier"], "num")],
        ["Clipping norm", Cell(p["clipping_norm"], "num")],
        ["Committed rounds (releases)", Cell(p["committed_rounds"], "int")],
        ["Sampling rate q of the uniform claim (target reports / devices)", Cell(opt(num(p["sampling_rate"])), "num")],
        ["Devices", Cell(p["devices"], "int")],
        ["Devices that reported", Cell(p["reporting_devices"], "int")],
        ["Devices that never reported (epsilon 0)", Cell(p["never_reported"], "int")],
        ["Most reports used from one device", Cell(p["participations_max"], "int")],
        *[[f"Per-device epsilon: {k}" + (" (over all devices)" if k == "worst" else " (devices that reported)"),
           Cell(opt(num(e[k])), "num")] for k in ("median", "p90", "p99", "worst")],
        ["Uniform-sampling claim (epsilon)", Cell(opt(num(p["epsilon_uniform_sampling"])), "num")],
        ["Share of devices whose own epsilon exceeds the claim",
         Cell(opt(num(p["devices_over_uniform_claim"])), "pct")],
    ]
    if worst:
        rows += [["Worst device: index in the fleet", Cell(worst["device"], "int")],
                 ["Worst device: device type and region", Cell(f"{worst['device_type']}, {worst['region']}", "text")],
                 ["Worst device: reports used", Cell(worst["participations"], "int")]]
    return Table("privacy", "Privacy accounting (summary.json privacy)",
                 [Column("figure", "Figure", "text"), Column("value", "Value", "num")], rows)


def _group_table(r: RunFolder, key: str, name: str) -> Table:
    columns = [Column(key, GROUPING_LABELS[key].capitalize(), "text"), *_GROUP_COLUMNS]
    return Table(f"privacy-{key}", f"Per-device epsilon by {GROUPING_LABELS[key]} (tables/{name}.csv)", columns,
                 records(r.tables[name], columns))


def _chart(r: RunFolder, p: dict[str, Any]) -> Chart:
    e = p["epsilon"]
    whole: EpsilonRow = ("all devices", num(e["median"]), num(e["p90"]), num(e["p99"]), num(e["worst"]))
    panels = []
    for key, name in PRIVACY_TABLES.items():
        table = r.tables[name]
        median, p90, p99, worst = (column(table, f"epsilon_{q}") for q in ("median", "p90", "p99", "worst"))
        rows: list[EpsilonRow] = [(str(g), float(a), float(b), float(c), float(d))
                                  for g, a, b, c, d in zip(table[key], median, p90, p99, worst, strict=True)]
        panels.append((f"By {GROUPING_LABELS[key]}", ([whole] if key == "device_type" else []) + rows))
    svg = figures.epsilon_ranges(panels, num(p["epsilon_uniform_sampling"]), delta_words(p), "f-privacy")
    return Chart(svg, "Per group of devices, the median, p90, p99 and worst per-device epsilon on a range, beside a "
                      "dashed line at the uniform-sampling claim.",
                 "Each device's epsilon composes the committed rounds that used its report, without amplification; "
                 "the dashed line is what an analysis assuming every round sampled devices at random (rate q) "
                 "would claim for every device. Quantiles over the group's devices that reported.")


def privacy_section(r: RunFolder) -> Section | None:
    """What does taking part cost each device's privacy? Per-device epsilon against the
    uniform-sampling claim (None when the workload had no ``privacy``)."""
    p = r.summary.get("privacy")
    if p is None:
        return None
    e = p["epsilon"]
    tiles = [Tile("median device epsilon", _eps(e["median"])), Tile("worst device epsilon", _eps(e["worst"])),
             Tile("uniform-sampling claim", _eps(p["epsilon_uniform_sampling"])),
             Tile("devices over the claim", pct(p["devices_over_uniform_claim"]))]
    tables = [_figures_table(p), *(_group_table(r, key, name) for key, name in PRIVACY_TABLES.items())]
    return Section("privacy", "Privacy: what does taking part cost each device?", _answer(p),
                   charts=[_chart(r, p)], tables=tables, tiles=tiles,
                   notes=[_WHY, _FORMAL, f"Caution: {PRIVACY_CAUTION}"])
