"""Finished runs of a study on disk, one file each, so an interrupted study resumes.

A run (one cell's configuration under one seed) is keyed by :func:`run_key`: a hash of the
validated configuration, the seed, the fleetsim version and a fingerprint of the simulator's
own source (:func:`engine_fingerprint`), so a changed engine never mixes its runs with an
older engine's. Its record is written to
``<folder>/<key>.json`` through a temporary file in the same folder that replaces the target
with ``os.replace`` only once it is complete and flushed, so a killed study leaves either a
whole record or none. Leftover temporary files (``.partial-*``) are removed when a store is
opened. The store lives in a study folder (``<study>/cells``): opening it claims that folder
for fleetsim (:func:`fleetsim.output.claim_study`), so a store never lands in a folder of
someone else's. One study at a time should write to a folder.
"""

from __future__ import annotations

import functools
import hashlib
import json
from pathlib import Path
from typing import Any

from .. import __version__
from ..config import Config
from ..errors import FleetsimError
from ..output import PARTIAL as _PARTIAL
from ..output import atomic_save, atomic_text, claim_study

__all__ = ["run_key", "engine_fingerprint", "RunStore", "atomic_text", "atomic_save", "RECORD_FORMAT"]

RECORD_FORMAT = 1
"""Version of the record layout; records of another format are run again."""



@functools.cache
def engine_fingerprint() -> str:
    """A short hash of the source of fleetsim's core modules (``fleetsim/*.py`` but the CLI).

    Plug-in policies outside the package are not covered: after changing one, use a fresh
    study folder.
    """
    package = Path(__file__).resolve().parents[1]
    digest = hashlib.sha256()
    for path in sorted(package.glob("*.py")):
        if path.name == "cli.py":
            continue
        digest.update(path.name.encode() + b"\0" + path.read_bytes() + b"\0")
    return digest.hexdigest()[:16]


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
