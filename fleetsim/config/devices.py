"""Device types in a fleet file: traits, signals by local hour and day, the settled state,
battery levels, and the adjustments a region can make to them."""

from __future__ import annotations

from typing import Annotated, Any

from pydantic import (
    BeforeValidator,
    Field,
    field_validator,
    model_validator,
)

from ..units import parse_duration
from .fields import (
    _ALL_SIGNALS,
    SIGNALS,
    BitRateTrait,
    DurationTrait,
    EnergyTrait,
    Percentage,
    PositiveDuration,
    Power,
    PowerTrait,
    Probability,
    Real,
    SignalName,
    SizeTrait,
    Trait,
    _at,
    _at_least_one_step,
    _listed_once,
    _Strict,
)


def _mean_on(value: Any) -> float | list[float]:
    """A mean on-duration: one duration, or a list of 24 (one per local hour)."""
    if isinstance(value, (list, tuple)):
        if len(value) != 24:
            raise ValueError(f"expected one duration or a list of 24 (one per local hour), got a list of {len(value)}")
        out = []
        for hour, item in enumerate(value):
            try:
                out.append(_at_least_one_step(parse_duration(item)))
            except ValueError as exc:
                raise ValueError(f"hour {hour}: {exc}") from None
        return out
    return _at_least_one_step(parse_duration(value))


MeanOn = Annotated[
    float | list[float],
    BeforeValidator(_mean_on, json_schema_input_type=str | float | list[str | float]),
    Field(description="mean on-duration: one duration, or 24 durations by local hour",
          examples=["50m", ["7h"] * 7 + ["40m"] * 15 + ["3h"] * 2]),
]
HourlyProbabilities = Annotated[list[Probability], Field(min_length=24, max_length=24)]


def _hours(value: float | list[float]) -> tuple[float, ...]:
    return tuple(value) if isinstance(value, list) else (float(value),) * 24


class WeekendPattern(_Strict):
    """A signal's values on the region's weekend days; a key left out keeps the weekday value."""

    hourly: HourlyProbabilities | None = None
    mean_on: MeanOn | None = None


class SignalPattern(_Strict):
    """One diurnal on/off chain: 24 on-probabilities by local hour and a mean on-duration
    (one, or one per local hour), with optional weekend values.

    With on-probability p and mean on-duration d in the hour, the chain leaves "on" at rate
    1/d and leaves "off" at rate p / ((1 - p) d), so its stationary on-fraction is p.
    """

    hourly: HourlyProbabilities
    mean_on: MeanOn
    weekend: WeekendPattern | None = None

    @property
    def mean_on_hourly(self) -> tuple[float, ...]:
        """Mean on-duration by local hour on weekdays, s (24 values)."""
        return _hours(self.mean_on)

    def profile(self, weekend: bool) -> tuple[tuple[float, ...], tuple[float, ...]]:
        """(on-probability, mean on-duration s) by local hour, on weekdays or weekend days."""
        hourly, mean_on = tuple(self.hourly), self.mean_on_hourly
        if weekend and self.weekend is not None:
            if self.weekend.hourly is not None:
                hourly = tuple(self.weekend.hourly)
            if self.weekend.mean_on is not None:
                mean_on = _hours(self.weekend.mean_on)
        return hourly, mean_on


class SettledPattern(SignalPattern):
    """The settled state (a device put down for a spell: on its charger, on a home network,
    untouched): a chain of its own that holds the signals in ``turns_on`` on while it lasts."""

    turns_on: list[SignalName] = Field(default_factory=lambda: list(_ALL_SIGNALS), min_length=1)

    @field_validator("turns_on")
    @classmethod
    def _unique(cls, value: list[str]) -> list[str]:
        return _listed_once(value, "signal")


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
    """The level's law at a look by charging state, and how long a seen level shapes the next."""

    charging: BatteryLevel = BatteryLevel(mean=75, sd=18)
    unplugged: BatteryLevel = BatteryLevel(mean=55, sd=22)
    correlation_time: PositiveDuration = Field(
        default=6 * 3600.0, description="time constant of the level's memory between looks")


_KEEP_SPREAD = Field(default=None, ge=0.0, le=3.0, description="left out: the type's own spread")


class TraitChange(Trait):
    """A trait in an adjustment: a ``spread`` left out keeps the type's own (a bare value: fixed)."""

    spread: Real | None = _KEEP_SPREAD


class DurationTraitChange(DurationTrait):
    spread: Real | None = _KEEP_SPREAD


class SizeTraitChange(SizeTrait):
    spread: Real | None = _KEEP_SPREAD


class EnergyTraitChange(EnergyTrait):
    spread: Real | None = _KEEP_SPREAD


class PowerTraitChange(PowerTrait):
    spread: Real | None = _KEEP_SPREAD


class BitRateTraitChange(BitRateTrait):
    spread: Real | None = _KEEP_SPREAD


class SignalAdjustment(_Strict):
    """Part of a signal pattern, to replace in one region (keys left out keep their values)."""

    hourly: HourlyProbabilities | None = None
    mean_on: MeanOn | None = None
    weekend: WeekendPattern | None = None


class SettledAdjustment(SignalAdjustment):
    turns_on: list[SignalName] | None = Field(default=None, min_length=1)


class BatteryLevelAdjustment(_Strict):
    mean: Percentage | None = Field(default=None, gt=0, lt=100)
    sd: Percentage | None = Field(default=None, gt=0, lt=50)


class BatteryLevelsAdjustment(_Strict):
    charging: BatteryLevelAdjustment | None = None
    unplugged: BatteryLevelAdjustment | None = None
    correlation_time: PositiveDuration | None = None


class DeviceAdjustment(_Strict):
    """Values of a device type to use in one region: any trait, battery levels, signals or the
    settled state. Mappings merge key by key into the type's own values; anything else replaces."""

    sample_cost: DurationTraitChange | None = None
    memory: SizeTraitChange | None = None
    battery_capacity: EnergyTraitChange | None = None
    train_power: PowerTraitChange | None = None
    radio_power: Power | None = Field(default=None, ge=0)
    charge_power: Power | None = Field(default=None, ge=0)
    download_rate: BitRateTraitChange | None = None
    upload_rate: BitRateTraitChange | None = None
    samples: TraitChange | None = None
    battery_level: BatteryLevelsAdjustment | None = None
    signals: dict[SignalName, SignalAdjustment] | None = None
    settled: SettledAdjustment | None = None


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
    settled: SettledPattern | None = None
    by_region: dict[str, DeviceAdjustment] = Field(default_factory=dict)

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

    @model_validator(mode="after")
    def _settled_within_signals(self) -> DeviceType:
        """The settled state holds its signals on, so each is on at least as often, every hour."""
        if self.settled is None:
            return self
        for weekend, where in ((False, ""), (True, "weekend.")):
            settled_p, _ = self.settled.profile(weekend)
            for name in self.settled.turns_on:
                signal_p, _ = self.signals[name].profile(weekend)
                for hour, (a, b) in enumerate(zip(settled_p, signal_p, strict=True)):
                    if a > b + 1e-12:
                        raise ValueError(_at(
                            f"settled.{where}hourly.{hour}",
                            f"{a:g} exceeds signals.{name}.{where}hourly.{hour} ({b:g}): the settled state "
                            f"holds {name} on, so {name} must be on at least as often in every hour",
                        ))
        return self
