"""Telemetry formats, their validation, synthetic telemetry and ``fleetsim telemetry``.

References outside the code: the Frictionless Table Schema validator (the ``frictionless``
package) for the shipped schemas, the generated files and the rows a bad file refuses;
zoneinfo and a worked daylight-saving example for local hours; the two-state Markov chain's
transient law (Kolmogorov forward equation, e.g. S. Ross, Introduction to Probability
Models, section 6.8) for the on-fraction by local hour; the Weibull law's moments
(E[X^n] = scale^n Gamma(1 + n/k)) for the spells' coefficient of variation.
"""

from __future__ import annotations

import json
import math
from datetime import datetime, timedelta, timezone
from pathlib import Path
from zoneinfo import ZoneInfo

import frictionless
import numpy as np
import pandas as pd
import pyarrow as pa
import pyarrow.parquet as pq
import pytest
import typer
import yaml
from typer.testing import CliRunner

from fleetsim.cli.app import _Commands
from fleetsim.cli.telemetry import telemetry as telemetry_command
from fleetsim.config import build_config, example_path
from fleetsim.errors import FleetsimError, TelemetryError
from fleetsim.output import read_marker
from fleetsim.telemetry import (
    KINDS,
    Telemetry,
    empty_frame,
    generate_telemetry,
    read_telemetry,
    schema_path,
    time_by_local_hour,
    validate_partition,
    write_telemetry,
)

# ------------------------------------------------------------------------- shared pieces

HEADER = "device_id,device_type,region,timezone,signal,start,end\n"
SNAP_HEADER = "device_id,device_type,region,timezone,time,idle,charging,unmetered,battery,download_mbps,upload_mbps\n"
LISBON = "phone,eu,Europe/Lisbon"


def write(path: Path, text: str) -> Path:
    path.write_text(text, encoding="utf-8")
    return path


def refusal(paths, kind=None) -> TelemetryError:
    with pytest.raises(TelemetryError) as caught:
        read_telemetry(paths, kind=kind)
    return caught.value


def frictionless_errors(path: Path, kind: str) -> list:
    """The errors the reference validator finds in ``path`` against the shipped schema (v2)."""
    descriptor = {"$schema": "https://datapackage.org/profiles/2.0/dataresource.json", "name": kind,
                  "path": path.name, "schema": json.loads(schema_path(kind).read_text(encoding="utf-8"))}
    report = frictionless.Resource(descriptor, basepath=str(path.parent)).validate()
    assert not report.errors, report.errors  # the resource itself was read
    return [e for task in report.tasks for e in task.errors]


def fleet_config(devices: int, days: float, zone: str, signals: dict, settled: dict | None) -> object:
    """The example's sections with a one-type, one-region fleet of our own (no weekend)."""
    raw = yaml.safe_load(example_path().read_text(encoding="utf-8"))
    kind = {"share": 1.0, "sample_cost": "100ms", "memory": "3GB", "battery_capacity": "14Wh",
            "train_power": "3W", "download_rate": "10Mbit/s", "upload_rate": "4Mbit/s", "samples": 100,
            "signals": signals, "settled": settled}
    raw["fleet"] = {"devices": devices, "device_types": {"reader": kind},
                    "regions": {"home": {"share": 1.0, "timezone": zone, "weekend_days": []}}}
    raw["horizon"] = {"start": "2026-03-02T00:00:00Z", "duration": f"{days}d"}
    return build_config(raw)


@pytest.fixture(scope="module")
def small():
    """Generated telemetry of 40 example devices over a day, a snapshot an hour."""
    from fleetsim.config import load_config

    config = load_config(example_path(), ["fleet.devices=40", "horizon.duration=1d"])
    return generate_telemetry(config, seed=4, snapshots_every=3600.0)


# ------------------------------------------------------------------ schemas and the reference


@pytest.mark.parametrize("kind", KINDS)
def test_shipped_schemas_are_valid_table_schema(kind, tmp_path):
    assert frictionless.validate(str(schema_path(kind)), type="schema").valid
    # The check can fail: the same schema with a type Table Schema does not have.
    broken = json.loads(schema_path(kind).read_text(encoding="utf-8"))
    broken["fields"][0]["type"] = "text"
    write(tmp_path / "broken.json", json.dumps(broken))
    assert not frictionless.validate(str(tmp_path / "broken.json"), type="schema").valid


