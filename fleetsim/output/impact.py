"""What ``fleetsim impact`` reads from a run folder and writes back into it.

A run folder (:mod:`fleetsim.output.run`) holds every participation with the device, the
round, whether its report was used and the FedAvg weight it carried; :func:`read_run_rounds`
reads those back with the run's settings. :func:`write_impact` adds, beside the run's own
files::

    impact.json               the impact summary (docs/impact.md), the settings and seed used
    tables/impact_curves.csv  held-out accuracy and loss by group over rounds and simulated time
    tables/impact_final.csv   each group's final accuracy and loss

Each file is written through a temporary file beside it and renamed; the tables go first and
``impact.json`` last, so a reader that finds ``impact.json`` finds the tables it describes.
Nothing else in the folder is touched.
"""

from __future__ import annotations

import json
from dataclasses import dataclass
from pathlib import Path
from typing import TYPE_CHECKING, Any

from ..config import Config, build_config
from ..errors import ConfigError, FleetsimError
from .files import atomic_save, atomic_text, inside, safe_name, write_csv
from .folders import read_marker
from .run import WORKLOADS

if TYPE_CHECKING:
    import pandas as pd

__all__ = ["RunRounds", "read_run_rounds", "write_impact", "IMPACT_FILE", "IMPACT_TABLES"]

IMPACT_FILE = "impact.json"
IMPACT_TABLES = ("impact_curves", "impact_final")
_EVENT_COLUMNS = ("round", "device", "device_type", "region", "used", "weight", "samples")
_ROUND_COLUMNS = ("round", "status", "closed_s")


@dataclass(frozen=True)
class RunRounds:
    """The parts of a run folder a replay of its rounds needs."""

    folder: Path  # the run folder (of one workload) the results go into
    config: Config
    seed: int
    replay: bool  # the run was driven by logged devices (``fleetsim run --replay``)
    participations: pd.DataFrame
    rounds: pd.DataFrame


def _read_json(path: Path) -> dict[str, Any]:
    try:
        data = json.loads(path.read_text(encoding="utf-8"))
    except OSError as exc:
        raise FleetsimError(f"{path}: cannot read ({exc.strerror or exc}); is it a run folder?") from None
    except json.JSONDecodeError as exc:
        raise FleetsimError(f"{path}: not valid JSON (line {exc.lineno}: {exc.msg})") from None
    if not isinstance(data, dict):
        raise FleetsimError(f"{path}: expected a JSON object")
    return data


def _read_parquet(path: Path, columns: tuple[str, ...]) -> pd.DataFrame:
    import pandas as pd

    try:
        frame = pd.read_parquet(path)
    except Exception as exc:  # pyarrow raises several kinds (ArrowInvalid, OSError, ...)
        raise FleetsimError(f"{path}: cannot read ({' '.join(str(exc).split()) or type(exc).__name__})") from None
    lacking = [c for c in columns if c not in frame.columns]
    if lacking:
        raise FleetsimError(f"{path}: lacks column(s) {', '.join(lacking)}; "
                            "was it written by this version of fleetsim?")
    return frame


def _workload_folder(top: Path, config: Config, workload: str | None) -> Path:
    """The run folder of the named workload (``workloads/NAME/``), or ``top`` for a run of one."""
    names = [job.name for job in config.jobs] if config.workloads else []
    if not names:
        if workload is not None:
            raise FleetsimError(f"--workload: {workload!r}: the run at {top} has one workload; leave the option out")
        return top
    if workload is None:
        raise FleetsimError(f"{top}: a run of several workloads ({', '.join(names)}); "
                            "pass --workload NAME to replay one of them")
    if workload not in names:
        raise FleetsimError(f"--workload: {workload!r}: not a workload of the run at {top}; "
                            f"expected one of {', '.join(names)}")
    taken: set[str] = set()
    folders = {name: safe_name(name, taken) for name in names}  # as write_run named them
    return inside(top, top / WORKLOADS / folders[workload])


def read_run_rounds(run_dir: str | Path, overrides: list[str] | None = None,
                    workload: str | None = None) -> RunRounds:
    """Read a run folder's settings (with ``--set`` overrides), participations and rounds.

    Raises FleetsimError naming the file and what is wrong: not a run folder, a file missing
    or unreadable, a column lacking, settings that no longer validate.
    """
    top = Path(run_dir)
    if not top.is_dir():
        raise FleetsimError(f"{top}: no such folder (expected a run folder written by 'fleetsim run --out')")
    marker = read_marker(top)
    if marker is None or marker["kind"] != "run":
        raise FleetsimError(f"{top}: not a run folder written by 'fleetsim run --out'")
    top_config = _settings(top / "config.json", [])
    folder = _workload_folder(top, top_config, workload)
    config = _settings(folder / "config.json", list(overrides or []))
    summary = _read_json(folder / "summary.json")
    seed = summary.get("seed")
    if not isinstance(seed, int) or isinstance(seed, bool):
        raise FleetsimError(f"{folder / 'summary.json'}: lacks the run's 'seed'")
    return RunRounds(
        folder=folder, config=config, seed=seed, replay=bool(summary.get("replay")),
        participations=_read_parquet(folder / "events.parquet", _EVENT_COLUMNS),
        rounds=_read_parquet(folder / "rounds.parquet", _ROUND_COLUMNS),
    )


def _settings(path: Path, overrides: list[str]) -> Config:
    """The run's settings from config.json; then, with ``overrides``, the same with them applied
    (their problems name ``--set`` and the key path, not the file)."""
    raw = _read_json(path)
    try:
        config = build_config(raw, source=str(path))
    except ConfigError as exc:
        first = exc.problems[0] if exc.problems else f"{path}: not valid settings"
        raise FleetsimError(f"{first}; was it written by this version of fleetsim?") from None
    return build_config(raw, source="--set", overrides=overrides) if overrides else config


def write_impact(folder: str | Path, summary: dict[str, Any], tables: dict[str, pd.DataFrame]) -> list[Path]:
    """Write the impact tables, then ``impact.json``, into the run folder ``folder``."""
    root = Path(folder)
    written = []
    for name in IMPACT_TABLES:
        target = inside(root, root / "tables" / f"{name}.csv")
        atomic_save(target, lambda tmp, frame=tables[name]: write_csv(frame, tmp))
        written.append(target)
    target = inside(root, root / IMPACT_FILE)
    atomic_text(target, json.dumps(summary, indent=2) + "\n")
    return [*written, target]
