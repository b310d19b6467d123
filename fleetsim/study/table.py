"""A run's summary as one flat row, the study's derived metrics, and which way is better.

:func:`flatten_summary` turns the nested ``Result.summary`` into columns named by
:func:`column_name`: the key path joined with ``_``, every ``-`` in a segment written ``_``
(``rounds_committed_per_hour``, ``bias_by_device_type_budget_phone_report_share``). Two key
paths that would give one column (device types ``budget-phone`` and ``budget_phone``) are an
error naming both. Counts by cause or outcome that a run did not see are 0, not missing.

Derived columns (docs/studies.md defines each): ``study_worst_representation``, min over
device types of min(r, 1/r) with r the type's representation ratio (report share / fleet
share), so that half and double count alike (a type with no reports gives 0; NaN when no
round committed), and ``study_worst_representation_type`` naming the type; then those of
:data:`DERIVED`, each added when the summary holds the figures it is computed from: used
reports and used examples per hour (FedAvg weight per hour when the summary holds
``participations.used_weight``), the shares of rounds abandoned at the selection timeout and
failed, and the worst representation over every grouping of :data:`GROUPINGS`, naming the
grouping and the group.

A run of several workloads nests each workload's figures under ``workloads.<name>`` (columns
``workloads_<name>_<column>``) and adds a ``sharing`` block (``sharing_desk_share_ranking``).
The derived columns are computed for each workload under its prefix, and the run gets totals
(:data:`SEVERAL_TOTALS`, the front's objectives, :data:`PARETO_OBJECTIVES_SEVERAL`): the sum of
committed rounds per hour, the largest compute waste fraction and the smallest worst
representation (with the columns naming the workload and type), and also the summed rates
and the worst group over the workloads. A total is NaN when any workload's figure is.

The metric names users type (``--maximise``, ``--limit``, ``--detect``, ``--heatmap``) are
these columns; :func:`resolve_metric` refuses the dotted names and old words of earlier
versions in one line naming the new column (see :mod:`fleetsim.study.names`).
"""

from __future__ import annotations

import fnmatch
import math
from collections.abc import Iterable, Sequence
from typing import Any, Literal

import pandas as pd

from ..events import CAUSES, OUTCOMES, WASTE_CAUSES, json_key
from .derived import (
    ABANDONED_SHARE,
    DERIVED,
    FAILED_SHARE,
    GROUPINGS,
    SEVERAL_COMMITTED,
    SEVERAL_TOTALS,
    SEVERAL_WASTE,
    SEVERAL_WASTE_WORKLOAD,
    USED_EXAMPLES_PER_HOUR,
    USED_REPORTS_PER_HOUR,
    WEIGHT_PER_HOUR,
    WORST_GROUP,
    WORST_GROUP_GROUPING,
    WORST_GROUP_NAME,
    WORST_GROUP_WORKLOAD,
    WORST_REPRESENTATION,
    WORST_REPRESENTATION_TYPE,
    WORST_REPRESENTATION_WORKLOAD,
    add_derived,
    column_name,
    is_several,
)
from .derived import add_column as _add

__all__ = [
    "WORST_REPRESENTATION", "WORST_REPRESENTATION_TYPE", "WORST_REPRESENTATION_WORKLOAD", "SEVERAL_COMMITTED",
    "SEVERAL_WASTE", "SEVERAL_WASTE_WORKLOAD", "SEVERAL_TOTALS", "PARETO_OBJECTIVES", "PARETO_OBJECTIVES_SEVERAL",
    "WORKLOADS_PREFIX", "USED_REPORTS_PER_HOUR", "USED_EXAMPLES_PER_HOUR", "WEIGHT_PER_HOUR", "ABANDONED_SHARE",
    "FAILED_SHARE", "WORST_GROUP", "WORST_GROUP_GROUPING", "WORST_GROUP_NAME", "WORST_GROUP_WORKLOAD", "GROUPINGS",
    "DERIVED", "is_several", "workload_prefix", "workload_prefixes", "split_workload", "ZERO_WHEN_ABSENT",
    "Direction", "column_name", "flatten_summary", "frame_of_rows", "metric_columns", "direction_of",
    "absent_is_zero", "improvement_sign", "shortfall",
]

WORKLOADS_PREFIX = "workloads_"
"""Every column of one workload of a run of several starts with this and the workload's name."""

PARETO_OBJECTIVES: tuple[tuple[str, bool], ...] = (
    ("rounds_committed_per_hour", True),
    ("waste_compute_fraction", False),
    (WORST_REPRESENTATION, True),
)
"""The front's three objectives and whether each is maximised."""

