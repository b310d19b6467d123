"""What each kind of fleetsim output folder may hold, and its marker.

Every folder fleetsim writes carries the marker file :data:`MARKER`; :func:`foreign` lists the
entries of such a folder that fleetsim would not have written, so that replacing it never
removes a file someone else put there (:mod:`fleetsim.output.folders` holds the rules).
"""

from __future__ import annotations

import json
import os
import re
from pathlib import Path
from typing import Any

__all__ = ["MARKER", "read_marker", "foreign"]

MARKER = ".fleetsim-output"
"""Name of the marker file in every folder fleetsim writes: JSON with kind, version and time."""


def read_marker(folder: str | Path) -> dict[str, Any] | None:
    """The marker of ``folder`` as a dict with a string ``kind``, or None when it has none."""
    path = Path(folder) / MARKER
    try:
        if path.is_symlink() or not path.is_file():
            return None
        data = json.loads(path.read_text(encoding="utf-8"))
    except (OSError, ValueError):
        return None
    return data if isinstance(data, dict) and isinstance(data.get("kind"), str) else None


# What a folder of each kind may hold (anything else was put there by someone else): names
# at the top, and the file name patterns allowed in each subfolder.
_RUN_FILES = {"summary.json", "config.json", "events.parquet", "rounds.parquet", "census.parquet",
              "report.html", "report.md", "impact.json"}
_STUDY_FILES = {"front.csv", "study.json", "study.md", "comparison.json", "comparison.md", "frontier.png",
                "frontier.svg", *(f"{stem}.{ext}" for stem in ("runs", "cell_means", "differences")
                                  for ext in ("parquet", "csv"))}
_SUBFOLDERS = {"run": {"tables": re.compile(r"[^/]+\.csv")},
               "study": {"cells": re.compile(r"[0-9a-f]+\.json"), "heatmaps": re.compile(r"[^/]+\.(png|svg)")}}
_TELEMETRY_FILES = {"telemetry.json", *(f"{stem}.{ext}" for stem in ("intervals", "snapshots", "traits", "tasks")
                                         for ext in ("csv", "parquet"))}
_WORKLOADS = "workloads"  # a run of several workloads: one run folder per workload under it
_TEMPORARY = re.compile(r"\.partial-.*|\..+\.partial")  # atomic_text, atomic_save and the report's temporary files


def foreign(where: Path, kind: str) -> list[str]:
    """Entries of the fleetsim folder ``where`` (of ``kind``) that fleetsim would not have written."""
    if kind == "telemetry":
        return _foreign_in(where, _TELEMETRY_FILES, {}, nested=False)
    if kind == "seeds":
        return _foreign_seeds(where)
    group = "run" if kind == "run" else "study"
    files = _RUN_FILES if group == "run" else _STUDY_FILES
    return _foreign_in(where, files, _SUBFOLDERS[group], nested=group == "run")


def _foreign_in(where: Path | str, files: set[str], subfolders: dict[str, re.Pattern[str]], nested: bool,
                prefix: str = "") -> list[str]:
    """:func:`_foreign` for one folder; ``nested``: it may hold ``workloads/NAME/``, each a run
    folder of one workload (without a marker or further workloads)."""
    extra = []
    for entry in sorted(os.scandir(where), key=lambda e: e.name):
        if (entry.name == MARKER and not prefix) or _TEMPORARY.fullmatch(entry.name):
            continue
        if entry.is_symlink():
            extra.append(prefix + entry.name)
        elif nested and entry.name == _WORKLOADS and entry.is_dir():
            for child in sorted(os.scandir(entry.path), key=lambda e: e.name):
                inner = f"{prefix}{entry.name}/{child.name}"
                if child.is_symlink() or not child.is_dir():
                    extra.append(inner)
                else:
                    extra += _foreign_in(child.path, files, subfolders, False, inner + "/")
        elif entry.name in subfolders and entry.is_dir():
            pattern = subfolders[entry.name]
            for child in sorted(os.scandir(entry.path), key=lambda e: e.name):
                if child.is_symlink() or not child.is_file() or not (
                        pattern.fullmatch(child.name) or _TEMPORARY.fullmatch(child.name)):
                    extra.append(f"{prefix}{entry.name}/{child.name}")
        elif entry.name not in files or not entry.is_file():
            extra.append(prefix + entry.name)
    return extra


_SEEDS_FILES = {"summary.json", "report.html", "report.md"}
_SEEDS = "seeds"  # a multi-seed run: one run folder per seed under it, each with its own marker


def _foreign_seeds(where: Path) -> list[str]:
    """:func:`_foreign` for a multi-seed run folder: its top files and ``seeds/SEED/``, each a
    run folder carrying the marker of a run."""
    extra = [name for name in _foreign_in(where, _SEEDS_FILES | {_SEEDS}, {}, nested=False) if name != _SEEDS]
    folder = where / _SEEDS
    if folder.is_symlink() or not folder.is_dir():
        return extra + ([_SEEDS] if os.path.lexists(folder) else [])
    for child in sorted(os.scandir(folder), key=lambda e: e.name):
        inner = f"{_SEEDS}/{child.name}"
        marker = read_marker(child.path) if child.is_dir(follow_symlinks=False) else None
        if child.is_symlink() or not re.fullmatch(r"[0-9]+", child.name) or marker is None or marker["kind"] != "run":
            extra.append(inner)
        else:
            extra += [f"{inner}/{name}" for name in _foreign_in(child.path, _RUN_FILES, _SUBFOLDERS["run"], True)]
    return extra
