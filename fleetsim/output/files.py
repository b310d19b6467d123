"""Single files written all or nothing, safe file names, and CSV cells no spreadsheet runs.

:func:`atomic_text` and :func:`atomic_save` write beside the target and rename, so a reader
sees the old file or the new one, never half of one; the files get the usual permissions
(0666 less the umask), like any file the process writes directly. Every CSV fleetsim writes
goes through :func:`write_csv`, which escapes text cells a spreadsheet would read as a formula.
"""

from __future__ import annotations

import hashlib
import os
import re
import tempfile
from collections.abc import Callable
from pathlib import Path
from typing import TYPE_CHECKING, Any

from ..errors import FleetsimError

if TYPE_CHECKING:
    import pandas as pd

__all__ = [
    "PARTIAL", "atomic_text", "atomic_save", "safe_name", "SAFE_NAME_LENGTH", "inside", "escape_cell",
    "unescape_cell", "csv_frame", "unescape_frame", "write_csv",
]

PARTIAL = ".partial-"
"""Prefix of temporary files written beside their target (left over only by a killed process)."""


def _reason(exc: BaseException) -> str:
    """A one-line reason for an OS error (pyarrow's carry only a message)."""
    text = exc.strerror if isinstance(exc, OSError) and exc.strerror else str(exc) or type(exc).__name__
    return " ".join(text.split())


def _file_mode() -> int:
    """The mode a new file gets from ``open``: 0666 less the process umask."""
    mask = os.umask(0)  # reading the umask means setting it; put it straight back
    os.umask(mask)
    return 0o666 & ~mask


# ------------------------------------------------------------------------------------- files


def atomic_text(path: Path, text: str) -> None:
    """Write ``text`` to ``path`` through a flushed temporary file beside it and ``os.replace``.

    Raises FleetsimError if the folder cannot be written (the target is then unchanged).
    """
    path = Path(path)
    try:
        path.parent.mkdir(parents=True, exist_ok=True)
        handle, tmp = tempfile.mkstemp(prefix=f"{PARTIAL}{path.name}.", dir=path.parent)
    except OSError as exc:
        raise FleetsimError(f"{path.parent}: cannot write ({exc.strerror or exc})") from None
    try:
        os.chmod(tmp, _file_mode())  # mkstemp makes the file private; an output is readable like the rest
        with os.fdopen(handle, "w", encoding="utf-8") as stream:
            stream.write(text)
            stream.flush()
            os.fsync(stream.fileno())
        os.replace(tmp, path)
    except BaseException as exc:
        try:
            os.unlink(tmp)
        except OSError:
            pass
        if isinstance(exc, OSError):
            raise FleetsimError(f"{path}: cannot write ({_reason(exc)})") from None
        raise


def atomic_save(path: Path, save: Callable[[Path], object]) -> None:
    """Let ``save(tmp_path)`` write a file (e.g. a plot or Parquet), then move it to ``path``.

    The temporary file sits beside ``path``, so the move is an atomic rename. Raises
    FleetsimError for an OS error (the target is then unchanged).
    """
    path = Path(path)
    tmp = path.with_name(f"{PARTIAL}{os.getpid()}.{path.name}")
    try:
        path.parent.mkdir(parents=True, exist_ok=True)
        save(tmp)
        os.replace(tmp, path)
    except BaseException as exc:
        try:
            os.unlink(tmp)
        except OSError:
            pass
        if isinstance(exc, OSError):
            raise FleetsimError(f"{path}: cannot write ({_reason(exc)})") from None
        raise


# ------------------------------------------------------------------------- names and paths

_UNSAFE = re.compile(r"[^A-Za-z0-9._-]")
SAFE_NAME_LENGTH = 100
"""Longest file name :func:`safe_name` returns (before any extension)."""


def safe_name(text: str, taken: set[str] | None = None, limit: int = SAFE_NAME_LENGTH) -> str:
    """A file name for ``text`` made of ASCII letters, digits, ``-``, ``_`` and ``.`` only, not
    starting with a dot or a dash, at most ``limit`` characters.

    A name that had to change (or was too long) ends in ``-`` and 10 hex digits of its SHA-256,
    so two names never end up alike by accident. With ``taken`` (lower-case names already
    used in the folder) the result is also unique there, ignoring case, and is added to it.
    """
    slug = _UNSAFE.sub("_", text).lstrip(".-")
    if not slug or slug != text or len(slug) > limit:
        digest = hashlib.sha256(text.encode("utf-8", "surrogatepass")).hexdigest()[:10]
        slug = f"{slug[: limit - 11]}-{digest}" if slug else digest
    if taken is not None:
        stem, n = slug, 2
        while slug.casefold() in taken:
            slug = f"{stem[: limit - 6]}-{n}"
            n += 1
        taken.add(slug.casefold())
    return slug


def inside(root: str | Path, path: str | Path) -> Path:
    """Return ``path`` if, symbolic links resolved, it lies inside ``root``; else raise FleetsimError."""
    base, full = Path(root).resolve(), Path(path).resolve()
    if base not in full.parents:
        raise FleetsimError(f"{path}: would be written outside {root}; refused")
    return Path(path)


# ------------------------------------------------------------------------------------- CSV

_FORMULA_START = frozenset("=+-@\t\r")
"""First characters a spreadsheet reads as the start of a formula (OWASP CSV injection, common practice)."""


def escape_cell(value: Any) -> Any:
    """``value`` with a ``'`` put in front if it is text a spreadsheet would take for a formula.

    Text already starting with ``'`` gets one more, so :func:`unescape_cell` gives back the
    exact original. Anything that is not text (a negative number, say) is returned as is.
    """
    if isinstance(value, str) and value[:1] and (value[0] in _FORMULA_START or value[0] == "'"):
        return "'" + value
    return value


def unescape_cell(value: Any) -> Any:
    """The inverse of :func:`escape_cell` for a text cell read back from a fleetsim CSV."""
    if isinstance(value, str) and value.startswith("'"):
        return value[1:]
    return value


def csv_frame(frame: pd.DataFrame) -> pd.DataFrame:
    """A copy of ``frame`` whose text cells and column names are passed through :func:`escape_cell`."""
    import pandas as pd  # here, not at the top: writing single files needs no table library

    out = frame.copy()
    for position in range(out.shape[1]):
        column = out.iloc[:, position]
        if isinstance(column.dtype, pd.CategoricalDtype):
            if column.cat.categories.dtype == object:
                out.isetitem(position, column.cat.rename_categories([escape_cell(c) for c in column.cat.categories]))
        elif column.dtype == object or pd.api.types.is_string_dtype(column.dtype):
            out.isetitem(position, column.map(escape_cell))
    out.columns = [escape_cell(name) for name in out.columns]
    return out


def unescape_frame(frame: pd.DataFrame) -> pd.DataFrame:
    """The inverse of :func:`csv_frame` for a table read back with pandas (text columns as str)."""
    out = frame.copy()
    for position in range(out.shape[1]):
        if out.iloc[:, position].dtype == object:
            out.isetitem(position, out.iloc[:, position].map(unescape_cell))
    out.columns = [unescape_cell(name) for name in out.columns]
    return out


def write_csv(frame: pd.DataFrame, path: str | Path) -> None:
    """Write ``frame`` (no index) as CSV with formula-like text escaped; every CSV fleetsim writes
    goes through here. Parquet files keep the raw values."""
    csv_frame(frame).to_csv(path, index=False)
