"""The building blocks of the fleet file's models: quantity types with their written forms,
the strict base model (which refuses renamed keys), per-device traits and error helpers.
"""

from __future__ import annotations

import math
import re
from datetime import datetime
from typing import Annotated, Any, ClassVar, Literal

from pydantic import (
    AfterValidator,
    BaseModel,
    BeforeValidator,
    ConfigDict,
    Field,
    PlainSerializer,
    ValidationError,
    model_validator,
)
from pydantic_core import InitErrorDetails, PydanticCustomError

from ..units import (
    format_instant,
    parse_bit_rate,
    parse_duration,
    parse_energy,
    parse_hazard,
    parse_instant,
    parse_percent,
    parse_power,
    parse_size,
)

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
Energy = Annotated[
    float,
    BeforeValidator(parse_energy, json_schema_input_type=str | float),
    Field(json_schema_extra={"examples": ["14Wh", "0.5kWh", "500mWh"]}),
]
Power = Annotated[
    float,
    BeforeValidator(parse_power, json_schema_input_type=str | float),
    Field(json_schema_extra={"examples": ["3.2W", "800mW"]}),
]
BitRate = Annotated[
    float,
    BeforeValidator(parse_bit_rate, json_schema_input_type=str | float),
    Field(json_schema_extra={"examples": ["14Mbit/s", "500kbit/s", "1.2Gbit/s"]}),
]
Percentage = Annotated[
    float,
    BeforeValidator(parse_percent, json_schema_input_type=str | float),
    Field(json_schema_extra={"examples": ["30%", 30]}),
]
Hazard = Annotated[
    float,
    BeforeValidator(parse_hazard, json_schema_input_type=str | float),
    Field(json_schema_extra={"examples": ["0.05/h", "1.2/d", "0.001/s"]}),
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


# Keys a fleet file used to hold, by model: old key -> (new key, how the new one is written).
# A file or --set that still uses one is refused naming the new key, before the unknown-key
# check; the old bare numbers for bit rates were Mbit/s, the new ones are bit/s.
RENAMED_KEYS: dict[str, dict[str, tuple[str, str]]] = {
    "DeviceType": {
        "battery_wh": ("battery_capacity", "an energy such as 14Wh"),
        "train_power_w": ("train_power", "a power such as 3.2W"),
        "radio_power_w": ("radio_power", "a power such as 0.8W"),
        "charge_power_w": ("charge_power", "a power such as 10W"),
        "down_mbps": ("download_rate", "a bit rate such as 40Mbit/s; a bare number is bit/s"),
        "up_mbps": ("upload_rate", "a bit rate such as 10Mbit/s; a bare number is bit/s"),
    },
    "Workload": {
        "crash_per_hour": ("crash_rate", "a hazard such as 0.05/h"),
        "update_compression": ("update_encoding.bits_per_weight",
                               "bits per weight such as 8 (a quarter of the model's 32-bit floats)"),
        "update_size": ("update_encoding", "bits per weight and a kept fraction; the bytes follow from the model"),
    },
}


class _Strict(BaseModel):
    # allow_inf_nan=False: no float field takes inf or NaN (YAML .inf/.nan, or 1e999).
    model_config = ConfigDict(extra="forbid", frozen=True, allow_inf_nan=False)

    @model_validator(mode="before")
    @classmethod
    def _renamed(cls, value: Any) -> Any:
        """Refuse each renamed key (RENAMED_KEYS) at its own key path, naming the new key."""
        renamed = RENAMED_KEYS.get(cls.__name__)
        if not renamed or not isinstance(value, dict):
            return value
        errors = [
            InitErrorDetails(
                type=PydanticCustomError("renamed", "renamed to {new}, {form}", {"new": new, "form": form}),
                loc=(old,), input=value[old],
            )
            for old, (new, form) in renamed.items() if old in value
        ]
        if errors:
            raise ValidationError.from_exception_data(cls.__name__, errors)
        return value


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


class Trait(_Strict):
    """A per-device trait drawn from a lognormal distribution.

    ``median`` is in the trait's base unit; ``spread`` is the standard deviation of the
    natural log (0 gives every device the median). A bare value in the file means a fixed
    value. The subclasses below take their quantity's written forms (``110ms``, ``3GB``,
    ``14Wh``, ``3.2W``, ``14Mbit/s``) for the median and for a bare value.
    """

    median: Real = Field(gt=0)
    spread: Real = Field(default=0.0, ge=0.0, le=3.0)
    _read: ClassVar[Any] = staticmethod(_number)

    @model_validator(mode="before")
    @classmethod
    def _bare(cls, value: Any) -> Any:
        if isinstance(value, (dict, list, tuple)) or value is None:
            return value  # a mapping for the fields; anything else: "a valid dictionary"
        # A bare value: the parser's own message says what was expected, at the trait's key.
        return {"median": cls._read(value), "spread": 0.0}


class DurationTrait(Trait):
    """A trait in seconds."""

    median: Duration = Field(gt=0)
    _read: ClassVar[Any] = staticmethod(parse_duration)


class SizeTrait(Trait):
    """A trait in bytes."""

    median: Size = Field(gt=0)
    _read: ClassVar[Any] = staticmethod(parse_size)


class EnergyTrait(Trait):
    """A trait in Wh."""

    median: Energy = Field(gt=0)
    _read: ClassVar[Any] = staticmethod(parse_energy)


class PowerTrait(Trait):
    """A trait in W."""

    median: Power = Field(gt=0)
    _read: ClassVar[Any] = staticmethod(parse_power)


class BitRateTrait(Trait):
    """A trait in bit/s."""

    median: BitRate = Field(gt=0)
    _read: ClassVar[Any] = staticmethod(parse_bit_rate)


def _listed_once(value: list[str], what: str) -> list[str]:
    """``value`` unless an item appears twice (then ValueError: "a <what> is listed twice")."""
    if len(set(value)) != len(value):
        raise ValueError(f"a {what} is listed twice")
    return value


def _at(key: str, message: str) -> str:
    """A validator message placed at ``key`` (relative to the model): :func:`_describe` moves
    the key into the line's key path."""
    return f"[at {key}] {message}"


_AT_RE = re.compile(r"^\[at ([^\]]+)\] ")


def _show(value: Any, limit: int = 60) -> str:
    """A value as error lines show it: its repr (control characters escaped), cut short."""
    text = repr(value)
    return text if len(text) <= limit else text[: limit - 3] + "..."

