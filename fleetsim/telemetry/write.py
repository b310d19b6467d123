"""Writing telemetry frames as the formats' files, CSV or Parquet, chunk after chunk.

The in-memory frames (:mod:`.frames`) go back to the files' columns: times as ISO 8601 UTC
text with ``Z`` in CSV (milliseconds, or microseconds where a time needs them) and as
timezone-aware UTC timestamps in Parquet, the snapshots' signals as ``true``/``false``,
whole-number fields as integers, absent values as empty cells (Parquet nulls). CSV text
cells a spreadsheet would run as a formula are escaped (:func:`fleetsim.output.escape_cell`,
applied to each distinct value), and the reader undoes it. Arrow's CSV writer writes the
rows (pandas' would take minutes for a large fleet). :func:`write_telemetry` writes into an existing folder; the
command line fills a fresh one all or nothing (:func:`fleetsim.output.atomic_folder`).
"""

from __future__ import annotations

from collections.abc import Callable, Iterable
from pathlib import Path
from typing import IO, Any

import numpy as np
import pandas as pd
import pyarrow as pa
import pyarrow.compute as pc

from ..output import escape_cell
from .frames import Telemetry
from .schemas import KINDS, memory_name, schema

__all__ = ["FORMATS", "file_frame", "iso_text", "write_telemetry"]

FORMATS = ("csv", "parquet")
"""File encodings: the suffix of every file written."""

