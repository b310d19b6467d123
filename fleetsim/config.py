"""Validated model of a fleet file: fleet, workload, rounds, selection, horizon, disruptions.

A fleet file is YAML read with ``yaml.safe_load`` and validated once, here, into typed
objects; nothing downstream patches dicts. :func:`load_config` and :func:`build_config`
raise :class:`~fleetsim.errors.ConfigError` whose lines each name the file, the key path,
the bad value and what was expected.
"""

from __future__ import annotations

import copy
import hashlib
import json
import math
import os
import re
import unicodedata
from datetime import datetime, timezone
from pathlib import Path
from typing import Annotated, Any, Literal
from zoneinfo import ZoneInfo, ZoneInfoNotFoundError

import yaml
from pydantic import (
    AfterValidator,
    BaseModel,
    BeforeValidator,
    ConfigDict,
    Field,
    PlainSerializer,
    ValidationError,
    field_validator,
    model_validator,
)

from .errors import ConfigError
from .units import format_instant, parse_duration, parse_instant, parse_size

__all__ = [
    "SIGNALS",
    "Trait",
    "SignalPattern",
    "BatteryLevel",
    "DeviceType",
    "Region",
    "FleetSpec",
    "Workload",
    "RoundSettings",
    "Selection",
    "Horizon",
    "Disruption",
    "Config",
    "load_config",
    "build_config",
    "apply_overrides",
    "config_hash",
    "config_schema",
    "example_path",
    "read_yaml",
    "load_yaml_text",
    "name_problem",
    "estimate_memory",
    "memory_limit",
    "check_memory",
]

SIGNALS = ("idle", "charging", "unmetered")
"""The three on/off device signals, in the order the engine stores them."""

SignalName = Literal["idle", "charging", "unmetered"]
_ALL_SIGNALS: tuple[SignalName, ...] = ("idle", "charging", "unmetered")


MIN_STEP_S = 0.001
"""Shortest positive duration (1 ms): simulated time must move on by at least this much."""


def _no_bool(value: Any) -> Any:
    # YAML reads yes/no/true/false as booleans, and pydantic would take them as 1 and 0.
    if isinstance(value, bool):
        raise ValueError("expected a number, not a boolean")
    return value


def _duration(value: Any) -> float:
    return parse_duration(value)


def _at_least_one_step(value: float) -> float:
    if value < MIN_STEP_S:
        raise ValueError("expected a positive duration of at least 1ms")
    return value


def _size(value: Any) -> float:
    return parse_size(value)


def _instant(value: Any) -> datetime:
    return parse_instant(value)


Duration = Annotated[
    float,
    BeforeValidator(_duration, json_schema_input_type=str | float),
    Field(json_schema_extra={"examples": ["90s", "8m", "PT8M"]}),
]
PositiveDuration = Annotated[Duration, AfterValidator(_at_least_one_step)]
Size = Annotated[
    float,
    BeforeValidator(_size, json_schema_input_type=str | float),
    Field(json_schema_extra={"examples": ["24MB", "1.5GB", "16MiB"]}),
]
Instant = Annotated[
    datetime,
    BeforeValidator(_instant, json_schema_input_type=str),
    PlainSerializer(format_instant, return_type=str),
]
Real = Annotated[float, BeforeValidator(_no_bool)]
"""A finite real number (the base model refuses inf and NaN), never a boolean."""
Count = Annotated[int, BeforeValidator(_no_bool)]
"""A whole number, never a boolean."""
Probability = Annotated[Real, Field(ge=0.0, le=1.0)]


class _Strict(BaseModel):
    # allow_inf_nan=False: no float field takes inf or NaN (YAML .inf/.nan, or 1e999).
    model_config = ConfigDict(extra="forbid", frozen=True, allow_inf_nan=False)


class Trait(_Strict):
    """A per-device trait drawn from a lognormal distribution.

    ``median`` is in the trait's unit; ``spread`` is the standard deviation of the natural
    log (0 gives every device the median). A bare number or string in the file means a
    fixed value. Durations and sizes accept their usual written forms.
    """

    median: Real = Field(gt=0)
    spread: Real = Field(default=0.0, ge=0.0, le=3.0)


