"""Parsing of the quantities a fleet file holds: durations, sizes, energy, power, bit rates,
percentages and hazards.

Durations accept short forms (``90s``, ``8m``, ``6h``, ``2d``, ``250ms``, combined as
``1h30m``) and ISO 8601 durations (``PT8M``, ``P1DT2H``). A bare number is seconds.

Every other quantity is a number followed by its unit symbol, the same way for each:

- sizes: SI (1 MB = 10**6 bytes) unless written with an IEC 80000-13 binary prefix
  (1 MiB = 2**20 bytes); bare number: bytes;
- energy: ``14Wh``, ``0.5kWh``, ``500mWh``; bare number: Wh;
- power: ``3.2W``, ``800mW``; bare number: W;
- bit rates: ``14Mbit/s``, ``500kbit/s``, ``1.2Gbit/s``, ``bit/s`` (SI prefixes, as
  IEC 80000-13 uses them for the bit: k = 10**3, M = 10**6, G = 10**9); bare number: bit/s;
- percentages: ``30%``, from 0 to 100; bare number: a percentage;
- hazards (events per unit of time): ``0.05/h``, ``1.2/d``, ``0.001/s``, any duration unit
  after the slash; bare number: per hour.

SI prefixes and unit symbols are case-sensitive (``mW`` is a milliwatt, ``MW`` a megawatt);
sizes alone also take ``mb`` or ``KB`` as the megabyte and kilobyte. A prefix is applied
to the decimal number as written, so ``1.2Gbit/s`` is exactly the float ``1.2e9``.

Every parser raises :class:`ValueError` with a message naming what it expected; the config
layer turns that into a key-path error.
"""

from __future__ import annotations

import math
import re
from collections.abc import Callable, Mapping
from dataclasses import dataclass, field
from datetime import date, datetime, timezone
from decimal import MAX_EMAX, MIN_EMIN, Context, Decimal, DecimalException
from fractions import Fraction

__all__ = [
    "Seconds",
    "Bytes",
    "parse_duration",
    "parse_size",
    "parse_energy",
    "parse_power",
    "parse_bit_rate",
    "parse_percent",
    "parse_hazard",
    "parse_instant",
    "format_duration",
    "format_instant",
]

Seconds = float
"""Simulated time and durations, in seconds."""

Bytes = float
"""Data amounts, in bytes."""

WattHours = float
"""Energy, in watt-hours (1 Wh = 3600 J)."""

Watts = float
"""Power, in watts."""

BitsPerSecond = float
"""Bit rates, in bit/s."""

Percent = float
"""Percentages, from 0 to 100."""

PerHour = float
"""Hazards (rates of events), per hour."""

_SHORT_UNITS = {"ms": 1e-3, "s": 1.0, "m": 60.0, "min": 60.0, "h": 3600.0, "d": 86400.0, "w": 604800.0}
_SHORT_RE = re.compile(r"(\d+(?:\.\d+)?)\s*(ms|min|s|m|h|d|w)")
_ISO_RE = re.compile(
    r"^P(?:(?P<w>\d+(?:\.\d+)?)W)?(?:(?P<d>\d+(?:\.\d+)?)D)?"
    r"(?:T(?:(?P<h>\d+(?:\.\d+)?)H)?(?:(?P<m>\d+(?:\.\d+)?)M)?(?:(?P<s>\d+(?:\.\d+)?)S)?)?$"
)

# Unit symbol -> factor to the base unit. SI prefixes: BIPM, The International System of
# Units (SI Brochure), 9th ed., 2019, table 7 (table number from memory); binary prefixes: IEC 80000-13:2008.
_SI = {"m": Fraction(1, 1000), "": Fraction(1), "k": Fraction(10**3), "M": Fraction(10**6),
       "G": Fraction(10**9), "T": Fraction(10**12)}
_SIZE_UNITS = {
    "": 1, "b": 1, "kb": 10**3, "mb": 10**6, "gb": 10**9, "tb": 10**12,
    "kib": 2**10, "mib": 2**20, "gib": 2**30, "tib": 2**40,
}
_SECONDS_PER = {"ms": Fraction(1, 1000), "s": Fraction(1), "m": Fraction(60), "min": Fraction(60),
                "h": Fraction(3600), "d": Fraction(86400), "w": Fraction(604800)}

