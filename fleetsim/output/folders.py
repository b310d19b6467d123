"""Output folders: the marker, the checks on a target, the atomic swap and leftovers.

Nothing fleetsim did not write is ever replaced: every folder it writes (run, sweep,
comparison and telemetry folders) carries the marker file :data:`MARKER`; a target that exists, is not
empty and has no marker is refused, and replacing an earlier output needs ``force``
(``--force``). :func:`check_target` holds these rules. A folder is filled under a fresh
sibling name (``.NAME.partial-*``) and swapped in only once complete
(:func:`atomic_folder`); :func:`clean_leftovers` removes the temporary folders a killed
process left beside a target.
"""

from __future__ import annotations

import ctypes
import errno
import functools
import json
import os
import re
import shutil
import sys
import tempfile
import time
from collections.abc import Callable, Iterable
from datetime import datetime, timezone
from pathlib import Path
from typing import Any

from ..errors import FleetsimError
from .contents import MARKER, foreign, read_marker
from .files import _reason, atomic_text

__all__ = [
    "MARKER", "KINDS", "atomic_folder", "check_target", "claim_study", "clean_leftovers", "marker_text",
    "read_marker",
]


KINDS = ("run", "sweep", "compare", "study", "telemetry", "seeds")
"""Kinds of output folder; ``study`` is a study folder not yet claimed by a sweep or comparison;
``telemetry`` a folder of synthetic telemetry (``fleetsim telemetry``); ``seeds`` a multi-seed
run folder (``fleetsim run --seeds``, :mod:`fleetsim.output.seeds`) or a report over several runs."""

# The marker kinds a folder may already carry for a write of each kind to go ahead without
# force: a study resumes in its own folder, a run never replaces anything unasked.
_RESUMES = {"run": set(), "sweep": {"sweep", "study"}, "compare": {"compare", "study"},
            "study": {"sweep", "compare", "study"}, "telemetry": set(), "seeds": set()}
_KIND_WORDS = {"run": "run", "sweep": "sweep", "compare": "comparison", "study": "study",
               "telemetry": "telemetry folder", "seeds": "multi-seed run"}
_HOLDER = "old"  # marker kind of the folder an output being replaced is moved into

_STARTED = time.time()
"""When this process loaded fleetsim (or was forked): only temporary folders older than this are leftovers."""


def _restart_clock() -> None:
    global _STARTED
    _STARTED = time.time()  # a forked child is a new process: older folders may be its parent's leftovers


if hasattr(os, "register_at_fork"):
    os.register_at_fork(after_in_child=_restart_clock)

_LEFTOVER = re.compile(r"\.(partial|old)-[a-z0-9_]{8}")  # after ".NAME"; tempfile.mkdtemp's 8 characters


def marker_text(kind: str) -> str:
    """The marker file's JSON for a folder of ``kind`` (see :data:`KINDS`)."""
    from .. import __version__

    created = datetime.now(timezone.utc).isoformat(timespec="seconds")
    return json.dumps({"kind": kind, "fleetsim": __version__, "created": created}) + "\n"


def _home() -> Path | None:
    try:
        return Path.home().resolve()
    except (RuntimeError, KeyError, OSError):
        return None


def check_target(
    target: str | Path, kind: str = "run", force: bool = False, inputs: Iterable[str | Path] = (),
    label: str | None = None,
) -> Path:
    """Check that a write of ``kind`` may go to the folder ``target``; return it as an absolute path.

    Refused (FleetsimError, one line starting with ``label``, default the path): the current
    folder or any folder holding it, the root, the home folder, a folder holding one of the
    ``inputs`` (the fleet file, a stress file), something that is not a folder, a non-empty
    folder without fleetsim's marker, and a fleetsim folder this write would replace unless
    ``force`` (a sweep or comparison resumes in a folder of its own kind without it).
    Nothing is touched.
    """
    label = label or str(target)
    if str(target) in ("", "."):
        raise FleetsimError(f"{label}: is the current folder; choose a new folder")
    where = Path(os.path.abspath(target))  # '..' folded lexically; a final symbolic link kept as is
    resolved = where.resolve()
    if resolved == Path(resolved.anchor):
        raise FleetsimError(f"{label}: is the root folder; choose a new folder")
    if resolved == _home():
        raise FleetsimError(f"{label}: is your home folder; choose a new folder")
    cwd = Path.cwd().resolve()
    if resolved == cwd or resolved in cwd.parents:
        raise FleetsimError(f"{label}: is the current folder or one that holds it; choose a new folder")
    for source in inputs:
        holder = Path(source).resolve().parent
        if resolved == holder or resolved in holder.parents:
            raise FleetsimError(f"{label}: holds the input file {source}; choose a new folder")
    if os.path.lexists(where) and not where.is_dir():
        raise FleetsimError(f"{label}: exists and is not a folder; choose a new folder")
    if where.is_dir():
        try:
            empty = not os.listdir(where)
        except OSError as exc:
            raise FleetsimError(f"{label}: cannot read the folder ({_reason(exc)})") from None
        if not empty:
            marker = read_marker(where)
            if marker is None or marker["kind"] not in KINDS:
                raise FleetsimError(f"{label}: exists and is not a fleetsim output folder; choose a new folder")
            if marker["kind"] not in _RESUMES[kind] and not force:
                word = _KIND_WORDS[marker["kind"]]
                raise FleetsimError(
                    f"{label}: holds an earlier fleetsim {word}; pass --force to replace it, or choose another folder"
                )
            if marker["kind"] not in _RESUMES[kind]:  # to be replaced: only if all of it is ours
                extra = foreign(where, marker["kind"])
                if extra:
                    names = ", ".join(extra[:3]) + (", ..." if len(extra) > 3 else "")
                    raise FleetsimError(f"{label}: holds files fleetsim did not write ({names}); "
                                        "move them away or choose another folder")
    return where


