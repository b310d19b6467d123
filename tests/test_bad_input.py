"""Bad input, generated: every invalid fleet file or option set is a clean one-line error.

Each example starts from the bundled example fleet (valid) and breaks it in one way: wrong
types, non-finite numbers, booleans for numbers, bad time zones, bad encodings, duplicate
keys, deep nesting, alias bombs, hostile names, settings under which time cannot advance,
instants out of range, runs too large for memory, bad plug-ins and bad command-line
options. Each one goes through the CLI in-process, as ``check`` and as ``run --out``, and
must exit 2 with only ``error:`` lines on stderr, each naming the file or the option (and
the key path and the value where there is one), with no traceback and no output folder.

Hypothesis runs derandomized (the same examples on every machine); set
``HYPOTHESIS_PROFILE=long`` for ten times as many.
"""

from __future__ import annotations

import copy
import gzip
import os
import re
import tempfile
import zoneinfo
from pathlib import Path
from typing import Any

import pytest
import yaml
from hypothesis import HealthCheck, Phase, given, settings
from hypothesis import strategies as st
from typer.testing import CliRunner

from fleetsim import SelectionPolicy
from fleetsim.cli import app
from fleetsim.config import (
    MAX_DEPTH,
    MAX_NODES,
    RENAMED_KEYS,
    check_memory,
    example_path,
    load_config,
    read_yaml,
)
from fleetsim.errors import ConfigError
from fleetsim.policies import make_policy

runner = CliRunner()
BASE_TEXT = example_path().read_text(encoding="utf-8")
BASE = yaml.safe_load(BASE_TEXT)
_SCALE = 10 if os.environ.get("HYPOTHESIS_PROFILE") == "long" else 1


def examples(n: int) -> settings:
    """Deterministic settings for ``n`` examples (x10 under HYPOTHESIS_PROFILE=long)."""
    return settings(
        max_examples=n * _SCALE, deadline=None, derandomize=True, database=None,
        phases=[Phase.explicit, Phase.generate],  # a failing example is reported as found, unshrunk
        suppress_health_check=[HealthCheck.too_slow, HealthCheck.data_too_large],
    )


# ------------------------------------------------------------------------------------ runner


def refused(content: bytes | None, args: list[str] = (), path: str | None = None, got: bool = True,
            fragment: str | None = None) -> list[str]:
    """Run ``check`` and ``run --out`` on ``content`` (None: the bundled file) with ``args``;
    assert a clean refusal and return the error lines of ``check``.

    ``path``: a key path some line must name; ``got``: some line must show the value;
    ``fragment``: text some line must hold.
    """
    with tempfile.TemporaryDirectory() as tmp:
        folder = Path(tmp)
        if content is None:
            target = str(example_path())
        else:
            target = str(folder / "fleet.yaml")
            Path(target).write_bytes(content)
        out = folder / "out"
        first: list[str] = []
        for command in (["check", target, *args], ["run", target, "--out", str(out), *args]):
            result = runner.invoke(app, command)
            assert result.exception is None or isinstance(result.exception, SystemExit), (
                command, repr(result.exception))
            assert result.exit_code == 2, (command, result.stdout, result.stderr)
            assert result.stdout == "", (command, result.stdout)
            lines = result.stderr.splitlines()
            assert lines, command
            assert "Traceback" not in result.stderr
            for line in lines:
                assert line.startswith("error: "), (command, line)
                assert line.isprintable(), (command, line)
                named = target in line or re.match(r"error: --?[a-z-]+", line)
                assert named, (command, line)
            if path is not None:
                assert any(re.search(rf"(^error: |: ){re.escape(path)}[.:]", line) for line in lines), (path, lines)
            if got:
                assert any("(got " in line for line in lines), lines
            if fragment is not None:
                assert any(fragment in line for line in lines), (fragment, lines)
            assert not out.exists(), command
            first = first or lines
        return first


_DUMPER = getattr(yaml, "CSafeDumper", yaml.SafeDumper)


def dump(data: Any) -> bytes:
    return yaml.dump(data, Dumper=_DUMPER, sort_keys=False, allow_unicode=True).encode("utf-8")


