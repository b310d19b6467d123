"""Reading telemetry files into :class:`~.frames.Telemetry`, refusing nothing silently.

Each file is loaded (:mod:`.sources`), its header and cells checked by its Table Schema
(:mod:`.validate`, :mod:`.cells`), then the rows that passed, from all files of the format
together, by the format's own rules (:mod:`.rules`). Every refused row is reported with its
file, row number (1 = first data row), column and reason; if any file has a problem,
:func:`read_telemetry` raises :class:`~fleetsim.errors.TelemetryError` with the first 20
lines and the summary. :func:`validate_partition` does the same for one in-memory frame, so
a Dask DataFrame is validated partition by partition (docs/telemetry.md).
"""

from __future__ import annotations

from collections.abc import Iterable
from pathlib import Path
from typing import Any

import numpy as np
import pandas as pd
import pyarrow as pa

from ..errors import TelemetryError
from .cells import ColumnTypeError, parse_column
from .frames import CATEGORIES, COLUMNS, PROBLEM_COLUMNS, SORT, FileReport, Telemetry, empty_frame
from .rules import Rows, Rules
from .schemas import KINDS, memory_name, schema
from .sources import Source, find_sources, load
from .validate import Block, check_cells, check_header

__all__ = ["read_telemetry", "validate_partition"]

_DEVICE = ["device_type", "region", "timezone"]
_WHAT = {"intervals": "interval logs", "snapshots": "snapshots"}


def read_telemetry(paths: str | Path | Iterable[str | Path], kind: str | None = None) -> Telemetry:
    """Read and validate telemetry files (CSV or Parquet, by suffix) or folders of them.

    A file's format is told by its name (``intervals.csv``, ``snapshots-0001.parquet``), or
    by ``kind`` for every path. Several files of one format are read as one table (the
    rules hold across them). Raises TelemetryError if any row or file is refused.
    """
    return _assemble([load(source) for source in find_sources(paths, kind)])


def validate_partition(frame: pd.DataFrame, kind: str, source: str = "partition") -> pd.DataFrame:
    """Validate one frame shaped like a file of ``kind`` (columns as in the file: text, or
    typed as in Parquet) and return it in the in-memory shape. Row numbers count from the
    frame's first row; ``source`` names it in error lines. Raises TelemetryError.

    For a Dask DataFrame, ``ddf.map_partitions(validate_partition, kind, meta=empty_frame(kind))``
    validates each partition; the per-device rules see one partition at a time, so give each
    device's rows to one partition (e.g. ``ddf.shuffle("device_id")``)."""
    if kind not in KINDS:
        raise TelemetryError([f"unknown telemetry format {kind!r}; expected one of {', '.join(KINDS)}"])
    table = pa.Table.from_pandas(frame, preserve_index=False)
    result = _assemble([Source(Path(source), kind, table=table)])
    out = result.frame(kind)
    return out if out is not None else empty_frame(kind)


def _assemble(sources: list[Source]) -> Telemetry:
    telemetry = Telemetry()
    reference: tuple[pd.DataFrame, str] | None = None
    for kind in KINDS:
        mine = [s for s in sources if s.kind == kind]
        if not mine:
            continue
        frame, reports, found = _read_kind(kind, mine, reference)
        setattr(telemetry, kind, frame)
        telemetry.report += reports
        if reference is None and found is not None:
            reference = (found, _WHAT[kind])
    total = sum(len(r.problems) for r in telemetry.report)
    if total:
        lines: list[str] = []
        for report in telemetry.report:
            lines += report.lines(TelemetryError.SHOWN + 1 - len(lines))
        read = sum(r.read for r in telemetry.report)
        refused = sum(r.refused for r in telemetry.report)
        files = len(telemetry.report)
        summary = (f"read {read:,} row{'s' if read != 1 else ''} from {files} file{'s' if files != 1 else ''}: "
                   f"kept {read - refused:,}, refused {refused:,}")
        raise TelemetryError(lines, summary, telemetry.report, total)
    return telemetry