def test_generated_files_validate_against_the_schemas_and_read_back_unchanged(small, tmp_path):
    for encoding in ("csv", "parquet"):
        folder = tmp_path / encoding
        folder.mkdir()
        written = write_telemetry(small, folder, encoding)
        assert [p.name for p in written] == [f"{k}.{encoding}" for k in ("intervals", "snapshots", "traits")]
        back = read_telemetry(folder)
        for kind in ("intervals", "snapshots", "traits"):
            pd.testing.assert_frame_equal(back.frame(kind), small.frame(kind))
        assert [(r.read, r.refused) for r in back.report] == [(len(small.frame(k)), 0) for k in
                                                              ("intervals", "snapshots", "traits")]
    for kind in ("intervals", "snapshots", "traits"):
        assert frictionless_errors(tmp_path / "csv" / f"{kind}.csv", kind) == []


BAD_SNAPSHOTS = SNAP_HEADER + f"""a,{LISBON},2026-03-02T05:00:00Z,true,false,1,50,,
,{LISBON},2026-03-02T05:10:00Z,true,false,1,50,1,2
a,{LISBON},2026-03-02T05:00:00Z,true,false,0,50,1,2
b,{LISBON},2026-02-30T05:00:00Z,maybe,false,0,150,0,2
b,{LISBON},2026-03-02T05:00:00.5Z,1,0,0,abc,-1,2
b,phone,,Europe/Lisbon,2026-03-02T06:00:00Z,1,0,0,5,2,x
,,,,,,,,,,
b,{LISBON},2026-03-02T07:00:00Z,yes,0,0,5,2,3
b,{LISBON},2026-03-02T08:00:00Z,TRUE,False,0,100,0.5,3
"""
BAD_TRAITS = """device_id,device_type,region,samples,memory_gb
a,phone,eu,10,3
a,phone,eu,11,3
b,phone,eu,1.5,3
c,phone,eu,-1,0
d,,eu,,
"""
BAD_INTERVALS = HEADER + f"""a,{LISBON},observed,2026-03-02T00:00:00Z,2026-03-03T00:00:00Z
a,{LISBON},wifi,2026-03-02T01:00:00Z,2026-03-02T02:00:00Z
a,{LISBON},idle,2026-03-02T01:00:00,2026-03-02T02:00:00Z
a,{LISBON},idle,2026-03-02 03:00:00Z,2026-03-02T04:00:00Z
a,{LISBON},,2026-03-02T05:00:00Z,2026-03-02T06:00:00Z
a,{LISBON},idle,2026-13-02T05:00:00Z,2026-03-02T06:00:00Z
"""


@pytest.mark.parametrize(("kind", "text"), [("snapshots", BAD_SNAPSHOTS), ("traits", BAD_TRAITS)])
def test_our_validator_refuses_exactly_the_rows_frictionless_refuses(kind, text, tmp_path):
    path = write(tmp_path / f"{kind}.csv", text)
    theirs = frictionless_errors(path, kind)
    # frictionless counts the header as row 1; we count data rows from 1.
    their_rows = {e.row_number - 1 for e in theirs}
    cell_errors = ("type-error", "constraint-error", "unique-error")
    their_cells = {(e.row_number - 1, e.field_name) for e in theirs if e.type in cell_errors}
    problems = refusal(path).report[0].problems
    assert set(problems["row"]) == their_rows
    cells = problems[problems["column"] != ""]
    assert {(int(r), c) for r, c in zip(cells["row"], cells["column"], strict=True)} == their_cells
    assert their_rows and len(their_rows) < text.count("\n") - 1  # some rows refused, some kept