def with_value(path: tuple[Any, ...], value: Any, data: Any = None) -> dict[str, Any]:
    data = copy.deepcopy(BASE if data is None else data)
    node = data
    for part in path[:-1]:
        node = node.setdefault(part, {}) if isinstance(node, dict) else node[part]
    node[path[-1]] = value
    return data


def key(path: tuple[Any, ...]) -> str:
    return ".".join(str(p) for p in path)


SHIFTED = with_value(("disruptions",), [
    {"kind": "behaviour-shift", "signal": "idle", "start": "1h", "duration": "2h", "factor": 0.5, "shift_hours": 2}
])

NUMBERS = [
    ("fleet", "devices"), ("fleet", "device_types", "tablet", "share"),
    ("fleet", "device_types", "tablet", "battery_capacity", "spread"),
    ("fleet", "device_types", "midrange-phone", "samples", "median"),
    ("fleet", "device_types", "tablet", "signals", "idle", "hourly", 3), ("fleet", "regions", "east-asia", "share"),
    ("workload", "update_encoding", "bits_per_weight"), ("workload", "epochs"), ("workload", "batch_size"),
    ("rounds", "target_reports"), ("rounds", "over_selection"), ("rounds", "min_reports"),
]
# Quantities written with a unit (energy, power, bit rate, percentage, hazard).
QUANTITIES = [
    ("fleet", "device_types", "budget-phone", "battery_capacity", "median"),
    ("fleet", "device_types", "tablet", "train_power", "median"), ("fleet", "device_types", "tablet", "radio_power"),
    ("fleet", "device_types", "tablet", "charge_power"),
    ("fleet", "device_types", "tablet", "upload_rate", "median"), ("fleet", "device_types", "flagship-phone",
                                                                   "download_rate"),
    ("fleet", "device_types", "tablet", "battery_level", "charging", "mean"),
    ("fleet", "device_types", "tablet", "battery_level", "unplugged", "sd"),
    ("workload", "min_battery"), ("workload", "crash_rate"),
]
DURATIONS = [
    ("horizon", "duration"), ("horizon", "warmup"), ("rounds", "selection_timeout"), ("rounds", "report_deadline"),
    ("rounds", "aggregation_time"), ("rounds", "rest"), ("rounds", "checkin_every"), ("workload", "execution_limit"),
    ("fleet", "device_types", "tablet", "signals", "charging", "mean_on"),
    ("fleet", "device_types", "tablet", "sample_cost", "median"),
]
SIZES = [("workload", "model_size"), ("workload", "memory_needed"),
         ("fleet", "device_types", "tablet", "memory", "median")]
DISRUPTION = [("disruptions", 0, "factor"), ("disruptions", 0, "shift_hours"), ("disruptions", 0, "start")]
OPTIONAL = {("horizon", "warmup"), ("rounds", "min_reports"),
            ("workload", "execution_limit")}  # null: no limit
ALL_LEAVES = NUMBERS + QUANTITIES + DURATIONS + SIZES + DISRUPTION


def base_for(path: tuple[Any, ...]) -> dict[str, Any]:
    return SHIFTED if path[0] == "disruptions" else BASE


# ------------------------------------------------------------------------- generated classes

letters = st.text(alphabet="abcdefghijklmnopqrstuvwxyzABCXYZ _-,;/", max_size=12)
wrong_values = st.one_of(letters, st.sampled_from(["12 parsecs", "1,5", "--3", "0x1G", "5 mins", "PT", "[]"]),
                         st.lists(st.integers(), min_size=1, max_size=3),
                         st.dictionaries(st.sampled_from(["a", "b"]), st.integers(), min_size=1))


@examples(105)
@given(path=st.sampled_from(ALL_LEAVES), value=st.one_of(wrong_values, st.none()))
def test_wrong_types_are_refused_at_their_key(path, value):
    if value is None and (path in OPTIONAL or path[-1] == "shift_hours"):
        value = "none at all"
    got = not isinstance(value, (list, dict))
    refused(dump(with_value(path, value, base_for(path))), path=key(path), got=got)


