"""Reading a run folder of several workloads for the report.

Such a folder (``fleetsim run`` of a fleet file with ``workloads``) holds at its top the
summary of the whole run (its ``sharing`` block and each workload's figures under
``workloads``), the competition tables ``tables/competition_by_device_type.csv`` and
``tables/competition_by_region.csv``, and under ``workloads/NAME/`` a complete run folder of
each workload alone, which the single-workload report reads as it reads any run folder.
Every problem is a :class:`~fleetsim.errors.FleetsimError` whose one-line message names the
file and what is wrong with it.
"""

from __future__ import annotations

import json
from dataclasses import dataclass
from pathlib import Path
from typing import Any

import pandas as pd

from ..errors import FleetsimError
from ..output import safe_name
from ..output.run import WORKLOADS
from .rundir import RunFolder, _check_events, _read_config, _read_json, _read_table, read_run_folder

__all__ = ["SeveralFolder", "read_several_folder", "is_several", "COMPETITION_GROUPINGS"]

COMPETITION_GROUPINGS = {"device_type": "competition_by_device_type", "region": "competition_by_region"}
"""Grouping column -> table name of the competition tables."""

_COMPETITION_COLUMNS = ("workload", "devices", "fleet_share", "accepted", "reports", "accepted_share",
                        "report_share_of_group", "report_share")

_HEADER_KEYS = ("scenario", "seed", "config_hash", "policy", "devices", "horizon_start", "simulated_hours", "caution",
                "sharing.rule", "sharing.workloads", "sharing.shares", "sharing.desk_share",
                "sharing.reporting_devices", "sharing.reported_for_several", "workloads")

_PART_KEYS = (("rounds", "committed"), ("rounds", "committed_per_hour"))
"""Keys of each workload's block under summary.json's ``workloads`` that the report reads."""


@dataclass(frozen=True)
class SeveralFolder:
    """The parts of a run folder of several workloads the report uses.

    ``tables`` maps ``competition_by_device_type`` and ``competition_by_region`` to their
    DataFrames; ``parts`` holds (workload name, its run folder) in the order of
    ``sharing.workloads`` (the priority order under ``sharing.rule: priority``).
    """

    path: Path
    summary: dict[str, Any]
    tables: dict[str, pd.DataFrame]
    parts: list[tuple[str, RunFolder]]

    @property
    def names(self) -> list[str]:
        return [name for name, _ in self.parts]


def is_several(folder: str | Path) -> bool:
    """Whether ``folder`` holds a run of several workloads: its summary.json has ``sharing`` or ``workloads``.

    Anything unreadable answers False, leaving the error to the single-workload reader
    (which names the problem as it always has).
    """
    try:
        data = json.loads((Path(folder) / "summary.json").read_text(encoding="utf-8"))
    except (OSError, ValueError):
        return False
    return isinstance(data, dict) and ("sharing" in data or "workloads" in data)


def _names(summary: dict[str, Any], path: Path) -> list[str]:
    """The workload names of ``sharing.workloads``, checked against the rest of the summary."""
    names = summary["sharing"]["workloads"]
    if not isinstance(names, list) or not names or not all(isinstance(n, str) for n in names) \
            or len(set(names)) != len(names):
        raise FleetsimError(f"{path}: 'sharing.workloads' should list each workload's name once (got "
                            f"{json.dumps(names)[:80]})")
    blocks = summary["workloads"]
    desk = summary["sharing"]["desk_share"]
    for name in names:
        if not isinstance(blocks, dict) or not isinstance(blocks.get(name), dict):
            raise FleetsimError(f"{path}: lacks 'workloads.{name}' for the workload in 'sharing.workloads'")
        if not isinstance(desk, dict) or name not in desk:
            raise FleetsimError(f"{path}: lacks 'sharing.desk_share.{name}' for the workload in 'sharing.workloads'")
        for keys in _PART_KEYS:
            value: Any = blocks[name]
            for key in keys:
                if not isinstance(value, dict) or key not in value:
                    raise FleetsimError(f"{path}: lacks 'workloads.{name}.{'.'.join(keys)}'; was it written by "
                                        "this version of fleetsim?")
                value = value[key]
    return names


def _competition(path: Path, key: str, names: list[str]) -> pd.DataFrame:
    """A competition table, checked to name only the run's workloads."""
    table = _read_table(path, (key, *_COMPETITION_COLUMNS))
    unknown = sorted(set(table["workload"]) - set(names))
    if unknown:
        raise FleetsimError(f"{path}: names workload(s) {', '.join(unknown)} not in summary.json's "
                            "'sharing.workloads'")
    return table


def _part(path: Path, name: str, taken: set[str], summary_path: Path) -> RunFolder:
    """The run folder of one workload (``workloads/NAME/``, named as :func:`fleetsim.output.write_run` names it)."""
    sub = path / WORKLOADS / safe_name(name, taken)
    if not sub.is_dir():
        raise FleetsimError(f"{sub}: missing; {summary_path} lists the workload '{name}' in 'sharing.workloads' "
                            "and its run folder should be there")
    return read_run_folder(sub)


def read_several_folder(folder: str | Path) -> SeveralFolder:
    """Read and check a run folder of several workloads; raises FleetsimError naming the first problem."""
    path = Path(folder)
    summary_path = path / "summary.json"
    summary = _read_json(summary_path, _HEADER_KEYS, path)
    names = _names(summary, summary_path)
    _read_config(path / "config.json", path)
    _check_events(path / "events.parquet")
    tables = {name: _competition(path / "tables" / f"{name}.csv", key, names)
              for key, name in COMPETITION_GROUPINGS.items()}
    taken: set[str] = set()
    parts = [(name, _part(path, name, taken, summary_path)) for name in names]
    return SeveralFolder(path=path, summary=summary, tables=tables, parts=parts)
