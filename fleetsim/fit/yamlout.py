"""A fitted fleet file as YAML text, with each estimate's interval as a comment.

The fleet dict is written key by key: mappings as blocks, lists of plain values as one flow
list, text quoted wherever YAML would read it back as something else. Comments come from a
mapping of key paths (tuples) to ``(lines above, comment at the end of the line)``.
"""

from __future__ import annotations

import json
import math
from typing import Any

import yaml

__all__ = ["FIT_HEADER", "render_yaml", "scalar_text"]

FIT_HEADER = "# fleetsim fit: a fleet file estimated from telemetry"
"""First line of every fleet file ``fleetsim fit`` writes: how it tells its own files."""

Comments = dict[tuple[str, ...], tuple[list[str], str]]


def scalar_text(value: Any) -> str:
    """One YAML scalar that reads back as ``value``."""
    if value is None:
        return "null"
    if isinstance(value, bool):
        return "true" if value else "false"
    if isinstance(value, int):
        return str(value)
    if isinstance(value, float):
        if not math.isfinite(value):
            raise ValueError(f"not a finite number: {value}")
        return repr(value)
    text = str(value)
    plain = text and text == text.strip() and not any(c in text for c in "#:,[]{}&*!|>'\"@`\n\\")
    if plain:
        try:
            plain = yaml.safe_load(text) == text
        except yaml.YAMLError:
            plain = False
    return text if plain else json.dumps(text, ensure_ascii=False)


def _flow_ok(value: Any) -> bool:
    return isinstance(value, list) and all(not isinstance(v, (dict, list)) for v in value)


def _emit(key: str, value: Any, path: tuple[str, ...], indent: int, comments: Comments, out: list[str]) -> None:
    pad = " " * indent
    above, inline = comments.get(path, ([], ""))
    out.extend(f"{pad}# {line}" if line else f"{pad}#" for line in above)
    tail = f"  # {inline}" if inline else ""
    head = f"{pad}{scalar_text(key)}:"
    if isinstance(value, dict) and value:
        out.append(head + tail)
        for k, v in value.items():
            _emit(str(k), v, path + (str(k),), indent + 2, comments, out)
    elif isinstance(value, dict):
        out.append(f"{head} {{}}{tail}")
    elif _flow_ok(value):
        out.append(f"{head} [{', '.join(scalar_text(v) for v in value)}]{tail}")
    elif isinstance(value, list):
        out.append(head + tail)
        for i, item in enumerate(value):
            if isinstance(item, dict):
                inner: list[str] = []
                for k, v in item.items():
                    _emit(str(k), v, path + (str(i), str(k)), indent + 4, comments, inner)
                first = inner[0].lstrip()
                out.append(f"{pad}  - {first}")
                out.extend(inner[1:])
            else:
                out.append(f"{pad}  - {scalar_text(item)}")
    else:
        out.append(f"{head} {scalar_text(value)}{tail}")


def render_yaml(data: dict[str, Any], comments: Comments, header: list[str]) -> str:
    """The YAML text of ``data`` under the ``header`` comment lines (without ``#``)."""
    out = [FIT_HEADER] + [f"# {line}" if line else "#" for line in header]
    for key, value in data.items():
        out.append("")
        _emit(str(key), value, (str(key),), 0, comments, out)
    return "\n".join(out) + "\n"
