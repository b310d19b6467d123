"""The study's derived columns of a run's summary (docs/studies.md defines each).

:func:`add_derived` adds them to the flat row :func:`fleetsim.study.table.flatten_summary`
builds: the worst representation by device type (min over types of min(r, 1/r), r the
report share / fleet share), then those of :data:`DERIVED` where the summary holds their
figures, and for a run of several workloads each workload's under its prefix and the totals
of :data:`SEVERAL_TOTALS`.
"""

from __future__ import annotations

import math
from collections.abc import Iterable, Sequence
from typing import Any

from ..errors import ConfigError
from ..events import json_key

__all__ = [
    "WORST_REPRESENTATION", "WORST_REPRESENTATION_TYPE", "WORST_REPRESENTATION_WORKLOAD", "SEVERAL_COMMITTED",
    "SEVERAL_WASTE", "SEVERAL_WASTE_WORKLOAD", "SEVERAL_TOTALS", "USED_REPORTS_PER_HOUR", "USED_EXAMPLES_PER_HOUR",
    "WEIGHT_PER_HOUR", "ABANDONED_SHARE", "FAILED_SHARE", "WORST_GROUP", "WORST_GROUP_GROUPING", "WORST_GROUP_NAME",
    "WORST_GROUP_WORKLOAD", "GROUPINGS", "DERIVED", "column_name", "add_column", "is_several", "add_derived",
]

WORST_REPRESENTATION = "study_worst_representation"
WORST_REPRESENTATION_TYPE = "study_worst_representation_type"

WORST_REPRESENTATION_WORKLOAD = "study_worst_representation_workload"
SEVERAL_COMMITTED = "study_rounds_committed_per_hour"
SEVERAL_WASTE = "study_worst_waste_compute_fraction"
SEVERAL_WASTE_WORKLOAD = "study_worst_waste_compute_fraction_workload"
SEVERAL_TOTALS = (SEVERAL_COMMITTED, SEVERAL_WASTE, WORST_REPRESENTATION)
"""The totals over workloads a run of several workloads adds (see the module doc)."""

USED_REPORTS_PER_HOUR = "study_used_reports_per_hour"
USED_EXAMPLES_PER_HOUR = "study_used_examples_per_hour"
WEIGHT_PER_HOUR = "study_weight_per_hour"
ABANDONED_SHARE = "study_abandoned_share"
FAILED_SHARE = "study_failed_share"
WORST_GROUP = "study_worst_group_representation"
WORST_GROUP_GROUPING = "study_worst_group_representation_grouping"
WORST_GROUP_NAME = "study_worst_group_representation_group"
WORST_GROUP_WORKLOAD = "study_worst_group_representation_workload"
GROUPINGS = ("device_type", "region", "data_quartile", "type_and_region")
"""The bias groupings (``bias.by_<grouping>``) :data:`WORST_GROUP` reads, in order; the last
only when the summary holds it."""
DERIVED = (USED_REPORTS_PER_HOUR, USED_EXAMPLES_PER_HOUR, WEIGHT_PER_HOUR, ABANDONED_SHARE, FAILED_SHARE,
           WORST_GROUP)
"""The derived numeric columns beyond the worst representation by device type."""


def column_name(path: Sequence[str]) -> str:
    """The study column of a summary key path: segments joined with ``_``, each ``-`` written ``_``."""
    return "_".join(json_key(str(segment)) for segment in path)


def _add(out: dict[str, tuple[tuple[str, ...], Any]], path: tuple[str, ...], value: Any) -> None:
    column = column_name(path)
    if column in out:
        first = ".".join(out[column][0])
        raise ConfigError([f"{first} and {'.'.join(path)}: both would be the study column {column}; "
                           "rename one (names that differ only in '-' and '_' cannot both be studied)"])
    out[column] = (path, value)


def is_several(summary: dict[str, Any]) -> bool:
    """True for the summary of a run of several workloads (a ``sharing`` block and ``workloads``)."""
    return isinstance(summary.get("workloads"), dict) and isinstance(summary.get("sharing"), dict)