def _remove(path: Path) -> None:
    """Delete a folder fleetsim made, its marker last, so one half-removed still shows it is ours."""
    try:
        if path.is_symlink() or not path.is_dir():
            path.unlink(missing_ok=True)
            return
        for child in os.scandir(path):
            if child.name == MARKER:
                continue
            if child.is_dir(follow_symlinks=False):
                shutil.rmtree(child.path, ignore_errors=True)
            else:
                os.unlink(child.path)
        (path / MARKER).unlink(missing_ok=True)
        path.rmdir()
    except OSError:
        pass  # what is left carries our naming and is removed by the next write to this target


def clean_leftovers(target: str | Path, notice: Callable[[str], None] | None = None) -> list[str]:
    """Remove the temporary folders (``.NAME.partial-*``, ``.NAME.old-*``) a killed write left beside
    ``target``; return their names.

    Only folders with exactly that naming, older than this process, and empty or carrying the
    marker are removed. If ``target`` itself is missing and a leftover holds the output it was
    replacing, that output is put back first. ``notice`` (default: stderr) gets one line.
    """
    where = Path(os.path.abspath(target))
    prefix = f".{where.name}"
    try:
        entries = sorted(os.scandir(where.parent), key=lambda e: e.name)
    except OSError:
        return []
    removed, restored = [], False
    for entry in entries:
        if not entry.name.startswith(prefix) or not _LEFTOVER.fullmatch(entry.name[len(prefix):]):
            continue
        path = Path(entry.path)
        try:
            if entry.is_symlink() or not entry.is_dir() or entry.stat().st_mtime >= _STARTED:
                continue
            children = os.listdir(path)
        except OSError:
            continue
        if children and read_marker(path) is None:
            continue
        previous = path / "previous"
        if not restored and not os.path.lexists(where) and read_marker(previous) is not None:
            try:
                os.replace(previous, where)
                restored = True
            except OSError:
                pass
        _remove(path)
        removed.append(entry.name)
    if removed:
        line = (f"note: removed {len(removed)} leftover temporary folder(s) of an interrupted fleetsim write "
                f"beside {target}: {', '.join(removed)}" + ("; the previous output was put back" if restored else ""))
        (notice or (lambda text: print(text, file=sys.stderr)))(line)
    return removed


@functools.cache
def _renameat2() -> Any:
    if not sys.platform.startswith("linux"):
        return None
    try:
        function = ctypes.CDLL(None, use_errno=True).renameat2
    except (OSError, AttributeError):
        return None
    function.argtypes = [ctypes.c_int, ctypes.c_char_p, ctypes.c_int, ctypes.c_char_p, ctypes.c_uint]
    return function


def _exchange(a: Path, b: Path) -> bool:
    """Swap two paths in one atomic step (Linux renameat2 with RENAME_EXCHANGE); False where unsupported."""
    function = _renameat2()
    if function is None:
        return False
    at_cwd, rename_exchange = -100, 2  # AT_FDCWD and RENAME_EXCHANGE from <fcntl.h> and <linux/fs.h>
    if function(at_cwd, os.fsencode(a), at_cwd, os.fsencode(b), rename_exchange) == 0:
        return True
    code = ctypes.get_errno()
    if code in (errno.EINVAL, errno.ENOSYS, errno.EOPNOTSUPP, errno.ENOTSUP):
        return False
    raise OSError(code, os.strerror(code), str(b))


