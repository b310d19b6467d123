"""Validation of fleet files: every problem is one line naming file, key path, value, expectation."""

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
        ("fleet.regions.south-asia.timezone=Mars/Olympus", "fleet.regions.south-asia.timezone", "unknown IANA time zone"),
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
