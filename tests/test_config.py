"""Validation of fleet files: every problem is one line naming file, key path, value, expectation."""

import json
import math

import pytest
import yaml

import fleetsim
from fleetsim.config import apply_overrides, build_config, config_hash, config_schema, example_path, load_config
from fleetsim.errors import ConfigError


@pytest.fixture()
def raw():
    return yaml.safe_load(example_path().read_text())


def problems(raw, overrides=()):
    with pytest.raises(ConfigError) as info:
        build_config(raw, source="fleet.yaml", overrides=list(overrides))
    return info.value.problems


def test_the_example_fleet_is_valid_and_bundled_copy_matches_fleets_folder():
    config = load_config(example_path())
    assert config.fleet.devices > 0
    assert config.rounds.accept_count == math.ceil(config.rounds.target_reports * config.rounds.over_selection)
    repo_copy = example_path().parents[2] / "fleets" / "inkwren.yaml"
    if repo_copy.exists():  # the source tree ships the same file under fleets/
        assert repo_copy.read_text() == example_path().read_text()


def test_example_zones_include_dst_no_dst_and_a_half_hour_offset():
    from datetime import datetime, timezone
    from zoneinfo import ZoneInfo

    config = load_config(example_path())
    zones = [ZoneInfo(r.timezone) for r in config.fleet.regions.values()]
    jan, jul = datetime(2026, 1, 15, tzinfo=timezone.utc), datetime(2026, 7, 15, tzinfo=timezone.utc)
    offsets = [(jan.astimezone(z).utcoffset(), jul.astimezone(z).utcoffset()) for z in zones]
    assert any(a != b for a, b in offsets), "a zone with DST"
    assert any(a == b for a, b in offsets), "a zone without DST"
    assert any(a.total_seconds() % 3600 == 1800 for a, _ in offsets), "a half-hour offset"


@pytest.mark.parametrize(
    ("override", "path", "expected"),
    [
        ("rounds.report_deadline=-5m", "rounds.report_deadline", "non-negative duration"),
        ("fleet.regions.south-asia.timezone=Mars/Olympus", "fleet.regions.south-asia.timezone",
         "unknown IANA time zone"),
        ("fleet.device_types.tablet.share=0.5", "fleet", "shares must sum to 1"),
        ("rounds.bogus=1", "rounds.bogus", "unknown key"),
        ("rounds.target_reports=many", "rounds.target_reports", "integer"),
        ("workload.model_size=12 parsecs", "workload.model_size", "size"),
        ("rounds.min_reports=500", "rounds", "must not exceed target_reports"),
        ("horizon.start=2026-03-02", "horizon.start", "UTC offset"),
    ],
)
def test_each_bad_value_is_one_line_with_its_key_path(raw, override, path, expected):
    lines = problems(raw, [override])
    assert len(lines) == 1, lines
    assert lines[0].startswith(f"fleet.yaml: {path}")
    assert expected in lines[0]


def test_probability_out_of_range_names_the_hour(raw):
    raw["fleet"]["device_types"]["tablet"]["signals"]["idle"]["hourly"][3] = 1.2
    (line,) = problems(raw)
    assert "fleet.device_types.tablet.signals.idle.hourly.3" in line
    assert "less than or equal to 1" in line and "1.2" in line


def test_unknown_key_lists_the_known_ones(raw):
    raw["workload"]["epoch"] = 2
    (line,) = problems(raw)
    assert "workload.epoch: unknown key; expected one of" in line and "epochs" in line


def test_several_problems_give_several_lines(raw):
    lines = problems(raw, ["rounds.checkin_every=-1s", "workload.epochs=0"])
    assert len(lines) == 2


def test_bad_yaml_and_missing_file_are_one_line(tmp_path):
    bad = tmp_path / "bad.yaml"
    bad.write_text("fleet: [unclosed\n")
    with pytest.raises(ConfigError) as info:
        load_config(bad)
    assert len(info.value.problems) == 1 and "not valid YAML at line" in info.value.problems[0]
    with pytest.raises(ConfigError, match="cannot read"):
        load_config(tmp_path / "missing.yaml")