# One number form for every quantity with a unit: digits, an optional fraction and exponent,
# then the unit symbol (letters, '%' and '/'), spaces allowed between them.
_QUANTITY_RE = re.compile(r"^(\d+(?:\.\d+)?(?:[eE][+-]?\d+)?)\s*([A-Za-z%/]*)$")
# Exact decimal arithmetic for applying a prefix, with exponents wide enough for any float.
_EXACT = Context(prec=60, Emax=MAX_EMAX, Emin=MIN_EMIN, traps=[])


def _finite(value: float | int, what: str, shown: object) -> float:
    """``value`` as a finite float; ValueError naming ``what`` otherwise (a huge int overflows)."""
    try:
        number = float(value)
    except OverflowError:
        number = math.inf
    if not math.isfinite(number):
        raise ValueError(f"expected a finite {what} (got {shown!r})")
    return number


def parse_duration(value: str | float | int) -> Seconds:
    """Return a duration in seconds.

    Raises ValueError for a boolean, a negative, non-finite or unreadable value.
    """
    if isinstance(value, bool):
        raise ValueError(f"expected a duration such as '90s', '8m' or 'PT8M', not a boolean (got {value!r})")
    if isinstance(value, (int, float)):
        seconds = _finite(value, "duration", value)
    elif isinstance(value, str):
        seconds = _finite(_parse_duration_text(value.strip()), "duration", value)
    else:
        raise ValueError(f"expected a duration such as '90s', '8m' or 'PT8M' (got {value!r})")
    if seconds < 0:
        raise ValueError(f"expected a non-negative duration (got {value!r})")
    return seconds


def _parse_duration_text(text: str) -> Seconds:
    if text.startswith("-"):
        raise ValueError(f"expected a non-negative duration (got {text!r})")
    iso = _ISO_RE.match(text)
    if iso and text not in ("P", "PT") and not text.endswith("T"):
        parts = {k: float(v) if v else 0.0 for k, v in iso.groupdict().items()}
        return (
            parts["w"] * 604800 + parts["d"] * 86400 + parts["h"] * 3600
            + parts["m"] * 60 + parts["s"]
        )
    try:
        return float(text)
    except ValueError:
        pass
    compact = text.replace(" ", "")
    pos = 0
    total = 0.0
    for match in _SHORT_RE.finditer(compact):
        if match.start() != pos:
            break
        total += float(match.group(1)) * _SHORT_UNITS[match.group(2)]
        pos = match.end()
    if pos == len(compact) and pos > 0:
        return total
    raise ValueError(f"expected a duration such as '90s', '8m', '6h', '2d' or 'PT8M' (got {text!r})")


@dataclass(frozen=True)
class _Quantity:
    """How one kind of quantity is written: its name, examples and unit symbols.

    ``units`` maps a unit symbol ('' for a bare number) to its factor to the base unit;
    ``fold_case`` reads symbols case-insensitively (sizes); ``most`` is the largest value;
    ``hint`` adds advice for a refused unit symbol.
    """

    noun: str
    article: str
    examples: str
    units: Mapping[str, Fraction | int]
    fold_case: bool = False
    most: float | None = None
    hint: Callable[[str], str] = field(default=lambda unit: "")

    def expected(self) -> str:
        return f"expected {self.article} {self.noun} such as {self.examples}"


def _parse_quantity(value: str | float | int, kind: _Quantity) -> float:
    """``value`` in ``kind``'s base unit.

    Raises ValueError naming what was expected for a boolean, an unreadable value, an
    unknown unit, a non-finite, negative or (``kind.most``) too large value.
    """
    if isinstance(value, bool):
        raise ValueError(f"{kind.expected()}, not a boolean (got {value!r})")
    if isinstance(value, (int, float)):
        number = _finite(value, kind.noun, value)
    elif isinstance(value, str):
        match = _QUANTITY_RE.match(value.strip())
        unit = match.group(2) if match else ""
        factor = kind.units.get(unit.lower() if kind.fold_case else unit)
        if not match or factor is None:
            raise ValueError(f"{kind.expected()}{kind.hint(unit)} (got {value!r})")
        number = _finite(_scaled(match.group(1), factor), kind.noun, value)
    else:
        raise ValueError(f"{kind.expected()} (got {value!r})")
    if number < 0:
        raise ValueError(f"expected a non-negative {kind.noun} (got {value!r})")
    if kind.most is not None and number > kind.most:
        raise ValueError(f"expected {kind.article} {kind.noun} from 0 to {kind.most:g} (got {value!r})")
    return number