def _put_in_place(tmp: Path, target: Path) -> Path | None:
    """Move the finished folder ``tmp`` to ``target``; return the path now holding what ``target``
    held (to be removed), or None.

    The swap is one atomic step where the system allows; elsewhere the old folder is first
    moved into a marked ``.NAME.old-*`` folder, which the next write puts back if this process
    is killed in between.
    """
    if not os.path.lexists(target):
        os.rename(tmp, target)
        return None
    if _exchange(tmp, target):
        return tmp
    holder = Path(tempfile.mkdtemp(prefix=f".{target.name}.old-", dir=target.parent))
    (holder / MARKER).write_text(marker_text(_HOLDER), encoding="utf-8")
    os.replace(target, holder / "previous")
    try:
        os.replace(tmp, target)
    except OSError:
        os.replace(holder / "previous", target)
        _remove(holder)
        raise
    return holder


def _new_folder(where: Path, kind: str, label: str) -> Path:
    """A fresh folder beside ``where`` (``.NAME.partial-*``) carrying the marker of ``kind``."""
    tmp: Path | None = None
    try:
        where.parent.mkdir(parents=True, exist_ok=True)
        tmp = Path(tempfile.mkdtemp(prefix=f".{where.name}.partial-", dir=where.parent))
        tmp.chmod(0o755)  # mkdtemp makes it private; an output folder is as readable as any output
        (tmp / MARKER).write_text(marker_text(kind), encoding="utf-8")
    except OSError as exc:
        if tmp is not None:
            _remove(tmp)
        raise FleetsimError(f"{label}: cannot create the output folder ({_reason(exc)})") from None
    return tmp


def atomic_folder(
    target: str | Path, fill: Callable[[Path], None], *, kind: str = "run", force: bool = False,
    inputs: Iterable[str | Path] = (), label: str | None = None, notice: Callable[[str], None] | None = None,
) -> Path:
    """Call ``fill(tmp)`` on a fresh marked folder beside ``target``, then put it in place of ``target``.

    ``target`` must pass :func:`check_target` (``kind``, ``force``, ``inputs``, ``label``),
    checked before and again just before the swap; leftovers of killed writes beside it are
    removed first (:func:`clean_leftovers`, reported to ``notice``). Raises FleetsimError for
    a refused target and for any OS error while writing (a full disk, say), after removing
    the temporary folder: the target is then exactly as it was.
    """
    label = label or str(target)
    inputs = list(inputs)
    where = check_target(target, kind, force, inputs, label)
    clean_leftovers(where, notice)
    tmp = _new_folder(where, kind, label)
    try:
        fill(tmp)
        check_target(target, kind, force, inputs, label)  # it may have changed while we wrote
        previous = _put_in_place(tmp, where)
    except OSError as exc:
        _remove(tmp)
        raise FleetsimError(f"{label}: cannot write ({_reason(exc)}); nothing was changed") from None
    except BaseException:
        _remove(tmp)
        raise
    if previous is not None:
        _remove(previous)
    return Path(target)


def claim_study(
    folder: str | Path, kind: str = "study", *, force: bool = False, inputs: Iterable[str | Path] = (),
    label: str | None = None, notice: Callable[[str], None] | None = None,
) -> Path:
    """Make ``folder`` a study folder of ``kind`` (``sweep``, ``compare``, or ``study`` for either)
    and return it as an absolute path.

    A missing folder is created with the marker in one step, an empty one gets the marker, a
    study folder of the same kind is kept as it is (resuming is not replacing), and with
    ``force`` another fleetsim folder is swapped for a fresh one. Everything else is refused
    as :func:`check_target` says. Raises FleetsimError.
    """
    label = label or str(folder)
    where = check_target(folder, kind, force, inputs, label)
    clean_leftovers(where, notice)
    marker = read_marker(where) if where.is_dir() else None
    if marker is not None and marker["kind"] in _RESUMES[kind]:
        if marker["kind"] != kind and kind != "study":
            atomic_text(where / MARKER, marker_text(kind))  # a folder the API started, now named
        return where
    if marker is None and where.is_dir():  # empty (check_target refuses anything else)
        atomic_text(where / MARKER, marker_text(kind))
        return where
    tmp = _new_folder(where, kind, label)
    try:
        previous = _put_in_place(tmp, where)
    except OSError as exc:
        _remove(tmp)
        raise FleetsimError(f"{label}: cannot create the study folder ({_reason(exc)})") from None
    if previous is not None:
        _remove(previous)
    return where