def test_overrides_set_nested_keys_and_list_items(raw):
    raw["disruptions"] = [{"kind": "crash-surge", "start": "1h", "duration": "2h", "factor": 3}]
    data = apply_overrides(raw, ["rounds.over_selection=1.5", "disruptions.0.factor=5", "selection.params.window=10"])
    config = build_config(data)
    assert config.rounds.over_selection == 1.5
    assert config.disruptions[0].factor == 5
    assert config.selection.params == {"window": 10}
    with pytest.raises(ConfigError, match="expected key.path=value"):
        apply_overrides(raw, ["rounds.over_selection"])


def test_disruptions_name_known_regions_and_types(raw):
    raw["disruptions"] = [{"kind": "network-slowdown", "start": "1h", "duration": "1h", "factor": 0.5,
                           "regions": ["atlantis"]}]
    (line,) = problems(raw)
    assert "unknown name 'atlantis'" in line


def test_config_hash_is_stable_and_sensitive(raw):
    a = build_config(raw)
    b = build_config(raw)
    c = build_config(raw, overrides=["rounds.over_selection=1.31"])
    assert config_hash(a) == config_hash(b) != config_hash(c)


def test_schema_describes_every_top_level_section():
    schema = config_schema()
    assert set(schema["properties"]) == set(fleetsim.Config.model_fields)
    assert schema["additionalProperties"] is False


def test_names_with_control_characters_are_refused(raw):
    raw["fleet"]["regions"]["north\x00atlantic"] = raw["fleet"]["regions"].pop("north-atlantic")
    (line,) = problems(raw)
    assert "control characters" in line


@pytest.mark.parametrize(
    ("override", "path", "expected"),
    [
        ("rounds.over_selection=.inf", "rounds.over_selection", "finite number"),
        ("disruptions=[{kind: behaviour-shift, signal: idle, start: 1h, duration: 1h, shift_hours: .nan}]",
         "disruptions.0.shift_hours", "finite number"),
        ("fleet.device_types.tablet.battery_capacity.median=.inf", "fleet.device_types.tablet.battery_capacity.median",
         "finite"),
        ("fleet.device_types.tablet.battery_capacity=.inf", "fleet.device_types.tablet.battery_capacity",
         "finite energy"),
        ("selection.params.window=.nan", "selection.params.window", "finite number"),
        ("workload.epochs=yes", "workload.epochs", "not a boolean"),
        ("fleet.device_types.tablet.signals.idle.hourly.0=true", "fleet.device_types.tablet.signals.idle.hourly.0",
         "not a boolean"),
        ("rounds.selection_timeout=yes", "rounds.selection_timeout", "not a boolean"),
        ("fleet.regions.east-asia.timezone=America", "fleet.regions.east-asia.timezone", "unknown IANA time zone"),
        ("fleet.regions.east-asia.timezone=../../etc/passwd", "fleet.regions.east-asia.timezone", "unknown IANA"),
        ("rounds.checkin_every=0.5s", "rounds.checkin_every", "greater than or equal to 1"),
        ("horizon.duration=0.1ms", "horizon.duration", "at least 1ms"),
        ("horizon.start=1600-01-01T00:00:00Z", "horizon.start", "range fleetsim can represent"),
        ("scenario=bad\u2028title", "scenario", "line or paragraph separators"),
    ],
)
def test_values_that_used_to_pass_or_crash_are_one_line(raw, override, path, expected):
    lines = problems(raw, [override])
    assert len(lines) == 1, lines
    assert lines[0].startswith(f"fleet.yaml: {path}: ") and expected in lines[0], lines
    assert "(got " in lines[0]


@pytest.mark.parametrize("char", ["\x00", "\x1b", "\x85", "\u202e", "\u2067", "\u2028", "\u2029", "\u200f"])
def test_one_rule_refuses_control_separator_and_bidi_characters_in_names(raw, char):
    raw["fleet"]["device_types"][f"tab{char}let"] = raw["fleet"]["device_types"].pop("tablet")
    (line,) = problems(raw)
    assert line.startswith("fleet.yaml: fleet.device_types: device type name") and f"U+{ord(char):04X}" in line