def test_intervals_refused_by_type_and_enum_match_frictionless_but_naive_times_are_ours(tmp_path):
    path = write(tmp_path / "intervals.csv", BAD_INTERVALS)
    theirs = {(e.row_number - 1, e.field_name) for e in frictionless_errors(path, "intervals")}
    ours = refusal(path).report[0].problems
    ours = {(int(r), c) for r, c in zip(ours["row"], ours["column"], strict=True)}
    assert theirs == {(2, "signal"), (5, "signal"), (6, "start")}
    # The schema's datetime type takes a time without Z; the format wants UTC written with Z.
    assert ours == theirs | {(3, "start"), (4, "start")}


# --------------------------------------------------------------------------- format rules


def test_format_rules_name_file_row_column_and_reason(tmp_path):
    path = write(tmp_path / "intervals.csv", HEADER + f"""d1,{LISBON},observed,2026-03-02T00:00:00Z,2026-03-03T00:00:00Z
d1,{LISBON},idle,2026-03-02T01:00:00Z,2026-03-02T02:00:00Z
d1,{LISBON},idle,2026-03-02T01:30:00Z,2026-03-02T03:00:00Z
d1,{LISBON},charging,2026-03-02T05:00:00Z,2026-03-02T04:00:00Z
d1,tablet,eu,Europe/Lisbon,unmetered,2026-03-02T05:00:00Z,2026-03-02T06:00:00Z
d2,phone,eu,Mars/Base,observed,2026-03-02T00:00:00Z,2026-03-03T00:00:00Z
d1,{LISBON},unmetered,2026-03-02T23:00:00Z,2026-03-03T00:30:00Z
d1,{LISBON},charging,2026-03-02T10:00:00.250Z,2026-03-02T11:00:00Z
d1,{LISBON},idle,2026-03-02T01:00:00Z,2026-03-02T01:10:00Z
""")
    snaps = write(tmp_path / "snapshots.csv", SNAP_HEADER + f"""d1,{LISBON},2026-03-02T05:00:00Z,true,false,1,50,,
d1,{LISBON},2026-03-02T06:00:00Z,true,false,1,50,,
d1,{LISBON},2026-03-02T05:30:00Z,true,false,1,50,,
d1,phone,na,Europe/Lisbon,2026-03-02T07:00:00Z,true,false,1,50,,
""")
    error = refusal([path, snaps])
    lines = error.problems
    assert lines == [
        f"{path}: row 3: start: overlaps row 2 (same device and signal)",
        f"{path}: row 4: end: 2026-03-02T04:00:00Z is not after start 2026-03-02T05:00:00Z",
        f"{path}: row 5: device_type: 'tablet' differs from 'phone' on row 1, the device's first row",
        f"{path}: row 6: timezone: unknown IANA time zone 'Mars/Base'",
        f"{path}: row 7: signal: lies outside every observed interval of its device",
        f"{path}: row 9: repeats row 2 (same device_id, signal, start)",
        f"{snaps}: row 3: time: 2026-03-02T05:30:00Z is not after the device's previous check-in "
        f"2026-03-02T06:00:00Z on row 2",
        f"{snaps}: row 4: region: 'na' differs from 'eu' on row 1, the device's first row",
        "read 13 rows from 2 files: kept 5, refused 8",
    ]
    assert isinstance(error, FleetsimError) and str(error) == "\n".join(lines)


def test_missing_and_unknown_columns_refuse_the_whole_file(tmp_path):
    path = write(tmp_path / "intervals.csv", "device_id,device_type,region,zone,signal,start\n"
                                             f"d1,{LISBON},observed,2026-03-02T00:00:00Z\n")
    assert refusal(path).problems == [
        f"{path}: zone: unknown column; expected some of device_id, device_type, region, timezone, signal, start, end",
        f"{path}: timezone: missing column (required)",
        f"{path}: end: missing column (required)",
        "read 1 row from 1 file: kept 0, refused 1",
    ]


def test_at_most_20_problems_are_listed_then_how_many_more(tmp_path):
    rows = "".join(f"d{i},{LISBON},wifi,2026-03-02T00:00:00Z,2026-03-03T00:00:00Z\n" for i in range(25))
    path = write(tmp_path / "intervals-part1.csv", HEADER + rows)
    lines = refusal(tmp_path).problems
    assert len(lines) == 22 and lines[0].startswith(f"{path}: row 1: signal: expected one of ")
    assert lines[20:] == ["... and 5 more", "read 25 rows from 1 file: kept 0, refused 25"]