# One written form per kind of quantity; each is a wrong unit for every other kind.
KIND_OF = {"battery_capacity": "energy", "train_power": "power", "radio_power": "power", "charge_power": "power",
           "upload_rate": "bit rate", "download_rate": "bit rate", "mean": "percentage", "sd": "percentage",
           "min_battery": "percentage", "crash_rate": "hazard"}
WRITTEN = {"energy": "14Wh", "power": "3W", "bit rate": "14Mbit/s", "percentage": "30%", "hazard": "0.05/h"}
WRONG_UNITS = {
    "energy": ["14J", "3000mAh", "14wh", "14 Wh/s", "14kwh"],
    "power": ["800mA", "3.2Wh", "3.2w", "3.2 kw", "3.2VA"],
    "bit rate": ["14MB/s", "14Mbps", "14Mb/s", "500Kbit/s", "2MiB/s", "14 Mbit", "14bps"],
    "percentage": ["130%", "30 percent", "0.3%%", "101", "30pct"],
    "hazard": ["0.05 per hour", "0.05h", "0.05/hour", "0.05/y", "5%/h", "/h"],
}


@examples(105)
@given(path=st.sampled_from(QUANTITIES), kind=st.sampled_from(sorted(WRONG_UNITS)), pick=st.integers(0, 6))
def test_quantities_with_a_wrong_unit_are_refused(path, kind, pick):
    own = KIND_OF[path[-2] if path[-1] == "median" else path[-1]]
    spelling = WRONG_UNITS[own][pick % len(WRONG_UNITS[own])] if kind == own else WRITTEN[kind]
    refused(dump(with_value(path, spelling)), path=key(path), fragment=f"expected a {own}".replace("a e", "an e"))


RENAMED = {("fleet", "device_types", "tablet", old): new for old, (new, _) in RENAMED_KEYS["DeviceType"].items()}
RENAMED |= {("workload", old): new for old, (new, _) in RENAMED_KEYS["Workload"].items()}


@examples(90)
@given(old=st.sampled_from(sorted(RENAMED)), how=st.sampled_from(["file", "set", "set-median"]),
       value=st.sampled_from(["40", "0.05", "14Wh", "{median: 14, spread: 0.1}"]))
def test_renamed_keys_are_refused_naming_the_new_one(old, how, value):
    new = RENAMED[old]
    where = key(old)
    if how == "file":
        data = copy.deepcopy(BASE)
        parent = data[old[0]] if len(old) == 2 else data["fleet"]["device_types"]["tablet"]
        parent[old[-1]] = parent.pop(new, None) if value == "40" else yaml.safe_load(value)
        lines = refused(dump(data), path=where, got=False, fragment=f"renamed to {new}")
    else:
        option = f"{where}.median={value}" if how == "set-median" else f"{where}={value}"
        lines = refused(None, ["--set", option], path=where, got=False, fragment=f"renamed to {new}")
    assert all("unknown key" not in line for line in lines), lines


NON_FINITE = [".inf", "-.inf", ".nan", ".NaN", "+.INF", "1.0e+999", "-1.0e+999", '"inf"', '"nan"', '"-Infinity"',
              "9" * 400, '"1e999s"', '"1e999MB"']


@examples(165)
@given(path=st.sampled_from(ALL_LEAVES + [("selection", "params", "window"), ("selection", "params", "extra")]),
       spelling=st.sampled_from(NON_FINITE))
def test_non_finite_numbers_are_refused_everywhere(path, spelling):
    text = dump(with_value(path, "@VALUE@", base_for(path))).decode().replace("'@VALUE@'", spelling)
    refused(text.encode(), path=key(path))


BOOLEANS = ["yes", "no", "true", "false", "on", "off", "True", "FALSE", "Yes", "y"]


@examples(150)
@given(path=st.sampled_from(ALL_LEAVES + [("selection", "params", "window")]), spelling=st.sampled_from(BOOLEANS))
def test_booleans_are_not_numbers(path, spelling):
    # 'y' is a YAML 1.1 boolean that PyYAML reads as text: refused all the same, as not a number.
    text = dump(with_value(path, "@VALUE@", base_for(path))).decode().replace("'@VALUE@'", spelling)
    refused(text.encode(), path=key(path))


