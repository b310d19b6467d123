"""Cells to typed arrays, vectorised: one Arrow column and its Table Schema field in, values
and masks out.

A CSV column arrives as text and is read by the field's lexical rules; a Parquet column
arrives typed and must have a matching type (a Parquet column of text is read like CSV).
Every function works on whole columns with Arrow compute kernels and NumPy: no Python loop
runs over the rows, so ten million rows take seconds.

Datetimes must read ``YYYY-MM-DDTHH:MM:SS[.fffffffff]Z`` (ISO 8601, UTC, with ``Z``); the
digits are taken from the text's bytes and checked against the calendar, so ``2026-02-30``
is refused rather than rolled over. Times are kept as int64 nanoseconds since the Unix epoch,
hence the years 1678 to 2261.
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Any

import numpy as np
import pyarrow as pa
import pyarrow.compute as pc

__all__ = ["Column", "ColumnTypeError", "parse_column", "format_times", "MIN_YEAR", "MAX_YEAR"]

MIN_YEAR, MAX_YEAR = 1678, 2261
"""The years a datetime may lie in (int64 nanoseconds since 1970 hold them)."""

_NUMBER_RE = r"^[+-]?(\d+\.?\d*|\.\d+)([eE][+-]?\d{1,3})?$"
_INTEGER_RE = r"^[+-]?\d{1,18}$"
_UTC_NAMES = {"UTC", "Etc/UTC", "+00:00", "Z"}
_NS = 1_000_000_000

_EXPECTED = {
    "datetime": "an ISO 8601 UTC time such as 2026-03-02T05:00:00Z",
    "boolean": "true or false",
    "number": "a finite number",
    "integer": "a whole number",
}


class ColumnTypeError(ValueError):
    """A typed (Parquet) column whose type cannot hold the field's values; the message says why."""


@dataclass
class Column:
    """One column read by its field: ``values`` (int64 ns for datetimes, float64, int64, bool,
    or int64 codes into the sorted ``categories`` for strings), ``missing`` (a missing value),
    ``bad`` (present but not of the type) and ``text`` (the cells as written, for messages)."""

    name: str
    type: str
    values: np.ndarray
    missing: np.ndarray
    bad: np.ndarray
    text: pa.Array | None = None
    categories: np.ndarray | None = None

    def shown(self, rows: np.ndarray) -> list[str]:
        """The cells at ``rows`` as written, for error lines."""
        if self.categories is not None:
            return [str(v) for v in self.categories[self.values[rows]]]
        if self.text is not None:
            return [str(v) for v in self.text.take(pa.array(rows)).to_pylist()]
        if self.type == "datetime":
            return format_times(self.values[rows])
        return [str(v) for v in self.values[rows].tolist()]

    def expected(self) -> str:
        return _EXPECTED.get(self.type, "text")


