"""What a study varies: the fleet file it starts from, the axes of a sweep, the settings of a
comparison's arms, and stress files of disruptions.

Every setting is a ``key.path=value`` override applied to the fleet file's own mapping and
validated by :func:`fleetsim.config.build_config`, so a bad value is reported with the file
and key path exactly as ``fleetsim run --set`` would, prefixed by the option that gave it.
"""

from __future__ import annotations

import itertools
import math
from collections.abc import Sequence
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import yaml

from ..config import Config, build_config, check_memory, load_config, load_yaml_text, read_yaml
from ..errors import ConfigError
from ..policies import make_policy
from ..units import parse_bit_rate, parse_duration, parse_energy, parse_hazard, parse_percent, parse_power, parse_size

__all__ = [
    "FleetFile",
    "Axis",
    "Cell",
    "parse_axis",
    "parse_assignment",
    "grid_cells",
    "read_stress",
    "check_policies",
    "workload_names",
    "MAX_AXIS_VALUES",
]

MAX_AXIS_VALUES = 10_000
"""Most values one ``--vary`` may produce (a guard against a mistyped range step)."""


@dataclass(frozen=True)
class FleetFile:
    """A fleet file's raw mapping, where it came from, and the overrides applied to every run.

    ``raw`` is the YAML mapping as read (never mutated); ``overrides`` are ``key.path=value``
    strings applied before each cell's own. Build with :meth:`read`.
    """

    raw: dict[str, Any]
    source: str
    overrides: tuple[str, ...] = ()
    stress_source: str | None = None

    @classmethod
    def read(cls, path: str | Path, overrides: Sequence[str] = ()) -> FleetFile:
        """Read and validate a fleet file with ``overrides``.

        Raises ConfigError (naming the file and key path) when the file cannot be read, is not
        YAML, or does not validate with the overrides applied.
        """
        path = Path(path)
        load_config(path, list(overrides))  # every reading and validation error, worded once
        raw = read_yaml(path)
        return cls(raw=raw, source=str(path), overrides=tuple(overrides))

    def config(self, extra: Sequence[str] = ()) -> Config:
        """The validated configuration with the base overrides, then ``extra``, applied.

        Raises ConfigError naming the file and key path.
        """
        return build_config(self.raw, source=self.source, overrides=[*self.overrides, *extra])

    def with_stress(self, path: str | Path) -> FleetFile:
        """This file with the disruptions of the stress file ``path`` appended.

        Raises ConfigError naming the stress file and the key path within it.
        """
        events = read_stress(path, self)
        raw = dict(self.raw)
        raw["disruptions"] = list(self.raw.get("disruptions") or []) + events
        return FleetFile(raw=raw, source=self.source, overrides=self.overrides, stress_source=str(path))


def read_stress(path: str | Path, base: FleetFile) -> list[dict[str, Any]]:
    """The ``disruptions`` list of a stress file, validated against ``base``'s fleet.

    A stress file is YAML holding one key, ``disruptions``: a list of disruption events in the
    fleet file's own format (docs/fleet-file.md). Raises ConfigError naming the stress file and
    the key path (``disruptions.0.factor``) of each problem.
    """
    path = Path(path)
    data = read_yaml(path, "the stress file")
    if not isinstance(data, dict) or "disruptions" not in data:
        raise ConfigError([f"{path}: expected a mapping with a 'disruptions' list at the top level"])
    extra = [key for key in data if key != "disruptions"]
    if extra:
        raise ConfigError([f"{path}: {key}: unknown key; a stress file holds only 'disruptions'" for key in extra])
    events = data["disruptions"]
    if not isinstance(events, list) or not events:
        raise ConfigError([f"{path}: disruptions: expected a non-empty list of disruption events"])
    # Validate the events alone against the base fleet, so each problem names its own index.
    alone = dict(base.raw)
    alone["disruptions"] = events
    kept = [item for item in base.overrides if not item.strip().startswith("disruptions")]
    build_config(alone, source=str(path), overrides=kept)
    return events