VALID_ZONES = zoneinfo.available_timezones()
BAD_ZONES = ["America", "Europe", "Asia", "Etc", "", " ", "Mars/Olympus", "../etc/passwd", "/etc/passwd",
             "America/", "America//New_York", "Asia/../Asia/Tokyo", "UTC ", "x" * 300, "__init__.py", "zone.tab",
             "tzdata.zi", "America/New_York\x00", "Europe/Lisbon\n", "posix/../UTC", "Asia\\Tokyo", "Ame\u202erica"]


@examples(135)
@given(region=st.sampled_from(sorted(BASE["fleet"]["regions"])),
       zone=st.one_of(st.sampled_from(BAD_ZONES), st.text(max_size=40)))
def test_bad_time_zones_are_refused(region, zone):
    if zone in VALID_ZONES:
        zone = zone + "/Atlantis"
    path = ("fleet", "regions", region, "timezone")
    refused(dump(with_value(path, zone)), path=key(path))


def _latin1(text: str) -> bytes:
    return text.replace("Inkwren next", "Inkwr\u00e9n n\u00e4xt").encode("latin-1")


ENCODINGS = {
    "latin-1": _latin1,
    "cp1252": lambda t: t.replace("invented", "invent\u00e9d \u20ac").encode("cp1252"),
    "utf-16": lambda t: t.encode("utf-16"),
    "utf-16-le": lambda t: t.encode("utf-16-le"),
    "utf-32": lambda t: t.encode("utf-32"),
    "gzip": lambda t: gzip.compress(t.encode()),
}


@examples(120)
@given(encoding=st.sampled_from(sorted(ENCODINGS)), noise=st.binary(max_size=64))
def test_files_that_are_not_utf8_text_are_refused(encoding, noise):
    blob = ENCODINGS[encoding](BASE_TEXT)
    lines = refused(blob + noise if encoding != "gzip" else blob, got=False)
    assert len(lines) == 1


@examples(90)
@given(blob=st.binary(min_size=1, max_size=512))
def test_arbitrary_bytes_are_refused(blob):
    refused(blob, got=False)


KEY_LINE = re.compile(r"^(\s*)([A-Za-z_][\w-]*):( .*)?$")
KEY_LINES = [i for i, line in enumerate(BASE_TEXT.splitlines()) if KEY_LINE.match(line)]


@examples(135)
@given(index=st.sampled_from(KEY_LINES), value=st.sampled_from(["", " 1", " [1]", " {}", " x"]))
def test_duplicate_keys_name_both_lines(index, value):
    lines = BASE_TEXT.splitlines()
    indent, name = KEY_LINE.match(lines[index]).group(1, 2)
    following = lines[index + 1] if index + 1 < len(lines) else ""
    if len(following) - len(following.lstrip()) > len(indent):
        value = ""  # a parent key: the copy takes over its children, the first is left empty
    lines.insert(index + 1, f"{indent}{name}:{value}")
    (line,) = refused(("\n".join(lines) + "\n").encode(), got=False)
    assert f"duplicate key '{name}' at line {index + 2} (first at line {index + 1})" in line, line


def _nested(depth: int, kind: str) -> str:
    if kind == "list":
        return "[" * depth + "1" + "]" * depth
    if kind == "map":
        return "{a: " * depth + "1" + "}" * depth
    return "".join(f"\n{'  ' * (i + 2)}k{i}:" for i in range(depth)) + " 1"


@examples(90)
@given(depth=st.one_of(st.integers(MAX_DEPTH, MAX_DEPTH + 40), st.sampled_from([200, 1000, 5000])),
       kind=st.sampled_from(["list", "map", "block"]), where=st.sampled_from(["params", "scenario", "top"]))
def test_deep_nesting_is_refused(depth, kind, where):
    if kind == "block":
        depth = min(depth, 60)  # block style costs indentation: keep the file small
    value = _nested(depth, kind)
    if where == "params":
        text = BASE_TEXT.replace("policy: first-come", f"policy: first-come\n  params:\n    deep: {value}")
    elif where == "scenario":
        text = BASE_TEXT.replace("scenario: Inkwren next-chapter ranking (invented demo fleet)", f"scenario: {value}")
    else:
        text = BASE_TEXT + f"\nextra: {value}\n"
    refused(text.encode(), got=False, fragment="nested")


