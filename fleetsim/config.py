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
from datetime import datetime
from pathlib import Path
from typing import Annotated, Any, Literal
from zoneinfo import ZoneInfo, ZoneInfoNotFoundError

import yaml
from pydantic import (
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
]

SIGNALS = ("idle", "charging", "unmetered")
"""The three on/off device signals, in the order the engine stores them."""

SignalName = Literal["idle", "charging", "unmetered"]
_ALL_SIGNALS: tuple[SignalName, ...] = ("idle", "charging", "unmetered")


def _duration(value: Any) -> float:
    return parse_duration(value)


def _size(value: Any) -> float:
    return parse_size(value)


def _instant(value: Any) -> datetime:
    return parse_instant(value)


Duration = Annotated[
    float,
    BeforeValidator(_duration, json_schema_input_type=str | float),
    Field(json_schema_extra={"examples": ["90s", "8m", "PT8M"]}),
]
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
Probability = Annotated[float, Field(ge=0.0, le=1.0)]


class _Strict(BaseModel):
    model_config = ConfigDict(extra="forbid", frozen=True)


class Trait(_Strict):
    """A per-device trait drawn from a lognormal distribution.

    ``median`` is in the trait's unit; ``spread`` is the standard deviation of the natural
    log (0 gives every device the median). A bare number or string in the file means a
    fixed value. Durations and sizes accept their usual written forms.
    """

    median: float = Field(gt=0)
    spread: float = Field(default=0.0, ge=0.0, le=3.0)


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
        try:
            return {"median": parser(value), "spread": 0.0}
        except (ValueError, TypeError):
            return value

    return BeforeValidator(convert)


def _number(value: Any) -> float:
    if isinstance(value, bool) or not isinstance(value, (int, float, str)):
        raise ValueError("expected a number")
    return float(value)


NumberTrait = Annotated[Trait, _trait_of(_number)]
DurationTrait = Annotated[Trait, _trait_of(parse_duration)]
SizeTrait = Annotated[Trait, _trait_of(parse_size)]


class SignalPattern(_Strict):
    """One diurnal on/off signal: 24 on-probabilities by local hour and a mean on-duration.

    With on-probability p and mean on-duration d the chain leaves "on" at rate 1/d and
    leaves "off" at rate p / ((1 - p) d), so its stationary on-fraction is p.
    """

    hourly: list[Probability] = Field(min_length=24, max_length=24)
    mean_on: Duration = Field(gt=0)


class BatteryLevel(_Strict):
    """Battery level (percent) seen at check-in: a Beta distribution by mean and sd."""

    mean: float = Field(gt=0, lt=100)
    sd: float = Field(gt=0, lt=50)

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
    radio_power_w: float = Field(default=1.0, ge=0, description="power draw while transferring, W")
    charge_power_w: float = Field(default=10.0, ge=0, description="charger power while plugged in, W")
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
        try:
            ZoneInfo(value)
        except (ZoneInfoNotFoundError, ValueError) as exc:
            raise ValueError(f"unknown IANA time zone {value!r}") from exc
        return value


def _check_shares(kind: str, items: dict[str, Any]) -> None:
    total = sum(item.share for item in items.values())
    if not math.isclose(total, 1.0, abs_tol=1e-6):
        raise ValueError(f"{kind} shares must sum to 1, they sum to {total:.6g}")


class FleetSpec(_Strict):
    devices: int = Field(gt=0, le=100_000_000)
    device_types: dict[str, DeviceType] = Field(min_length=1)
    regions: dict[str, Region] = Field(min_length=1)

    @model_validator(mode="after")
    def _shares(self) -> FleetSpec:
        for kind, names in (("device type", self.device_types), ("region", self.regions)):
            for name in names:
                if not name.strip() or any(ord(c) < 32 or ord(c) == 127 for c in name):
                    raise ValueError(f"{kind} name {name!r} must be non-blank text without control characters")
        _check_shares("device type", self.device_types)
        _check_shares("region", self.regions)
        return self