def test_duplicate_keys_name_both_lines_in_fleet_and_override_text(tmp_path):
    path = tmp_path / "fleet.yaml"
    path.write_text(example_path().read_text().replace("  epochs: 2\n", "  epochs: 2\n  epochs: 3\n"))
    with pytest.raises(ConfigError) as info:
        load_config(path)
    (line,) = info.value.problems
    assert "duplicate key 'epochs' at line" in line and "(first at line" in line
    with pytest.raises(ConfigError, match=r"--set: selection.params: .*duplicate key 'a'"):
        apply_overrides(yaml.safe_load(example_path().read_text()), ["selection.params={a: 1, a: 2}"])


def test_memory_estimate_is_above_a_measured_run_and_grows_with_the_drivers():
    from fleetsim.config import estimate_memory

    config = load_config(example_path())
    # Measured: peak RSS of `fleetsim run` on the example (50,000 devices, 7 days) was 505 MB.
    small = estimate_memory(config, 30.0)
    assert 505e6 <= small["total"] <= 5 * 505e6
    bigger = estimate_memory(load_config(example_path(), ["fleet.devices=1000000"]), 30.0)
    assert bigger["devices"] == pytest.approx(20 * small["devices"])
    faster = estimate_memory(load_config(example_path(), ["rounds.checkin_every=1s"]), 30.0)
    # ticks: devices x (window / check-in period + 1)
    assert faster["ticks"] == pytest.approx(small["ticks"] * (30 + 1) / (30 / 600 + 1))


# ------------------------------------------------------------------ quantities with units

RENAMES = [  # old key path -> new key, as docs/fleet-file.md lists them
    ("fleet.device_types.tablet.battery_wh", "battery_capacity"),
    ("fleet.device_types.tablet.train_power_w", "train_power"),
    ("fleet.device_types.tablet.radio_power_w", "radio_power"),
    ("fleet.device_types.tablet.charge_power_w", "charge_power"),
    ("fleet.device_types.tablet.down_mbps", "download_rate"),
    ("fleet.device_types.tablet.up_mbps", "upload_rate"),
    ("workload.crash_per_hour", "crash_rate"),
]


@pytest.mark.parametrize(("old", "new"), RENAMES)
def test_each_old_key_in_a_file_is_refused_naming_the_new_one(tmp_path, old, new):
    text = example_path().read_text()
    *_, leaf = old.split(".")
    indent = "  " if old.startswith("workload") else "      "
    path = tmp_path / "f.yaml"
    # The tablet (the last device type) or the workload gets the old key beside its new one.
    anchor = "  requires:" if old.startswith("workload") else "      samples: {median: 180, spread: 1.9}"
    path.write_text(text.replace(anchor, f"{indent}{leaf}: 40\n{anchor}"))
    with pytest.raises(ConfigError) as info:
        load_config(path)
    (line,) = info.value.problems
    assert line.startswith(f"{path}: {old}: renamed to {new}, ") and line.endswith("(got 40)"), line


@pytest.mark.parametrize(("old", "new"), RENAMES)
def test_each_old_key_in_an_override_is_refused_naming_the_new_one(raw, old, new):
    (line,) = problems(raw, [f"{old}=40"])
    assert line.startswith(f"fleet.yaml: {old}: renamed to {new}, ") and line.endswith("(got 40)"), line


def test_every_renamed_key_of_a_mapping_gets_its_own_line_and_the_message_says_how_to_write_it(raw):
    old_style = {"share": 1.0, "battery_wh": 14, "down_mbps": {"median": 40, "spread": 0.7}}
    raw["fleet"]["device_types"] = {"tablet": {**raw["fleet"]["device_types"]["tablet"], **old_style}}
    lines = problems(raw)
    assert lines == [
        "fleet.yaml: fleet.device_types.tablet.battery_wh: renamed to battery_capacity, an energy such as 14Wh "
        "(got 14)",
        "fleet.yaml: fleet.device_types.tablet.down_mbps: renamed to download_rate, a bit rate such as 40Mbit/s; "
        "a bare number is bit/s",
    ]


# The example fleet as it was written before units were spelt out (bare numbers in Wh, W,
# Mbit/s, per hour and percent): per device type battery_wh, train_power_w, radio_power_w,
# charge_power_w, down_mbps, up_mbps.
OLD_EXAMPLE = {
    "budget-phone": (14, 3.2, 0.8, 10, 14, 4),
    "midrange-phone": (17, 3.6, 1.0, 18, 32, 9),
    "flagship-phone": (19, 4.5, 1.1, 27, 70, 18),
    "tablet": (30, 4.0, 1.0, 20, 40, 10),
}