def _bomb(levels: int, width: int, indent: str) -> str:
    rows = [f"{indent}l0: &l0 [{', '.join(['x'] * width)}]"]
    for i in range(1, levels):
        rows.append(f"{indent}l{i}: &l{i} [{', '.join([f'*l{i - 1}'] * width)}]")
    return "\n".join(rows)


@examples(75)
@given(levels=st.integers(4, 9), width=st.integers(8, 12), where=st.sampled_from(["params", "top", "scenario"]))
def test_alias_bombs_are_refused_while_small(levels, width, where):
    if width ** levels <= MAX_NODES:
        levels += 3
    if where == "params":
        text = BASE_TEXT.replace("policy: first-come", "policy: first-come\n  params:\n" + _bomb(levels, width, "    "))
    elif where == "top":
        text = BASE_TEXT + "\nbomb:\n" + _bomb(levels, width, "  ") + "\n"
    else:
        text = _bomb(levels, width, "") + "\n" + BASE_TEXT.replace(
            "scenario: Inkwren next-chapter ranking (invented demo fleet)", f"scenario: *l{levels - 1}")
    refused(text.encode(), got=False, fragment="expands to more than")


@examples(30)
@given(where=st.sampled_from(["params", "top", "list"]))
def test_recursive_aliases_are_refused(where):
    value = {"params": "policy: first-come\n  params: &p {x: *p}", "top": None, "list": None}[where]
    if value:
        text = BASE_TEXT.replace("policy: first-come", value)
    elif where == "top":
        text = BASE_TEXT + "\nloop: &loop [1, *loop]\n"
    else:
        text = BASE_TEXT + "\ndisruptions: &d [*d]\n"
    refused(text.encode(), got=False, fragment="contains itself")


HOSTILE = ([chr(c) for c in range(0, 32)] + ["\x7f", "\x85", "\x9b"] + [chr(c) for c in range(0x202A, 0x202F)]
           + [chr(c) for c in range(0x2066, 0x206A)] + ["\u2028", "\u2029", "\u200e", "\u200f", "\u061c"])


@examples(165)
@given(kind=st.sampled_from(["device type", "region", "scenario"]), char=st.sampled_from(HOSTILE),
       at=st.integers(0, 6), blank=st.booleans(), long=st.booleans())
def test_hostile_names_are_refused(kind, char, at, blank, long):
    data = copy.deepcopy(BASE)
    section = {"device type": "device_types", "region": "regions"}.get(kind)
    old = "tablet" if kind == "device type" else "east-asia"
    name = old[:at] + char + old[at:]
    if blank:
        name = " " * (at + 1)
    elif long:
        name = old * 30
    if section is None:
        data["scenario"] = name
        path = "scenario"
    else:
        items = data["fleet"][section]
        data["fleet"][section] = {name if k == old else k: v for k, v in items.items()}
        path = f"fleet.{section}"
    lines = refused(dump(data), path=path, got=False)
    assert any(repr(name)[:20] in line or "blank" in line or "at most" in line or "scenario" in line
               for line in lines), lines


@examples(90)
@given(selection=st.sampled_from(["1ms", "0.5s", "0.9s", "0.0001", "990ms"]),
       aggregation=st.sampled_from(["0s", "0", "1ms", "0.009s"]),
       checkin=st.sampled_from([None, "0.5s", "1ms", "0.001", "0.0001ms", "0"]))
def test_settings_under_which_time_cannot_advance_are_refused(selection, aggregation, checkin):
    data = with_value(("rounds", "selection_timeout"), selection)
    data["rounds"]["aggregation_time"] = aggregation
    if checkin is not None:
        data["rounds"]["checkin_every"] = checkin
    refused(dump(data), path="rounds")


@examples(90)
@given(start=st.one_of(st.integers(1, 1677), st.integers(2263, 9999)).map(lambda y: f"{y:04d}-03-02T00:00:00Z"),
       how=st.sampled_from(["start", "long", "warmup", "impossible"]))