def _trait_of(parser: Any) -> Any:
    def convert(value: Any) -> Any:
        if isinstance(value, dict):
            out = dict(value)
            if "median" in out and not isinstance(out["median"], bool):
                try:
                    out["median"] = parser(out["median"])
                except ValueError:
                    pass  # left for the model to report
            return out
        if isinstance(value, (list, tuple)) or value is None:
            return value  # left for the model: "a valid dictionary"
        # A bare value: the parser's own message says what was expected.
        return {"median": parser(value), "spread": 0.0}

    return BeforeValidator(convert)


def _number(value: Any) -> float:
    if isinstance(value, bool):
        raise ValueError("expected a number, not a boolean")
    if not isinstance(value, (int, float, str)):
        raise ValueError("expected a number")
    try:
        number = float(value)
    except OverflowError:
        number = math.inf
    except ValueError:
        raise ValueError("expected a number") from None
    if not math.isfinite(number):
        raise ValueError("expected a finite number")
    return number


NumberTrait = Annotated[Trait, _trait_of(_number)]
DurationTrait = Annotated[Trait, _trait_of(parse_duration)]
SizeTrait = Annotated[Trait, _trait_of(parse_size)]


class SignalPattern(_Strict):
    """One diurnal on/off signal: 24 on-probabilities by local hour and a mean on-duration.

    With on-probability p and mean on-duration d the chain leaves "on" at rate 1/d and
    leaves "off" at rate p / ((1 - p) d), so its stationary on-fraction is p.
    """

    hourly: list[Probability] = Field(min_length=24, max_length=24)
    mean_on: PositiveDuration


class BatteryLevel(_Strict):
    """Battery level (percent) seen at check-in: a Beta distribution by mean and sd."""

    mean: Real = Field(gt=0, lt=100)
    sd: Real = Field(gt=0, lt=50)

    @model_validator(mode="after")
    def _feasible(self) -> BatteryLevel:
        m, s = self.mean / 100, self.sd / 100
        if s * s >= m * (1 - m):
            raise ValueError(
                f"sd {self.sd} is too large for mean {self.mean}: need sd^2 < mean (100 - mean)"
            )
        return self


class BatteryLevels(_Strict):
    charging: BatteryLevel = BatteryLevel(mean=75, sd=18)
    unplugged: BatteryLevel = BatteryLevel(mean=55, sd=22)


class DeviceType(_Strict):
    """A kind of device: its fleet share, traits and diurnal signals."""

    share: Probability
    sample_cost: DurationTrait = Field(description="training time per local sample per epoch")
    memory: SizeTrait = Field(description="memory available to a training task")
    battery_wh: NumberTrait = Field(description="battery capacity in Wh")
    train_power_w: NumberTrait = Field(description="power draw while training, W")
    radio_power_w: Real = Field(default=1.0, ge=0, description="power draw while transferring, W")
    charge_power_w: Real = Field(default=10.0, ge=0, description="charger power while plugged in, W")
    down_mbps: NumberTrait
    up_mbps: NumberTrait
    samples: NumberTrait = Field(description="local training samples")
    battery_level: BatteryLevels = BatteryLevels()
    signals: dict[str, SignalPattern]

    @field_validator("signals")
    @classmethod
    def _all_signals(cls, value: dict[str, SignalPattern]) -> dict[str, SignalPattern]:
        missing = [s for s in SIGNALS if s not in value]
        unknown = [s for s in value if s not in SIGNALS]
        if unknown:
            raise ValueError(f"unknown signal(s) {', '.join(unknown)}; expected {', '.join(SIGNALS)}")
        if missing:
            raise ValueError(f"missing signal(s) {', '.join(missing)}; expected all of {', '.join(SIGNALS)}")
        return value


class Region(_Strict):
    """A region: its fleet share and IANA time zone."""

    share: Probability
    timezone: str

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


class FleetSpec(_Strict):
    devices: Count = Field(gt=0, le=100_000_000)
    device_types: dict[str, DeviceType] = Field(min_length=1)
    regions: dict[str, Region] = Field(min_length=1)

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
        return self