def _worst_representation(summary: dict[str, Any]) -> tuple[float, str | None]:
    """min over device types of min(r, 1/r) and the type that sets it (NaN, None when a ratio
    is undefined)."""
    worst, worst_type = math.nan, None
    types = summary.get("bias", {}).get("by_device_type", {})
    ratios = {name: v.get("representation_ratio") for name, v in types.items()}
    if ratios and all(r is not None and math.isfinite(r) for r in ratios.values()):
        for name, r in ratios.items():
            closeness = 0.0 if r <= 0 else min(r, 1.0 / r)
            if worst_type is None or closeness < worst:
                worst, worst_type = closeness, name
    return worst, worst_type


def _worst_of(figures: dict[str, float], pick: Any) -> str | None:
    """The workload ``pick`` (max or min) chooses among ``figures``, the earlier of equals; None
    when any figure is undefined."""
    if not figures or not all(math.isfinite(v) for v in figures.values()):
        return None
    return pick(figures, key=figures.__getitem__)


def _at(part: Any, *keys: str) -> Any:
    """The value at ``keys`` inside nested mappings, or None."""
    for key in keys:
        part = part.get(key) if isinstance(part, dict) else None
    return part


def _number(value: Any) -> float:
    return float(value) if isinstance(value, (int, float)) and not isinstance(value, bool) else math.nan


def _per(numerator: float, denominator: float) -> float:
    return numerator / denominator if math.isfinite(denominator) and denominator > 0 else math.nan


def _groups(table: dict[str, Any], trail: tuple[str, ...] = ()) -> Iterable[tuple[str, dict[str, Any]]]:
    """The groups of a bias table, however deep it nests (type x region: ``type / region``)."""
    for key, value in table.items():
        if isinstance(value, dict) and "representation_ratio" in value:
            yield " / ".join((*trail, str(key))), value
        elif isinstance(value, dict):
            yield from _groups(value, (*trail, str(key)))


def _worst_group(bias: dict[str, Any]) -> tuple[float, str | None, str | None]:
    """min of min(r, 1/r) over every group of every grouping of :data:`GROUPINGS` the summary
    holds, with the grouping and group that set it (the first of equals). A group without
    devices (fleet share 0) is passed over; any other undefined ratio makes it NaN."""
    worst: tuple[float, str | None, str | None] = (math.nan, None, None)
    for grouping in GROUPINGS:
        table = bias.get("by_" + grouping)
        for name, figures in _groups(table) if isinstance(table, dict) else ():
            if _number(figures.get("fleet_share")) == 0:
                continue
            r = _number(figures.get("representation_ratio"))
            if not math.isfinite(r):
                return math.nan, None, None
            closeness = 0.0 if r <= 0 else min(r, 1.0 / r)
            if worst[1] is None or closeness < worst[0]:
                worst = (closeness, grouping, name)
    return worst


def _derived(part: dict[str, Any], hours: float) -> list[tuple[str, Any]]:
    """The :data:`DERIVED` columns (and the worst group's names) of one workload's figures,
    each only when the figures it is computed from are there (see docs/studies.md)."""
    out: list[tuple[str, Any]] = []
    processed, wasted = _at(part, "waste", "examples_processed"), _at(part, "waste", "examples")
    for column, figure in ((USED_REPORTS_PER_HOUR, _at(part, "participations", "used_reports")),
                           (USED_EXAMPLES_PER_HOUR, None if wasted is None else _number(processed) - _number(wasted)),
                           (WEIGHT_PER_HOUR, _at(part, "participations", "used_weight"))):
        if figure is not None:
            out.append((column, _per(_number(figure), hours)))
    attempted, ended = _at(part, "rounds", "attempted"), _at(part, "rounds", "ended_by")
    if attempted is not None and isinstance(ended, dict):
        failed = _number(ended.get("report_deadline", 0)) + _number(ended.get("unmasking_failed", 0))
        out.append((ABANDONED_SHARE, _per(_number(ended.get("selection_timeout", 0)), _number(attempted))))
        out.append((FAILED_SHARE, _per(failed, _number(attempted))))
    bias = part.get("bias")
    if isinstance(bias, dict) and all(isinstance(bias.get(f"by_{g}"), dict) for g in GROUPINGS[:3]):
        value, grouping, group = _worst_group(bias)
        out.extend([(WORST_GROUP, value), (WORST_GROUP_GROUPING, grouping), (WORST_GROUP_NAME, group)])
    return out