def _read_kind(kind: str, sources: list[Source], reference: tuple[pd.DataFrame, str] | None):
    """One format's files: (frame, reports, each device's first type/region/zone or None)."""
    descriptor = schema(kind)
    fields = {f["name"]: f for f in descriptor["fields"]}
    offsets = np.cumsum([0] + [s.rows for s in sources])
    whole: dict[int, list[tuple[str, str]]] = {}
    blocks: list[Block] = []
    parts = []
    for i, source in enumerate(sources):
        problems = list(source.problems)
        if source.table is not None and not problems:
            problems += check_header(source.table.column_names, descriptor)
        columns = {}
        if not problems and source.table is not None:
            for name in source.table.column_names:
                try:
                    columns[name] = parse_column(source.table.column(name), fields[name],
                                                 descriptor.get("missingValues", [""]),
                                                 unescape=source.path.suffix.lower() == ".csv")
                except ColumnTypeError as exc:
                    problems.append((name, str(exc)))
        if problems or source.table is None:
            whole[i] = problems
            continue
        size = source.table.num_rows
        numbers = source.numbers if source.numbers is not None else np.arange(1, size + 1)
        ids = offsets[i] + np.asarray(numbers, dtype=np.int64) - 1
        blocks += [Block(np.array([offsets[i] + row - 1]), "", reason) for row, reason in source.ragged]
        found, refused = check_cells(columns, descriptor, size)
        blocks += [Block(ids[b.rows], b.column, b.reasons) for b in found]
        keep = np.flatnonzero(~refused)
        parts.append((columns, keep, ids[keep]))

    def where(other: int, me: int) -> str:
        f_other, f_me = (int(np.searchsorted(offsets, x, side="right")) - 1 for x in (other, me))
        text = f"row {other - offsets[f_other] + 1}"
        return text if f_other == f_me else f"{text} of {sources[f_other].path}"

    rows = _combine(kind, descriptor, parts, where)
    rules = Rules(rows)
    if parts:
        _run_rules(kind, rules, reference)
    blocks += rules.blocks
    reports = _reports(sources, offsets, whole, blocks, list(fields))
    found_devices = _devices(rows, rules.alive) if kind in _WHAT else None
    return _frame(kind, rows, rules), reports, found_devices


def _run_rules(kind: str, rules: Rules, reference: tuple[pd.DataFrame, str] | None) -> None:
    if kind == "intervals":
        rules.unique(["device_id", "signal", "start"], "")
        rules.end_after_start()
        rules.zones_known()
        rules.constant_per_device(_DEVICE)
        rules.no_overlap()
        rules.inside_observed()
    elif kind == "snapshots":
        rules.unique(["device_id", "time"], "")
        rules.zones_known()
        rules.constant_per_device(_DEVICE)
        rules.times_increase()
    elif kind == "traits":
        rules.unique(["device_id"], "device_id")
    else:
        rules.end_after_start()
    if reference is not None and kind in ("snapshots", "traits"):
        columns = _DEVICE if kind == "snapshots" else _DEVICE[:2]
        rules.agree_with(reference[0], columns, reference[1])


def _combine(kind: str, descriptor: dict[str, Any], parts: list, where) -> Rows:
    """The kept rows of every file of a format as one :class:`Rows`."""
    values: dict[str, np.ndarray] = {}
    categories: dict[str, np.ndarray] = {}
    for field in descriptor["fields"]:
        name = field["name"]
        if not any(name in columns for columns, _, _ in parts):
            continue
        pieces = []
        if field["type"] == "string":
            words = np.unique(np.concatenate([columns[name].categories for columns, _, _ in parts if name in columns]
                                             + [np.array([""], dtype=object)]))
            for columns, keep, _ in parts:
                if name in columns:
                    remap = np.searchsorted(words, columns[name].categories)
                    codes = _kept(columns[name].values, keep)
                    same = remap.size == words.size  # the file's words are all the words: codes stand
                    pieces.append(codes if same else remap[codes])
                else:
                    pieces.append(np.full(keep.size, np.searchsorted(words, ""), dtype=np.int64))
            categories[name] = words
        else:
            for columns, keep, _ in parts:
                column = columns.get(name)
                if field["type"] in ("number", "integer"):
                    if column is None:
                        data = np.full(keep.size, np.nan)
                    else:
                        data = _kept(column.values, keep).astype(np.float64)
                        data[_kept(column.missing, keep)] = np.nan
                else:
                    data = _kept(column.values, keep)
                pieces.append(data)
        values[name] = (pieces[0] if len(pieces) == 1 else np.concatenate(pieces)) if pieces else np.zeros(0)
    ids = np.concatenate([i for _, _, i in parts]) if parts else np.zeros(0, dtype=np.int64)
    return Rows(kind, ids, values, categories, where)