PARETO_OBJECTIVES_SEVERAL: tuple[tuple[str, bool], ...] = (
    (SEVERAL_COMMITTED, True),
    (SEVERAL_WASTE, False),
    (WORST_REPRESENTATION, True),
)
"""The front's objectives for several workloads: the totals over the workloads."""

Direction = Literal["higher", "lower", "closer-to-1"]

_SKIPPED = {"caution"}
_TEXT = {"scenario", "fleet_file", "config_hash", "policy", "horizon_start"}  # stay text, even when empty

ZERO_WHEN_ABSENT: dict[str, tuple[str, ...]] = {
    "waste_by_cause_": tuple(json_key(c) for c in WASTE_CAUSES if c != "used"),
    "participations_dropouts_by_cause_": tuple(json_key(c) for c in CAUSES[1:]),
    "participations_by_outcome_": tuple(json_key(o) for o in OUTCOMES),
}
"""Column prefixes of counts by cause or outcome, with the words that may follow: a run that
saw none of a cause has no such key, and its column is 0."""

# Which way is better, by column pattern (first match wins; None: neutral). Everything else is
# neutral: shares, accepted counts, server load, test statistics. These are choices of this
# tool, stated in docs/studies.md; they are common practice, not taken from a source.
_DIRECTIONS: tuple[tuple[str, Direction | None], ...] = (
    ("rounds_committed", "higher"),
    ("rounds_committed_per_hour", "higher"),
    ("participations_used_reports", "higher"),
    ("participations_used_weight", "higher"),
    ("bias_coverage", "higher"),
    (WORST_REPRESENTATION, "higher"),
    (SEVERAL_COMMITTED, "higher"),
    (USED_REPORTS_PER_HOUR, "higher"),
    (USED_EXAMPLES_PER_HOUR, "higher"),
    (WEIGHT_PER_HOUR, "higher"),
    (WORST_GROUP, "higher"),
    (ABANDONED_SHARE, "lower"),
    (FAILED_SHARE, "lower"),
    (SEVERAL_WASTE, "lower"),
    ("bias_*_representation_ratio", "closer-to-1"),
    ("bias_*_weight_ratio", "closer-to-1"),
    ("bias_*_never_share", "lower"),
    ("bias_gini", "lower"),
    ("rounds_ended_by_*", "lower"),
    ("rounds_duration_s_*", "lower"),
    ("rounds_selection_s_*", "lower"),
    ("rounds_report_s_*", "lower"),
    # Totals of work done, used or not, are the size of the run, not waste: neutral.
    ("waste_examples_processed", None),
    ("waste_*", "lower"),
    ("participations_dropouts_by_cause_*", "lower"),
    ("participations_by_outcome_late", "lower"),
    ("participations_by_outcome_stopped", "lower"),
    ("participations_by_outcome_dropout", "lower"),
    # The model a run's rounds train (a study's runs with an ``impact`` section) and the
    # privacy each device spends (a workload with ``privacy``): docs/impact.md.
    ("impact_gap", "lower"),
    ("impact_*accuracy", "higher"),
    ("impact_*loss", "lower"),
    ("privacy_*epsilon*", "lower"),
    ("privacy_devices_over_uniform_claim", "lower"),
)


def _walk(path: tuple[str, ...], value: Any, out: dict[str, tuple[tuple[str, ...], Any]]) -> None:
    if isinstance(value, dict):
        for key, inner in value.items():
            _walk((*path, str(key)), inner, out)
    elif isinstance(value, (list, tuple)):
        for i, inner in enumerate(value):
            _walk((*path, str(i)), inner, out)
    elif path and path[0] not in _SKIPPED:
        _add(out, path, math.nan if value is None and path[0] not in _TEXT else value)


def flatten_summary(summary: dict[str, Any]) -> dict[str, Any]:
    """One flat row of a run's summary plus the study's derived columns (see module doc).

    For a run of several workloads the derived columns are computed for each workload, under
    its ``workloads_<name>_`` prefix, and the totals of :data:`SEVERAL_TOTALS` are added.
    Raises ConfigError naming both key paths when two would give the same column.
    """
    found: dict[str, tuple[tuple[str, ...], Any]] = {}
    _walk((), summary, found)
    add_derived(found, summary)
    return {column: value for column, (_, value) in found.items()}


_MARKER = WORST_REPRESENTATION  # every workload of a run of several has workloads_<name>_<_MARKER>


def workload_prefix(name: str) -> str:
    """The prefix of one workload's columns: ``workloads_`` and the name written as a column."""
    return column_name(("workloads", name)) + "_"