def test_instants_out_of_range_are_refused(start, how):
    data = copy.deepcopy(BASE)
    if how == "start":
        data["horizon"]["start"] = start
        path = "horizon.start"
    elif how == "long":
        data["horizon"]["start"] = "2262-01-01T00:00:00Z"
        data["horizon"]["duration"] = "200d"
        path = "horizon.duration"
    elif how == "warmup":
        data["horizon"]["start"] = "1677-10-01T00:00:00Z"
        data["horizon"]["warmup"] = "30d"
        path = "horizon"
    else:
        text = dump(data).decode().replace("'2026-03-02T00:00:00Z'", start[:5] + "02-30T00:00:00Z")
        refused(text.encode(), got=False, fragment="cannot read")
        return
    refused(dump(data), path=path)


@examples(60)
@given(devices=st.sampled_from([20_000_000, 60_000_000, 100_000_000]), checkin=st.sampled_from(["1s", "2s", "10m"]),
       days=st.sampled_from(["7d", "3650d", "36500d"]))
def test_runs_too_large_for_memory_are_refused_before_they_start(devices, checkin, days):
    data = copy.deepcopy(BASE)
    data["fleet"]["devices"] = devices
    data["rounds"]["checkin_every"] = checkin
    data["horizon"]["duration"] = days
    if devices * 300 < 0.75 * os.sysconf("SC_PHYS_PAGES") * os.sysconf("SC_PAGE_SIZE") and checkin == "10m" \
            and days == "7d":
        data["rounds"]["checkin_every"] = "1s"
    refused(dump(data), fragment="of memory")


class Exploding(SelectionPolicy):
    """A plug-in whose constructor raises what it is given."""

    def __init__(self, kind: str = "runtime"):
        raise {"runtime": RuntimeError("boom"), "exit": SystemExit(3), "key": KeyError("k"),
               "zero": ZeroDivisionError("z"), "recursion": RecursionError("deep"),
               "attr": AttributeError("a")}[kind]

    def choose(self, candidates, round, rng):
        return []


class NotAPolicy:
    window_s = 20.0

    def choose(self, candidates, round, rng):
        return []


class TextWindow(SelectionPolicy):
    window_s = "20"  # type: ignore[assignment]

    def choose(self, candidates, round, rng):
        return []


class NoChoose(SelectionPolicy):
    pass


def not_a_class(**kwargs):
    return NotAPolicy()


PLUGINS = ["sys:exit", "os:system", "builtins:object", "builtins:print", "fleetsim.policies:make_policy",
           "fleetsim.policies:SelectionPolicy", f"{__name__}:NotAPolicy", f"{__name__}:not_a_class",
           f"{__name__}:TextWindow", f"{__name__}:NoChoose", f"{__name__}:Missing", "no.such.module:Thing", ":",
           "a b:c", "sys:", ":exit", "os.path:join", "fleetsim:__version__", "..:x", "tests.test_bad_input:BASE"]


@examples(90)
@given(plugin=st.one_of(st.sampled_from(PLUGINS),
                        st.sampled_from(["runtime", "exit", "key", "zero", "recursion", "attr"]).map(
                            lambda kind: f"{__name__}:Exploding@{kind}")))
def test_bad_plugins_are_refused(plugin):
    name, _, kind = plugin.partition("@")
    data = with_value(("selection",), {"policy": name, "params": {"kind": kind} if kind else {}})
    refused(dump(data), path="selection", got=False)


ACCEPTS = {"first-come": {"window"}, "lottery": {"window"}, "quick-finish": {"window", "max_predicted"},
           "share-quota": {"window", "relax_after"}, "rested-first": {"window"}}
ABSURD = [1e-300, 0, -1, -0.5, 1e300, 2.5e9, "20", "fast", True, False, [1], {"a": 1}, None]
VALID = {"window": lambda v: 0.001 <= v <= 604800, "max_predicted": lambda v: v is None or 0.001 <= v <= 1e12,
         "relax_after": lambda v: 0 <= v <= 1}


