"""A run's summary as one flat row, the study's derived metrics, and which way is better.

:func:`flatten_summary` turns the nested ``Result.summary`` into columns named by
:func:`column_name`: the key path joined with ``_``, every ``-`` in a segment written ``_``
(``rounds_committed_per_hour``, ``waste_by_cause_idle_ended_compute_s``,
``bias_by_device_type_budget_phone_report_share``). Two key paths that would give one column
(device types ``budget-phone`` and ``budget_phone``, say) are an error naming both. Counts by
cause or outcome that a run did not see are 0, not missing. Two columns are added:

- ``study_worst_representation``: min over device types of min(r, 1/r), r the type's
  representation ratio (report share / fleet share). 1 means every type reports in
  proportion to its fleet share; 0.5 means some type reports at half (or twice) its share.
  Maximising it maximises the representation ratio farthest from 1, measured on the ratio
  scale so that half and double count alike. A type with no reports gives 0; NaN when no
  round committed.
- ``study_worst_representation_type``: the device type that sets it.

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

from ..errors import ConfigError
from ..events import CAUSES, OUTCOMES, WASTE_CAUSES, json_key

__all__ = [
    "WORST_REPRESENTATION",
    "WORST_REPRESENTATION_TYPE",
    "PARETO_OBJECTIVES",
    "ZERO_WHEN_ABSENT",
    "Direction",
    "column_name",
    "flatten_summary",
    "frame_of_rows",
    "metric_columns",
    "direction_of",
    "absent_is_zero",
    "improvement_sign",
    "shortfall",
]

WORST_REPRESENTATION = "study_worst_representation"
WORST_REPRESENTATION_TYPE = "study_worst_representation_type"

PARETO_OBJECTIVES: tuple[tuple[str, bool], ...] = (
    ("rounds_committed_per_hour", True),
    ("waste_compute_fraction", False),
    (WORST_REPRESENTATION, True),
)
"""The front's three objectives and whether each is maximised."""

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
    ("bias_coverage", "higher"),
    (WORST_REPRESENTATION, "higher"),
    ("bias_*_representation_ratio", "closer-to-1"),
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
)


def column_name(path: Sequence[str]) -> str:
    """The study column of a summary key path: segments joined with ``_``, each ``-`` written ``_``."""
    return "_".join(json_key(str(segment)) for segment in path)


def _walk(path: tuple[str, ...], value: Any, out: dict[str, tuple[tuple[str, ...], Any]]) -> None:
    if isinstance(value, dict):
        for key, inner in value.items():
            _walk((*path, str(key)), inner, out)
    elif isinstance(value, (list, tuple)):
        for i, inner in enumerate(value):
            _walk((*path, str(i)), inner, out)
    elif path and path[0] not in _SKIPPED:
        _add(out, path, math.nan if value is None and path[0] not in _TEXT else value)


def _add(out: dict[str, tuple[tuple[str, ...], Any]], path: tuple[str, ...], value: Any) -> None:
    column = column_name(path)
    if column in out:
        first = ".".join(out[column][0])
        raise ConfigError([f"{first} and {'.'.join(path)}: both would be the study column {column}; "
                           "rename one (names that differ only in '-' and '_' cannot both be studied)"])
    out[column] = (path, value)


def flatten_summary(summary: dict[str, Any]) -> dict[str, Any]:
    """One flat row of a run's summary plus the study's derived columns (see module doc).

    Raises ConfigError naming both key paths when two would give the same column.
    """
    found: dict[str, tuple[tuple[str, ...], Any]] = {}
    _walk((), summary, found)
    worst, worst_type = math.nan, None
    types = summary.get("bias", {}).get("by_device_type", {})
    ratios = {name: v.get("representation_ratio") for name, v in types.items()}
    if ratios and all(r is not None and math.isfinite(r) for r in ratios.values()):
        for name, r in ratios.items():
            closeness = 0.0 if r <= 0 else min(r, 1.0 / r)
            if worst_type is None or closeness < worst:
                worst, worst_type = closeness, name
    _add(found, ("study", "worst_representation"), worst)
    _add(found, ("study", "worst_representation_type"), worst_type)
    return {column: value for column, (_, value) in found.items()}


def absent_is_zero(column: str, known: Iterable[str] = ()) -> bool:
    """True when ``column`` counts a cause or outcome (see ZERO_WHEN_ABSENT) that a run may not
    have seen, so that its absence means 0. A waste column names one of the figures ``known``
    columns have for another cause (``waste_by_cause_crash_compute_s``)."""
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
    for column in frame.columns:
        if column.startswith(tuple(ZERO_WHEN_ABSENT)):
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


def direction_of(metric: str) -> Direction | None:
    """Which way ``metric`` is better: higher, lower, closer to 1, or None (neutral)."""
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