class Workload(_Strict):
    """What one participation asks of a device."""

    model_size: Size = Field(gt=0, description="model download size")
    update_size: Size | None = Field(default=None, gt=0, description="update upload size")
    update_compression: Real = Field(default=1.0, ge=1.0, description="used when update_size is unset")
    epochs: Count = Field(default=1, ge=1, le=1_000_000)
    batch_size: Count = Field(default=32, ge=1, le=1_000_000_000)
    memory_needed: Size = Field(default=0.0, ge=0)
    requires: list[SignalName] = Field(default_factory=lambda: list(_ALL_SIGNALS))
    min_battery: Real = Field(default=0.0, ge=0, le=100, description="percent")
    # Unset (the default, infinite): no limit. A value in the file must be finite.
    execution_limit: PositiveDuration = Field(default=float("inf"))
    crash_per_hour: Real = Field(default=0.0, ge=0, description="crash hazard while working")

    @field_validator("requires")
    @classmethod
    def _unique(cls, value: list[str]) -> list[str]:
        if len(set(value)) != len(value):
            raise ValueError("a signal is listed twice")
        return value

    @property
    def upload_bytes(self) -> float:
        return self.update_size if self.update_size is not None else self.model_size / self.update_compression


MIN_CHECKIN_S = 1.0
"""Shortest check-in period, s: each period in a window costs the engine one step."""
MIN_CYCLE_S = 1.0
"""Shortest server loop (selection timeout + aggregation time), s."""


class RoundSettings(_Strict):
    """The server's round protocol."""

    target_reports: Count = Field(ge=1, le=100_000_000)
    over_selection: Real = Field(default=1.3, ge=1.0, le=1000.0)
    selection_timeout: PositiveDuration
    min_reports: Count | None = Field(default=None, ge=1)
    report_deadline: PositiveDuration
    aggregation_time: Duration = Field(default=30.0, ge=0)
    rest: Duration = Field(default=0.0, ge=0)
    checkin_every: Duration = Field(ge=MIN_CHECKIN_S)

    @model_validator(mode="after")
    def _min_le_target(self) -> RoundSettings:
        if self.min_reports is not None and self.min_reports > self.target_reports:
            raise ValueError(
                f"min_reports ({self.min_reports}) must not exceed target_reports ({self.target_reports})"
            )
        # Each pass of the server's loop lasts at least the selection (when nobody checks
        # in) plus the aggregation: shorter, and simulated time all but stops.
        cycle = self.selection_timeout + self.aggregation_time
        if cycle < MIN_CYCLE_S:
            raise ValueError(
                _at("selection_timeout", f"selection_timeout + aggregation_time must be at least "
                    f"{MIN_CYCLE_S:g}s so that simulated time moves on (got {cycle:g}s)")
            )
        return self

    @property
    def accept_count(self) -> int:
        """Check-ins a round accepts: ceil(target_reports * over_selection)."""
        return math.ceil(self.target_reports * self.over_selection - 1e-9)

    @property
    def required_reports(self) -> int:
        return self.min_reports if self.min_reports is not None else self.target_reports


class Selection(_Strict):
    """Which check-ins a round accepts: a built-in policy name or ``package.module:Name``.

    ``params`` is free-form (keyword arguments for the policy) but holds only finite numbers,
    nests at most MAX_DEPTH deep and expands (aliases counted each time) to at most
    MAX_NODES values.
    """

    policy: str = Field(default="first-come", max_length=200)
    params: dict[str, Any] = Field(default_factory=dict)

    @field_validator("params")
    @classmethod
    def _plain_data(cls, value: dict[str, Any]) -> dict[str, Any]:
        problem = structure_problem(value)
        if problem is not None:
            where, message = problem
            raise ValueError(_at(where, message) if where else message)
        return value


class Horizon(_Strict):
    """The simulated span. ``warmup`` runs the server before ``start`` so that the fleet's
    rest periods and participation history reach their running state; nothing of the warm-up
    is reported. Unset: as long as the rest period, at most two days."""

    start: Instant
    duration: PositiveDuration
    warmup: Duration | None = Field(default=None, ge=0)


