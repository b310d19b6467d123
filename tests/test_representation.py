"""Representation against the right baselines, and outcomes by region and hour of day.

Checked against hand-worked examples, sums that must add up to the run's totals, Python's
own zoneinfo for local hours, and repeated sampling from a population whose true weight
share is known in closed form (the coverage of the delta-method interval).
"""

from __future__ import annotations

import math
from datetime import datetime, timedelta, timezone
from pathlib import Path
from types import SimpleNamespace
from zoneinfo import ZoneInfo

import numpy as np
import pandas as pd
import pytest

import fleetsim
from fleetsim.events import CAUSES, OUTCOMES, ROUND_STATUS, WASTE_CAUSES
from fleetsim.metrics.bias import bias_tables, pair_bias_table, pair_name, weight_share_interval
from fleetsim.metrics.outcomes import outcomes_by_hour, outcomes_by_region, outcomes_part, participation_status
from fleetsim.metrics.waste import labelled_frame
from fleetsim.output import write_run
from fleetsim.report import render_report
from tests.test_report import frame, numbers, parse

Z = 1.959963984540054  # scipy.stats.norm.ppf(0.975)
START = datetime(2026, 3, 7, 22, 0, tzinfo=timezone.utc)  # New York changes to summer time on 8 March 2026
SUMS = ["devices", "accepted", "reports", "examples", "weight", "fleet_share", "eligible_share", "accepted_share",
        "report_share", "weight_share", "example_share"]
"""Bias table columns that add up over a grouping's parts (counts, and shares of the whole fleet)."""


def _labels(values, categories) -> pd.Categorical:
    return pd.Categorical(values, categories=list(categories))


def _fleet(types, regions, device_type, region, samples) -> SimpleNamespace:
    device_type, region = np.asarray(device_type), np.asarray(region)
    return SimpleNamespace(type_names=tuple(types), region_names=tuple(regions), samples=np.asarray(samples),
                           device_type=device_type, region=region, group=device_type * len(regions) + region)


def _census(types, regions) -> pd.DataFrame:
    pairs = [(t, r) for t in types for r in regions]
    return pd.DataFrame({"device_type": _labels([t for t, _ in pairs], types),
                         "region": _labels([r for _, r in pairs], regions),
                         "eligible_est": np.ones(len(pairs)), "eligible_se": np.zeros(len(pairs)),
                         "sampled": np.ones(len(pairs), dtype=np.int64)})


def _parts(fleet, device, used, weight) -> pd.DataFrame:
    device = np.asarray(device)
    return pd.DataFrame({
        "device": device,
        "device_type": _labels(np.array(fleet.type_names)[fleet.device_type[device]], fleet.type_names),
        "region": _labels(np.array(fleet.region_names)[fleet.region[device]], fleet.region_names),
        "used": np.asarray(used, dtype=bool), "samples": fleet.samples[device],
        "weight": np.asarray(weight, dtype=float)})


def _tables(fleet, parts):
    reports = np.bincount(parts["device"].to_numpy()[parts["used"].to_numpy()], minlength=len(fleet.samples))
    census = _census(fleet.type_names, fleet.region_names)
    return bias_tables(fleet, parts, census, reports), pair_bias_table(fleet, parts, census, reports)


# ------------------------------------------------------------------------------ weight against examples