def _scaled(digits: str, factor: Fraction | int) -> float:
    """The decimal ``digits`` times ``factor``, rounded once to the nearest float (so that
    ``1.2`` with the prefix G gives exactly ``float('1.2e9')``); inf when it overflows."""
    factor = Fraction(factor)
    try:
        exact = _EXACT.divide(_EXACT.multiply(Decimal(digits), factor.numerator), factor.denominator)
    except DecimalException:  # an exponent beyond even Decimal's range: inf or 0 as a float gives
        return float(digits) * float(factor)
    return float(exact)


def _size_hint(unit: str) -> str:
    return "; a size is in bytes, not bits" if unit.endswith("bit") else ""


def _rate_hint(unit: str) -> str:
    prefix = unit[:-len("B/s")] if unit.endswith("B/s") else unit[:-len("Bps")] if unit.endswith("Bps") else None
    if prefix is not None and prefix in ("", "k", "K", "M", "G", "T", "Ki", "Mi", "Gi"):
        return f"; {unit} is a byte rate: write bits, 1 {prefix}B/s = 8 {prefix}bit/s"
    if unit.lower() in ("bps", "kbps", "mbps", "gbps", "b/s", "kb/s", "mb/s", "gb/s"):
        return f"; write the unit as {_SI_CASE.get(unit[0].lower(), '')}bit/s"
    if unit.startswith("K"):
        return "; the SI prefix kilo is a lower-case k: kbit/s"
    return ""


_SI_CASE = {"k": "k", "m": "M", "g": "G", "b": ""}


def _energy_hint(unit: str) -> str:
    if unit.endswith("J"):
        return "; write energy in Wh (1 Wh = 3600 J)"
    if unit.endswith("Ah"):
        return "; write energy in Wh (ampere-hours need the battery voltage: Wh = Ah x V)"
    if unit.lower().endswith("wh"):
        return "; unit symbols are case-sensitive: mWh, Wh, kWh"
    return ""


def _power_hint(unit: str) -> str:
    if unit.lower().endswith("wh"):
        return "; Wh is an energy, a power is in W"
    if unit.lower().endswith("w"):
        return "; unit symbols are case-sensitive: mW, W, kW"
    return ""


def _hazard_hint(unit: str) -> str:
    if unit and not unit.startswith("/"):
        return "; write events per unit of time after a slash: 0.05/h, 1.2/d"
    return ""


_SIZE = _Quantity("size", "a", "'20MB', '500kB' or '16MiB'", _SIZE_UNITS, fold_case=True, hint=_size_hint)
_ENERGY = _Quantity("energy", "an", "'14Wh', '0.5kWh' or '500mWh'",
                    {"": 1, **{f"{p}Wh": f for p, f in _SI.items() if p in ("m", "", "k", "M")}},
                    hint=_energy_hint)
_POWER = _Quantity("power", "a", "'3.2W' or '800mW'",
                   {"": 1, **{f"{p}W": f for p, f in _SI.items() if p in ("m", "", "k")}}, hint=_power_hint)
_BIT_RATE = _Quantity("bit rate", "a", "'14Mbit/s', '500kbit/s' or '1.2Gbit/s'",
                      {"": 1, **{f"{p}bit/s": f for p, f in _SI.items() if p != "m"}}, hint=_rate_hint)
_PERCENT = _Quantity("percentage", "a", "'30%'", {"": 1, "%": 1}, most=100.0)
_HAZARD = _Quantity("hazard", "a", "'0.05/h', '1.2/d' or '0.001/s'",
                    {"": 1, **{f"/{u}": Fraction(3600) / s for u, s in _SECONDS_PER.items()}}, hint=_hazard_hint)


