"""Writing a run's outputs to a folder, all or nothing.

Layout of a run folder::

    summary.json        headline figures (docs/metrics.md)
    config.json         the validated configuration the run used
    events.parquet      the event log: one row per device participation
    rounds.parquet      one row per round
    census.parquet      eligible devices counted every 15 minutes by type and region
    tables/*.csv        every derived table

Files are written into a fresh sibling folder that replaces the target only once all of
them are complete, so an interrupted or failed write leaves no half-written folder.
"""

from __future__ import annotations

import json
import os
import shutil
import tempfile
from collections.abc import Callable
from pathlib import Path
from typing import TYPE_CHECKING

import pandas as pd

from .errors import FleetsimError

if TYPE_CHECKING:
    from .engine import Result

__all__ = ["write_run", "atomic_folder", "atomic_text", "atomic_save", "event_frame", "read_summary", "PARTIAL"]

PARTIAL = ".partial-"
"""Prefix of temporary files written beside their target (left over only by a killed process)."""


def event_frame(result: Result) -> pd.DataFrame:
    """The event log with readable labels and ISO 8601 UTC timestamps."""
    from .client import CAUSES, PHASES
    from .events import OUTCOMES, WASTE_CAUSES

    parts = result.participations
    fleet = result.fleet
    start = pd.Timestamp(result.config.horizon.start)
    frame = parts.copy()
    frame["device_type"] = pd.Categorical.from_codes(parts["device_type"], fleet.type_names)
    frame["region"] = pd.Categorical.from_codes(parts["region"], fleet.region_names)
    frame["outcome"] = pd.Categorical.from_codes(parts["outcome"], OUTCOMES)
    frame["cause"] = pd.Categorical.from_codes(parts["cause"], CAUSES)
    frame["phase"] = pd.Categorical.from_codes(parts["phase"], PHASES)
    frame["waste_cause"] = pd.Categorical.from_codes(parts["waste_cause"], WASTE_CAUSES)
    frame.insert(5, "accepted_utc", start + pd.to_timedelta(parts["accepted_s"], unit="s"))
    frame.insert(7, "ended_utc", start + pd.to_timedelta(parts["ended_s"], unit="s"))
    return frame


def atomic_folder(target: Path, fill: Callable[[Path], None]) -> Path:
    """Call ``fill(tmp)`` on a fresh folder beside ``target``, then put it in place of ``target``.

    Raises FleetsimError if the parent cannot be written or ``target`` is a file.
    """
    target = Path(target)
    if target.exists() and not target.is_dir():
        raise FleetsimError(f"{target}: exists and is not a folder")
    parent = target.resolve().parent
    try:
        parent.mkdir(parents=True, exist_ok=True)
        tmp = Path(tempfile.mkdtemp(prefix=f".{target.name}.partial-", dir=parent))
        tmp.chmod(0o755)  # mkdtemp makes it private; a run folder is as readable as any output
    except OSError as exc:
        raise FleetsimError(f"{target}: cannot create the output folder ({exc.strerror or exc})") from None
    try:
        fill(tmp)
        if target.exists():
            old = Path(tempfile.mkdtemp(prefix=f".{target.name}.old-", dir=parent))
            os.replace(target, old / "previous")
            os.replace(tmp, target)
            shutil.rmtree(old, ignore_errors=True)
        else:
            os.replace(tmp, target)
    except BaseException:
        shutil.rmtree(tmp, ignore_errors=True)
        raise
    return target


def atomic_text(path: Path, text: str) -> None:
    """Write ``text`` to ``path`` through a flushed temporary file beside it and ``os.replace``.

    Raises FleetsimError if the folder cannot be written.
    """
    path = Path(path)
    try:
        path.parent.mkdir(parents=True, exist_ok=True)
        handle, tmp = tempfile.mkstemp(prefix=f"{PARTIAL}{path.name}.", dir=path.parent)
    except OSError as exc:
        raise FleetsimError(f"{path.parent}: cannot write ({exc.strerror or exc})") from None
    try:
        with os.fdopen(handle, "w", encoding="utf-8") as stream:
            stream.write(text)
            stream.flush()
            os.fsync(stream.fileno())
        os.replace(tmp, path)
    except BaseException:
        try:
            os.unlink(tmp)
        except OSError:
            pass
        raise


def atomic_save(path: Path, save: Callable[[Path], object]) -> None:
    """Let ``save(tmp_path)`` write a file (e.g. a plot or Parquet), then move it to ``path``.

    The temporary file sits beside ``path``, so the move is an atomic rename.
    """
    path = Path(path)
    path.parent.mkdir(parents=True, exist_ok=True)
    tmp = path.with_name(f"{PARTIAL}{os.getpid()}.{path.name}")
    try:
        save(tmp)
        os.replace(tmp, path)
    except BaseException:
        try:
            os.unlink(tmp)
        except OSError:
            pass
        raise


def write_run(result: Result, out: str | Path) -> Path:
    """Write every output of ``result`` to the folder ``out`` (replaced whole)."""

    def fill(folder: Path) -> None:
        (folder / "summary.json").write_text(json.dumps(result.summary, indent=2) + "\n", encoding="utf-8")
        (folder / "config.json").write_text(
            json.dumps(result.config.model_dump(mode="json"), indent=2) + "\n", encoding="utf-8"
        )
        event_frame(result).to_parquet(folder / "events.parquet", index=False)
        result.tables["rounds"].to_parquet(folder / "rounds.parquet", index=False)
        result.census.to_parquet(folder / "census.parquet", index=False)
        tables = folder / "tables"
        tables.mkdir()
        for name, table in result.tables.items():
            table.to_csv(tables / f"{name}.csv", index=False)

    return atomic_folder(Path(out), fill)


def read_summary(run_dir: str | Path) -> dict:
    """Read ``summary.json`` of a run folder; raises FleetsimError if it is missing or broken."""
    path = Path(run_dir) / "summary.json"
    try:
        return json.loads(path.read_text(encoding="utf-8"))
    except OSError as exc:
        raise FleetsimError(f"{path}: cannot read ({exc.strerror or exc}); is {run_dir} a run folder?") from None
    except json.JSONDecodeError as exc:
        raise FleetsimError(f"{path}: not valid JSON ({exc.msg} at line {exc.lineno})") from None
