"""What a comparison prints and the files it writes, each atomically by :func:`write_compare`.

In the folder: ``cells/`` (resume), ``runs.parquet/.csv`` (every metric per condition, arm
and seed, with ``condition``, ``stress_file``, ``arm`` and ``arm_settings``),
``differences.parquet/.csv`` (one row per condition and metric, with its role, p-values
raw and adjusted, TOST result, verdict code, ``seeds`` and ``alpha``), ``comparison.json``
(the design, the methods, the code tables, the verdicts, the overall line per condition) and
``comparison.md`` (the text, every metric).

The text opens each condition with the primary metrics, then the secondary ones, and ends it
with the overall line (:mod:`fleetsim.study.compare_overall`).
"""

from __future__ import annotations

import json
import math
from pathlib import Path
from typing import Any

import pandas as pd

from .. import __version__
from .compare import ComparisonResult
from .compare_methods import design_record, method_lines, methods
from .compare_overall import OVERALL
from .stats import LEVEL
from .store import atomic_text, save_frame
from .table import SEVERAL_TOTALS, WORST_REPRESENTATION, column_name, direction_of, workload_prefix, workload_prefixes
from .verdicts import ALPHA, CONDITIONS, ROLES, VERDICTS, Condition, verdict_text

__all__ = ["render_compare", "comparison_record", "write_compare", "headline_metrics", "HEADLINE",
           "HEADLINE_SEVERAL"]

HEADLINE = (
    "rounds_committed_per_hour",
    "waste_compute_fraction",
    "waste_energy_fraction",
    "bias_coverage",
    WORST_REPRESENTATION,
    "bias_gini",
    "rounds_duration_s_p50",
)
"""Metrics the command prints first (every metric is in differences.csv)."""

HEADLINE_SEVERAL = (*SEVERAL_TOTALS, "sharing_reported_for_several")
"""With several workloads: the totals over them and the share of reporting devices that
reported for more than one, printed before each workload's own :data:`HEADLINE` metrics."""

_TYPE_SHARES = ("eligible_share", "accepted_share", "report_share", "weight_share", "representation_ratio")

def _num(x: Any) -> str:
    if x is None or x is pd.NA or (isinstance(x, float) and not math.isfinite(x)):
        return "n/a"
    return f"{x:.4g}"


def _signed(x: float) -> str:
    return "n/a" if not math.isfinite(x) else f"{x:+.4g}"


def _p(x: Any) -> str:
    if x is None or x is pd.NA or (isinstance(x, float) and not math.isfinite(x)):
        return "-"
    return f"{x:.2g}" if x < 0.001 else f"{x:.3f}"


def _row_text(row: pd.Series, name: str, width: int) -> str:
    interval = "" if not math.isfinite(row["low"]) else f" [{_signed(row['low'])}, {_signed(row['high'])}]"
    said = verdict_text(row["verdict"], row["seeds"])
    if isinstance(row["margin"], str) and math.isfinite(row["tost_p_adjusted"]):
        said += f" (TOST adj. p {_p(row['tost_p_adjusted'])} for +-{row['margin']})"
    elif row["verdict"] == "judged-as-rate":
        said += f" ({row['judged_as']})"
    return (f"  {name:<{width}} {_num(row['baseline_mean']):>10} {_num(row['candidate_mean']):>10}  "
            f"{(_signed(row['difference']) + interval):<34} {_p(row['p_adjusted']):>7}  {said}")


def headline_metrics(workloads: list[str]) -> list[str]:
    """The headline columns: :data:`HEADLINE`, or with several workloads
    :data:`HEADLINE_SEVERAL`, each workload's desk share and each workload's :data:`HEADLINE`."""
    if not workloads:
        return list(HEADLINE)
    desk = [column_name(("sharing", "desk_share", name)) for name in workloads]
    return [*HEADLINE_SEVERAL, *desk, *(workload_prefix(name) + m for name in workloads for m in HEADLINE)]


Shown = list[tuple[str | None, str]]
"""Rows to print: (metric, name printed), or (None, a heading line)."""