def workload_prefixes(columns: Iterable[str]) -> list[str]:
    """The ``workloads_<name>_`` prefixes of the workloads among ``columns`` (found from the
    ``workloads_<name>_study_worst_representation`` column :func:`flatten_summary` always adds),
    longest first; empty for a single workload."""
    found = {c[: -len(_MARKER)] for c in columns if c.startswith(WORKLOADS_PREFIX) and c.endswith("_" + _MARKER)}
    return sorted(found, key=lambda p: (-len(p), p))


def split_workload(column: str, prefixes: Sequence[str]) -> tuple[str, str]:
    """``(prefix, rest)`` of a workload's column (the longest matching prefix of ``prefixes``),
    or ``("", column)`` for a column of the whole run."""
    for prefix in prefixes:
        if column.startswith(prefix) and len(column) > len(prefix):
            return prefix, column[len(prefix):]
    return "", column


def absent_is_zero(column: str, known: Iterable[str] = ()) -> bool:
    """True when ``column`` counts a cause or outcome (see ZERO_WHEN_ABSENT) that a run may not
    have seen, so that its absence means 0. A waste column names one of the figures ``known``
    columns have for another cause (``waste_by_cause_crash_compute_s``). A workload's column
    (``workloads_<name>_...``, the workload among ``known``) is judged without its prefix,
    against that workload's ``known`` columns."""
    known = list(known)
    own, column = split_workload(column, workload_prefixes(known))
    if own:
        known = [c[len(own):] for c in known if c.startswith(own)]
    for prefix, words in ZERO_WHEN_ABSENT.items():
        if not column.startswith(prefix):
            continue
        rest = column[len(prefix):]
        if prefix != "waste_by_cause_":
            return rest in words
        figures = {c[len(prefix) + len(w) + 1:] for c in known for w in words if c.startswith(f"{prefix}{w}_")}
        return any(rest.startswith(f"{w}_") and rest[len(w) + 1:] in figures for w in words)
    return False


def frame_of_rows(rows: list[dict[str, Any]]) -> pd.DataFrame:
    """Rows of flattened summaries as a frame; counts absent from a run become 0."""
    frame = pd.DataFrame.from_records(rows)
    prefixes = workload_prefixes(frame.columns)
    for column in frame.columns:
        if split_workload(column, prefixes)[1].startswith(tuple(ZERO_WHEN_ABSENT)):
            frame[column] = frame[column].fillna(0)
    return frame


def metric_columns(frame: pd.DataFrame, exclude: Iterable[str] = ()) -> list[str]:
    """The numeric metric columns of a table, in order (bookkeeping columns left out)."""
    skip = set(exclude) | {"seed", "cell"}
    return [
        c for c in frame.columns
        if c not in skip and not c.startswith("setting_")
        and pd.api.types.is_numeric_dtype(frame[c]) and not pd.api.types.is_bool_dtype(frame[c])
    ]


def direction_of(metric: str, prefixes: Sequence[str] | None = None) -> Direction | None:
    """Which way ``metric`` is better: higher, lower, closer to 1, or None (neutral).

    A workload's column is judged as the same column of a single workload. ``prefixes``
    (:func:`workload_prefixes` of the study's columns) tells where its workload's name ends;
    without them any ``workloads_<name>_`` is taken off, which misjudges only names holding a
    pattern's first word (``x_waste``).
    """
    if prefixes is not None:
        metric = split_workload(metric, prefixes)[1]
    elif metric.startswith(WORKLOADS_PREFIX):
        for pattern, direction in _DIRECTIONS:
            if fnmatch.fnmatchcase(metric, f"{WORKLOADS_PREFIX}*_{pattern}"):
                return direction
        return None
    for pattern, direction in _DIRECTIONS:
        if fnmatch.fnmatchcase(metric, pattern):
            return direction
    return None


def shortfall(ratio: Any) -> Any:
    """Distance of a representation ratio from 1 on the ratio scale: 1 - min(r, 1/r), in [0, 1]."""
    import numpy as np

    r = np.asarray(ratio, dtype=float)
    with np.errstate(divide="ignore", invalid="ignore"):
        close = np.where(r > 0, np.minimum(r, 1.0 / r), 0.0)
    close = np.where(np.isfinite(r), close, np.nan)
    return 1.0 - close


def improvement_sign(direction: Direction | None) -> int:
    """+1 when a larger value is better, -1 when smaller is better, 0 when neutral.

    Closer-to-1 metrics are judged on their :func:`shortfall`, where smaller is better.
    """
    return {"higher": 1, "lower": -1, "closer-to-1": -1, None: 0}[direction]
