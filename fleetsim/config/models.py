"""The validated model of a fleet file: fleet, workload, rounds, selection, horizon, disruptions."""

from __future__ import annotations

import math
import re
import unicodedata
from datetime import datetime, timezone
from typing import Any, Literal
from zoneinfo import ZoneInfo, ZoneInfoNotFoundError

from pydantic import Field, field_serializer, field_validator, model_validator

from ..units import format_instant
from .fields import (
    _ALL_SIGNALS,
    SIGNALS,
    BitRateTrait,
    Count,
    Duration,
    DurationTrait,
    EnergyTrait,
    Hazard,
    Instant,
    Percentage,
    PositiveDuration,
    Power,
    PowerTrait,
    Probability,
    Real,
    SignalName,
    Size,
    SizeTrait,
    Trait,
    _at,
    _show,
    _Strict,
)
from .yamltext import structure_problem


class SignalPattern(_Strict):
    """One diurnal on/off signal: 24 on-probabilities by local hour and a mean on-duration.

    With on-probability p and mean on-duration d the chain leaves "on" at rate 1/d and
    leaves "off" at rate p / ((1 - p) d), so its stationary on-fraction is p.
    """

    hourly: list[Probability] = Field(min_length=24, max_length=24)
    mean_on: PositiveDuration


class BatteryLevel(_Strict):
    """Battery level (a percentage, ``72%``) seen at check-in: a Beta distribution by mean and sd."""

    mean: Percentage = Field(gt=0, lt=100)
    sd: Percentage = Field(gt=0, lt=50)

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
    sample_cost: DurationTrait = Field(description="training time per local sample per epoch, s",
                                       examples=[{"median": "110ms", "spread": 0.3}])
    memory: SizeTrait = Field(description="memory available to a training task, bytes",
                              examples=[{"median": "3GB", "spread": 0.25}])
    battery_capacity: EnergyTrait = Field(description="battery capacity, Wh",
                                          examples=[{"median": "14Wh", "spread": 0.1}])
    train_power: PowerTrait = Field(description="power draw while training, W",
                                    examples=[{"median": "3.2W", "spread": 0.2}])
    radio_power: Power = Field(default=1.0, ge=0, description="power draw while transferring, W")
    charge_power: Power = Field(default=10.0, ge=0, description="charger power while plugged in, W")
    download_rate: BitRateTrait = Field(description="download bandwidth, bit/s",
                                        examples=[{"median": "14Mbit/s", "spread": 0.9}])
    upload_rate: BitRateTrait = Field(description="upload bandwidth, bit/s",
                                      examples=[{"median": "4Mbit/s", "spread": 0.9}])
    samples: Trait = Field(description="local training samples", examples=[{"median": 180, "spread": 1.6}])
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
    min_battery: Percentage = Field(default=0.0, ge=0, le=100, description="battery level, %")
    # Unset or null (the default, held as infinity): no limit. A value in the file must be finite.
    execution_limit: PositiveDuration = Field(default=float("inf"))
    crash_rate: Hazard = Field(default=0.0, ge=0, description="crash hazard while working, per hour")

    @field_validator("requires")
    @classmethod
    def _unique(cls, value: list[str]) -> list[str]:
        if len(set(value)) != len(value):
            raise ValueError("a signal is listed twice")
        return value

    @field_validator("execution_limit", mode="wrap")
    @classmethod
    def _no_limit(cls, value: Any, handler: Any) -> Any:
        return float("inf") if value is None else handler(value)

    @field_serializer("execution_limit")
    def _limit_out(self, value: float) -> float | None:
        # No limit is written as null, so a written configuration reads back as it was.
        return None if math.isinf(value) else value

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
