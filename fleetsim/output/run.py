"""A run's folder: what :func:`write_run` puts in it and :func:`read_summary` reads back.

Layout of a run folder::

    summary.json        headline figures (docs/metrics.md)
    config.json         the validated configuration the run used
    events.parquet      the event log: one row per device participation
    rounds.parquet      one row per round
    census.parquet      eligible devices counted every 15 minutes by type and region
    tables/*.csv        every derived table
    workloads/NAME/     with several workloads: each one's own run folder as above (no marker);
                        the top level then holds every workload's events (a ``workload``
                        column), the summary with a ``sharing`` block, and the competition tables
    .fleetsim-output    the marker: {"kind": "run", "fleetsim": version, "created": UTC time}
"""

from __future__ import annotations

import json
from collections.abc import Callable, Iterable
from pathlib import Path
from typing import TYPE_CHECKING

from ..errors import FleetsimError
from .files import inside, safe_name, write_csv
from .folders import atomic_folder

if TYPE_CHECKING:
    import pandas as pd

    from ..result import Result

__all__ = ["write_run", "fill_run", "event_frame", "read_summary", "WORKLOADS"]

WORKLOADS = "workloads"
"""Subfolder of a run of several workloads: one run folder per workload (``workloads/NAME/``)."""


def event_frame(result: Result) -> pd.DataFrame:
    """The event log (already labelled, ``Result.participations``) with ISO 8601 UTC timestamps."""
    import pandas as pd  # here, not at the top: the folder rules need no table library

    parts = result.participations
    start = pd.Timestamp(result.config.horizon.start)
    frame = parts.copy()
    frame.insert(5, "accepted_utc", start + pd.to_timedelta(parts["accepted_s"], unit="s"))
    frame.insert(7, "ended_utc", start + pd.to_timedelta(parts["ended_s"], unit="s"))
    return frame


def write_run(
    result: Result, out: str | Path, *, force: bool = False, inputs: Iterable[str | Path] = (),
    label: str | None = None, notice: Callable[[str], None] | None = None,
) -> Path:
    """Write every output of ``result`` to the folder ``out``, all or nothing.

    ``out`` may be new or empty; an earlier fleetsim output there is replaced only with
    ``force``. ``inputs``, ``label`` and ``notice`` as for :func:`atomic_folder`. Raises
    FleetsimError (see :func:`check_target`) with nothing touched.
    """

    return atomic_folder(Path(out), lambda folder: fill_run(result, folder), kind="run", force=force, inputs=inputs,
                         label=label, notice=notice)


def fill_run(result: Result, folder: Path) -> None:
    """Write every file of a run folder of ``result`` (``workloads/NAME/`` too) into the new ``folder``."""
    _fill(result, folder)
    parts = result.workloads
    if len(parts) > 1:
        taken: set[str] = set()
        for name, part in parts.items():
            sub = inside(folder, folder / WORKLOADS / safe_name(name, taken))
            sub.mkdir(parents=True)
            _fill(part, sub)


def _fill(result: Result, folder: Path) -> None:
    """Write one result's summary, settings, event tables and derived tables into ``folder``."""
    (folder / "summary.json").write_text(json.dumps(result.summary, indent=2) + "\n", encoding="utf-8")
    (folder / "config.json").write_text(
        json.dumps(result.config.model_dump(mode="json"), indent=2) + "\n", encoding="utf-8"
    )
    event_frame(result).to_parquet(folder / "events.parquet", index=False)
    # The rounds table of one workload (with its derived columns); of several, the engine's rows.
    rounds = result.tables["rounds"] if "rounds" in result.tables else result.rounds
    rounds.to_parquet(folder / "rounds.parquet", index=False)
    result.census.to_parquet(folder / "census.parquet", index=False)
    tables = folder / "tables"
    tables.mkdir()
    taken: set[str] = set()
    for name, table in result.tables.items():
        write_csv(table, inside(folder, tables / f"{safe_name(name, taken)}.csv"))


def read_summary(run_dir: str | Path) -> dict:
    """Read ``summary.json`` of a run folder; raises FleetsimError if it is missing or broken."""
    path = Path(run_dir) / "summary.json"
    try:
        return json.loads(path.read_text(encoding="utf-8"))
    except OSError as exc:
        raise FleetsimError(f"{path}: cannot read ({exc.strerror or exc}); is {run_dir} a run folder?") from None
    except json.JSONDecodeError as exc:
        raise FleetsimError(f"{path}: not valid JSON ({exc.msg} at line {exc.lineno})") from None
