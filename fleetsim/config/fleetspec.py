"""The fleet section of a fleet file: regions with their mixes and adjustments, names, and the
merged (type, region) specs."""

from __future__ import annotations

import math
import re
import unicodedata
from typing import Any, Literal
from zoneinfo import ZoneInfo, ZoneInfoNotFoundError

from pydantic import (
    Field,
    PrivateAttr,
    ValidationError,
    field_validator,
    model_validator,
)

from .devices import DeviceAdjustment, DeviceType
from .fields import (
    _AT_RE,
    Count,
    Probability,
    _at,
    _listed_once,
    _show,
    _Strict,
)

WEEKDAYS = ("monday", "tuesday", "wednesday", "thursday", "friday", "saturday", "sunday")
"""Day names as the fleet file writes them, in ISO 8601 order (Monday is day 1)."""

WeekdayName = Literal["monday", "tuesday", "wednesday", "thursday", "friday", "saturday", "sunday"]


class Region(_Strict):
    """A region: its fleet share, IANA time zone, weekend days, and optionally its own
    device-type mix and values for every device type in it."""

    share: Probability
    timezone: str
    type_mix: dict[str, Probability] | None = None
    weekend_days: list[WeekdayName] = Field(default_factory=lambda: ["saturday", "sunday"])
    overrides: DeviceAdjustment | None = None

    @field_validator("weekend_days")
    @classmethod
    def _unique_days(cls, value: list[str]) -> list[str]:
        return _listed_once(value, "day")

    @property
    def weekend_isodays(self) -> frozenset[int]:
        """The weekend days as ISO 8601 day numbers (Monday 1 ... Sunday 7)."""
        return frozenset(WEEKDAYS.index(day) + 1 for day in self.weekend_days)

    @field_validator("timezone")
    @classmethod
    def _known_zone(cls, value: str) -> str:
        # A zone key is a relative path of plain parts; anything else (a folder such as
        # 'America', '..', a NUL, a 300-character name) must not reach the file system.
        if not _ZONE_RE.fullmatch(value):
            raise ValueError(f"unknown IANA time zone {value!r}")
        try:
            ZoneInfo(value)
        except (ZoneInfoNotFoundError, ValueError, OSError, UnicodeError) as exc:
            raise ValueError(f"unknown IANA time zone {value!r}") from exc
        return value


_ZONE_RE = re.compile(r"[A-Za-z0-9_+-]{1,40}(/[A-Za-z0-9_+-]{1,40}){0,3}")

# Characters that would let a name break a line or reorder the text around it on display:
# bidirectional embeddings, overrides and isolates (Unicode UAX #9) and the implicit marks.
_BIDI_CONTROLS = frozenset("\u202a\u202b\u202c\u202d\u202e\u2066\u2067\u2068\u2069\u200e\u200f\u061c")
# Unicode general categories: Cc control (NUL, C0, DEL, C1), Zl line separator, Zp paragraph
# separator, Cs surrogate, Cn unassigned.
_REFUSED_CATEGORIES = frozenset({"Cc", "Zl", "Zp", "Cs", "Cn"})
MAX_NAME_LENGTH = 80
"""Longest device type name, region name or scenario title, in characters."""


def name_problem(name: str, limit: int = MAX_NAME_LENGTH) -> str | None:
    """Why ``name`` cannot be a device type name, region name or scenario title, or None.

    Names are shown in tables, reports and terminals: they must be non-blank, at most
    ``limit`` characters, and hold no control characters, line or paragraph separators or
    bidirectional controls.
    """
    if not name.strip():
        return "must not be blank"
    if len(name) > limit:
        return f"must be at most {limit} characters"
    for char in name:
        if char in _BIDI_CONTROLS or unicodedata.category(char) in _REFUSED_CATEGORIES:
            return (f"must not hold control characters, line or paragraph separators or "
                    f"bidirectional controls (holds U+{ord(char):04X})")
    return None


def _check_shares(kind: str, items: dict[str, Any]) -> None:
    total = sum(item.share for item in items.values())
    if not math.isclose(total, 1.0, abs_tol=1e-6):
        raise ValueError(f"{kind} shares must sum to 1, they sum to {total:.6g}")


def _merge(base: dict[str, Any], change: dict[str, Any]) -> dict[str, Any]:
    """``base`` with ``change`` laid over it: mappings merge key by key, anything else replaces."""
    out = dict(base)
    for key, value in change.items():
        if isinstance(value, dict) and isinstance(out.get(key), dict):
            out[key] = _merge(out[key], value)
        else:
            out[key] = value
    return out