class Disruption(_Strict):
    """An event in simulated time that changes the fleet or the server for a while.

    kinds: ``network-slowdown`` (``factor`` multiplies bandwidth), ``behaviour-shift``
    (``signal``'s on-probabilities times ``factor``, and/or its hours moved by
    ``shift_hours``), ``crash-surge`` (``factor`` multiplies the crash hazard),
    ``compute-drift`` (``factor`` multiplies per-sample training cost), ``server-outage``
    (no round opens; a running round is lost).
    """

    kind: Literal["network-slowdown", "behaviour-shift", "crash-surge", "compute-drift", "server-outage"]
    start: Duration = Field(description="offset from the horizon start")
    duration: PositiveDuration
    factor: Real = Field(default=1.0, ge=0, le=1e6)
    signal: SignalName | None = None
    shift_hours: Real = Field(default=0.0, ge=-24.0, le=24.0)
    regions: list[str] | None = None
    device_types: list[str] | None = None

    @model_validator(mode="after")
    def _fits_kind(self) -> Disruption:
        if self.kind == "behaviour-shift" and self.signal is None:
            raise ValueError("a behaviour-shift needs 'signal'")
        if self.kind != "behaviour-shift" and (self.signal is not None or self.shift_hours):
            raise ValueError(f"'signal' and 'shift_hours' apply to behaviour-shift, not {self.kind}")
        if self.kind == "server-outage" and (self.regions or self.device_types):
            raise ValueError("a server-outage affects every device; drop 'regions'/'device_types'")
        return self


class Config(_Strict):
    """A whole fleet file."""

    scenario: str = "unnamed scenario"
    horizon: Horizon
    fleet: FleetSpec
    workload: Workload
    rounds: RoundSettings
    selection: Selection = Selection()
    disruptions: list[Disruption] = Field(default_factory=list)

    @field_validator("scenario")
    @classmethod
    def _title(cls, value: str) -> str:
        problem = name_problem(value, MAX_TITLE_LENGTH)
        if problem:
            raise ValueError(f"the scenario title {problem}")
        return value

    @model_validator(mode="after")
    def _cross_checks(self) -> Config:
        for i, event in enumerate(self.disruptions):
            for key, known in (("regions", self.fleet.regions), ("device_types", self.fleet.device_types)):
                for j, name in enumerate(getattr(event, key) or []):
                    if name not in known:
                        raise ValueError(_at(
                            f"disruptions.{i}.{key}.{j}",
                            f"unknown name {_show(name)}; expected one of {', '.join(known)}",
                        ))
        _check_span(self)
        return self


MAX_TITLE_LENGTH = 200
"""Longest scenario title, in characters."""

# The instants a run can hold: pandas Timestamps are int64 nanoseconds from the Unix epoch
# (1677-09-21T00:12:43Z to 2262-04-11T23:47:16Z); every datetime lies within years 1-9999.
_FIRST_INSTANT_S = -(2**63 - 1) / 1e9
_LAST_INSTANT_S = (2**63 - 1) / 1e9
# Time simulated around the horizon besides the warm-up: the signals' settling time before it
# (at most 3 days, fleetsim.signals) and after it the last round's selection, deadline and a
# two-hour tail; a margin of a day on each side covers work that ends after the last close.
_SETTLING_S = 4 * 86400.0
_TAIL_MARGIN_S = 2 * 3600.0 + 86400.0