def test_parquet_times_must_be_utc_timestamps_and_text_columns_read_like_csv(tmp_path):
    base = {"device_id": ["d1"], "device_type": ["phone"], "region": ["eu"], "timezone": ["UTC"],
            "signal": ["observed"]}
    naive = pa.table({**base, "start": pa.array([0], pa.timestamp("ms")), "end": pa.array([60], pa.timestamp("ms"))})
    pq.write_table(naive, tmp_path / "intervals.parquet")
    assert refusal(tmp_path / "intervals.parquet").problems[:2] == [
        f"{tmp_path / 'intervals.parquet'}: start: Parquet type timestamp[ms]: expected a timezone-aware UTC timestamp",
        f"{tmp_path / 'intervals.parquet'}: end: Parquet type timestamp[ms]: expected a timezone-aware UTC timestamp",
    ]
    text = pa.table({**base, "start": ["2026-03-02T00:00:00Z"], "end": ["2026-03-02T00:01:00.5Z"]})
    pq.write_table(text, tmp_path / "intervals.parquet")
    frame = read_telemetry(tmp_path / "intervals.parquet").intervals
    start = datetime(2026, 3, 2, tzinfo=timezone.utc).timestamp()
    assert frame[["start_s", "end_s"]].values.tolist() == [[start, start + 60.5]]


def test_a_file_that_is_not_telemetry_is_refused_by_name(tmp_path):
    for name, reason in (("notes.csv", "cannot tell the format from the name"), ("intervals.txt", "unknown file type"),
                         ("missing.csv", "not found")):
        if name != "missing.csv":
            write(tmp_path / name, "x\n")
        assert reason in refusal(tmp_path / name).problems[0]


def test_formula_cells_are_escaped_in_csv_and_read_back_as_written(tmp_path):
    frame = empty_frame("traits").reindex(range(2))
    frame["device_id"] = ["=HYPERLINK(1)", "'quoted"]
    frame["device_type"], frame["region"] = "phone", "-north,east"
    write_telemetry(Telemetry(traits=frame), tmp_path, "csv")
    text = (tmp_path / "traits.csv").read_text(encoding="utf-8")
    assert "'=HYPERLINK(1)" in text and "\"'-north,east\"" in text
    back = read_telemetry(tmp_path).traits
    assert sorted(back["device_id"]) == ["'quoted", "=HYPERLINK(1)"] and set(back["region"]) == {"-north,east"}


# -------------------------------------------------------------------------- local hours, DST


def test_intervals_across_daylight_saving_changes_map_to_the_right_local_hours(tmp_path):
    # Worked example, America/New_York (EST UTC-5, EDT UTC-4): clocks go 02:00 -> 03:00 local on
    # 2026-03-08 (07:00Z) and 02:00 -> 01:00 on 2026-11-01 (06:00Z). Interval A, 06:30Z-08:30Z,
    # is 01:30-02:00 EST then 03:00-04:30 EDT: 30 min in hour 1, 60 in hour 3, 30 in hour 4,
    # none in hour 2. Interval B, 05:00Z-07:00Z, is 01:00-02:00 EDT then 01:00-02:00 EST:
    # two hours in local hour 1.
    zone = "phone,na,America/New_York"
    path = write(tmp_path / "intervals.csv", HEADER + f"""n1,{zone},observed,2026-03-08T00:00:00Z,2026-03-09T00:00:00Z
n1,{zone},idle,2026-03-08T06:30:00Z,2026-03-08T08:30:00Z
n2,{zone},observed,2026-11-01T00:00:00Z,2026-11-02T00:00:00Z
n2,{zone},idle,2026-11-01T05:00:00Z,2026-11-01T07:00:00Z
""")
    table = time_by_local_hour(read_telemetry(path).intervals)
    idle = table[table["signal"] == "idle"]
    spring = idle[idle["step_s"] < datetime(2026, 6, 1, tzinfo=timezone.utc).timestamp()]
    autumn = idle[idle["step_s"] >= datetime(2026, 6, 1, tzinfo=timezone.utc).timestamp()]
    by_hour = {h: s for h, s in spring.groupby("hour")["seconds"].sum().items() if s}
    assert by_hour == {1: 1800.0, 3: 3600.0, 4: 1800.0}
    assert {h: s for h, s in autumn.groupby("hour")["seconds"].sum().items() if s} == {1: 7200.0}
    # The same by zoneinfo, minute by minute.
    tz = ZoneInfo("America/New_York")
    start = datetime(2026, 3, 8, 6, 30, tzinfo=timezone.utc)
    minutes = [(start + timedelta(minutes=m)).astimezone(tz).hour for m in range(120)]
    assert {h: 60.0 * minutes.count(h) for h in set(minutes)} == by_hour
    observed = table[table["signal"] == "observed"]
    assert observed["seconds"].sum() == 2 * 86400.0


