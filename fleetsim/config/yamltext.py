"""Reading fleet and stress files: one safe YAML reader (UTF-8, no duplicate keys, bounded
nesting and alias expansion) whose failures are one-line errors naming the file and line.
"""

from __future__ import annotations

import math
from pathlib import Path
from typing import Any

import yaml

from ..errors import ConfigError
from .fields import _show

MAX_FILE_BYTES = 16 * 2**20
"""Largest fleet or stress file read, bytes (the example is about 10 kB)."""
MAX_DEPTH = 32
"""Deepest nesting of mappings and lists a file may hold (the format itself needs 6)."""
MAX_NODES = 200_000
"""Most values a file may expand to, each alias counted as often as it is used (so that an
alias bomb, a few lines that expand to billions of values, is refused while still small)."""



# libyaml's parser (where installed) is ten times faster and stops at 1000 levels of nesting
# by itself; the pure-Python one recurses, and a RecursionError is caught below.
_SafeBase: Any = getattr(yaml, "CSafeLoader", yaml.SafeLoader)


class _Loader(_SafeBase):  # type: ignore[misc, valid-type]
    """The safe YAML loader, refusing duplicate keys and values it cannot build, with lines."""

    def construct_mapping(self, node: yaml.MappingNode, deep: bool = False) -> dict[Any, Any]:
        seen: dict[Any, int] = {}
        for key_node, _ in node.value:
            if key_node.tag == "tag:yaml.org,2002:merge":
                continue  # merged keys may be overridden: that is what merging is for
            key = self.construct_object(key_node, deep=True)
            try:
                first = seen.get(key)
            except TypeError:
                continue  # an unhashable key: the base class refuses it with its line
            line = key_node.start_mark.line + 1
            if first is not None:
                raise yaml.constructor.ConstructorError(
                    None, None, f"duplicate key {_show(key)} at line {line} (first at line {first})",
                    key_node.start_mark,
                )
            seen[key] = line
        return super().construct_mapping(node, deep=deep)

    def construct_object(self, node: yaml.Node, deep: bool = False) -> Any:
        try:
            return super().construct_object(node, deep=deep)
        except (ValueError, TypeError, OverflowError) as exc:
            # e.g. a date that does not exist (2026-02-30): the timestamp constructor raises.
            shown = f" {_show(node.value)}" if isinstance(node, yaml.ScalarNode) else ""
            raise yaml.constructor.ConstructorError(
                None, None, f"cannot read{shown} ({exc})", node.start_mark
            ) from None


def load_yaml_text(text: str) -> Any:
    """Parse YAML text as fleet files are parsed: safe types only, no duplicate keys, at most
    MAX_DEPTH levels and MAX_NODES values.

    Raises ValueError with a one-line reason (and the line where known).
    """
    try:
        data = yaml.load(text, Loader=_Loader)  # noqa: S506 (a SafeLoader subclass)
    except yaml.YAMLError as exc:
        mark = getattr(exc, "problem_mark", None)
        where = f" at line {mark.line + 1}, column {mark.column + 1}" if mark else ""
        problem = getattr(exc, "problem", None) or str(exc).splitlines()[0]
        if "nesting depth" in problem:
            problem = f"nested more than {MAX_DEPTH} levels deep"
        raise ValueError(f"not valid YAML{where}: {problem}") from None
    except RecursionError:
        raise ValueError(f"not valid YAML: nested more than {MAX_DEPTH} levels deep") from None
    problem = structure_problem(data, finite=False)
    if problem is not None:
        where, message = problem
        raise ValueError(f"{where}: {message}" if where else message)
    return data


def structure_problem(data: Any, finite: bool = True) -> tuple[str, str] | None:
    """The first problem of a parsed tree as (key path, message), or None.

    Refuses nesting deeper than MAX_DEPTH, a value that contains itself, more than MAX_NODES
    values with aliases expanded, and (``finite``) infinite or NaN numbers. Shared values are
    measured once, so a bomb costs no more to check than its text.
    """
    sizes: dict[int, int] = {}
    active: set[int] = set()

    def walk(node: Any, path: tuple[str, ...]) -> int:
        if len(path) > MAX_DEPTH:
            raise _Refused(path, f"nested more than {MAX_DEPTH} levels deep")
        if isinstance(node, float) and finite and not math.isfinite(node):
            raise _Refused(path, f"expected a finite number (got {_show(node)})")
        if not isinstance(node, (dict, list)):
            return 1
        key = id(node)
        if key in active:
            raise _Refused(path, "a value that contains itself (a recursive alias)")
        if key in sizes:
            return sizes[key]
        active.add(key)
        items = node.items() if isinstance(node, dict) else enumerate(node)
        total = 1
        for name, child in items:
            total += walk(child, (*path, str(name)))
            if total > MAX_NODES:
                raise _Refused(path, f"expands to more than {MAX_NODES:,} values (an alias bomb?)")
        active.discard(key)
        sizes[key] = total
        return total

    try:
        walk(data, ())
    except _Refused as refused:
        shown = refused.path if len(refused.path) <= 8 else (*refused.path[:8], "...")
        return ".".join(shown), refused.message
    return None


class _Refused(Exception):
    def __init__(self, path: tuple[str, ...], message: str):
        super().__init__(message)
        self.path, self.message = path, message


def read_yaml(path: Path, what: str = "the file") -> Any:
    """Read a YAML file as UTF-8 (see :func:`load_yaml_text`); ConfigError names the file
    (and line) on failure: unreadable, larger than MAX_FILE_BYTES, not UTF-8, not YAML."""
    try:
        with path.open("rb") as handle:
            blob = handle.read(MAX_FILE_BYTES + 1)
    except OSError as exc:
        raise ConfigError([f"{path}: cannot read {what} ({exc.strerror or exc})"]) from None
    if len(blob) > MAX_FILE_BYTES:
        raise ConfigError([f"{path}: {what} is larger than {MAX_FILE_BYTES // 2**20} MiB; expected a short YAML file"])
    try:
        text = blob.decode("utf-8")
    except UnicodeDecodeError as exc:
        raise ConfigError([f"{path}: {what} is not UTF-8 text{_encoding_hint(blob)} "
                           f"(byte 0x{blob[exc.start]:02x} at offset {exc.start})"]) from None
    try:
        return load_yaml_text(text)
    except ValueError as exc:
        raise ConfigError([f"{path}: {exc}"]) from None


def _encoding_hint(blob: bytes) -> str:
    """What a non-UTF-8 file probably is, by its first bytes (gzip RFC 1952 magic, UTF-16 BOMs)."""
    if blob.startswith(b"\x1f\x8b"):
        return ": it looks gzip-compressed; decompress it first"
    if blob.startswith((b"\xff\xfe", b"\xfe\xff")):
        return ": it looks like UTF-16; save it as UTF-8"
    return ""