def iso_text(seconds: np.ndarray) -> pa.Array:
    """Unix seconds as ISO 8601 UTC text with ``Z`` (``2026-03-02T05:00:00.000Z``): to the
    millisecond, or the microsecond where a time needs it. The digits are written straight
    into the bytes of a fixed-width text column (a per-row formatter takes ~1 us a row)."""
    us = np.rint(np.asarray(seconds, dtype=np.float64) * 1e6).astype(np.int64)
    places = 3 if np.all(us % 1000 == 0) else 6
    day, rest = np.divmod(us, 86_400_000_000)
    dates = day.astype("datetime64[D]")
    months = dates.astype("datetime64[M]")
    parts = [
        (dates.astype("datetime64[Y]").astype(np.int64) + 1970, 4), (months.astype(np.int64) % 12 + 1, 2),
        ((dates - months.astype("datetime64[D]")).astype(np.int64) + 1, 2), (rest // 3_600_000_000, 2),
        (rest // 60_000_000 % 60, 2), (rest // 1_000_000 % 60, 2),
        (rest % 1_000_000 // (1000 if places == 3 else 1), places),
    ]
    width = 21 + places
    out = np.empty((us.size, width), dtype=np.uint8)
    position = 0
    for (value, digits), after in zip(parts, "--T::.Z", strict=True):
        for j in range(digits):
            out[:, position + j] = 48 + value // 10 ** (digits - 1 - j) % 10
        position += digits
        out[:, position] = ord(after)
        position += 1
    offsets = np.arange(0, us.size * width + 1, width, dtype=np.int32 if us.size * width < 2**31 else np.int64)
    kind = pa.string() if offsets.dtype == np.int32 else pa.large_string()
    return pa.Array.from_buffers(kind, us.size, [None, pa.py_buffer(offsets), pa.py_buffer(out.reshape(-1))])


def _text(values: pd.Series, csv: bool) -> pa.Array:
    """A text column as Arrow strings; for CSV with fleetsim's formula escape on each distinct value."""
    codes, words = pd.factorize(values.astype(object) if not isinstance(values.dtype, pd.CategoricalDtype)
                                else values)
    words = [str(w) for w in words]
    if csv:
        words = [str(escape_cell(w)) for w in words]
    dictionary = pa.DictionaryArray.from_arrays(pa.array(codes, type=pa.int32()), pa.array(words, type=pa.string()))
    return dictionary.cast(pa.string())


def file_frame(kind: str, frame: pd.DataFrame, csv: bool) -> pa.Table:
    """The file of ``kind`` for an in-memory ``frame``, as an Arrow table: times as ISO text for
    CSV (``csv``) and UTC timestamps for Parquet. Fields the frame lacks are left out."""
    out: dict[str, pa.Array] = {}
    for field in schema(kind)["fields"]:
        name, type_ = field["name"], field["type"]
        source = memory_name(name)
        if source not in frame.columns:
            continue
        values = frame[source]
        if type_ == "datetime":
            seconds = values.to_numpy(dtype=np.float64)
            if csv:
                out[name] = iso_text(seconds)
            else:
                out[name] = pa.array(np.rint(seconds * 1e6).astype(np.int64), type=pa.timestamp("us", tz="UTC"))
        elif type_ == "boolean":
            out[name] = pa.array(values.to_numpy(dtype=bool))
        elif type_ == "integer":
            number = values.to_numpy(dtype=np.float64)
            out[name] = pa.array(np.rint(np.nan_to_num(number)).astype(np.int64), mask=np.isnan(number))
        elif type_ == "number":
            out[name] = pa.array(values.to_numpy(dtype=np.float64), from_pandas=True)
        else:
            out[name] = _text(values, csv)
    names = [str(escape_cell(n)) if csv else n for n in out]
    return pa.table(list(out.values()), names=names)


_STRUCTURAL = frozenset(',"\r\n')


def _quoting(table: pa.Table, kind: str) -> str:
    """``none`` when no text cell or name needs quotes in CSV, else ``needed`` (quote all text)."""
    texts = list(table.column_names)
    for field in schema(kind)["fields"]:
        if field["type"] == "string" and field["name"] in table.column_names:
            texts += pc.unique(table.column(field["name"])).to_pylist()
    return "needed" if any(_STRUCTURAL & set(str(t)) for t in texts) else "none"


class _Files:
    """One open file per format in ``folder``, appended to chunk by chunk."""

    def __init__(self, folder: Path, encoding: str):
        self.folder, self.encoding = Path(folder), encoding
        self.csv: dict[str, IO[bytes]] = {}
        self.parquet: dict[str, Any] = {}
        self.columns: dict[str, list[str]] = {}

    def path(self, kind: str) -> Path:
        return self.folder / f"{kind}.{self.encoding}"

    def add(self, kind: str, frame: pd.DataFrame) -> None:
        table = file_frame(kind, frame, self.encoding == "csv")
        names = self.columns.setdefault(kind, table.column_names)
        if table.column_names != names:
            raise ValueError(f"{kind}: a chunk has columns {table.column_names}, the first had {names}")
        if self.encoding == "csv":
            import pyarrow.csv as pacsv

            stream = self.csv.get(kind)
            first = stream is None
            if stream is None:
                stream = self.csv[kind] = open(self.path(kind), "wb")
            options = pacsv.WriteOptions(include_header=first, quoting_style=_quoting(table, kind))
            pacsv.write_csv(table, stream, options)
        else:
            import pyarrow.parquet as pq

            writer = self.parquet.get(kind)
            if writer is None:
                writer = self.parquet[kind] = pq.ParquetWriter(self.path(kind), table.schema)
            writer.write_table(table)

    def close(self) -> None:
        for stream in self.csv.values():
            stream.close()
        for writer in self.parquet.values():
            writer.close()


def write_telemetry(telemetry: Telemetry | Iterable[Telemetry], folder: str | Path, encoding: str = "csv",
                    on_chunk: Callable[[Telemetry], None] | None = None) -> list[Path]:
    """Write the frames of ``telemetry`` (or of each chunk, in order) to ``folder`` (which must
    exist) as ``KIND.csv`` or ``KIND.parquet``; return the files written. ``on_chunk`` is
    called after each chunk (progress). Raises OSError for a write that fails."""
    if encoding not in FORMATS:
        raise ValueError(f"unknown encoding {encoding!r}; expected one of {', '.join(FORMATS)}")
    chunks = [telemetry] if isinstance(telemetry, Telemetry) else telemetry
    files = _Files(Path(folder), encoding)
    try:
        for chunk in chunks:
            for kind in KINDS:
                frame = chunk.frame(kind)
                if frame is not None:
                    files.add(kind, frame)
            if on_chunk is not None:
                on_chunk(chunk)
    finally:
        files.close()
    return [files.path(kind) for kind in KINDS if kind in files.columns]