def _shown(part: pd.DataFrame, result: ComparisonResult, every_metric: bool) -> Shown:
    """The rows to print: every metric, or the headline ones and each device type's shares
    (with several workloads: the totals, then each workload's headline metrics and its
    device types' representation ratios under a heading of its own)."""
    if every_metric:
        return [(m, m) for m in part.index]
    if not result.workloads:
        shown: Shown = [(m, m) for m in HEADLINE if m in part.index]
        types: Shown = [(column_name(("bias", "by_device_type", name, share)), f"{name}: {share}")
                        for name in result.type_names for share in _TYPE_SHARES]
        types = [(m, n) for m, n in types if m in part.index]
        return shown + ([(None, "  by device type (bias_by_device_type_<type>_<figure>):")] + types if types else [])
    every = headline_metrics(result.workloads)
    shown = [(m, m) for m in every[:len(HEADLINE_SEVERAL) + len(result.workloads)] if m in part.index]
    for name in result.workloads:
        prefix = workload_prefix(name)
        own: Shown = [(prefix + m, m) for m in HEADLINE]
        own += [(prefix + column_name(("bias", "by_device_type", kind, "representation_ratio")),
                 f"{kind}: representation_ratio") for kind in result.type_names]
        shown += [(None, f"  workload {name} ({prefix}<column>):")] + [(m, n) for m, n in own if m in part.index]
    return shown


def _condition_lines(result: ComparisonResult, condition: Condition, every_metric: bool) -> list[str]:
    """One condition: the primary metrics, the secondary ones shown, the counts, the overall line."""
    d = result.differences
    part = d[d["condition"] == condition.code].set_index("metric", drop=False)
    primary: Shown = [(m, m) for m in result.primary if m in part.index]
    shown = [(m, n) for m, n in _shown(part, result, every_metric) if m not in result.primary]
    width = max([len(n) for m, n in primary + shown if m is not None] + [20])
    head = (f"  {'metric':<{width}} {'baseline':>10} {'candidate':>10}  {'difference [95% interval]':<34} "
            f"{'adj. p':>7}  verdict")
    lines = ["", f"{condition.text}:", f"  primary metrics (Holm; family-wise error {100 * ALPHA:g}%):", head]
    lines += [_row_text(part.loc[m], n, width) for m, n in primary]
    lines += ["", f"  secondary metrics (Benjamini-Hochberg; false discovery rate {100 * ALPHA:g}%):", head]
    for metric, name in shown:
        lines.append(name if metric is None else _row_text(part.loc[metric], name, width))
    counts = part["verdict"].value_counts()
    lines.append("  all metrics: " + ", ".join(f"{v} {k}" for k, v in counts.items())
                 + " (every metric in differences.csv, or rerun with --all)")
    lines.append(f"  overall: {result.overall[condition.code].text}")
    return lines


def _detection_lines(result: ComparisonResult) -> list[str]:
    texts = {c.code: c.text for c in result.conditions}
    lines = ["", f"seeds needed (paired t test, two-sided {100 * ALPHA:g}% level, power {result.power:g}; "
                 "noncentral t, Cohen 1988):"]
    for row in result.detections.itertuples():
        needed = "more than a million" if row.seeds_needed is pd.NA else f"{row.seeds_needed}"
        if not math.isfinite(row.sd_of_differences):
            needed = "unknown (needs at least 2 seeds to estimate the spread)"
        lines.append(f"  {row.metric} by {_num(row.change)} ({texts[row.condition]}): {needed} "
                     f"(sd of paired differences {_num(row.sd_of_differences)})")
    return lines