def _add_derived(found: dict[str, tuple[tuple[str, ...], Any]], parts: dict[str, dict[str, Any]],
                 hours: float) -> None:
    """A run of several workloads: each workload's derived columns under its prefix, then the
    totals: rates summed, the worst group over the workloads (with the workload)."""
    own = {name: dict(_derived(part, hours)) for name, part in parts.items()}
    for name, columns in own.items():
        for column, value in columns.items():
            _add(found, ("workloads", name, column), value)
    for column in (USED_REPORTS_PER_HOUR, USED_EXAMPLES_PER_HOUR, WEIGHT_PER_HOUR):
        if all(column in columns for columns in own.values()):
            _add(found, (column,), math.fsum(columns[column] for columns in own.values()))
    if all(WORST_GROUP in columns for columns in own.values()):
        worst = _worst_of({n: columns[WORST_GROUP] for n, columns in own.items()}, min)
        pick = own[worst] if worst is not None else {}
        for column in (WORST_GROUP, WORST_GROUP_GROUPING, WORST_GROUP_NAME):
            _add(found, (column,), pick.get(column, math.nan if column == WORST_GROUP else None))
        _add(found, (WORST_GROUP_WORKLOAD,), worst)


def _add_totals(found: dict[str, tuple[tuple[str, ...], Any]], parts: dict[str, dict[str, Any]]) -> None:
    """The totals over the workloads of a run of several (:data:`SEVERAL_TOTALS`): the sum of
    committed rounds per hour, the worst compute waste fraction and the worst representation,
    each NaN when any workload's figure is undefined."""
    committed = [_number(_at(part, "rounds", "committed_per_hour")) for part in parts.values()]
    _add(found, ("study", "rounds_committed_per_hour"), math.fsum(committed))
    waste = {name: _number(_at(part, "waste", "compute_fraction")) for name, part in parts.items()}
    name = _worst_of(waste, max)
    _add(found, ("study", "worst_waste_compute_fraction"), waste[name] if name is not None else math.nan)
    _add(found, ("study", "worst_waste_compute_fraction_workload"), name)
    own = {name: found[column_name(("workloads", name, "study", "worst_representation"))][1] for name in parts}
    name = _worst_of(own, min)
    kind = found[column_name(("workloads", name, "study", "worst_representation_type"))][1] \
        if name is not None else None
    _add(found, ("study", "worst_representation"), own[name] if name is not None else math.nan)
    _add(found, ("study", "worst_representation_type"), kind)
    _add(found, ("study", "worst_representation_workload"), name)


def add_derived(found: dict[str, tuple[tuple[str, ...], Any]], summary: dict[str, Any]) -> None:
    """Add the derived columns of ``summary`` to the flat row ``found`` (column -> (key path, value))."""
    hours = _number(summary.get("simulated_hours"))
    if not is_several(summary):
        worst, worst_type = _worst_representation(summary)
        _add(found, ("study", "worst_representation"), worst)
        _add(found, ("study", "worst_representation_type"), worst_type)
        for column, value in _derived(summary, hours):
            _add(found, (column,), value)
        return
    parts = {str(name): part for name, part in summary["workloads"].items() if isinstance(part, dict)}
    for name, part in parts.items():
        worst, worst_type = _worst_representation(part)
        _add(found, ("workloads", name, "study", "worst_representation"), worst)
        _add(found, ("workloads", name, "study", "worst_representation_type"), worst_type)
    _add_totals(found, parts)
    _add_derived(found, parts, hours)


add_column = _add
