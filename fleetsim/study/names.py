"""The metric names users type, and the names of earlier versions they replace.

A metric name (``--maximise``, ``--minimise``, ``--limit``, ``--detect``, ``--heatmap``) is a
study column (:func:`fleetsim.study.table.column_name`), such as
``rounds_committed_per_hour``, or the one column ending in ``_`` and the name given
(``committed_per_hour``). Earlier versions named columns by dotted key paths
(``rounds.committed_per_hour``) and some figures by other words (``rounds.failed``,
``waste.by_cause.stopped-at-close``, ``signal:idle``). Such a name is refused in one line
naming the column it became, so a script written for the old names stops instead of
studying something else. With several workloads a short name that ends one column per
workload (``committed_per_hour``) is ambiguous and refused with the candidates.
"""

from __future__ import annotations

import difflib
import re
from collections.abc import Iterable

from ..errors import ConfigError
from .table import absent_is_zero, column_name

__all__ = ["resolve_metric", "renamed", "OLD_PATHS", "OLD_CAUSES"]

OLD_PATHS: dict[str, str] = {
    "rounds.failed": "rounds.ended_by.report_deadline",
    "rounds.abandoned": "rounds.ended_by.selection_timeout",
    "rounds.outage": "rounds.ended_by.server_outage",
    "participations.by_outcome.reported": "participations.by_outcome.on_time",
    "bias.chi_square": "bias.chi_square_device_type",
    "bias.chi_square_p": "bias.chi_square_device_type_p",
    "bias.lorenz_gini": "bias.gini",
}
"""Key paths of earlier versions and the paths that replaced them. The old path written with
``_`` and its last part alone (``failed``) are refused too."""

OLD_CAUSES: dict[str, str] = {
    "signal:idle": "idle_ended",
    "signal:charging": "charging_ended",
    "signal:unmetered": "unmetered_ended",
    "battery": "battery_low",
    "os-limit": "execution_limit",
    "stopped-at-close": "stopped",
    "abandoned-round": "selection_timeout",
    "failed-round": "report_deadline",
}
"""Dropout and waste causes of earlier versions and the words that replaced them (``battery``
only as a cause: after ``by_cause`` or ``dropouts_by_cause``)."""

_DROPOUT_ONLY = ("signal:idle", "signal:charging", "signal:unmetered", "battery", "os-limit")
_CAUSE_KEYS = ("by_cause", "dropouts_by_cause")


def _written(word: str) -> str:
    return word.replace("-", "_").replace(":", "_")


# An old cause inside a name written with '_': its own segment(s), 'battery' only after a
# cause key and not already 'battery_low'.
_OLD_IN_TEXT = [
    (re.compile(r"(?<=by_cause_)battery(?!_low)(?=_|$)") if old == "battery"
     else re.compile(rf"(?:(?<=_)|^){re.escape(_written(old))}(?=_|$)"), new)
    for old, new in OLD_CAUSES.items()
]


def renamed(name: str) -> str | None:
    """The column (or short name) an old metric name stands for, or None if it holds no old form.

    Old forms: a dotted key path; a path of :data:`OLD_PATHS`, dotted, written with ``_`` or
    as its last part alone; a cause of :data:`OLD_CAUSES`, as a segment or written with ``_``.
    """
    for old, new in OLD_PATHS.items():
        if name in (old, column_name(old.split(".")), old.rsplit(".", 1)[-1]):
            return column_name(new.split("."))
    if name in OLD_CAUSES:  # a cause alone: a dropout count, or a waste cause
        where = "dropouts_by_cause" if name in _DROPOUT_ONLY else "waste_by_cause"
        return f"{where}_{OLD_CAUSES[name]}"
    if "." in name or ":" in name:
        out: list[str] = []
        for segment in name.split("."):
            if segment in OLD_CAUSES and (segment != "battery" or (out and out[-1] in _CAUSE_KEYS)):
                segment = OLD_CAUSES[segment]
            out.append(segment)
        return column_name(out)
    text = name.replace("-", "_")
    for pattern, new in _OLD_IN_TEXT:
        text = pattern.sub(new, text)
    return text if text != name.replace("-", "_") else None


def _match(name: str, columns: list[str], absent_zero: bool) -> list[str]:
    """The columns ``name`` names: itself, or those ending in ``_`` and ``name``."""
    if name in columns or (absent_zero and absent_is_zero(name, columns)):
        return [name]
    return [c for c in columns if c.endswith("_" + name)]


def resolve_metric(name: str, known: Iterable[str], option: str, absent_zero: bool = False) -> str:
    """The metric column ``name`` means: an exact column, or the one column ending in ``_name``.

    With ``absent_zero``, a count by cause or outcome that no run has seen yet is accepted as
    itself (:func:`fleetsim.study.table.absent_is_zero`). Raises ConfigError naming ``option``
    when ``name`` is an old name (naming its new column), no column, or an ambiguous short name
    (with the closest names).
    """
    columns = list(known)
    if name in columns or (absent_zero and absent_is_zero(name, columns)):
        return name
    new = renamed(name)
    if new is not None:
        found = _match(new, columns, absent_zero)
        if len(found) == 1:
            raise ConfigError([f"{option} {name}: renamed to {found[0]}"])
        close = difflib.get_close_matches(new, columns, n=3, cutoff=0.5)
        hint = f"; did you mean {', '.join(close)}?" if close else ""
        raise ConfigError([f"{option} {name}: no such metric; metrics are study columns, the key path "
                           f"joined with '_' ({new}){hint}"])
    ends = _match(name, columns, absent_zero)
    if len(ends) == 1:
        return ends[0]
    if len(ends) > 1:
        raise ConfigError([f"{option} {name}: matches several metrics ({', '.join(ends[:6])}); give the full name"])
    close = difflib.get_close_matches(name, columns, n=3, cutoff=0.5)
    hint = f"; did you mean {', '.join(close)}?" if close else "; see the columns of runs.csv or docs/studies.md"
    raise ConfigError([f"{option} {name}: no such metric{hint}"])
