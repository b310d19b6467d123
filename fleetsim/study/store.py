"""Finished runs of a study on disk, one file each, so an interrupted study resumes.

A run (one sweep cell or comparison arm under one seed) is keyed by :func:`run_key`: a hash of the
validated configuration, the seed, the fleetsim version and a fingerprint of the simulator's
own source (:func:`engine_fingerprint`), so a changed engine never mixes its runs with an
older engine's. Its record is written to
``<folder>/<key>.json`` through a temporary file in the same folder that replaces the target
with ``os.replace`` only once it is complete and flushed, so a killed study leaves either a
whole record or none. Leftover temporary files (``.partial-*``) are removed when a store is
opened. The store lives in a study folder (``<study>/cells``): opening it claims that folder
for fleetsim (:func:`fleetsim.output.claim_study`), so a store never lands in a folder of
someone else's. One study at a time should write to a folder.

:func:`save_frame` writes a study table beside them, as Parquet and CSV, each atomically.
"""

from __future__ import annotations

import hashlib
import json
from functools import partial
from pathlib import Path
from typing import TYPE_CHECKING, Any

from .. import __version__
from ..config import Config
from ..errors import FleetsimError
from ..output import PARTIAL as _PARTIAL
from ..output import atomic_save, atomic_text, claim_study, write_csv

if TYPE_CHECKING:
    import pandas as pd

__all__ = [
    "run_key", "engine_fingerprint", "source_fingerprint", "RunStore", "atomic_text", "atomic_save", "save_frame",
    "RECORD_FORMAT", "NOT_ENGINE",
]

RECORD_FORMAT = 1
"""Version of the record layout; records of another format are run again."""

PACKAGE = Path(__file__).resolve().parents[1]
"""The fleetsim package folder whose source :func:`engine_fingerprint` hashes."""

NOT_ENGINE = ("cli", "output", "report", "study")
"""Subpackages of fleetsim that never change a run's summary, left out of the fingerprint."""


def source_fingerprint(package: Path) -> str:
    """A short hash of every ``.py`` file under ``package`` (subpackages at any depth) but those
    of :data:`NOT_ENGINE`, each with its path relative to ``package``.

    A file added, removed, moved or changed anywhere in the core (``events.py``,
    ``metrics/waste.py``, ``policies/builtin.py``, ``config/models.py``, ...) changes it.
    """
    digest = hashlib.sha256()
    for path in sorted(package.rglob("*.py"), key=lambda p: p.relative_to(package).as_posix()):
        relative = path.relative_to(package)
        if relative.parts[0] in NOT_ENGINE or "__pycache__" in relative.parts:
            continue
        digest.update(relative.as_posix().encode() + b"\0" + path.read_bytes() + b"\0")
    return digest.hexdigest()[:16]


_FINGERPRINTS: dict[Path, str] = {}


def engine_fingerprint() -> str:
    """:func:`source_fingerprint` of the installed fleetsim (:data:`PACKAGE`), computed once per
    process and package folder, so every run of a study is keyed by the same engine.

    Plug-in policies outside the package are not covered: after changing one, use a fresh
    study folder.
    """
    if PACKAGE not in _FINGERPRINTS:
        _FINGERPRINTS[PACKAGE] = source_fingerprint(PACKAGE)
    return _FINGERPRINTS[PACKAGE]


def run_key(config: Config, seed: int) -> str:
    """A 20-hex-digit key for ``config`` run under ``seed`` by this fleetsim version and engine."""
    canonical = json.dumps(
        {"config": config.model_dump(mode="json"), "seed": int(seed), "fleetsim": __version__,
         "engine": engine_fingerprint()},
        sort_keys=True, separators=(",", ":"),
    )
    return hashlib.sha256(canonical.encode()).hexdigest()[:20]


class RunStore:
    """The folder of finished run records of one study (created when missing), ``<study>/cells``.

    Raises FleetsimError if ``folder`` exists as a file or cannot be created, or if the study
    folder holding it is not empty and not a fleetsim study folder.
    """

    def __init__(self, folder: str | Path):
        self.folder = Path(folder)
        if self.folder.exists() and not self.folder.is_dir():
            raise FleetsimError(f"{self.folder}: exists and is not a folder")
        claim_study(self.folder.parent, "study")
        try:
            self.folder.mkdir(parents=True, exist_ok=True)
        except OSError as exc:
            raise FleetsimError(f"{self.folder}: cannot create ({exc.strerror or exc})") from None
        for leftover in self.folder.glob(f"{_PARTIAL}*"):
            try:
                leftover.unlink()
            except OSError:
                pass

    def path(self, key: str) -> Path:
        return self.folder / f"{key}.json"

    def load(self, key: str) -> dict[str, Any] | None:
        """The record saved under ``key``, or None if there is none (or it cannot be used)."""
        try:
            record = json.loads(self.path(key).read_text(encoding="utf-8"))
        except (OSError, ValueError):
            return None
        if not isinstance(record, dict) or record.get("format") != RECORD_FORMAT or record.get("key") != key:
            return None
        return record

    def save(self, key: str, record: dict[str, Any]) -> None:
        """Write ``record`` under ``key`` atomically."""
        body = dict(record, format=RECORD_FORMAT, key=key)
        text = json.dumps(body, indent=1, allow_nan=False)
        atomic_text(self.path(key), text)


def save_frame(frame: pd.DataFrame, stem: Path) -> list[Path]:
    """Write ``frame`` as ``stem.parquet`` (raw values) and ``stem.csv`` (formula-like text escaped,
    :func:`fleetsim.output.write_csv`), each atomically; return both paths."""
    parquet, csv = stem.with_name(stem.name + ".parquet"), stem.with_name(stem.name + ".csv")
    atomic_save(parquet, partial(frame.to_parquet, index=False))
    atomic_save(csv, partial(write_csv, frame))
    return [parquet, csv]