# ------------------------------------------------------------------------ synthetic telemetry


def _stationary_hourly(p: np.ndarray, d: float, minutes_per_hour: int = 60) -> np.ndarray:
    """[24 * m] on-probability of a two-state chain with hourly on-probability p and mean
    on-duration d (s), in its daily periodic regime: q' = p + (q - p) exp(-h / ((1 - p) d))."""
    h = 3600.0 / minutes_per_hour
    steps = np.repeat(p, minutes_per_hour)
    q, out = steps[0], np.empty(steps.size)
    for _ in range(8):  # eight days from any start: the transient (time constant <= d) is gone
        for i, pi in enumerate(steps):
            out[i] = q
            q = pi + (q - pi) * math.exp(-h / ((1.0 - pi) * d))
    return out


def test_generated_intervals_have_the_models_on_fraction_by_local_hour():
    hourly = np.array([0.8, 0.8, 0.8, 0.8, 0.7, 0.6, 0.4, 0.3, 0.2, 0.2, 0.2, 0.2,
                       0.3, 0.3, 0.2, 0.2, 0.3, 0.4, 0.5, 0.5, 0.6, 0.7, 0.7, 0.8])
    settled_p = np.where(hourly >= 0.6, 0.35, 0.05)
    signals = {"idle": {"hourly": hourly.tolist(), "mean_on": "30m"},
               "charging": {"hourly": (hourly * 0.9).tolist(), "mean_on": "45m"},
               "unmetered": {"hourly": np.full(24, 0.5).tolist(), "mean_on": "20m"}}
    settled = {"hourly": settled_p.tolist(), "mean_on": "2h", "turns_on": ["idle", "charging"]}
    devices, days = 1500, 4
    config = fleet_config(devices, days, "Asia/Kolkata", signals, settled)
    frames = generate_telemetry(config, seed=11, snapshots_every=86400.0)
    table = time_by_local_hour(frames.intervals)
    seconds = table.groupby(["signal", "hour"])["seconds"].sum()
    settled_q = _stationary_hourly(settled_p, 7200.0)
    for name, d in (("idle", 1800.0), ("charging", 2700.0), ("unmetered", 1200.0)):
        p = np.asarray(signals[name]["hourly"])
        covered = name in settled["turns_on"]
        # The own chain's on-probability (docs/fleet-file.md): 1 - (1 - p) / (1 - p_settled).
        own = 1.0 - (1.0 - p) / (1.0 - settled_p) if covered else p
        q = _stationary_hourly(own, d)
        q = 1.0 - (1.0 - q) * (1.0 - settled_q) if covered else q
        expected = q.reshape(24, 60).mean(axis=1)  # hour h of the local day, Asia/Kolkata
        seen = np.array([seconds[(name, h)] / seconds[("observed", h)] for h in range(24)])
        # Each device-day gives an hour's on-fraction in [0, 1] with mean q: variance <= q(1-q).
        bound = 4.5 * np.sqrt(expected * (1 - expected) / (devices * days))
        assert np.all(np.abs(seen - expected) < bound), (name, np.round(seen - expected, 4), np.round(bound, 4))