def test_equal_reporting_gives_every_quartile_a_weight_ratio_of_one():
    # 40 devices holding 1 .. 40 examples each (no work cap binding: weight = samples), every
    # device reporting exactly three times: each group's weight is then 3 x its examples, so
    # weight share = example share by construction, in every grouping.
    n = 40
    fleet = _fleet(("phone", "tablet"), ("north", "south"), np.arange(n) % 2, (np.arange(n) // 2) % 2,
                   np.arange(1, n + 1))
    device = np.tile(np.arange(n), 3)
    bias, pairs = _tables(fleet, _parts(fleet, device, np.ones(device.size), fleet.samples[device]))
    quartiles = bias["data_quartile"]
    assert list(quartiles["devices"]) == [10, 10, 10, 10]
    # The quartiles hold very different shares of the examples (1..10 against 31..40 of 820).
    assert math.isclose(quartiles["example_share"].iloc[0], 55 / 820, rel_tol=1e-12)
    assert math.isclose(quartiles["example_share"].iloc[3], 355 / 820, rel_tol=1e-12)
    for table in (*bias.values(), pairs):
        assert np.allclose(table["weight_ratio"], 1.0, rtol=1e-12, atol=0)
        assert np.allclose(table["representation_ratio"], 1.0, rtol=1e-12, atol=0)
        assert (table["weight_ratio_low"] < 1).all() and (table["weight_ratio_high"] > 1).all()
    # Set against its devices instead (the wrong baseline), Q4's weight share is far from its fleet share.
    assert quartiles["weight_share"].iloc[3] / quartiles["fleet_share"].iloc[3] > 1.7


def test_shares_ratios_and_interval_by_hand():
    # Four devices: phone/north 10 examples, phone/south 30, tablet/north 20, tablet/south 40.
    # Used reports: device 0 twice (weights 10, 10), device 1 once (capped at 16), device 2
    # once (20); device 3's one report is unused.
    fleet = _fleet(("phone", "tablet"), ("north", "south"), [0, 0, 1, 1], [0, 1, 0, 1], [10, 30, 20, 40])
    parts = _parts(fleet, [0, 0, 1, 2, 3], [1, 1, 1, 1, 0], [10, 10, 16, 20, 40])
    bias, pairs = _tables(fleet, parts)
    types = bias["device_type"].set_index("device_type")
    # Weights: phone 36, tablet 20 of 56; examples: phone 40, tablet 60 of 100; reports 3 and 1 of 4.
    assert np.allclose(types["weight_share"], [36 / 56, 20 / 56], rtol=1e-12, atol=0)
    assert np.allclose(types["example_share"], [0.4, 0.6], rtol=1e-12, atol=0)
    assert np.allclose(types["weight_ratio"], [(36 / 56) / 0.4, (20 / 56) / 0.6], rtol=1e-12, atol=0)
    assert np.allclose(types["representation_ratio"], [(3 / 4) / 0.5, (1 / 4) / 0.5], rtol=1e-12, atol=0)
    assert list(types["examples"]) == [40, 60] and list(types["weight"]) == [36.0, 20.0]
    # Delta method, devices as units: w = (20, 16, 20, 0), n = 4, B = 56; phone W = 9/14,
    # S_g = 400 + 256 = 656, S = 1056: v = 4/3 x ((5/14)^2 x 656 + (9/14)^2 x 400) / 56^2.
    w_phone = 9 / 14
    v = 4 / 3 * ((1 - w_phone) ** 2 * 656 + w_phone ** 2 * 400) / 56 ** 2
    assert math.isclose(types.at["phone", "weight_ratio_low"], (w_phone - Z * math.sqrt(v)) / 0.4, rel_tol=1e-12)
    # The upper end, 9/14 + 0.64, passes 1: clipped there, so at most 1 / 0.4.
    assert w_phone + Z * math.sqrt(v) > 1 and types.at["phone", "weight_ratio_high"] == 1 / 0.4
    # The pair table: phone / north holds 10 of 100 examples and 20 of 56 weight; tablet / south none.
    rows = pairs.set_index(["device_type", "region"])
    assert math.isclose(rows.at[("phone", "north"), "weight_ratio"], (20 / 56) / 0.1, rel_tol=1e-12)
    assert rows.at[("tablet", "south"), "weight_share"] == 0 and rows.at[("tablet", "south"), "reports"] == 0
    assert rows.at[("tablet", "south"), "never_share"] == 1.0
    assert pair_name("phone", "north") == "phone / north"


def test_weight_interval_covers_the_true_share():
    # A population in closed form: a device is in group 0 with probability 0.3; it reports
    # Poisson(2) times in group 0 and Poisson(3) times in group 1, each report weighing the
    # device's lognormal(3, 0.5) examples. The true weight share of group 0 is
    # 0.3 x 2 / (0.3 x 2 + 0.7 x 3) = 2/9. Over 4,000 fleets of 1,000 devices the 95% interval
    # must cover it 93.5% to 96.5% of the time (binomial standard error 0.34 points). Dropping
    # the W^2 (S - S_g) term covers about 91%; taking each report as a unit of its own (a
    # device's reports as independent) about 73%, which the second check shows.
    rng = np.random.default_rng(20260302)
    truth, trials, n = 2 / 9, 4000, 1000
    covered = per_report = 0
    for _ in range(trials):
        group = (rng.random(n) >= 0.3).astype(np.int64)
        reports = rng.poisson(np.where(group == 0, 2.0, 3.0))
        samples = rng.lognormal(3.0, 0.5, n)
        _, low, high = weight_share_interval(reports * samples, group, 2)
        covered += int(low[0] <= truth <= high[0])
        _, low, high = weight_share_interval(np.repeat(samples, reports), np.repeat(group, reports), 2)
        per_report += int(low[0] <= truth <= high[0])
    assert 0.935 <= covered / trials <= 0.965, covered / trials
    assert per_report / trials < 0.85, per_report / trials


def test_weight_interval_is_undefined_without_weight():
    share, low, high = weight_share_interval(np.zeros(5), np.zeros(5, dtype=np.int64), 2)
    assert np.isnan(share).all() and np.isnan(low).all() and np.isnan(high).all()


# ------------------------------------------------------------------------------ a real run


@pytest.fixture(scope="module")
def run() -> fleetsim.Result:
    """A small run with abandoned rounds (short selection timeout) and failed ones (crashes)."""
    config = fleetsim.load_config(fleetsim.example_path(), [
        "fleet.devices=4000", "horizon.duration=12h", "rounds.rest=2h", "rounds.target_reports=20",
        "rounds.min_reports=18", "rounds.selection_timeout=40s", "workload.crash_rate=6/h"])
    return fleetsim.simulate(config, seed=3)


def test_a_runs_ratios_match_the_event_log(run):
    parts, fleet = run.participations, run.fleet
    used = parts[parts["used"]]
    weight = used.groupby("device_type", observed=False)["weight"].sum()
    examples = pd.Series(fleet.samples).groupby(fleet.device_type).sum().to_numpy(dtype=float)
    table = run.tables["bias_by_device_type"]
    expected = (weight.to_numpy() / weight.sum()) / (examples / examples.sum())
    assert np.allclose(table["weight_ratio"], expected, rtol=1e-12, atol=0)
    for name, row in run.summary["bias"]["by_device_type"].items():
        i = list(fleet.type_names).index(name)
        assert math.isclose(row["weight_ratio"], expected[i], rel_tol=1e-12)
        assert row["weight_ratio_low"] < row["weight_ratio"] < row["weight_ratio_high"]
        assert math.isclose(row["representation_ratio"], row["report_share"] / row["fleet_share"], rel_tol=1e-12)


def test_type_region_marginals_equal_the_type_and_region_tables(run):
    pairs = run.tables["bias_by_device_type_region"]
    types, regions = list(run.fleet.type_names), list(run.fleet.region_names)
    assert len(pairs) == len(types) * len(regions)
    for key, name in (("device_type", "bias_by_device_type"), ("region", "bias_by_region")):
        table = run.tables[name].set_index(key)
        summed = pairs.groupby(key, sort=False)[SUMS].sum().loc[table.index]
        for column in SUMS:
            assert np.allclose(summed[column], table[column], rtol=1e-12, atol=1e-15), (key, column)
    # summary.json's map: type -> region -> the table's figures, every pair.
    mapped = run.summary["bias"]["by_type_and_region"]
    assert list(mapped) == list(types) and all(list(mapped[t]) == list(regions) for t in types)
    for row in pairs.to_dict("records"):
        entry = mapped[row["device_type"]][row["region"]]
        for figure in ("fleet_share", "report_share", "example_share", "weight_ratio", "representation_ratio"):
            value = row[figure]
            assert (entry[figure] is None) if not math.isfinite(value) else math.isclose(entry[figure], value)


def test_outcomes_by_region_and_hour_add_up_to_the_totals(run):
    s = run.summary
    rounds, ended, waste = s["rounds"], s["rounds"]["ended_by"], s["waste"]
    assert ended["selection_timeout"] > 0 and ended["report_deadline"] > 0  # both kinds occur
    by_region, by_hour = run.tables["outcomes_by_region"], run.tables["outcomes_by_hour"]
    parts = run.participations
    status = run.rounds.set_index("round")["status"].astype(str).reindex(parts["round"]).to_numpy()
    frames = [by_region, by_hour[by_hour["clock"] == "utc"], by_hour[by_hour["clock"] == "local"]]
    for table in frames:
        assert table["accepted"].sum() == s["participations"]["accepted"]
        assert table["reports"].sum() == s["participations"]["used_reports"]
        assert (table["in_committed"] + table["abandoned"] + table["failed"] == table["accepted"]).all()
        assert table["abandoned"].sum() == int((status == "selection-timeout").sum())
        assert table["failed"].sum() == int(np.isin(status, ["report-deadline", "server-outage",
                                                             "unmasking-failed"]).sum())
        for column, total in (("wasted_compute_s", waste["compute_s"]), ("wasted_bytes", waste["bytes"]),
                              ("wasted_energy_wh", waste["energy_wh"]), ("wasted_examples", waste["examples"]),
                              ("examples", waste["examples_processed"])):
            assert math.isclose(table[column].sum(), total, rel_tol=1e-9), column
    utc, local = frames[1], frames[2]
    assert list(utc["hour_of_day"]) == list(range(24)) == list(local["hour_of_day"])
    assert utc["rounds"].sum() == rounds["attempted"] and utc["rounds_committed"].sum() == rounds["committed"]
    assert utc["rounds_abandoned"].sum() == ended["selection_timeout"]
    assert utc["rounds_failed"].sum() == ended["report_deadline"] + ended["server_outage"] + ended["unmasking_failed"]
    assert local["rounds"].isna().all()
    # summary.json holds the region table's figures and each clock's peak hour.
    for row in by_region.to_dict("records"):
        entry = s["outcomes"]["by_region"][row["region"]]
        assert entry["accepted"] == row["accepted"] and math.isclose(entry["failed_share"], row["failed_share"])
    for clock, table in (("utc", utc), ("local", local)):
        peak = s["outcomes"][f"by_hour_{clock}"]
        assert math.isclose(peak["failed_share_peak"], table["failed_share"].max())
        assert table["failed_share"].iloc[peak["failed_share_peak_hour"]] == peak["failed_share_peak"]


# ------------------------------------------------------------------------------ outcomes by hand


def _outcome_frame():
    """Six participations of four rounds, in two regions (New York, Kolkata), with known work; the
    last is accepted in New York after its change to summer time."""
    rounds = pd.DataFrame({"round": [0, 1, 2, 3], "status": _labels(
        ["committed", "selection-timeout", "report-deadline", "committed"], ROUND_STATUS),
        # Opened 22:10 and 23:50 UTC on 7 March, 00:30 and 07:05 UTC on 8 March.
        "opened_s": [600.0, 6600.0, 9000.0, 32700.0]})
    parts = pd.DataFrame({
        "round": [0, 0, 1, 2, 2, 3],
        "device": [0, 1, 2, 3, 0, 1],
        "device_type": _labels(["phone"] * 6, ["phone"]),
        "region": _labels(["ny", "in", "ny", "in", "ny", "ny"], ["ny", "in"]),
        "accepted_s": [700.0, 800.0, 6700.0, 9100.0, 9200.0, 32800.0],
        "used": [True, False, False, False, False, True],
        "outcome": _labels(["on-time", "late", "stopped", "on-time", "dropout", "on-time"], OUTCOMES),
        "dropout_cause": _labels(["none"] * 4 + ["crash", "none"], CAUSES),
        "waste_cause": _labels(["used", "late", "selection-timeout", "report-deadline", "crash", "used"],
                               WASTE_CAUSES),
        "compute_s": [10.0, 20.0, 0.0, 30.0, 5.0, 40.0],
        "download_bytes": [1.0, 2.0, 0.0, 3.0, 1.0, 4.0], "upload_bytes": [1.0, 0.0, 0.0, 1.0, 0.0, 1.0],
        "energy_wh": [1.0, 2.0, 0.0, 3.0, 0.5, 4.0],
        "examples_processed": [16.0, 32.0, 0.0, 48.0, 8.0, 64.0],
    })
    return labelled_frame(parts), rounds


def test_outcomes_by_region_by_hand():
    labelled, rounds = _outcome_frame()
    status = participation_status(labelled, rounds)
    table = outcomes_by_region(labelled, status, ["ny", "in"]).set_index("region")
    # ny: rounds 0 and 3 (committed), 1 (abandoned), 2 (failed); in: rounds 0 (committed), 2 (failed).
    assert list(table["accepted"]) == [4, 2] and list(table["abandoned"]) == [1, 0]
    assert list(table["failed"]) == [1, 1] and list(table["in_committed"]) == [2, 1]
    assert list(table["reports"]) == [2, 0]
    assert table.at["ny", "abandoned_share"] == 1 / 4 and table.at["in", "failed_share"] == 1 / 2
    # Work of the unused participations: ny 0 + 5 of 10 + 0 + 5 + 40 s; in 20 + 30 of 50 s.
    assert list(table["wasted_compute_s"]) == [5.0, 50.0] and list(table["compute_s"]) == [55.0, 50.0]
    assert table.at["in", "compute_fraction"] == 1.0 and table.at["ny", "compute_fraction"] == 5 / 55
    assert table.at["ny", "examples_fraction"] == 8 / 88
    assert list(table["wasted_bytes"]) == [1.0, 6.0] and table.at["ny", "bytes_fraction"] == 1 / 8


def test_outcomes_by_hour_by_hand():
    labelled, rounds = _outcome_frame()
    status = participation_status(labelled, rounds)
    zones = {"ny": "America/New_York", "in": "Asia/Kolkata"}
    table = outcomes_by_hour(labelled, status, rounds, START, zones)
    utc, local = table[table["clock"] == "utc"], table[table["clock"] == "local"]
    # UTC hour of each round's opening: 22, 23, 0, 7; its participations follow it.
    assert {h: int(utc["rounds"].iloc[h]) for h in (22, 23, 0, 7)} == {22: 1, 23: 1, 0: 1, 7: 1}
    assert utc["rounds"].sum() == 4 and utc["rounds_abandoned"].iloc[23] == 1 and utc["rounds_failed"].iloc[0] == 1
    assert list(utc["accepted"].iloc[[22, 23, 0, 7]]) == [2, 1, 2, 1]
    assert utc["failed_share"].iloc[0] == 1.0 and utc["abandoned_share"].iloc[23] == 1.0
    # Local hours from Python's zoneinfo, one participation at a time (New York at UTC-5 before
    # the change on 8 March at 07:00 UTC, UTC-4 after; Kolkata at UTC+5:30).
    expected = np.zeros(24, dtype=int)
    for seconds, region in zip(labelled["accepted_s"], labelled["region"].astype(str), strict=True):
        expected[(START + timedelta(seconds=seconds)).astimezone(ZoneInfo(zones[region])).hour] += 1
    assert list(local["accepted"]) == list(expected)
    # By hand: New York 17:11, 18:51, 19:33 (UTC-5) and 03:06 (UTC-4; 02:06 at a fixed UTC-5);
    # Kolkata 03:43 and 06:01.
    assert {h: int(c) for h, c in enumerate(local["accepted"]) if c} == {3: 2, 6: 1, 17: 1, 18: 1, 19: 1}
    peaks = outcomes_part(outcomes_by_region(labelled, status, ["ny", "in"]), table)
    # Hour 0 UTC (round 2, failed) is the first hour with failed share 1.
    assert peaks["by_hour_utc"]["failed_share_peak"] == 1.0 and peaks["by_hour_utc"]["failed_share_peak_hour"] == 0
    assert peaks["by_region"]["ny"]["abandoned_share"] == 1 / 4
    assert peaks["by_hour_local"]["abandoned_share_peak_hour"] == 18  # round 1's one device, at 18:51 in New York


# ------------------------------------------------------------------------------ the report


def test_report_shows_the_new_tables_as_written(run, tmp_path: Path):
    folder = write_run(run, tmp_path / "run")
    html, md = render_report(folder)
    parsed = parse(html)
    for table_id, name in (("outcomes-region", "outcomes_by_region"), ("outcomes-hour", "outcomes_by_hour"),
                           ("bias-device_type_region", "bias_by_device_type_region")):
        shown, table = frame(parsed, table_id), run.tables[name]
        assert len(shown) == len(table)
        for column in shown.columns:
            if column in ("region", "device_type", "clock"):
                assert list(shown[column]) == list(table[column].astype(str)), (table_id, column)
            else:
                assert np.allclose(numbers(shown[column]), table[column].to_numpy(dtype=float), rtol=1e-12,
                                   equal_nan=True), (table_id, column)
    shown = frame(parsed, "bias-data_quartile")
    assert np.allclose(numbers(shown["weight_ratio"]), run.tables["bias_by_data_quartile"]["weight_ratio"])
    # The answer names each ratio's baseline.
    answer = next(a for a in parsed.answers if "represented" in a)
    assert "reports against devices" in answer and "weight against the examples held" in answer
    assert "Weight share /" in html and "example share" in html