def parse_size(value: str | float | int) -> Bytes:
    """Return a data size in bytes (SI: 1 MB = 10**6 B; IEC: 1 MiB = 2**20 B; bare: bytes).

    Raises ValueError for a boolean, a negative, non-finite or unreadable value.
    """
    return _parse_quantity(value, _SIZE)


def parse_energy(value: str | float | int) -> WattHours:
    """Return an energy in Wh (``14Wh``, ``0.5kWh``, ``500mWh``; bare number: Wh).

    Raises ValueError for a boolean, a negative, non-finite or unreadable value or an
    unknown unit (joules and ampere-hours are refused with a hint).
    """
    return _parse_quantity(value, _ENERGY)


def parse_power(value: str | float | int) -> Watts:
    """Return a power in W (``3.2W``, ``800mW``, ``1kW``; bare number: W).

    Raises ValueError for a boolean, a negative, non-finite or unreadable value or an
    unknown unit.
    """
    return _parse_quantity(value, _POWER)


def parse_bit_rate(value: str | float | int) -> BitsPerSecond:
    """Return a bit rate in bit/s (``14Mbit/s``, ``500kbit/s``, ``1.2Gbit/s``; bare: bit/s).

    Prefixes are SI (k = 10**3, M = 10**6, G = 10**9, T = 10**12). Raises ValueError for a
    boolean, a negative, non-finite or unreadable value or an unknown unit; byte rates
    (``MB/s``) and ``Mbps`` are refused with a hint.
    """
    return _parse_quantity(value, _BIT_RATE)


def parse_percent(value: str | float | int) -> Percent:
    """Return a percentage from 0 to 100 (``30%``; bare number: percent, not a fraction).

    Raises ValueError for a boolean, an unreadable, non-finite or out-of-range value.
    """
    return _parse_quantity(value, _PERCENT)


def parse_hazard(value: str | float | int) -> PerHour:
    """Return a hazard (events per unit of time) per hour.

    Written as a number, a slash and a duration unit: ``0.05/h``, ``1.2/d``, ``0.001/s``
    (also ``/ms``, ``/m`` or ``/min``, ``/w``). A bare number is per hour. Raises ValueError
    for a boolean, a negative, non-finite or unreadable value.
    """
    return _parse_quantity(value, _HAZARD)


def parse_instant(value: str | datetime) -> datetime:
    """Return an aware UTC datetime from an ISO 8601 timestamp.

    A timestamp without an offset is refused: the fleet file states instants in UTC. Raises
    ValueError naming what was expected.
    """
    if isinstance(value, datetime):
        moment = value
    elif isinstance(value, date):
        raise ValueError(f"expected a timestamp with a time and UTC offset, such as '{value}T00:00:00Z' (got {value})")
    elif isinstance(value, str):
        try:
            moment = datetime.fromisoformat(value.strip().replace("Z", "+00:00"))
        except ValueError as exc:
            raise ValueError(
                f"expected an ISO 8601 timestamp such as '2026-03-02T00:00:00Z' (got {value!r})"
            ) from exc
    else:
        raise ValueError(f"expected an ISO 8601 timestamp such as '2026-03-02T00:00:00Z' (got {value!r})")
    if moment.tzinfo is None:
        raise ValueError(f"expected a timestamp with a UTC offset (e.g. a trailing 'Z') (got {value!r})")
    try:
        return moment.astimezone(timezone.utc)
    except OverflowError:  # an offset pushes it past year 1 or 9999
        raise ValueError(f"expected an instant between years 1 and 9999 in UTC (got {value!r})") from None


def format_duration(seconds: Seconds) -> str:
    """Render seconds as a short duration (``'1h30m'``, ``'45s'``)."""
    if seconds < 1:
        return f"{seconds * 1000:.0f}ms"
    parts = []
    remaining = round(seconds)
    for unit, size in (("d", 86400), ("h", 3600), ("m", 60), ("s", 1)):
        count, remaining = divmod(remaining, size)
        if count:
            parts.append(f"{count}{unit}")
    return "".join(parts) or "0s"


def format_instant(moment: datetime) -> str:
    """Render an instant as ISO 8601 UTC with a trailing ``Z``."""
    return moment.astimezone(timezone.utc).strftime("%Y-%m-%dT%H:%M:%SZ")
