"""Durations, sizes and instants as the fleet file writes them."""

from datetime import datetime, timezone

import pytest
from hypothesis import given
from hypothesis import strategies as st

from fleetsim.units import (
    format_duration,
    parse_bit_rate,
    parse_duration,
    parse_energy,
    parse_hazard,
    parse_instant,
    parse_percent,
    parse_power,
    parse_size,
)


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


# ------------------------------------------------------------ energy, power, rates, hazards
# SI prefixes: BIPM, The International System of Units (SI Brochure), 9th ed., 2019, table of
# SI prefixes (m = 10^-3, k = 10^3, M = 10^6, G = 10^9, T = 10^12); symbols are case-sensitive.
# IEC 80000-13:2008 uses the same decimal prefixes for the bit (1 Mbit = 10^6 bit).
# A prefixed value must equal the float of the same decimal written out in the base unit.


@pytest.mark.parametrize(
    ("text", "wh"),
    [("14Wh", 14.0), ("0.5kWh", float("500")), ("500mWh", float("0.5")), ("1.5MWh", float("1.5e6")),
     ("14", 14.0), (14, 14.0), (0.25, 0.25), ("3 Wh", 3.0), ("1e3mWh", 1.0)],
)
def test_energy_in_watt_hours_with_si_prefixes(text, wh):
    assert parse_energy(text) == wh


@pytest.mark.parametrize(("text", "w"), [("3.2W", 3.2), ("800mW", 0.8), ("1.5kW", 1500.0), ("10", 10.0), (0.8, 0.8)])
def test_power_in_watts_with_si_prefixes(text, w):
    assert parse_power(text) == w


@pytest.mark.parametrize(
    ("text", "bps"),
    [("14Mbit/s", float("14e6")), ("500kbit/s", float("500e3")), ("1.2Gbit/s", float("1.2e9")),
     ("0.9Mbit/s", float("0.9e6")), ("2Tbit/s", float("2e12")), ("9600bit/s", 9600.0), ("64000", 64000.0),
     (1e6, 1e6), ("1.5e1Mbit/s", float("15e6"))],
)
def test_bit_rates_follow_si_prefixes_for_the_bit(text, bps):
    assert parse_bit_rate(text) == bps


@pytest.mark.parametrize(
    ("bad", "hint"),
    [("14MB/s", "byte rate"), ("14kB/s", "1 kB/s = 8 kbit/s"), ("2MiB/s", "byte rate"), ("14MBps", "byte rate"),
     ("14Mbps", "write the unit as Mbit/s"), ("14Mb/s", "Mbit/s"), ("500Kbit/s", "lower-case k"),
     ("14mbit/s", "bit rate such as"), ("14 Mbit", "bit rate such as")],
)
def test_byte_rates_and_loose_bit_rate_units_are_refused_with_a_hint(bad, hint):
    with pytest.raises(ValueError, match="expected a bit rate such as") as info:
        parse_bit_rate(bad)
    assert hint in str(info.value) and f"(got {bad!r})" in str(info.value)


@pytest.mark.parametrize(("text", "pct"), [("30%", 30.0), ("0%", 0.0), ("100%", 100.0), ("72.5 %", 72.5), (30, 30.0),
                                           ("45", 45.0)])
def test_percentages_with_or_without_the_sign(text, pct):
    assert parse_percent(text) == pct


@pytest.mark.parametrize(
    ("text", "per_hour"),
    [("0.05/h", 0.05), ("1.2/d", 0.05), ("0.001/s", 3.6), ("1/min", 60.0), ("1/m", 60.0), ("7/w", 7 / 168),
     ("1/ms", 3.6e6), ("0.05", 0.05), (2, 2.0)],
)
def test_hazards_per_unit_of_time_in_per_hour(text, per_hour):
    # 1 d = 24 h, 1 h = 3600 s, 1 w = 168 h (common practice).
    assert parse_hazard(text) == pytest.approx(per_hour, rel=1e-15)


@pytest.mark.parametrize(
    ("parser", "bad", "words"),
    [(parse_energy, "14J", "1 Wh = 3600 J"), (parse_energy, "3000mAh", "battery voltage"),
     (parse_energy, "14wh", "case-sensitive"), (parse_energy, "-3Wh", "an energy such as"),
     (parse_power, "3.2Wh", "Wh is an energy"), (parse_power, "3.2w", "case-sensitive"),
     (parse_power, "3.2MW", "a power such as"),
     (parse_percent, "130%", "from 0 to 100"), (parse_percent, 100.5, "from 0 to 100"),
     (parse_percent, "30 percent", "a percentage such as"), (parse_percent, "-1%", "a percentage such as"),
     (parse_hazard, "0.05 per hour", "a hazard such as"), (parse_hazard, "0.05h", "after a slash"),
     (parse_hazard, "0.05/y", "a hazard such as"), (parse_hazard, -0.1, "non-negative hazard")],
)
def test_wrong_units_and_ranges_are_refused_naming_what_was_expected(parser, bad, words):
    with pytest.raises(ValueError) as info:
        parser(bad)
    assert words in str(info.value) and f"(got {bad!r})" in str(info.value)


@pytest.mark.parametrize("parser", [parse_energy, parse_power, parse_bit_rate, parse_percent, parse_hazard])
@pytest.mark.parametrize("bad", [True, None, [1], float("inf"), float("nan"), 10**400, "1e999", "", "Wh", "inf"])
def test_every_quantity_refuses_booleans_non_finite_and_unreadable_values(parser, bad):
    with pytest.raises(ValueError, match=r"^expected .*\(got "):
        parser(bad)


def test_exponents_beyond_any_float_do_not_hang_or_crash():
    with pytest.raises(ValueError, match="finite bit rate"):
        parse_bit_rate("1e" + "9" * 30 + "Mbit/s")
    assert parse_energy("1e-" + "9" * 30 + "kWh") == 0.0  # underflows to zero, like float('1e-999')