@dataclass(frozen=True)
class Axis:
    """One varied key of a sweep and its values, in the order given."""

    key: str
    values: tuple[Any, ...]

    def override(self, value: Any) -> str:
        return f"{self.key}={_yaml_scalar(value)}"


@dataclass(frozen=True)
class Cell:
    """One cell of a sweep's grid: its index, the value of each axis, and a label of
    ``key=value`` pairs (each key shortened to its last part unless that is ambiguous)."""

    index: int
    settings: tuple[tuple[str, Any], ...]
    overrides: tuple[str, ...] = field(default=())
    label: str = ""


def _show(value: Any) -> str:
    if isinstance(value, float):
        return f"{value:g}"
    return str(value)


def _yaml_scalar(value: Any) -> str:
    """Write ``value`` so that the override reads it back as the same value."""
    if isinstance(value, str):
        try:
            if load_yaml_text(value) == value:
                return value
        except ValueError:
            pass
    text = yaml.safe_dump(value, default_flow_style=True).strip()
    return text.removesuffix("\n...").strip()


def parse_assignment(text: str, option: str) -> tuple[str, str]:
    """Split ``key.path=value``; raises ConfigError naming ``option`` when malformed."""
    key, sep, value = text.partition("=")
    if not sep or not key.strip() or not value.strip():
        raise ConfigError([f"{option}: expected key.path=value (got {_shown(text)})"])
    return key.strip(), value.strip()


def _shown(value: Any) -> str:
    text = repr(value)
    return text if len(text) <= 60 else text[:57] + "..."


def _split_values(text: str) -> list[str]:
    """Split on commas that are not inside brackets or quotes (so YAML lists stay whole)."""
    items: list[str] = []
    current: list[str] = []
    depth, quote = 0, ""
    for char in text:
        if quote:
            if char == quote:
                quote = ""
        elif char in "\"'":
            quote = char
        elif char in "[{":
            depth += 1
        elif char in "]}":
            depth -= 1
        elif char == "," and depth == 0:
            items.append("".join(current).strip())
            current = []
            continue
        current.append(char)
    items.append("".join(current).strip())
    return items


# The written forms a range may use, each giving the base unit a bare number means in the file.
_RANGE_PARSERS = (float, parse_duration, parse_size, parse_energy, parse_power, parse_bit_rate, parse_percent,
                  parse_hazard)


def _range_parts(parts: list[str]) -> list[float] | None:
    """Read start, stop, step as plain numbers or as quantities of one kind (all three alike):
    durations, sizes, energy, power, bit rates, percentages or hazards, in base units."""
    for parser in _RANGE_PARSERS:
        try:
            numbers = [float(parser(p)) for p in parts]  # type: ignore[operator]
        except (ValueError, OverflowError):
            continue
        if all(math.isfinite(n) for n in numbers):
            return numbers
    return None