def _kept(values: np.ndarray, keep: np.ndarray) -> np.ndarray:
    """``values[keep]``, without the copy when every row is kept (``keep`` is then 0..n-1)."""
    return values if keep.size == values.size else values[keep]


def _devices(rows: Rows, alive: np.ndarray) -> pd.DataFrame | None:
    """Each kept device's type, region and zone as on its first kept row, indexed by device id."""
    if "device_id" not in rows.values:
        return None
    live = np.flatnonzero(alive)
    codes, first = np.unique(rows.values["device_id"][live], return_index=True)
    at = live[first]
    data = {c: rows.text(c, at) for c in _DEVICE if c in rows.values}
    return pd.DataFrame(data, index=pd.Index(rows.categories["device_id"][codes], name="device_id"))


def _frame(kind: str, rows: Rows, rules: Rules) -> pd.DataFrame:
    """The kept rows in the in-memory shape, sorted as :data:`SORT` says."""
    if not rules.alive.any() or not rows.values:
        return empty_frame(kind)
    order = rules.sorted_live(tuple(name[:-2] if name.endswith("_s") else name for name in SORT[kind]))
    data: dict[str, Any] = {}
    empty = empty_frame(kind)
    for field in COLUMNS[kind]:
        file_name = next((n for n in rows.values if memory_name(n) == field), None)
        if file_name is None:
            data[field] = np.full(order.size, np.nan)
        elif field in CATEGORIES:
            data[field] = pd.Categorical.from_codes(rows.codes_of(field, CATEGORIES[field])[order],
                                                    categories=list(CATEGORIES[field]))
        elif file_name in rows.categories:
            data[field] = rows.text(file_name, order)
        elif field.endswith("_s") and file_name != field:
            data[field] = rows.values[file_name][order] / 1e9
        else:
            data[field] = rows.values[file_name][order].astype(empty[field].dtype)
    return pd.DataFrame(data, columns=COLUMNS[kind], copy=False)  # fresh arrays: no copy into blocks


def _reports(sources: list[Source], offsets: np.ndarray, whole: dict[int, list[tuple[str, str]]],
             blocks: list[Block], order: list[str]) -> list[FileReport]:
    """One report per file: counts and its problems, sorted by row and column."""
    if blocks:
        ids = np.concatenate([b.rows for b in blocks])
        columns = np.concatenate([np.full(b.rows.size, b.column, dtype=object) for b in blocks])
        reasons = np.concatenate([np.full(b.rows.size, b.reasons, dtype=object) if isinstance(b.reasons, str)
                                  else np.asarray(b.reasons, dtype=object) for b in blocks])
    else:
        ids, columns, reasons = np.zeros(0, dtype=np.int64), np.zeros(0, dtype=object), np.zeros(0, dtype=object)
    rank = {name: k + 1 for k, name in enumerate(order)}
    position = np.array([rank.get(c, 0) for c in columns], dtype=np.int64)
    file_of = np.searchsorted(offsets, ids, side="right") - 1
    reports = []
    for i, source in enumerate(sources):
        label = str(source.path)
        if i in whole:
            problems = pd.DataFrame({"file": label, "row": pd.array([pd.NA] * len(whole[i]), dtype="Int64"),
                                     "column": [c for c, _ in whole[i]], "reason": [r for _, r in whole[i]]})
            reports.append(FileReport(label, source.kind, source.rows, 0, source.rows, problems))
            continue
        mine = np.flatnonzero(file_of == i)
        mine = mine[np.lexsort([position[mine], ids[mine]])]
        problems = pd.DataFrame({"file": label, "row": pd.array(ids[mine] - offsets[i] + 1, dtype="Int64"),
                                 "column": columns[mine], "reason": reasons[mine]}, columns=PROBLEM_COLUMNS)
        refused = int(np.unique(ids[mine]).size)
        reports.append(FileReport(label, source.kind, source.rows, source.rows - refused, refused, problems))
    return reports