class Workload(_Strict):
    """What one participation asks of a device."""

    model_size: Size = Field(gt=0, description="model download size")
    update_size: Size | None = Field(default=None, gt=0, description="update upload size")
    update_compression: float = Field(default=1.0, ge=1.0, description="used when update_size is unset")
    epochs: int = Field(default=1, ge=1)
    batch_size: int = Field(default=32, ge=1)
    memory_needed: Size = Field(default=0.0, ge=0)
    requires: list[SignalName] = Field(default_factory=lambda: list(_ALL_SIGNALS))
    min_battery: float = Field(default=0.0, ge=0, le=100, description="percent")
    execution_limit: Duration = Field(default=float("inf"), gt=0)
    crash_per_hour: float = Field(default=0.0, ge=0, description="crash hazard while working")

    @field_validator("requires")
    @classmethod
    def _unique(cls, value: list[str]) -> list[str]:
        if len(set(value)) != len(value):
            raise ValueError("a signal is listed twice")
        return value

    @property
    def upload_bytes(self) -> float:
        return self.update_size if self.update_size is not None else self.model_size / self.update_compression


class RoundSettings(_Strict):
    """The server's round protocol."""

    target_reports: int = Field(ge=1)
    over_selection: float = Field(default=1.3, ge=1.0)
    selection_timeout: Duration = Field(gt=0)
    min_reports: int | None = Field(default=None, ge=1)
    report_deadline: Duration = Field(gt=0)
    aggregation_time: Duration = Field(default=30.0, ge=0)
    rest: Duration = Field(default=0.0, ge=0)
    checkin_every: Duration = Field(gt=0)

    @model_validator(mode="after")
    def _min_le_target(self) -> RoundSettings:
        if self.min_reports is not None and self.min_reports > self.target_reports:
            raise ValueError(
                f"min_reports ({self.min_reports}) must not exceed target_reports ({self.target_reports})"
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
    """Which check-ins a round accepts: a built-in policy name or ``package.module:Name``."""

    policy: str = "first-come"
    params: dict[str, Any] = Field(default_factory=dict)


class Horizon(_Strict):
    """The simulated span. ``warmup`` runs the server before ``start`` so that the fleet's
    rest periods and participation history reach their running state; nothing of the warm-up
    is reported. Unset: as long as the rest period, at most two days."""

    start: Instant
    duration: Duration = Field(gt=0)
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
    duration: Duration = Field(gt=0)
    factor: float = Field(default=1.0, ge=0)
    signal: SignalName | None = None
    shift_hours: float = 0.0
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

    @model_validator(mode="after")
    def _cross_checks(self) -> Config:
        for i, event in enumerate(self.disruptions):
            for key, known in (("regions", self.fleet.regions), ("device_types", self.fleet.device_types)):
                for name in getattr(event, key) or []:
                    if name not in known:
                        raise ValueError(
                            f"disruptions.{i}.{key}: unknown name {name!r}; expected one of {', '.join(known)}"
                        )
        return self


# ---------------------------------------------------------------------------------------------
# Loading, overrides and errors


def example_path() -> Path:
    """Path of the bundled example fleet (the Inkwren scenario)."""
    return Path(__file__).parent / "data" / "inkwren.yaml"


def read_yaml(path: Path, what: str = "the file") -> Any:
    """Parse a YAML file with ``yaml.safe_load``; ConfigError names the file (and line) on failure."""
    try:
        text = path.read_text(encoding="utf-8")
    except OSError as exc:
        raise ConfigError([f"{path}: cannot read {what} ({exc.strerror or exc})"]) from None
    try:
        return yaml.safe_load(text)
    except yaml.YAMLError as exc:
        mark = getattr(exc, "problem_mark", None)
        where = f" at line {mark.line + 1}, column {mark.column + 1}" if mark else ""
        problem = getattr(exc, "problem", None) or str(exc).splitlines()[0]
        raise ConfigError([f"{path}: not valid YAML{where}: {problem}"]) from None


def load_config(path: str | Path, overrides: list[str] | None = None) -> Config:
    """Read, override and validate a fleet file.

    ``overrides`` are ``key.path=value`` strings; values are parsed as YAML scalars.
    Raises ConfigError (one line per problem) for unreadable files or invalid content.
    """
    path = Path(path)
    raw = read_yaml(path)
    if not isinstance(raw, dict):
        raise ConfigError([f"{path}: expected a mapping of sections at the top level, got {type(raw).__name__}"])
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
            problems.append(f"--set {item!r}: expected key.path=value")
            continue
        try:
            value = yaml.safe_load(text) if text.strip() else ""
        except yaml.YAMLError:
            value = text
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
            problems.append(f"--set {item!r}: {key} does not name a settable key in {source}")
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
        path = ".".join(str(p) for p in loc) or "(top level)"
        message = error["msg"]
        if message.startswith("Value error, "):
            message = message[len("Value error, "):]
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
        shown = found and not isinstance(value, (dict, list)) and ", got " not in message
        got = f" (got {value!r})" if shown else ""
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
