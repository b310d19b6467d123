"""Loading a fleet file: overrides, validation and one-line errors; hash and JSON Schema."""

from __future__ import annotations

import copy
import hashlib
import json
from pathlib import Path
from typing import Any

from pydantic import BaseModel, ValidationError

from ..errors import ConfigError
from .fields import _AT_RE, _show
from .models import Config
from .yamltext import load_yaml_text, read_yaml


def example_path() -> Path:
    """Path of the bundled example fleet (the Inkwren scenario)."""
    return Path(__file__).parents[1] / "data" / "inkwren.yaml"


def load_config(path: str | Path, overrides: list[str] | None = None) -> Config:
    """Read, override and validate a fleet file.

    ``overrides`` are ``key.path=value`` strings; values are parsed as YAML scalars.
    Raises ConfigError (one line per problem) for unreadable files or invalid content.
    """
    path = Path(path)
    raw = read_yaml(path)
    if not isinstance(raw, dict):
        raise ConfigError([f"{path}: expected a mapping of sections at the top level (got {type(raw).__name__})"])
    return build_config(raw, source=str(path), overrides=overrides)


def build_config(raw: dict[str, Any], source: str = "<config>", overrides: list[str] | None = None) -> Config:
    """Validate a mapping (after applying ``key.path=value`` overrides) into a Config."""
    data = apply_overrides(raw, overrides or [], source=source)
    try:
        return Config.model_validate(data)
    except ValidationError as exc:
        raise ConfigError(_describe(exc, source, data)) from None


def _unshared(node: Any) -> Any:
    """A copy of a YAML tree in which no two places share a mapping or list: a file's aliases
    (``*name``) become copies, so an override changes only the place its key path names. The
    reader bounds the expanded size (MAX_NODES), so this copy is bounded too."""
    if isinstance(node, dict):
        return {key: _unshared(value) for key, value in node.items()}
    if isinstance(node, list):
        return [_unshared(value) for value in node]
    return copy.copy(node)


def apply_overrides(raw: dict[str, Any], overrides: list[str], source: str = "<config>") -> dict[str, Any]:
    """Return a copy of ``raw`` with each ``key.path=value`` set (value read as YAML).

    List items are addressed by index (``disruptions.0.factor``). Raises ConfigError for a
    malformed override.
    """
    data = _unshared(raw)
    problems = []
    for item in overrides:
        key, sep, text = item.partition("=")
        if not sep or not key.strip():
            problems.append(f"--set: expected key.path=value (got {_show(item)})")
            continue
        try:
            value = load_yaml_text(text) if text.strip() else ""
        except ValueError as exc:
            if text.lstrip()[:1] in "[{&*!|>":
                problems.append(f"--set: {key.strip()}: {exc} (got {_show(text)})")
                continue
            value = text  # plain text that YAML cannot read, such as 'a: b: c', stays text
        parts = key.strip().split(".")
        node: Any = data
        try:
            for part in parts[:-1]:
                if isinstance(node, list):
                    node = node[int(part)]
                else:
                    if node.get(part) is None:  # a key written bare (null) holds a mapping once set into
                        node[part] = {}
                    node = node[part]
            last = parts[-1]
            if isinstance(node, list):
                node[int(last)] = value
            elif isinstance(node, dict):
                node[last] = value
            else:
                raise TypeError
        except (ValueError, IndexError, TypeError, AttributeError):
            problems.append(f"--set: {key.strip()}: does not name a settable key in {source} (got {_show(item)})")
    if problems:
        raise ConfigError(problems)
    return data


def _lookup(data: Any, loc: tuple[Any, ...]) -> tuple[bool, Any]:
    node = data
    for part in loc:
        try:
            node = node[part]
        except (KeyError, IndexError, TypeError):
            return False, None
    return True, node


def _describe(exc: ValidationError, source: str, data: dict[str, Any]) -> list[str]:
    lines = []
    seen = set()
    for error in exc.errors(include_url=False):
        # Drop the internal names pydantic adds for union branches and function validators.
        loc = tuple(p for p in error["loc"] if not (isinstance(p, str) and ("[" in p or p.startswith("function-"))))
        message = error["msg"]
        if message.startswith("Value error, "):
            message = message[len("Value error, "):]
        placed = _AT_RE.match(message)
        if placed:  # a model validator naming the key it is about (see _at)
            loc = (*loc, *placed.group(1).split("."))
            message = message[placed.end():]
        loc = tuple(int(p) if isinstance(p, str) and p.isdigit() and isinstance(
            _lookup(data, loc[: i])[1], list) else p for i, p in enumerate(loc))
        path = ".".join(str(p) for p in loc) or "(top level)"
        if error["type"] == "extra_forbidden":
            message = "unknown key"
            parent = _lookup(data, loc[:-1])[1]
            if isinstance(parent, dict):
                known = _known_keys(loc[:-1])
                if known:
                    message += f"; expected one of {', '.join(known)}"
        if (path, message) in seen:
            continue
        seen.add((path, message))
        found, value = _lookup(data, loc)
        shown = found and not isinstance(value, (dict, list)) and "(got " not in message
        got = f" (got {_show(value)})" if shown else ""
        lines.append(f"{source}: {path}: {message}{got}")
    return lines


def _known_keys(loc: tuple[Any, ...]) -> list[str]:
    model: Any = Config
    for part in loc:
        if isinstance(part, int) or model is None:
            continue
        fields = getattr(model, "model_fields", None)
        if fields is None:
            return []
        if part in fields:
            annotation = fields[part].annotation
            model = _inner_model(annotation)
        else:
            # a dict key such as a device type name: the value model is the dict's value type
            continue
    fields = getattr(model, "model_fields", None)
    return list(fields) if fields else []


def _inner_model(annotation: Any) -> Any:
    args = getattr(annotation, "__args__", ())
    if isinstance(annotation, type) and issubclass(annotation, BaseModel):
        return annotation
    for arg in reversed(args):
        inner = _inner_model(arg)
        if inner is not None:
            return inner
    return None


def config_hash(config: Config) -> str:
    """A short SHA-256 of the validated configuration (canonical JSON)."""
    canonical = json.dumps(config.model_dump(mode="json"), sort_keys=True, separators=(",", ":"))
    return hashlib.sha256(canonical.encode()).hexdigest()[:16]


def config_schema() -> dict[str, Any]:
    """JSON Schema of the fleet file format (for editor completion)."""
    schema = Config.model_json_schema(mode="validation")
    schema["$schema"] = "https://json-schema.org/draft/2020-12/schema"
    schema["title"] = "fleetsim fleet file"
    return schema