def render_compare(result: ComparisonResult, every_metric: bool = False) -> str:
    """The plain-text account of a comparison that ``fleetsim compare`` prints (verdicts worded
    from their codes by :func:`fleetsim.study.verdicts.verdict_text`)."""
    seeds = result.seeds
    pairing = ("the same seed for both arms (common random numbers)" if result.candidate_seed_offset == 0
               else f"candidate seeds offset by {result.candidate_seed_offset} (unpaired randomness)")
    runs = len({(r.condition, r.arm, r.run_seed) for r in result.runs.itertuples()})
    lines = [
        f"compare on {result.base.source}: {len(seeds)} seeds ({seeds[0]}..{seeds[-1]}), {pairing}",
        f"  baseline:  {result.baseline.label}",
        f"  candidate: {result.candidate.label}",
        f"  {runs} runs on {result.executor}; {result.reused} reused; {result.wall_s:.1f} s",
        "  differences are candidate - baseline, mean over seeds with 95% paired t intervals; adj. p is the "
        "p-value of no change after adjustment",
        *method_lines(result),
    ]
    if result.workloads:
        lines.append(f"  workloads {', '.join(result.workloads)}: each one's figures are workloads_<name>_<column>; "
                     "study_* are totals over them (docs/studies.md)")
    for condition in result.conditions:
        lines += _condition_lines(result, condition, every_metric)
    d = result.differences
    if len(result.conditions) > 1:
        lines += ["", "does the candidate still win under stress?"]
        prefixes = workload_prefixes(result.runs.columns)
        for metric in headline_metrics(result.workloads):
            verdicts = [f"{verdict_text(row.verdict, row.seeds)} {condition.text}"
                        for condition in result.conditions
                        for row in d[(d["condition"] == condition.code) & (d["metric"] == metric)].itertuples()]
            if verdicts and direction_of(metric, prefixes):
                lines.append(f"  {metric}: " + "; ".join(verdicts))
        lines += [f"  overall {c.text}: {result.overall[c.code].text}" for c in result.conditions]
    if not result.detections.empty:
        lines += _detection_lines(result)
    lines += ["", f"caution: {result.caution}"]
    return "\n".join(lines)


def comparison_record(result: ComparisonResult) -> dict[str, Any]:
    """The JSON-ready description of a comparison written to ``comparison.json``."""
    def verdicts(condition: str) -> dict[str, str]:
        part = result.differences[result.differences["condition"] == condition]
        return dict(zip(part["metric"], part["verdict"], strict=True))

    return {
        "kind": "compare",
        "fleetsim": __version__,
        "fleet_file": result.base.source,
        "overrides": list(result.base.overrides),
        "arms": [{"arm": arm.name, "settings": list(arm.overrides)} for arm in (result.baseline, result.candidate)],
        **({"workloads": result.workloads} if result.workloads else {}),
        "seeds": result.seeds,
        "candidate_seed_offset": result.candidate_seed_offset,
        "conditions": [{"condition": c.code, "stress_file": c.stress_file, "meaning": CONDITIONS[c.code]}
                       for c in result.conditions],
        "interval": f"{int(LEVEL * 100)}% paired Student t across seeds",
        "alpha": ALPHA,
        "power": result.power,
        "verdict_codes": VERDICTS,
        "verdicts": {c.code: verdicts(c.code) for c in result.conditions},
        "primary": list(result.primary),
        "role_codes": ROLES,
        "margins": [{"metric": m.metric, "margin": m.text, "relative": m.relative, "value": m.value}
                    for m in result.margins],
        "count_rates": dict(result.rate_of),
        "methods": methods(result),
        "design": design_record(result),
        "overall_codes": OVERALL,
        "overall": {c: {"verdict": o.verdict, "reason": o.reason, "primary": o.primary}
                    for c, o in result.overall.items()},
        "detections": json.loads(result.detections.to_json(orient="records")),
        "executor": result.executor,
        "runs_reused": result.reused,
        "wall_s": result.wall_s,
        "caution": result.caution,
    }


def write_compare(result: ComparisonResult, folder: str | Path) -> list[Path]:
    """Write runs, differences, comparison.json and comparison.md into ``folder``, each atomically.

    Raises FleetsimError when ``folder`` is not empty and not a fleetsim comparison folder (see
    :func:`fleetsim.output.claim_study`) or a file cannot be written.
    """
    from ..output import claim_study

    folder = Path(folder)
    claim_study(folder, "compare")
    written = []
    for frame, stem in ((result.runs, "runs"), (result.differences, "differences")):
        written += save_frame(frame, folder / stem)
    atomic_text(folder / "comparison.json", json.dumps(comparison_record(result), indent=2, default=str) + "\n")
    atomic_text(folder / "comparison.md", render_compare(result, every_metric=True) + "\n")
    return written + [folder / "comparison.json", folder / "comparison.md"]