def _valid(param: str, value: Any) -> bool:
    if isinstance(value, bool) or not isinstance(value, (int, float, type(None))):
        return False
    return value is None and param == "max_predicted" or value is not None and VALID[param](value)


@examples(120)
@given(policy=st.sampled_from(sorted(ACCEPTS)),
       param=st.sampled_from(["window", "max_predicted", "relax_after", "windw"]),
       value=st.sampled_from(ABSURD))
def test_absurd_policy_parameters_are_refused(policy, param, value):
    if param in ACCEPTS[policy] and _valid(param, value):
        value = "fast"
    data = with_value(("selection",), {"policy": policy, "params": {param: value}})
    refused(dump(data), path=f"selection.params.{param}", got=not isinstance(value, (list, dict)))


BAD_OPTIONS = [
    ["--days", "abc"], ["--days", "nan"], ["--days", "inf"], ["--days", "-1"], ["--days", "0"], ["--days", "1e9"],
    ["--days", ""], ["--days", "1e-300"], ["--days", "100000"], ["--devices", "abc"], ["--devices", "0"],
    ["--devices", "-5"], ["--devices", "1e3"], ["--devices", "100000001"], ["--devices", "2.5"],
    ["--devices", "100000000", "--days", "3650"], ["--seed", "-1"], ["--seed", "abc"], ["--seed", "1.5"],
    ["--seed", "99999999999999999999999"], ["--bogus"], ["--days"], ["-x"], ["--set"], ["--set", "nokey"],
    ["--set", "=3"], ["--set", "rounds.over_selection=.inf"], ["--set", "fleet.devices=yes"],
    ["--set", "rounds.rest=.nan"], ["--set", "selection.params.x=" + "[" * 50 + "]" * 50],
    ["--set", "horizon.start=2026-02-30T00:00:00Z"], ["--set", "fleet.regions.east-asia.timezone=America"],
    ["--set", "selection.policy=sys:exit"], ["--set", "rounds.checkin_every=1ms"],
    ["--set", "fleet.device_types.tablet.share=true"], ["--set", "selection.params={a: 1, a: 2}"],
    ["--set", "scenario=bad\u202ename"], ["--set", "fleet.devices.x.y=3"],
]


@examples(120)
@given(options=st.sampled_from(BAD_OPTIONS), prefix=st.sampled_from([[], ["--set", "rounds.over_selection=1.5"]]))
def test_bad_options_are_one_line_errors_naming_the_option(options, prefix):
    lines = refused(None, [*prefix, *options], got=False)
    for line in lines:
        assert " Usage:" not in line and "\u256d" not in line


# ------------------------------------------------------------------------- direct regressions


def write(tmp_path: Path, content: bytes | str) -> Path:
    path = tmp_path / "fleet.yaml"
    (path.write_bytes if isinstance(content, bytes) else path.write_text)(content)
    return path


def only_problem(path: Path, overrides: list[str] = ()) -> str:
    with pytest.raises(ConfigError) as info:
        load_config(path, list(overrides))
    (line,) = info.value.problems
    return line


def test_latin1_file_names_the_byte(tmp_path):
    line = only_problem(write(tmp_path, _latin1(BASE_TEXT)))
    assert "not UTF-8 text (byte 0xe9 at offset" in line


def test_impossible_date_names_line_and_value(tmp_path):
    path = write(tmp_path, BASE_TEXT.replace('"2026-03-02T00:00:00Z"', "2026-02-30T00:00:00Z"))
    assert "at line 11" in only_problem(path) and "'2026-02-30T00:00:00Z'" in only_problem(path)


def test_deep_nesting_is_one_line(tmp_path):
    path = write(tmp_path, BASE_TEXT + "\nx: " + "[" * 50000 + "]" * 50000 + "\n")
    assert "nested more than" in only_problem(path)


def test_alias_bomb_is_refused_before_it_expands(tmp_path):
    bomb = "policy: first-come\n  params:\n" + _bomb(9, 10, "    ")
    path = write(tmp_path, BASE_TEXT.replace("policy: first-come", bomb))
    assert "selection.params.l5: expands to more than 200,000 values" in only_problem(path)