def _inside_spells(frames, config) -> np.ndarray:
    start = config.horizon.start.timestamp()
    end = start + config.horizon.duration
    idle = frames.intervals[frames.intervals["signal"] == "idle"]
    inside = idle[(idle["start_s"] > start) & (idle["end_s"] < end)]
    return (inside["end_s"] - inside["start_s"]).to_numpy()


def test_on_spells_are_exponential_or_weibull_with_the_same_mean():
    flat = {"hourly": np.full(24, 0.3).tolist(), "mean_on": "1h"}
    config = fleet_config(300, 4, "UTC", {"idle": flat, "charging": flat, "unmetered": flat}, None)
    exponential = _inside_spells(generate_telemetry(config, seed=2, snapshots_every=86400.0), config)
    weibull = _inside_spells(generate_telemetry(config, seed=2, durations="weibull:3",
                                                snapshots_every=86400.0), config)
    k = 3.0
    cv = math.sqrt(math.gamma(1 + 2 / k) / math.gamma(1 + 1 / k) ** 2 - 1)  # 0.3634
    assert exponential.size > 5000 and weibull.size > 5000
    assert abs(exponential.std() / exponential.mean() - 1.0) < 0.06
    assert abs(weibull.std() / weibull.mean() - cv) < 0.02
    for spells in (exponential, weibull):
        assert abs(spells.mean() / 3600.0 - 1.0) < 0.04
    # Shape 0.5: CV sqrt(Gamma(5) / Gamma(3)^2 - 1) = sqrt(5). Heavy-tailed, so the estimate is
    # loose, and low by a little (the longest spells are the likeliest to cross the horizon's ends).
    heavy = _inside_spells(generate_telemetry(config, seed=2, durations="weibull:0.5",
                                              snapshots_every=86400.0), config)
    assert abs(heavy.std() / heavy.mean() - math.sqrt(5.0)) < 0.3


def test_snapshots_follow_the_intervals_and_the_battery_law(small):
    snaps, intervals = small.snapshots, small.intervals
    # Every snapshot's signals agree with the interval logs at its time.
    for name in ("idle", "charging", "unmetered"):
        rows = intervals[intervals["signal"] == name]
        on = [((rows["device_id"] == d) & (rows["start_s"] <= t) & (t < rows["end_s"])).any()
              for d, t in zip(snaps["device_id"][:200], snaps["time_s"][:200], strict=True)]
        assert on == snaps[name][:200].tolist()
    assert snaps.groupby("device_id")["time_s"].apply(lambda t: t.is_monotonic_increasing and t.is_unique).all()
    assert snaps["battery"].between(0, 100).all() and len(snaps) > 20 * 40 * 0.7


# -------------------------------------------------------------------------- Dask, command line


def test_a_dask_frame_is_validated_partition_by_partition(small, tmp_path):
    import dask.dataframe as dd

    write_telemetry(small, tmp_path, "csv")
    # As docs/telemetry.md shows it: each device's rows brought to one partition, then checked.
    raw = dd.read_csv(tmp_path / "intervals.csv", dtype=str, keep_default_na=False, blocksize=20_000)
    assert raw.npartitions > 1
    checked = raw.shuffle("device_id").map_partitions(validate_partition, "intervals",
                                                      meta=empty_frame("intervals")).compute()
    order = ["device_id", "signal", "start_s"]
    pd.testing.assert_frame_equal(checked.sort_values(order).reset_index(drop=True), small.intervals)
    raw = pd.read_csv(tmp_path / "intervals.csv", dtype=str, keep_default_na=False)
    raw.loc[5, "signal"] = "wifi"
    with pytest.raises(TelemetryError, match="partition: row 6: signal: expected one of"):
        validate_partition(raw, "intervals")


def _app() -> typer.Typer:
    app = typer.Typer(cls=_Commands, add_completion=False, pretty_exceptions_enable=False)
    app.command("telemetry")(telemetry_command)
    app.command("other")(lambda: None)  # a group of two, as in the real command line
    return app


