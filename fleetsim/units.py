"""Parsing of the quantities a fleet file holds: durations, data sizes and rates.

Durations accept short forms (``90s``, ``8m``, ``6h``, ``2d``, ``250ms``, combined as
``1h30m``) and ISO 8601 durations (``PT8M``, ``P1DT2H``). A bare number is seconds.

Sizes are SI (1 MB = 10**6 bytes) unless written with an IEC 80000-13 binary prefix
(1 MiB = 2**20 bytes). A bare number is bytes.

Every parser raises :class:`ValueError` with a message naming what it expected; the config
layer turns that into a key-path error.
"""

from __future__ import annotations

import math
import re
from datetime import date, datetime, timezone

__all__ = [
    "Seconds",
    "Bytes",
    "parse_duration",
    "parse_size",
    "parse_instant",
    "format_duration",
    "format_instant",
]

Seconds = float
"""Simulated time and durations, in seconds."""

Bytes = float
"""Data amounts, in bytes."""

_SHORT_UNITS = {"ms": 1e-3, "s": 1.0, "m": 60.0, "min": 60.0, "h": 3600.0, "d": 86400.0, "w": 604800.0}
_SHORT_RE = re.compile(r"(\d+(?:\.\d+)?)\s*(ms|min|s|m|h|d|w)")
_ISO_RE = re.compile(
    r"^P(?:(?P<w>\d+(?:\.\d+)?)W)?(?:(?P<d>\d+(?:\.\d+)?)D)?"
    r"(?:T(?:(?P<h>\d+(?:\.\d+)?)H)?(?:(?P<m>\d+(?:\.\d+)?)M)?(?:(?P<s>\d+(?:\.\d+)?)S)?)?$"
)

# SI decimal prefixes and IEC 80000-13 binary prefixes.
_SIZE_UNITS = {
    "b": 1, "kb": 10**3, "mb": 10**6, "gb": 10**9, "tb": 10**12,
    "kib": 2**10, "mib": 2**20, "gib": 2**30, "tib": 2**40,
}
_SIZE_RE = re.compile(r"^(\d+(?:\.\d+)?(?:[eE][+-]?\d+)?)\s*([a-zA-Z]*)$")


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


def parse_size(value: str | float | int) -> Bytes:
    """Return a data size in bytes (SI: 1 MB = 10**6 B; IEC: 1 MiB = 2**20 B).

    Raises ValueError for a boolean, a negative, non-finite or unreadable value.
    """
    if isinstance(value, bool):
        raise ValueError(f"expected a size such as '20MB' or '16MiB', not a boolean (got {value!r})")
    if isinstance(value, (int, float)):
        size = _finite(value, "size", value)
    elif isinstance(value, str):
        match = _SIZE_RE.match(value.strip())
        unit = match.group(2).lower() if match else ""
        if not match or unit not in _SIZE_UNITS and unit != "":
            raise ValueError(f"expected a size such as '20MB', '500kB' or '16MiB' (got {value!r})")
        size = _finite(float(match.group(1)) * _SIZE_UNITS.get(unit, 1), "size", value)
    else:
        raise ValueError(f"expected a size such as '20MB' or '16MiB' (got {value!r})")
    if size < 0:
        raise ValueError(f"expected a non-negative size (got {value!r})")
    return size


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
