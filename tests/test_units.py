"""Durations, sizes and instants as the fleet file writes them."""

from datetime import datetime, timezone

import pytest
from hypothesis import given
from hypothesis import strategies as st

from fleetsim.units import format_duration, parse_duration, parse_instant, parse_size


@pytest.mark.parametrize(
    ("text", "seconds"),
    [
        ("90s", 90), ("8m", 480), ("6h", 21600), ("2d", 172800), ("250ms", 0.25), ("1h30m", 5400),
        ("45", 45), (12, 12), (0.5, 0.5),
        # ISO 8601 durations (ISO 8601-1:2019, section 5.5.2)
        ("PT8M", 480), ("P1DT2H", 93600), ("PT1.5S", 1.5), ("P1W", 604800), ("PT0S", 0),
    ],
)
def test_durations_in_short_and_iso_8601_forms(text, seconds):
    assert parse_duration(text) == pytest.approx(seconds)


@pytest.mark.parametrize("bad", ["-5m", "5 parsecs", "P", "PT", "", "m5", True, None, [1], "nan"])
def test_bad_durations_are_refused_with_what_was_expected(bad):
    with pytest.raises(ValueError, match="duration"):
        parse_duration(bad)


@pytest.mark.parametrize(
    ("text", "size"),
    [
        # SI prefixes: 1 MB = 10**6 B; IEC 80000-13 binary prefixes: 1 MiB = 2**20 B
        ("24MB", 24e6), ("1.5GB", 1.5e9), ("500kB", 5e5), ("16MiB", 16 * 2**20), ("1GiB", 2**30),
        ("2KiB", 2048), (1000, 1000), ("64", 64),
    ],
)
def test_sizes_follow_si_and_iec_80000_13(text, size):
    assert parse_size(text) == pytest.approx(size)


@pytest.mark.parametrize("bad", ["-1MB", "12 parsecs", "MB", True])
def test_bad_sizes_are_refused(bad):
    with pytest.raises(ValueError, match="size"):
        parse_size(bad)


def test_instants_are_iso_8601_utc():
    # ISO 8601: 'Z' designates UTC; an explicit offset is converted to UTC.
    assert parse_instant("2026-03-02T00:00:00Z") == datetime(2026, 3, 2, tzinfo=timezone.utc)
    assert parse_instant("2026-03-02T05:30:00+05:30") == datetime(2026, 3, 2, tzinfo=timezone.utc)
    with pytest.raises(ValueError, match="offset"):
        parse_instant("2026-03-02T00:00:00")
    with pytest.raises(ValueError, match="ISO 8601"):
        parse_instant("next tuesday")


@given(st.integers(min_value=1, max_value=10 * 86400))
def test_formatted_durations_read_back(seconds):
    assert parse_duration(format_duration(seconds)) == seconds


@pytest.mark.parametrize("bad", [float("inf"), float("nan"), 10**400, "1e999", "inf", "P" + "9" * 320 + "D"])
def test_non_finite_and_overflowing_durations_are_refused(bad):
    # A bare int too large for a float (10**400) overflows: refused like inf, not raised as OverflowError.
    with pytest.raises(ValueError, match=r"finite duration \(got "):
        parse_duration(bad)


@pytest.mark.parametrize("bad", [float("inf"), 10**400, "1e999MB", "1e999"])
def test_non_finite_sizes_are_refused(bad):
    with pytest.raises(ValueError, match="finite size"):
        parse_size(bad)


def test_instant_pushed_past_year_9999_by_its_offset_is_refused():
    with pytest.raises(ValueError, match="between years 1 and 9999"):
        parse_instant("9999-12-31T23:00:00-05:00")
