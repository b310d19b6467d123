"""A run's summary as one flat row, the study's derived metrics, and which way is better.

:func:`flatten_summary` turns the nested ``Result.summary`` into dotted columns
(``rounds.committed_per_hour``, ``bias.by_device_type.tablet.report_share``). Data-size
quartiles are keyed ``Q1``..``Q4`` (their sample bounds differ by seed). Counts by cause
that a run did not see are 0, not missing. Two columns are added:

- ``study.worst_representation``: min over device types of min(r, 1/r), r the type's
  representation ratio (report share / fleet share). 1 means every type reports in
  proportion to its fleet share; 0.5 means some type reports at half (or twice) its share.
  Maximising it maximises the representation ratio farthest from 1, measured on the ratio
  scale so that half and double count alike. A type with no reports gives 0; NaN when no
  round committed.
- ``study.worst_representation_type``: the device type that sets it.
"""

from __future__ import annotations

import difflib
import fnmatch
import math
from collections.abc import Iterable
from typing import Any, Literal

import pandas as pd

from ..errors import ConfigError

__all__ = [
    "WORST_REPRESENTATION",
    "PARETO_OBJECTIVES",
    "Direction",
    "flatten_summary",
    "frame_of_rows",
    "metric_columns",
    "direction_of",
    "resolve_metric",
    "improvement_sign",
    "shortfall",
]

WORST_REPRESENTATION = "study.worst_representation"

PARETO_OBJECTIVES: tuple[tuple[str, bool], ...] = (
    ("rounds.committed_per_hour", True),
    ("waste.compute_fraction", False),
    (WORST_REPRESENTATION, True),
)
"""The front's three objectives and whether each is maximised."""

Direction = Literal["higher", "lower", "closer-to-1"]

_SKIPPED = {"caution"}
_TEXT = {"scenario", "fleet_file", "config_hash", "policy", "horizon_start"}  # stay text, even when empty
_ZERO_WHEN_ABSENT = ("waste.by_cause.", "participations.dropouts_by_cause.", "participations.by_outcome.")

# Which way is better, by column pattern (first match wins). Everything else is neutral: shares,
# accepted counts, server load, test statistics. These are choices of this tool, stated in
# docs/studies.md; they are common practice, not taken from a source.
_DIRECTIONS: tuple[tuple[str, Direction], ...] = (
    ("rounds.committed", "higher"),
    ("rounds.committed_per_hour", "higher"),
    ("participations.used_reports", "higher"),
    ("bias.coverage", "higher"),
    (WORST_REPRESENTATION, "higher"),
    ("bias.*.representation_ratio", "closer-to-1"),
    ("bias.*.never_share", "lower"),
    ("bias.gini", "lower"),
    ("rounds.failed", "lower"),
    ("rounds.abandoned", "lower"),
    ("rounds.outage", "lower"),
    ("rounds.duration_s.*", "lower"),
    ("rounds.selection_s.*", "lower"),
    ("rounds.report_s.*", "lower"),
    ("waste.*", "lower"),
    ("participations.dropouts_by_cause.*", "lower"),
    ("participations.by_outcome.late", "lower"),
    ("participations.by_outcome.stopped", "lower"),
    ("participations.by_outcome.dropout", "lower"),
)


def _walk(prefix: str, value: Any, out: dict[str, Any]) -> None:
    if isinstance(value, dict):
        for key, inner in value.items():
            name = str(key)
            if prefix == "bias.by_data_quartile":
                name = name.split(" ", 1)[0]  # "Q1 (<= 64 samples)" -> "Q1"
            _walk(f"{prefix}.{name}" if prefix else name, inner, out)
    elif isinstance(value, (list, tuple)):
        for i, inner in enumerate(value):
            _walk(f"{prefix}.{i}", inner, out)
    elif prefix not in _SKIPPED:
        out[prefix] = math.nan if value is None and prefix not in _TEXT else value


def flatten_summary(summary: dict[str, Any]) -> dict[str, Any]:
    """One flat row of a run's summary plus the study's derived columns (see module doc)."""
    row: dict[str, Any] = {}
    _walk("", summary, row)
    worst, worst_type = math.nan, None
    types = summary.get("bias", {}).get("by_device_type", {})
    ratios = {name: v.get("representation_ratio") for name, v in types.items()}
    if ratios and all(r is not None and math.isfinite(r) for r in ratios.values()):
        for name, r in ratios.items():
            closeness = 0.0 if r <= 0 else min(r, 1.0 / r)
            if worst_type is None or closeness < worst:
                worst, worst_type = closeness, name
    row[WORST_REPRESENTATION] = worst
    row[f"{WORST_REPRESENTATION}_type"] = worst_type
    return row


def frame_of_rows(rows: list[dict[str, Any]]) -> pd.DataFrame:
    """Rows of flattened summaries as a frame; counts absent from a run become 0."""
    frame = pd.DataFrame.from_records(rows)
    for column in frame.columns:
        if column.startswith(_ZERO_WHEN_ABSENT):
            frame[column] = frame[column].fillna(0)
    return frame


def metric_columns(frame: pd.DataFrame, exclude: Iterable[str] = ()) -> list[str]:
    """The numeric metric columns of a table, in order (bookkeeping columns left out)."""
    skip = set(exclude) | {"seed", "cell"}
    return [
        c for c in frame.columns
        if c not in skip and not c.startswith("setting:")
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


def resolve_metric(name: str, known: Iterable[str], option: str) -> str:
    """The metric column ``name`` means: an exact column, or the one column ending in ``.name``.

    Raises ConfigError naming ``option`` when there is no such column or the short name is
    ambiguous, with the closest names.
    """
    columns = list(known)
    if name in columns:
        return name
    ends = [c for c in columns if c.endswith("." + name)]
    if len(ends) == 1:
        return ends[0]
    if len(ends) > 1:
        raise ConfigError([f"{option} {name!r}: matches several metrics ({', '.join(ends[:6])}); give the full name"])
    close = difflib.get_close_matches(name, columns, n=3, cutoff=0.5)
    hint = f"; did you mean {', '.join(close)}?" if close else "; see the columns of runs.csv or docs/studies.md"
    raise ConfigError([f"{option} {name!r}: no such metric{hint}"])