def test_the_command_writes_a_marked_folder_all_or_nothing(tmp_path):
    out = tmp_path / "logs"
    args = ["telemetry", "--out", str(out), "--devices", "30", "--days", "0.5", "--format", "parquet",
            "--snapshots-every", "2h"]
    done = CliRunner().invoke(_app(), args)
    assert done.exit_code == 0, done.output
    assert "caution: synthetic telemetry" in done.output and "privacy review" in done.output
    assert sorted(p.name for p in out.iterdir()) == [".fleetsim-output", "intervals.parquet", "snapshots.parquet",
                                                     "telemetry.json", "traits.parquet"]
    assert read_marker(out)["kind"] == "telemetry"
    assert len(read_telemetry(out).traits) == 30
    again = CliRunner().invoke(_app(), args)
    assert again.exit_code == 2 and "holds an earlier fleetsim telemetry folder; pass --force" in again.output
    write(out / "notes.txt", "mine")
    kept = CliRunner().invoke(_app(), args + ["--force"])
    assert kept.exit_code == 2 and "holds files fleetsim did not write (notes.txt)" in kept.output
    (out / "notes.txt").unlink()
    assert CliRunner().invoke(_app(), args + ["--force", "--format", "csv"]).exit_code == 0
    assert sorted(p.suffix for p in out.iterdir() if p.stem in KINDS) == [".csv"] * 3
    for bad, line in ((["--durations", "gamma"], "error: --durations: expected exponential or weibull:K"),
                      (["--format", "xml"], "error: --format: expected csv or parquet (got 'xml')"),
                      (["--snapshots-every", "0s"], "error: --snapshots-every: expected a duration of at least")):
        failed = CliRunner().invoke(_app(), ["telemetry", "--out", str(tmp_path / "new")] + bad)
        assert failed.exit_code == 2 and failed.output.startswith(line), failed.output
        assert len(failed.output.strip().splitlines()) == 1 and not (tmp_path / "new").exists()


def test_dictionary_encoded_text_reads_as_plain_text():
    """Parquet text read as a dictionary (as the reader asks) gives the same codes, words and
    missing rows as the same column decoded: nulls, the schema's missing values, a CSV
    formula escape (Arrow's dictionary_encode is the reference encoding)."""
    from fleetsim.telemetry.cells import parse_column
    from fleetsim.telemetry.schemas import schema

    descriptor = schema("intervals")
    field = next(f for f in descriptor["fields"] if f["name"] == "device_type")
    missing = descriptor.get("missingValues", [""])
    words = ["tablet", None, "", "'=sum", "budget-phone", "tablet", None, "midrange-phone", ""] * 3
    for cells, n_missing in ((words, 12), ([w for w in words if w is not None], 6)):  # nulls 2, empty 2 (x 3)
        plain = pa.array(cells, type=pa.string())
        chunked = pa.chunked_array([plain[:10].dictionary_encode(), plain[10:].dictionary_encode()])
        for unescape in (False, True):
            want = parse_column(plain, field, missing, unescape=unescape)
            got = parse_column(chunked, field, missing, unescape=unescape)
            assert list(got.categories) == list(want.categories)
            assert np.array_equal(got.values, want.values)
            assert np.array_equal(got.missing, want.missing) and got.missing.sum() == n_missing


def test_the_observed_interval_holding_a_row_is_the_latest_that_starts_at_or_before_it():
    """The vectorised search behind the observed-interval rule against a plain search of each
    group (numpy's searchsorted on the group alone): groups of one row, several, none."""
    from fleetsim.telemetry.rules import _latest_at_or_before

    rng = np.random.default_rng(3)
    group = np.sort(rng.choice(np.arange(200), 300))
    start = np.concatenate([np.sort(rng.integers(0, 50, (group == g).sum())) for g in np.unique(group)]).astype(float)
    at_group = np.sort(rng.integers(-1, 201, 2000))
    at = rng.integers(-5, 55, at_group.size).astype(float)
    got = _latest_at_or_before(group, start, at_group, at)
    for j in range(at.size):
        rows = np.flatnonzero(group == at_group[j])
        k = np.searchsorted(start[rows], at[j], side="right") - 1
        assert got[j] == (rows[k] if k >= 0 else -1), j