def test_the_example_with_units_is_the_same_configuration_as_before():
    new = load_config(example_path())
    raw = yaml.safe_load(example_path().read_text())
    for name, (wh, train_w, radio_w, charge_w, down, up) in OLD_EXAMPLE.items():
        kind = raw["fleet"]["device_types"][name]
        kind["battery_capacity"]["median"] = wh
        kind["train_power"]["median"] = train_w
        kind["radio_power"], kind["charge_power"] = radio_w, charge_w
        kind["download_rate"]["median"] = down * 10**6  # 1 Mbit/s = 10^6 bit/s (SI prefix M)
        kind["upload_rate"]["median"] = up * 10**6
        kind["battery_level"] = {"charging": {"mean": 72, "sd": 20}, "unplugged": {"mean": 52, "sd": 24}}
    raw["workload"]["min_battery"], raw["workload"]["crash_rate"] = 30, 1.0  # bare: %, per hour
    bare = build_config(raw)
    assert bare.model_dump() == new.model_dump()
    assert config_hash(bare) == config_hash(new)


def test_fleet_arrays_keep_mbit_per_s_and_watt_hours_exactly(raw):
    from fleetsim.fleet import sample_fleet

    config = build_config(raw, overrides=["fleet.device_types.tablet.download_rate=1.2Gbit/s",
                                          "fleet.device_types.tablet.upload_rate=500kbit/s",
                                          "fleet.device_types.tablet.battery_capacity=0.5kWh",
                                          "fleet.device_types.tablet.train_power=800mW",
                                          "fleet.devices=400"])
    fleet = sample_fleet(config, seed=1)
    tablets = fleet.device_type == fleet.type_names.index("tablet")
    assert tablets.any()
    assert set(fleet.down_mbps[tablets]) == {1200.0} and set(fleet.up_mbps[tablets]) == {0.5}
    assert set(fleet.battery_wh[tablets]) == {500.0} and set(fleet.train_power_w[tablets]) == {0.8}


def test_written_quantities_validate_with_their_unit(raw):
    config = build_config(raw, overrides=["workload.min_battery=45%", "workload.crash_rate=1.2/d",
                                          "fleet.device_types.tablet.battery_level.charging={mean: 60%, sd: 15%}",
                                          "fleet.device_types.tablet.charge_power=18W"])
    assert config.workload.min_battery == 45.0
    assert config.workload.crash_rate == pytest.approx(0.05)  # 1.2 per day = 0.05 per hour
    assert config.fleet.device_types["tablet"].battery_level.charging.mean == 60.0
    assert config.fleet.device_types["tablet"].charge_power == 18.0
    (line,) = problems(raw, ["fleet.device_types.tablet.download_rate.median=40MB/s"])
    assert line.startswith("fleet.yaml: fleet.device_types.tablet.download_rate.median: expected a bit rate")
    assert "byte rate" in line and "(got '40MB/s')" in line


def test_schema_shows_the_new_keys_with_examples():
    defs = config_schema()["$defs"]
    kind = defs["DeviceType"]["properties"]
    for name in ("battery_capacity", "train_power", "radio_power", "charge_power", "download_rate", "upload_rate"):
        assert name in kind
    assert kind["download_rate"]["examples"] == [{"median": "14Mbit/s", "spread": 0.9}]
    assert "14Wh" in defs["EnergyTrait"]["properties"]["median"]["examples"]
    work = defs["Workload"]["properties"]
    assert "crash_rate" in work and "crash_per_hour" not in work
    assert "0.05/h" in work["crash_rate"]["examples"] and "30%" in work["min_battery"]["examples"]


@pytest.mark.parametrize("limit", ["10m", "null"])
def test_a_written_configuration_reads_back_as_it_was(limit):
    # config.json is the run's typed settings: no execution limit is written as null, never Infinity
    # (JSON has no infinity, RFC 8259 section 6).
    config = load_config(example_path(), [f"workload.execution_limit={limit}"])
    text = json.dumps(config.model_dump(mode="json"), allow_nan=False)
    assert build_config(json.loads(text)) == config