def _check_span(config: Config) -> None:
    """Refuse a horizon whose simulated instants fall outside what pandas and datetime hold."""
    horizon, rounds = config.horizon, config.rounds
    start_s = horizon.start.timestamp()
    warmup = horizon.warmup if horizon.warmup is not None else min(rounds.rest, 2 * 86400.0)
    first = start_s - warmup - _SETTLING_S
    last = start_s + horizon.duration + rounds.selection_timeout + rounds.report_deadline + _TAIL_MARGIN_S
    lo, hi = _FIRST_INSTANT_S + _SETTLING_S, _LAST_INSTANT_S - _TAIL_MARGIN_S
    if not lo <= start_s <= hi:
        raise ValueError(_at("horizon.start", f"expected an instant between {_utc(lo)} and {_utc(hi)}, the "
                             f"range fleetsim can represent (got {_show(format_instant(horizon.start))})"))
    if first < _FIRST_INSTANT_S:
        raise ValueError(_at("horizon.warmup", f"with the warm-up the run would begin before {_utc(lo)}, the "
                             f"earliest instant fleetsim can represent (got {warmup:g}s)"))
    if last > _LAST_INSTANT_S:
        raise ValueError(_at("horizon.duration", f"the run would end after {_utc(hi)}, the latest instant "
                             f"fleetsim can represent (got {horizon.duration:g}s)"))


def _utc(seconds: float) -> str:
    return datetime.fromtimestamp(seconds, tz=timezone.utc).strftime("%Y-%m-%d")


def _at(key: str, message: str) -> str:
    """A validator message placed at ``key`` (relative to the model): :func:`_describe` moves
    the key into the line's key path."""
    return f"[at {key}] {message}"


_AT_RE = re.compile(r"^\[at ([^\]]+)\] ")


# ---------------------------------------------------------------------------------------------
# Loading, overrides and errors


def example_path() -> Path:
    """Path of the bundled example fleet (the Inkwren scenario)."""
    return Path(__file__).parent / "data" / "inkwren.yaml"


MAX_FILE_BYTES = 16 * 2**20
"""Largest fleet or stress file read, bytes (the example is about 10 kB)."""
MAX_DEPTH = 32
"""Deepest nesting of mappings and lists a file may hold (the format itself needs 6)."""
MAX_NODES = 200_000
"""Most values a file may expand to, each alias counted as often as it is used (so that an
alias bomb, a few lines that expand to billions of values, is refused while still small)."""


def _show(value: Any, limit: int = 60) -> str:
    """A value as error lines show it: its repr (control characters escaped), cut short."""
    text = repr(value)
    return text if len(text) <= limit else text[: limit - 3] + "..."


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


def apply_overrides(raw: dict[str, Any], overrides: list[str], source: str = "<config>") -> dict[str, Any]:
    """Return a copy of ``raw`` with each ``key.path=value`` set (value read as YAML).

    List items are addressed by index (``disruptions.0.factor``). Raises ConfigError for a
    malformed override.
    """
    data = copy.deepcopy(raw)
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
                node = node[int(part)] if isinstance(node, list) else node.setdefault(part, {})
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


# Bytes a run holds per unit of each driver, from the peak resident memory of `fleetsim run`
# on the example fleet (1,000 to 1,000,000 devices, 0.5 to 7 days, check-ins every 1 s to
# 10 min: 250 to 500 MB, about 200 B per device and 850 B per participation), rounded up.
_BASE_BYTES = 300e6  # interpreter, numpy, pandas, pyarrow, simpy
_PER_DEVICE = 300.0  # traits, runtime state, signal state, output tables
_PER_TICK = 120.0  # one check-in tick of a collection window (ids, times, masks, gathered traits)
_PER_STEP = 100.0  # one 15-minute grid step of one (type, region, signal) signal table
_PER_PARTICIPATION = 1000.0  # one row of the event log, its frames, tables and the Parquet writer
_PER_ROUND = 400.0
_GRID_S = 900.0  # fleetsim.signals.STEP_S