def parse_axis(text: str) -> Axis:
    """Read ``key.path=v1,v2,...`` or ``key.path=start:stop:step`` into an Axis.

    List values are read as YAML scalars (``1.3``, ``lottery``, ``6m``). A range includes
    ``stop`` when it falls on the grid; its parts may be numbers, durations (``2m:10m:2m``,
    giving seconds), sizes (``10MB:40MB:10MB``, giving bytes) or other quantities with a unit
    (``10Mbit/s:40Mbit/s:10Mbit/s`` giving bit/s, ``20%:40%:10%``, ``0.05/h:0.2/h:0.05/h``);
    whole numbers stay integers.
    Raises ConfigError for a malformed option, an empty or repeated value, a zero or
    wrong-signed step, or more than MAX_AXIS_VALUES values.
    """
    key, spec = parse_assignment(text, "--vary")
    where, got = f"--vary: {key}", f"(got {_shown(text)})"
    parts = spec.split(":")
    if len(parts) == 3 and "," not in spec:
        numbers = _range_parts(parts)
        if numbers is None:
            raise ConfigError([f"{where}: expected start:stop:step as finite numbers or quantities of one kind "
                               f"(durations, sizes, energy, power, bit rates, percentages, hazards) {got}"])
        start, stop, step = numbers
        if step == 0 or (stop - start) * step < 0:
            raise ConfigError([f"{where}: step {parts[2]} never reaches {parts[1]} from {parts[0]} {got}"])
        ratio = (stop - start) / step
        if not math.isfinite(ratio) or ratio + 1 > MAX_AXIS_VALUES:
            raise ConfigError([f"{where}: gives more than {MAX_AXIS_VALUES} values {got}"])
        count = math.floor(ratio + 1e-9) + 1
        whole = all(p.strip().lstrip("+-").isdigit() for p in parts)
        values: list[Any] = []
        for i in range(count):
            v = float(f"{start + i * step:.12g}")
            values.append(int(round(v)) if whole else v)
    else:
        values = []
        for item in _split_values(spec):
            if not item:
                raise ConfigError([f"{where}: an empty value; separate values with single commas {got}"])
            try:
                values.append(load_yaml_text(item))
            except ValueError as exc:
                if item[:1] in "[{&*!|>":
                    raise ConfigError([f"{where}: {exc} (got {_shown(item)})"]) from None
                values.append(item)
        if len(values) > MAX_AXIS_VALUES:
            raise ConfigError([f"{where}: gives more than {MAX_AXIS_VALUES} values {got}"])
    seen: list[Any] = []
    for value in values:
        if value in seen:
            raise ConfigError([f"{where}: {_show(value)} is listed twice {got}"])
        seen.append(value)
    return Axis(key=key, values=tuple(values))


def check_policies(config: Config, source: str) -> None:
    """Build every workload's selection policy and check the run's memory, as a run would.

    Raises ConfigError naming ``source`` and the selection's key path (``selection``, or
    ``workloads.<name>.selection`` for one of several workloads).
    """
    jobs = config.jobs
    for job in jobs:
        where = "selection" if len(jobs) == 1 else f"workloads.{job.name}.selection"
        policy = make_policy(job.config.selection.policy, job.config.selection.params, source=f"{source}: {where}")
        check_memory(job.config, float(policy.window_s), source)


def workload_names(config: Config) -> list[str]:
    """The names of a configuration's workloads when it has several, else an empty list."""
    jobs = config.jobs
    return [job.name for job in jobs] if len(jobs) > 1 else []


def grid_cells(base: FleetFile, axes: Sequence[Axis]) -> list[tuple[Cell, Config]]:
    """Every cell of the grid (first axis slowest) with its validated configuration.

    Raises ConfigError for a key varied twice, or a cell whose settings do not validate or
    whose selection policy cannot be built (each problem once, naming the first cell it
    occurs in and how many more share it).
    """
    keys = [axis.key for axis in axes]
    twice = sorted({k for k in keys if keys.count(k) > 1})
    if twice:
        raise ConfigError([f"--vary {k}: varied twice; give all its values in one --vary" for k in twice])
    short = [k.rsplit(".", 1)[-1] for k in keys]
    names = short if len(set(short)) == len(short) else keys
    problems: dict[str, list[str]] = {}
    cells: list[tuple[Cell, Config]] = []
    for index, combo in enumerate(itertools.product(*(axis.values for axis in axes))):
        settings = tuple(zip(keys, combo, strict=True))
        overrides = tuple(axis.override(value) for axis, value in zip(axes, combo, strict=True))
        label = ", ".join(f"{name}={_show(value)}" for name, value in zip(names, combo, strict=True))
        cell = Cell(index=index, settings=settings, overrides=overrides, label=label)
        try:
            config = base.config(overrides)
            check_policies(config, base.source)
        except ConfigError as exc:
            for line in exc.problems:
                problems.setdefault(line, []).append(cell.label)
            continue
        cells.append((cell, config))
    if problems:
        lines = []
        for line, labels in problems.items():
            more = f" (and {len(labels) - 1} more cells)" if len(labels) > 1 else ""
            lines.append(f"--vary cell {labels[0]}{more}: {line}")
        raise ConfigError(lines)
    return cells

