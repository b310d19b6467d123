"""Several workloads on one fleet: each ``workloads`` entry's sections merged over the file's,
and each workload as a :class:`Job` (a Config of one workload)."""

from __future__ import annotations

from dataclasses import dataclass
from typing import Any

__all__ = ["MAIN", "Job", "merge_sections"]

MAIN = "main"
"""The name of a file's only workload when it lists no ``workloads``."""


@dataclass(frozen=True)
class Job:
    """One workload of a run: its ``name``, the run's Config with this workload's sections
    (and no ``workloads``), and its ``share`` of check-ins under ``sharing.rule: shares``."""

    name: str
    config: Any  # a fleetsim.config.Config (not imported: the models module builds jobs)
    share: float


_SECTIONS = ("workload", "rounds", "selection")


def _merged(base: Any, own: Any) -> Any:
    """``own`` over ``base``: mappings merge key by key; anything else in ``own`` replaces."""
    if isinstance(base, dict) and isinstance(own, dict):
        out = dict(base)
        for key, value in own.items():
            out[key] = _merged(base.get(key), value) if key in base else value
        return out
    return own


def merge_sections(value: Any) -> Any:
    """A raw file with each ``workloads`` entry's sections merged over the top-level ones.

    An entry's ``workload``, ``rounds`` and ``selection`` merge key by key over the file's
    sections of those names (an entry that leaves a section out takes it whole); a
    selection naming another policy than the top level's takes none of its ``params``.
    Merging a file already merged changes nothing."""
    if not isinstance(value, dict) or not isinstance(value.get("workloads"), dict):
        return value
    merged = {}
    for name, entry in value["workloads"].items():
        entry = {} if entry is None else entry
        if not isinstance(entry, dict):
            merged[name] = entry
            continue
        out = dict(entry)
        for section in _SECTIONS:
            base = value.get(section, {} if section == "selection" else None)
            own = entry.get(section, {})
            if section == "selection" and isinstance(base, dict) and isinstance(own, dict) and (
                    own.get("policy", base.get("policy")) != base.get("policy")):
                base = {key: item for key, item in base.items() if key != "params"}
            if isinstance(base, dict) and isinstance(own, dict):
                out[section] = _merged(base, own)
            elif section in entry or base is not None:
                out[section] = own if section in entry else base
        merged[name] = out
    return {**value, "workloads": merged}