def _first_error(exc: ValidationError) -> tuple[str, str]:
    """(dotted location, message) of a validation error's first problem."""
    error = exc.errors()[0]
    where = ".".join(str(part) for part in error["loc"])
    message = str(error["msg"]).removeprefix("Value error, ")
    inner = _AT_RE.match(message)
    if inner:  # a validator placed its message at a key of its own
        where = f"{where}.{inner.group(1)}" if where else inner.group(1)
        message = message[inner.end():]
    return where, message


class FleetSpec(_Strict):
    devices: Count = Field(gt=0, le=100_000_000)
    device_types: dict[str, DeviceType] = Field(min_length=1)
    regions: dict[str, Region] = Field(min_length=1)
    _groups: dict[tuple[str, str], DeviceType] = PrivateAttr(default_factory=dict)

    def group_spec(self, type_name: str, region_name: str) -> DeviceType:
        """The device type as it is in the region: its own values, then the region's
        ``overrides``, then the type's ``by_region`` entry for the region."""
        return self._groups[(type_name, region_name)]

    def type_mix(self, region_name: str) -> dict[str, float]:
        """The region's device-type shares: its ``type_mix`` (unlisted types 0), else the types' shares."""
        mix = self.regions[region_name].type_mix
        if mix is None:
            return {name: kind.share for name, kind in self.device_types.items()}
        return {name: mix.get(name, 0.0) for name in self.device_types}

    def joint_mix(self) -> list[list[float]]:
        """Share of the fleet in each (device type, region) pair, [type][region] in file order:
        region share x the region's type mix (sums to 1)."""
        region_total = sum(r.share for r in self.regions.values())
        table = []
        for tname in self.device_types:
            row = []
            for rname, region in self.regions.items():
                mix = self.type_mix(rname)
                row.append(region.share / region_total * mix[tname] / sum(mix.values()))
            table.append(row)
        return table

    def _build_groups(self) -> None:
        groups: dict[tuple[str, str], DeviceType] = {}
        for tname, kind in self.device_types.items():
            for rname in kind.by_region:
                if rname not in self.regions:
                    raise ValueError(_at(f"device_types.{tname}.by_region",
                                         f"unknown region {_show(rname)}; expected one of {', '.join(self.regions)}"))
            base = None
            for rname, region in self.regions.items():
                layers = []
                if region.overrides is not None:
                    layers.append((f"regions.{rname}.overrides", region.overrides))
                if rname in kind.by_region:
                    layers.append((f"device_types.{tname}.by_region.{rname}", kind.by_region[rname]))
                if not layers:
                    groups[(tname, rname)] = kind
                    continue
                if base is None:
                    base = kind.model_dump(exclude={"by_region"})
                merged = base
                for _, layer in layers:
                    merged = _merge(merged, layer.model_dump(exclude_unset=True, exclude_none=True))
                try:
                    groups[(tname, rname)] = DeviceType.model_validate(merged)
                except ValidationError as exc:
                    where, message = _first_error(exc)
                    raise ValueError(_at(f"{layers[-1][0]}.{where}",
                                         f"{message} (device type {_show(tname)} in region {_show(rname)})")) from None
        self._groups = groups

    @model_validator(mode="after")
    def _shares(self) -> FleetSpec:
        for kind, names in (("device type", self.device_types), ("region", self.regions)):
            for name in names:
                problem = name_problem(name)
                if problem:
                    key = "device_types" if kind == "device type" else "regions"
                    raise ValueError(_at(key, f"{kind} name {_show(name)} {problem}"))
        _check_shares("device type", self.device_types)
        _check_shares("region", self.regions)
        for rname, region in self.regions.items():
            if region.type_mix is None:
                continue
            key = f"regions.{rname}.type_mix"
            for tname in region.type_mix:
                if tname not in self.device_types:
                    raise ValueError(_at(key, f"unknown device type {_show(tname)}; expected one of "
                                         f"{', '.join(self.device_types)}"))
            total = sum(region.type_mix.values())
            if not math.isclose(total, 1.0, abs_tol=1e-6):
                raise ValueError(_at(key, f"type shares must sum to 1, they sum to {total:.6g}"))
        self._build_groups()
        return self