def format_times(ns: np.ndarray) -> list[str]:
    """Nanoseconds since the epoch as ISO 8601 UTC text with ``Z``."""
    ns = np.asarray(ns, dtype=np.int64)
    seconds = np.datetime_as_string((ns // _NS).astype("datetime64[s]"), unit="s")
    out = []
    for text, part in zip(seconds.tolist(), (ns % _NS).tolist(), strict=True):
        out.append(f"{text}.{part:09d}".rstrip("0") + "Z" if part else f"{text}Z")
    return out


def _mask(array: pa.Array | pa.ChunkedArray) -> np.ndarray:
    """A boolean Arrow result as a NumPy mask (null counts as False)."""
    return np.asarray(pc.fill_null(array, False).to_numpy(zero_copy_only=False), dtype=bool)


def _as_string(array: pa.Array) -> pa.Array:
    if pa.types.is_dictionary(array.type):
        array = array.dictionary_decode()
    if pa.types.is_large_string(array.type):
        return array
    return array.cast(pa.string())


def _is_text(array: pa.Array) -> bool:
    kind = array.type.value_type if pa.types.is_dictionary(array.type) else array.type
    return pa.types.is_string(kind) or pa.types.is_large_string(kind)


_FORMULA = frozenset("=+-@\t\r'")  # what fleetsim.output.escape_cell puts a "'" before


def _unescaped(word: str) -> str:
    """A CSV text cell with fleetsim's formula escape undone (``'=x`` reads ``=x``)."""
    return word[1:] if word[:1] == "'" and word[1:2] in _FORMULA and len(word) > 1 else word


def _strings(array: pa.Array, unescape: bool) -> tuple[np.ndarray, np.ndarray]:
    """Sorted distinct strings of the column and each row's code into them (missing rows: code of '')."""
    encoded = pc.dictionary_encode(pc.fill_null(array, ""))
    if isinstance(encoded, pa.ChunkedArray):
        encoded = encoded.combine_chunks()
    words = encoded.dictionary.to_pylist()
    words = np.asarray([_unescaped(w) for w in words] if unescape else words, dtype=object)
    categories, remap = np.unique(np.append(words, ""), return_inverse=True)
    codes = remap[np.asarray(encoded.indices.to_numpy(zero_copy_only=False), dtype=np.int64)]
    return categories, codes


def _dictionary_strings(array: pa.DictionaryArray, missing_values: list[str],
                        unescape: bool) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """:func:`_strings` and the missing mask of a dictionary-encoded text column (as Parquet
    stores text), from its dictionary and indices without decoding a string per row."""
    dictionary = _as_string(array.dictionary)
    word_missing = _mask(pc.is_null(dictionary))
    if missing_values:
        word_missing |= _mask(pc.is_in(dictionary, value_set=pa.array(missing_values, type=dictionary.type)))
    words = pc.fill_null(dictionary, "").to_pylist()
    words = np.asarray([_unescaped(w) for w in words] if unescape else words, dtype=object)
    categories, remap = np.unique(np.append(words, ""), return_inverse=True)
    indices = array.indices
    if not indices.null_count:  # the common case: no per-row masks to build
        index = indices.to_numpy(zero_copy_only=False)
        missing = word_missing[index] if word_missing.any() else np.zeros(len(array), dtype=bool)
        return categories, remap[index], missing
    null = _mask(pc.is_null(indices))
    index = pc.fill_null(indices, 0).to_numpy(zero_copy_only=False)
    codes = remap[index]
    codes[null] = remap[-1]  # a null row reads as ''
    return categories, codes, null | word_missing[index]


def _fixed_width(array: pa.Array, rows: np.ndarray, width: int) -> np.ndarray:
    """The bytes of the strings at ``rows`` (all ``width`` long) as a [rows, width] uint8 matrix
    (a view of the column's data when every row has this width)."""
    buffers = array.buffers()
    kind = np.int64 if pa.types.is_large_string(array.type) else np.int32
    offsets = np.frombuffer(buffers[1], dtype=kind)[array.offset: array.offset + len(array) + 1]
    data = np.frombuffer(buffers[2], dtype=np.uint8)
    first = int(offsets[0])
    if rows.size == len(array) and int(offsets[-1]) - first == rows.size * width:
        return data[first: first + rows.size * width].reshape(rows.size, width)
    return data[offsets[rows].astype(np.int64)[:, None] + np.arange(width)]


_SEPARATORS = {4: "-", 7: "-", 10: "T", 13: ":", 16: ":"}
_MONTH_DAYS = np.array([31, 28, 31, 30, 31, 30, 31, 31, 30, 31, 30, 31], dtype=np.int64)


def _days_from_civil(year: np.ndarray, month: np.ndarray, day: np.ndarray) -> np.ndarray:
    """Days since 1970-01-01 of proleptic Gregorian dates (H. Hinnant, "chrono-Compatible
    Low-Level Date Algorithms", days_from_civil; years from 1 on)."""
    y = year - (month <= 2)
    era = y // 400
    yoe = y - era * 400
    doy = (153 * ((month + 9) % 12) + 2) // 5 + day - 1
    doe = yoe * 365 + yoe // 4 - yoe // 100 + doy
    return era * 146097 + doe - 719468


def _parse_fixed(text: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """(int64 ns, ok) of ``YYYY-MM-DDTHH:MM:SS[.f...]Z`` texts of one width, [rows, width] bytes."""
    width = text.shape[1]
    ok = text[:, width - 1] == ord("Z")
    if width > 20:
        ok &= text[:, 19] == ord(".")
    for position, char in _SEPARATORS.items():
        ok &= text[:, position] == ord(char)

    def number(first: int, count: int) -> np.ndarray:
        nonlocal ok
        out = np.zeros(text.shape[0], dtype=np.int64)
        for position in range(first, first + count):
            digit = text[:, position].astype(np.int64) - 48
            ok &= (digit >= 0) & (digit <= 9)
            out = out * 10 + digit
        return out

    year, month, day = number(0, 4), number(5, 2), number(8, 2)
    hour, minute, second = number(11, 2), number(14, 2), number(17, 2)
    fraction = number(20, width - 21) * 10 ** (30 - width) if width > 20 else np.zeros(text.shape[0], np.int64)
    ok &= (year >= MIN_YEAR) & (year <= MAX_YEAR) & (month >= 1) & (month <= 12)
    month = np.where(ok, month, 1)
    leap = (year % 4 == 0) & ((year % 100 != 0) | (year % 400 == 0))
    ok &= (day >= 1) & (day <= _MONTH_DAYS[month - 1] + ((month == 2) & leap))
    ok &= (hour <= 23) & (minute <= 59) & (second <= 59)
    seconds = _days_from_civil(year, month, day) * 86400 + hour * 3600 + minute * 60 + second
    return np.where(ok, seconds * _NS + fraction, 0), ok


def _parse_times(array: pa.Array) -> tuple[np.ndarray, np.ndarray]:
    """(int64 ns, ok) of ISO 8601 UTC texts; ok is False for anything else, impossible dates included.

    The texts are grouped by length (20 characters, or 22 to 30 with a fraction), and each
    group's bytes read as a matrix, column by column."""
    length = np.asarray(pc.fill_null(pc.binary_length(array), 0).to_numpy(zero_copy_only=False), dtype=np.int64)
    ns = np.zeros(len(array), dtype=np.int64)
    ok = np.zeros(len(array), dtype=bool)
    for width in np.unique(length):
        if width != 20 and not 22 <= width <= 30:
            continue
        rows = np.flatnonzero(length == width)
        ns[rows], ok[rows] = _parse_fixed(_fixed_width(array, rows, int(width)))
    ok &= ~_mask(pc.is_null(array))
    return ns, ok


def _parse_text(array: pa.Array, field: dict[str, Any], missing: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """(values, bad) of a text column read by the field's type."""
    kind = field["type"]
    if kind == "datetime":
        values, ok = _parse_times(array)
    elif kind == "boolean":
        truths = pa.array(field.get("trueValues", ["true", "True", "TRUE", "1"]))
        falses = pa.array(field.get("falseValues", ["false", "False", "FALSE", "0"]))
        values = _mask(pc.is_in(array, value_set=truths))
        ok = values | _mask(pc.is_in(array, value_set=falses))
    elif kind == "number":
        ok = _mask(pc.match_substring_regex(array, _NUMBER_RE))
        values = pc.cast(pc.if_else(pa.array(ok), array, "0"), pa.float64()).to_numpy(zero_copy_only=False)
        ok &= np.isfinite(values)
    elif kind == "integer":
        ok = _mask(pc.match_substring_regex(array, _INTEGER_RE))
        values = pc.cast(pc.if_else(pa.array(ok), array, "0"), pa.int64()).to_numpy(zero_copy_only=False)
    else:
        raise ValueError(f"unsupported field type {kind!r}")
    return values, ~ok & ~missing


def _typed(array: pa.Array, field: dict[str, Any], missing: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """(values, bad) of a typed (Parquet) column; raises ColumnTypeError for a type that cannot hold them."""
    kind, t = field["type"], array.type
    if kind == "datetime" and pa.types.is_timestamp(t):
        if t.tz not in _UTC_NAMES:
            raise ColumnTypeError(f"Parquet type {t}: expected a timezone-aware UTC timestamp")
        raw = np.asarray(array.cast(pa.int64()).fill_null(0).to_numpy(zero_copy_only=False), dtype=np.int64)
        per_s = {"s": 1, "ms": 10**3, "us": 10**6, "ns": 10**9}[t.unit]
        epoch = np.datetime64("1970-01-01", "s")
        low = int((np.datetime64(f"{MIN_YEAR}-01-01", "s") - epoch).astype(np.int64))
        high = int((np.datetime64(f"{MAX_YEAR + 1}-01-01", "s") - epoch).astype(np.int64))
        ok = (raw >= low * per_s) & (raw < high * per_s)
        values = np.where(ok, raw, 0) * (_NS // per_s)
        return values, ~ok & ~missing
    if kind == "boolean" and pa.types.is_boolean(t):
        return _mask(array), np.zeros(len(array), dtype=bool)
    if kind in ("number", "integer") and (pa.types.is_integer(t) or pa.types.is_floating(t)):
        filled = array.cast(pa.float64()).fill_null(0.0)
        values = np.asarray(filled.to_numpy(zero_copy_only=False), dtype=np.float64)
        ok = np.isfinite(values)
        if kind == "integer":
            ok &= (values == np.round(values)) & (np.abs(values) < 2.0**62)
            values = np.where(ok, values, 0).astype(np.int64)
        return values, ~ok & ~missing
    raise ColumnTypeError(f"Parquet type {t}: expected {_EXPECTED.get(kind, 'text')}")


def parse_column(array: pa.Array | pa.ChunkedArray, field: dict[str, Any], missing_values: list[str],
                 unescape: bool = False) -> Column:
    """Read one column by its Table Schema ``field``; ``missing_values`` are the schema's
    ``missingValues`` (an Arrow null is missing too); ``unescape``: undo fleetsim's CSV formula
    escape in text. Raises ColumnTypeError for a typed column of the wrong type."""
    if isinstance(array, pa.ChunkedArray):
        array = array.combine_chunks() if array.num_chunks != 1 else array.chunk(0)
    name, kind = field["name"], field["type"]
    if kind == "string" and pa.types.is_dictionary(array.type) and _is_text(array):
        categories, codes, missing = _dictionary_strings(array, missing_values, unescape)
        return Column(name, kind, codes, missing, np.zeros(len(array), dtype=bool), categories=categories)
    text = _is_text(array)
    if text:
        array = _as_string(array)
    missing = _mask(pc.is_null(array))
    if text and missing_values:
        missing |= _mask(pc.is_in(array, value_set=pa.array(missing_values, type=array.type)))
    if kind == "string":
        if not text:
            raise ColumnTypeError(f"Parquet type {array.type}: expected text")
        categories, codes = _strings(array, unescape)
        return Column(name, kind, codes, missing, np.zeros(len(array), dtype=bool), categories=categories)
    if text:
        values, bad = _parse_text(array, field, missing)
        return Column(name, kind, values, missing, bad, text=array)
    values, bad = _typed(array, field, missing)
    return Column(name, kind, values, missing, bad)