def test_stress_file_reader_refuses_duplicate_keys(tmp_path):
    path = write(tmp_path, "disruptions:\n  - kind: crash-surge\n    kind: server-outage\n")
    with pytest.raises(ConfigError, match="duplicate key 'kind' at line 3 \\(first at line 2\\)"):
        read_yaml(path, "the stress file")


def test_zone_folder_is_unknown(tmp_path):
    path = write(tmp_path, BASE_TEXT.replace("Asia/Tokyo", "America"))
    assert "unknown IANA time zone 'America'" in only_problem(path)


def test_plugin_that_is_not_a_policy_class_is_refused_without_being_called():
    with pytest.raises(ConfigError, match="is not a fleetsim.SelectionPolicy subclass"):
        make_policy("sys:exit", {})
    with pytest.raises(ConfigError, match=r"refused its parameters \(SystemExit"):
        make_policy(f"{__name__}:Exploding", {"kind": "exit"})


def test_tiny_window_would_stall_the_selection():
    with pytest.raises(ConfigError, match=r"selection.params.window: .* \(got 1e-300\)"):
        make_policy("lottery", {"window": 1e-300})


def test_non_finite_values_that_used_to_pass(tmp_path):
    for old, new, where in [("over_selection: 1.2", "over_selection: .inf", "rounds.over_selection"),
                            ("battery_capacity: {median: 14Wh,", "battery_capacity: {median: .inf,",
                             "battery_capacity.median")]:
        assert where in only_problem(write(tmp_path, BASE_TEXT.replace(old, new)))
    shifted = BASE_TEXT + "\ndisruptions:\n  - {kind: behaviour-shift, signal: idle, start: 1h, duration: 1h, " \
                          "shift_hours: .nan}\n"
    assert "disruptions.0.shift_hours: Input should be a finite number (got nan)" in only_problem(
        write(tmp_path, shifted))


def test_yes_is_not_a_count(tmp_path):
    line = only_problem(write(tmp_path, BASE_TEXT.replace("epochs: 2", "epochs: yes")))
    assert line.endswith("workload.epochs: expected a number, not a boolean (got True)")


def test_horizon_past_2262_is_refused(tmp_path):
    path = write(tmp_path, BASE_TEXT.replace('"2026-03-02T00:00:00Z"', '"2262-04-06T00:00:00Z"'))
    assert "horizon.duration: the run would end after 2262-04-" in only_problem(path)


def test_memory_estimate_refuses_and_names_the_option():
    check_memory(load_config(example_path()), 30.0, "f.yaml", limit=2e9)  # about 0.8 GB: allowed
    # 100 million devices at about 300 B each: some 30 GB for the fleet alone.
    config = load_config(example_path(), ["fleet.devices=100000000"])
    with pytest.raises(ConfigError, match=r"^--devices: a run would need about [\d.]+ GB of memory"):
        check_memory(config, 30.0, "f.yaml", limit=16e9, names={"fleet.devices": "--devices"})


def test_zero_length_server_loop_is_refused(tmp_path):
    text = BASE_TEXT.replace("selection_timeout: 2m", "selection_timeout: 1ms").replace(
        "aggregation_time: 45s", "aggregation_time: 0s")
    assert "rounds.selection_timeout: selection_timeout + aggregation_time must be at least 1s" in only_problem(
        write(tmp_path, text))


def test_usage_errors_are_error_lines():
    result = runner.invoke(app, ["run", "--days", "abc"])
    assert result.exit_code == 2 and result.stderr == "error: --days: expected a number (got 'abc')\n"
    result = runner.invoke(app, ["run", "--seed", "-1"])
    assert result.stderr == "error: --seed: expected a whole number from 0 to 2**63 - 1 (got -1)\n"
    result = runner.invoke(app, ["run", "--days", "1e9", "--out", "unused"])
    assert result.stderr.startswith("error: --days: the run would end after") and "(got 1000000000.0)" in result.stderr


def test_bidi_override_in_a_region_name_is_refused(tmp_path):
    line = only_problem(write(tmp_path, BASE_TEXT.replace("east-asia:", '"east\\u202easia":')))
    assert "fleet.regions: region name 'east\\u202easia'" in line and "U+202E" in line
