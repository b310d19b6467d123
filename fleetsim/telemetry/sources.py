"""Finding telemetry files and loading each as an Arrow table, text or typed.

A path is a folder (its files named after a format: ``intervals.csv``, ``snapshots.parquet``,
``traits-2026-03.csv`` ...) or one such file; the suffix says the encoding (``.csv`` or
``.parquet``). A CSV file is read with every cell as text (the schema's types are applied
later, :mod:`.cells`); rows with the wrong number of cells are set aside with their row
numbers. Nothing here raises for a bad file: it comes back with its problems.
"""

from __future__ import annotations

import csv
from collections.abc import Iterable
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np
import pyarrow as pa
import pyarrow.csv as pacsv

from ..errors import TelemetryError
from .schemas import KINDS, schema

__all__ = ["Source", "find_sources", "kind_of", "load"]

SUFFIXES = (".csv", ".parquet")
_BLOCK = 1 << 26  # bytes per block of the CSV reader: large blocks read large files faster


@dataclass
class Source:
    """One file of one format: its rows (``table``, None if unreadable), the row number of
    each table row (1 = first data row; None when they are 1, 2, ...), rows set aside
    (``ragged``: row number and reason) and problems with the file as a whole (``problems``:
    column, reason)."""

    path: Path
    kind: str
    table: pa.Table | None = None
    numbers: np.ndarray | None = None
    ragged: list[tuple[int, str]] = field(default_factory=list)
    problems: list[tuple[str, str]] = field(default_factory=list)

    @property
    def rows(self) -> int:
        return (self.table.num_rows if self.table is not None else 0) + len(self.ragged)


def kind_of(name: str) -> str | None:
    """The format a file name stands for: its stem is a format's name, or starts with it and
    one of ``-``, ``_``, ``.`` (``intervals-part2.csv``); None otherwise."""
    stem = Path(name).name
    for suffix in SUFFIXES:
        if stem.lower().endswith(suffix):
            stem = stem[: -len(suffix)]
            break
    else:
        return None
    for kind in KINDS:
        if stem == kind or (stem.startswith(kind) and stem[len(kind)] in "-_."):
            return kind
    return None


def find_sources(paths: str | Path | Iterable[str | Path], kind: str | None = None) -> list[Source]:
    """The files to read, in the order given (a folder's files sorted by name).

    ``kind`` reads every file as that format whatever its name. Raises TelemetryError for a
    path that does not exist, a file whose format or encoding cannot be told from its name,
    and a folder with no telemetry file.
    """
    if isinstance(paths, (str, Path)):
        paths = [paths]
    if kind is not None and kind not in KINDS:
        raise TelemetryError([f"unknown telemetry format {kind!r}; expected one of {', '.join(KINDS)}"])
    found: list[Source] = []
    problems: list[str] = []
    for given in paths:
        path = Path(given)
        if path.is_dir():
            inside = sorted(p for p in path.iterdir() if p.is_file() and kind_of(p.name) is not None
                            and (kind is None or kind_of(p.name) == kind))
            if not inside:
                problems.append(f"{path}: holds no telemetry file (expected {', '.join(KINDS)} as .csv or .parquet)")
            found += [Source(p, kind_of(p.name) or "") for p in inside]
        elif path.is_file():
            if path.suffix.lower() not in SUFFIXES:
                problems.append(f"{path}: unknown file type {path.suffix!r}; expected .csv or .parquet")
            elif (kind or kind_of(path.name)) is None:
                problems.append(f"{path}: cannot tell the format from the name; expected a name starting with "
                                f"{', '.join(KINDS)} (e.g. intervals.csv)")
            else:
                found.append(Source(path, kind or kind_of(path.name) or ""))
        else:
            problems.append(f"{path}: not found")
    if problems:
        raise TelemetryError(problems)
    return found


def _header(path: Path) -> list[str] | None:
    """The first record of a CSV file (UTF-8, a byte-order mark allowed); None if it is empty."""
    with open(path, encoding="utf-8-sig", newline="") as stream:
        return next(csv.reader(stream), None)


def _read_csv(path: Path, names: list[str], threads: bool) -> tuple[pa.Table, list[tuple[int | None, int]]]:
    bad: list[tuple[int | None, int]] = []

    def set_aside(row: pacsv.InvalidRow) -> str:
        bad.append((row.number, row.actual_columns))
        return "skip"

    table = pacsv.read_csv(
        path,
        read_options=pacsv.ReadOptions(use_threads=threads, block_size=_BLOCK),
        parse_options=pacsv.ParseOptions(invalid_row_handler=set_aside, ignore_empty_lines=False),
        convert_options=pacsv.ConvertOptions(
            column_types={name: pa.string() for name in names}, strings_can_be_null=False,
            quoted_strings_can_be_null=False, null_values=[],
        ),
    )
    return table, bad


def _load_csv(source: Source) -> None:
    try:
        names = _header(source.path)
    except UnicodeDecodeError as exc:
        source.problems.append(("", f"is not UTF-8 text (byte {exc.start} of the first line)"))
        return
    if not names:
        source.problems.append(("", "is empty; expected a header row naming the columns"))
        return
    table, bad = _read_csv(source.path, names, threads=True)
    if bad:  # the threaded reader does not know row numbers: read again in one thread to name them
        table, bad = _read_csv(source.path, names, threads=False)
        skipped = sorted((number or 0) - 1 for number, _ in bad)
        source.ragged = [(row, f"has {cells} cell(s), expected {len(names)}")
                         for row, (_, cells) in zip(skipped, sorted(bad, key=lambda b: b[0] or 0), strict=True)]
        total = table.num_rows + len(bad)
        source.numbers = np.setdiff1d(np.arange(1, total + 1), skipped)
    source.table = table


def load(source: Source) -> Source:
    """Read ``source``'s rows; a file that cannot be read gets a problem instead (no exception)."""
    try:
        if source.path.suffix.lower() == ".csv":
            _load_csv(source)
        else:
            import pyarrow.parquet as pq

            # Text columns of the format read as dictionaries: each distinct word decoded once.
            text = [f["name"] for f in schema(source.kind)["fields"] if f["type"] == "string"]
            present = set(pq.read_schema(source.path).names)
            source.table = pq.read_table(source.path, read_dictionary=[n for n in text if n in present])
    except (OSError, pa.ArrowException) as exc:
        kind = "CSV" if source.path.suffix.lower() == ".csv" else "Parquet"
        reason = " ".join((getattr(exc, "strerror", None) or str(exc) or type(exc).__name__).split())
        source.problems.append(("", f"cannot be read as {kind} ({reason})"))
        source.table = None
    return source