def estimate_memory(config: Config, window_s: float) -> dict[str, float]:
    """A rough upper estimate of the memory a run needs, bytes, by driver.

    Keys: ``base``, ``devices`` (fleet size), ``ticks`` (check-ins of one collection window:
    devices x window / checkin_every), ``signals`` (device types x regions x 15-minute steps
    of the simulated span), ``events`` (participations: at most each device once per
    max(rest, checkin_every), and at most accept_count per round, a round lasting at least
    the aggregation time plus the fleet's median task time), and ``total``. ``window_s`` is the
    selection policy's collection window.
    """
    fleet, rounds, horizon = config.fleet, config.rounds, config.horizon
    n = fleet.devices
    warmup = horizon.warmup if horizon.warmup is not None else min(rounds.rest, 2 * 86400.0)
    span = warmup + horizon.duration
    window = min(window_s, rounds.selection_timeout)
    ticks = n * (window / rounds.checkin_every + 1.0)
    steps = (span + _SETTLING_S + rounds.selection_timeout + rounds.report_deadline + _TAIL_MARGIN_S) / _GRID_S
    lines = len(fleet.device_types) * len(fleet.regions) * len(SIGNALS)
    cycle = rounds.aggregation_time + min(rounds.selection_timeout, rounds.report_deadline, _typical_task_s(config))
    n_rounds = span / max(cycle, MIN_STEP_S) + 1.0
    per_device = n * (span / max(rounds.rest, rounds.checkin_every) + 1.0)
    participations = min(per_device, n_rounds * rounds.accept_count)
    terms = {
        "base": _BASE_BYTES,
        "devices": n * _PER_DEVICE,
        "ticks": ticks * _PER_TICK,
        "signals": lines * steps * _PER_STEP,
        "events": participations * _PER_PARTICIPATION + n_rounds * _PER_ROUND,
    }
    terms["total"] = sum(terms.values())
    return terms


def _typical_task_s(config: Config) -> float:
    """The fleet's median task time, s: each type's task at its median traits, the median
    over device types weighted by share (a round waits for most of its reports)."""
    work = config.workload
    times = []
    for kind in config.fleet.device_types.values():
        samples = max(1.0, kind.samples.median)
        train = math.ceil(samples / work.batch_size) * work.batch_size * work.epochs * kind.sample_cost.median
        transfer = (work.model_size / kind.down_mbps.median + work.upload_bytes / kind.up_mbps.median) * 8e-6
        times.append((train + transfer, kind.share))
    times.sort()
    total = sum(share for _, share in times)
    running = 0.0
    for seconds, share in times:
        running += share
        if running >= total / 2:
            return seconds
    return times[-1][0]


def memory_limit(fraction: float = 0.75) -> float:
    """``fraction`` of this machine's physical memory, bytes (inf where it cannot be told)."""
    try:
        return fraction * os.sysconf("SC_PHYS_PAGES") * os.sysconf("SC_PAGE_SIZE")
    except (ValueError, OSError, AttributeError):
        return math.inf


def check_memory(config: Config, window_s: float, source: str, limit: float | None = None,
                 names: dict[str, str] | None = None) -> None:
    """Refuse a run whose estimated memory (:func:`estimate_memory`) exceeds ``limit`` bytes
    (default: :func:`memory_limit`), before anything is allocated.

    The error names the key that drives the estimate most; ``names`` maps a key path to the
    option that set it (``{"fleet.devices": "--devices"}``). Raises ConfigError.
    """
    limit = memory_limit() if limit is None else limit
    terms = estimate_memory(config, window_s)
    if terms["total"] <= limit:
        return
    driver = max(("devices", "ticks", "signals", "events"), key=lambda k: terms[k])
    key, value = {
        "devices": ("fleet.devices", config.fleet.devices),
        "ticks": ("rounds.checkin_every", config.rounds.checkin_every),
        "signals": ("horizon.duration", config.horizon.duration),
        "events": ("horizon.duration", config.horizon.duration),
    }[driver]
    where = (names or {}).get(key) or f"{source}: {key}"
    raise ConfigError([
        f"{where}: a run would need about {_gb(terms['total'])} of memory, more than the {_gb(limit)} allowed "
        f"(75% of physical memory); mostly for {_DRIVERS[driver]}: use fewer devices, a shorter horizon or "
        f"less frequent check-ins (got {_show(value)})"
    ])


_DRIVERS = {
    "devices": "the fleet's devices",
    "ticks": "the check-ins of one collection window",
    "signals": "the signal tables of the horizon",
    "events": "the rounds and participations of the horizon",
}


def _gb(value: float) -> str:
    return f"{value / 1e9:,.1f} GB" if math.isfinite(value) else "unbounded"


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
