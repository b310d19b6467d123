"""Metrics of the round protocol: waste in examples, the capped FedAvg weight, dropouts per
round, secure aggregation's unmasking, the server's load (check-ins counted or estimated,
the share turned away, rounds held) and overlapping rounds, checked against hand arithmetic.

Sources: the arithmetic of examples processed, the FedAvg weight and the threshold t =
ceil(threshold x accepted) is the protocol in docs/fleet-file.md and docs/metrics.md; a
share of work is wasted / all; p10 and p90 are numpy's linear interpolation (Hyndman and
Fan 1996, definition 7; common practice): the value at position q (n - 1) of the sorted
values, linear between neighbours; the time-average of devices working is the integral of
the number working over the horizon divided by its length (the definition of a time mean).
The server's load: a rate is a count over the seconds it was counted in; a free eligible
device checks in once per check-in period (once per stretch x period with pacing), so the
estimated rate is the census's eligible count / (stretch x period); the share turned away
is 1 - accepted / answered (its definition in docs/metrics.md); the masked upload is n_w x
(bits + ceil(log2 n)) / 8 bytes (the protocol's own arithmetic). The most intervals open at
once is the largest number covering one instant (a sweep over starts and ends, by hand).
"""

from __future__ import annotations

import json
import math
from pathlib import Path
from types import SimpleNamespace

import numpy as np
import pandas as pd
import pytest

import fleetsim
from fleetsim.brief import render_summary
from fleetsim.config.protocol import SecureAggregation
from fleetsim.events import CAUSES, OUTCOMES, ROUND_STATUS, WASTE_CAUSES
from fleetsim.metrics.bias import bias_tables
from fleetsim.metrics.load import hourly_table, open_by_hour, rounds_open, server_load_part, stretch_at
from fleetsim.metrics.rounds import round_frame
from fleetsim.metrics.secure import secure_part, unmasking_by_accepted
from fleetsim.metrics.summary import participations_part, waste_part
from fleetsim.metrics.waste import labelled_frame, waste_by_cause, waste_by_device_type, waste_sums
from fleetsim.output import write_run
from fleetsim.report import write_report
from fleetsim.study.table import direction_of
from tests.test_report import frame, numbers, parse

START = pd.Timestamp("2026-03-02T00:00:00Z").to_pydatetime()
SMALL = ["fleet.devices=20000", "horizon.duration=12h", "rounds.rest=4h"]
# The protocol settings each run tests are pinned here, whatever the example fleet file sets.
UNPACED = SMALL + ["rounds.pacing=null", "rounds.in_flight=1", "rounds.over_selection=1.3"]
SECURE = UNPACED + ["rounds.configure=after-selection", "rounds.secure_aggregation.threshold=0.75"]
PACED = SMALL + ["rounds.pacing.margin=1.5", "rounds.in_flight=2", "rounds.configure=after-selection"]


def _labels(values: list[str], names: tuple[str, ...] | list[str]) -> pd.Categorical:
    return pd.Categorical(values, categories=list(names))


# ------------------------------------------------------------------------------ constructed logs


def _participations() -> pd.DataFrame:
    """Four participations: a used report, a late one, a dropout and one stopped before it began."""
    return pd.DataFrame({
        "round": [0, 0, 1, 1],
        "device": [0, 1, 2, 3],
        "device_type": _labels(["phone", "phone", "tablet", "tablet"], ["phone", "tablet"]),
        "outcome": _labels(["on-time", "late", "dropout", "stopped"], OUTCOMES),
        "dropout_cause": _labels(["none", "none", "idle-ended", "none"], CAUSES),
        "waste_cause": _labels(["used", "late", "idle-ended", "stopped"], WASTE_CAUSES),
        "used": [True, False, False, False],
        "compute_s": [10.0, 5.0, 2.0, 0.0],
        "download_bytes": [100.0, 100.0, 100.0, 0.0],
        "upload_bytes": [50.0, 50.0, 0.0, 0.0],
        "energy_wh": [1.0, 0.5, 0.25, 0.0],
        "examples_processed": [64.0, 32.0, 16.0, 0.0],
    })


def test_waste_in_examples_by_hand():
    labelled = labelled_frame(_participations())
    wasted = labelled[~labelled["used"]]
    by_cause = waste_by_cause(wasted).set_index("cause")
    by_type = waste_by_device_type(labelled, wasted, ["phone", "tablet"]).set_index("device_type")
    # 64 + 32 + 16 + 0 = 112 examples processed; all but the used 64 wasted: 48 / 112 = 3/7.
    part = waste_part(waste_sums(labelled), waste_sums(wasted), by_cause.reset_index(), by_type.reset_index())
    assert part["examples_processed"] == 112.0 and part["examples"] == 48.0
    assert math.isclose(part["examples_fraction"], 3 / 7, rel_tol=1e-12)
    assert math.isclose(part["compute_fraction"], 7 / 17, rel_tol=1e-12)  # (5 + 2) / 17 s, beside it
    assert by_cause.loc["late", "examples"] == 32.0 and by_cause.loc["idle-ended", "examples"] == 16.0
    assert by_cause.loc["stopped", "examples"] == 0.0 and by_cause.loc["stopped", "participations"] == 1
    assert part["by_cause"]["idle_ended"]["examples"] == 16.0
    # phone: 32 of 96 wasted; tablet: 16 of 16.
    assert list(by_type["examples"]) == [96.0, 16.0] and list(by_type["wasted_examples"]) == [32.0, 16.0]
    assert math.isclose(by_type.loc["phone", "examples_fraction"], 1 / 3, rel_tol=1e-12)
    assert part["by_device_type"]["tablet"]["examples_fraction"] == 1.0


def test_dropout_share_per_round_by_hand():
    # Round 0: 1 dropout of 4; round 1: none of 2; round 2: 2 of 5.
    outcomes = ["dropout", "on-time", "on-time", "late"] + ["on-time", "stopped"] + ["dropout"] * 2 + ["on-time"] * 3
    labelled = pd.DataFrame({
        "round": [0] * 4 + [1] * 2 + [2] * 5,
        "outcome": _labels(outcomes, OUTCOMES),
        "dropout_cause": _labels(["crash" if o == "dropout" else "none" for o in outcomes], CAUSES),
        "weight": np.arange(11.0),
    })
    used = np.zeros(11, bool)
    used[[1, 2, 4]] = True  # on-time reports of rounds 0 and 1
    part = participations_part(labelled, used, np.ones(11))
    assert part["used_reports"] == 3 and part["used_weight"] == 1.0 + 2.0 + 4.0  # their FedAvg weights summed
    share = part["round_dropout_share"]
    assert math.isclose(share["mean"], (0.25 + 0 + 0.4) / 3, rel_tol=1e-12)
    # Sorted 0, 0.25, 0.4: position 0.9 x 2 = 1.8, so 0.25 + 0.8 x 0.15 = 0.37.
    assert math.isclose(share["p90"], 0.37, rel_tol=1e-12)


def test_weight_share_uses_the_capped_weight_by_hand():
    # Two device types in one region; three used reports and one unused.
    fleet = SimpleNamespace(type_names=("phone", "tablet"), region_names=("north",),
                            samples=np.array([100, 20, 500, 40]), group=np.array([0, 0, 1, 1]),
                            device_type=np.array([0, 0, 1, 1]), region=np.array([0, 0, 0, 0]))
    census = pd.DataFrame({"device_type": _labels(["phone", "tablet"], ["phone", "tablet"]),
                           "region": _labels(["north", "north"], ["north"]),
                           "eligible_est": [1.0, 1.0], "eligible_se": [0.0, 0.0], "sampled": [2, 2]})
    parts = pd.DataFrame({"device": [0, 1, 2, 3], "device_type": _labels(["phone", "phone", "tablet", "tablet"],
                                                                         ["phone", "tablet"]),
                          "region": _labels(["north"] * 4, ["north"]), "used": [True, True, True, False],
                          "samples": [100, 20, 500, 40], "weight": [10.0, 20.0, 30.0, 40.0]})
    table = bias_tables(fleet, parts, census, np.array([1, 1, 1, 0]))["device_type"].set_index("device_type")
    # Weights 10 + 20 for phone, 30 for tablet (the unused 40 not counted): 30/60 each; the
    # data sizes would have given 120/620 and 500/620.
    assert np.allclose(table["weight_share"], [0.5, 0.5], rtol=1e-12, atol=0)


def _rounds() -> pd.DataFrame:
    """Six rounds: four reach the unmasking (committed or unmasking-failed), two do not."""
    status = ["committed", "unmasking-failed", "committed", "report-deadline", "selection-timeout",
              "unmasking-failed"]
    closed = np.array([400.0, 1400.0, 2400.0, 3400.0, 4400.0, 5400.0])
    return pd.DataFrame({
        "round": np.arange(6), "opened_s": closed - 300.0, "selected_s": closed - 200.0, "closed_s": closed,
        "ended_s": closed + np.array([15.0, 16.0, 17.0, 0.0, 0.0, 18.0]),
        "accepted": [10, 10, 8, 10, 4, 8], "reports": [8, 7, 6, 3, 0, 6],
        "status": _labels(status, ROUND_STATUS), "checkins": [20] * 6,
        "unmask_responses": [7, 5, 5, 0, 0, 4],
    })


def test_round_frame_adds_the_unmasking_by_hand():
    rounds = round_frame(_rounds(), START, SecureAggregation(threshold=0.6))
    # t = ceil(0.6 x 10) = 6, ceil(0.6 x 8) = ceil(4.8) = 5, ceil(0.6 x 4) = ceil(2.4) = 3.
    assert list(rounds["unmask_needed"]) == [6, 6, 5, 6, 3, 5]
    assert list(rounds["unmasking_s"]) == [15.0, 16.0, 17.0, 0.0, 0.0, 18.0]
    assert list(rounds["duration_s"]) == [315.0, 316.0, 317.0, 300.0, 300.0, 318.0]  # open to end
    assert list(round_frame(_rounds(), START)["unmask_needed"]) == [0] * 6


def test_secure_aggregation_figures_by_hand():
    rounds = round_frame(_rounds(), START, SecureAggregation(threshold=0.6))
    part = secure_part(rounds, SecureAggregation(threshold=0.6), accept_count=10)
    assert part is not None
    # Reached: rounds 0, 1, 2, 5; answers 7, 5, 5, 4 against t 6, 6, 5, 5.
    assert (part["needed"], part["reached_unmasking"], part["failed"]) == (6, 4, 2)
    assert part["failed_share"] == 0.5
    assert math.isclose(part["responses_mean"], 21 / 4, rel_tol=1e-12)
    assert math.isclose(part["responses_p10"], 4.3, rel_tol=1e-12)  # sorted 4, 5, 5, 7 at 0.3
    assert math.isclose(part["margin_mean"], -0.25, rel_tol=1e-12)  # 1, -1, 0, -1
    assert part["margin_p10"] == -1.0  # sorted -1, -1, 0, 1 at 0.3
    assert math.isclose(part["reporters_lost_mean"], 1.5, rel_tol=1e-12)  # 1, 2, 1, 2
    assert math.isclose(part["unmasking_s"]["p50"], 16.5, rel_tol=1e-12)  # 15, 16, 17, 18
    table = unmasking_by_accepted(rounds, SecureAggregation(threshold=0.6)).set_index("accepted")
    assert list(table.index) == [8, 10]
    assert list(table["needed"]) == [5, 6] and list(table["rounds"]) == [2, 2] and list(table["failed"]) == [1, 1]
    assert list(table["failed_share"]) == [0.5, 0.5] and list(table["reports_mean"]) == [6.0, 7.5]
    assert list(table["responses_mean"]) == [4.5, 6.0]
    assert np.allclose(table["responses_p10"], [4.1, 5.2], rtol=1e-12, atol=0)  # 4, 5 and 5, 7 at 0.1
    assert list(table["margin_mean"]) == [-0.5, 0.0] and list(table["margin_min"]) == [-1, -1]
    assert secure_part(rounds, None, 10) is None and unmasking_by_accepted(rounds, None).empty


HORIZON = 5400.0
"""An hour and a half: the second hour of the constructed logs is half inside the horizon."""


def _census(totals: dict[float, float]) -> pd.DataFrame:
    """Census counts at the given times, each fleet-wide eligible estimate split over two regions."""
    times = np.repeat(list(totals), 2)
    return pd.DataFrame({
        "time_s": times, "device_type": _labels(["phone"] * times.size, ["phone"]),
        "region": _labels(["north", "south"] * len(totals), ["north", "south"]),
        "eligible_est": np.repeat(list(totals.values()), 2) / 2.0, "eligible_se": 0.0, "sampled": 8,
    })


def _record(accepted_s: list[float], paced: bool = False) -> SimpleNamespace:
    """A run record as the load metrics read it: check-ins every 600 s, four census counts in
    the first hour (eligible 600, 1200, 600, 1200) and two in the second (300, 300)."""
    accepted = np.asarray(accepted_s, dtype=float)
    rounds = SimpleNamespace(checkin_every=600.0, pacing=SimpleNamespace() if paced else None)
    return SimpleNamespace(
        config=SimpleNamespace(rounds=rounds),
        census=_census({0.0: 600.0, 900.0: 1200.0, 1800.0: 600.0, 2700.0: 1200.0, 3600.0: 300.0, 4500.0: 300.0}),
        participations=pd.DataFrame({"accepted_s": accepted, "started_s": accepted, "ended_s": accepted + 10.0}),
    )


def _held_rounds() -> pd.DataFrame:
    """Three rounds: the first held 800 s from inside the warm-up, the third 600 s."""
    return pd.DataFrame({"opened_s": [500.0, 2000.0, 5000.0], "ended_s": [900.0, 2400.0, 5300.0],
                         "held_s": [800.0, 0.0, 600.0], "stretch": [1, 1, 1]})


def _load_of(record: SimpleNamespace, rounds: pd.DataFrame) -> tuple[pd.DataFrame, dict]:
    hourly, _, _ = hourly_table(START, HORIZON, {}, record, rounds, ["north", "south"])
    return hourly, server_load_part(record, hourly, rounds, HORIZON)


def test_estimated_load_by_hand():
    # Per count: 600 / 600 s = 1, 2, 1, 2 check-ins per second in the first hour, 0.5 and 0.5
    # in the second. 1350 devices accepted in the first hour, 90 in the second and 10 after
    # the horizon's end (not counted).
    accepted = [100.0] * 1350 + [4000.0] * 90 + [5500.0] * 10
    hourly, part = _load_of(_record(accepted), _held_rounds())
    assert np.allclose(hourly["checkins_per_s"], [1.5, 0.5], rtol=1e-12, atol=0)
    assert np.allclose(hourly["checkins_per_s"], hourly["eligible"] / 600.0, rtol=1e-12, atol=0)
    assert list(hourly["accepted"]) == [1350, 90]
    # Answered in the hours: 1.5 x 3600 = 5400 and 0.5 x 1800 = 900.
    assert np.allclose(hourly["turned_away_share"], [1 - 1350 / 5400, 1 - 90 / 900], rtol=1e-12, atol=0)
    assert part["basis"] == "estimated" and part["accepted"] == 1440
    # The mean over the counts, (1 + 2 + 1 + 2 + 0.5 + 0.5) / 6 = 7/6 per second, x 5400 s.
    assert math.isclose(part["checkins_per_s_mean"], 7 / 6, rel_tol=1e-12)
    assert math.isclose(part["checkins"], 6300, rel_tol=1e-12)
    assert math.isclose(part["turned_away_share"], 1 - 1440 / 6300, rel_tol=1e-12)
    assert part["checkins_per_s_peak"] == 1.5 and part["peak_hour_utc"] == "2026-03-02T00:00:00Z"


def test_paced_estimate_divides_by_the_stretch_in_force():
    # Rounds open at 1000 s (stretch 2) and 3000 s (stretch 3): counts at 0..2700 s fall under
    # the first (before it, its own stretch), those at 3600 and 4500 s under the second.
    rounds = pd.DataFrame({"opened_s": [1000.0, 3000.0], "ended_s": [1500.0, 3500.0], "held_s": [0.0, 0.0],
                           "stretch": [2, 3]})
    times = np.array([0.0, 900.0, 1000.0, 2700.0, 3600.0, 4500.0])
    assert list(stretch_at(times, rounds)) == [2, 2, 2, 2, 3, 3]
    assert list(stretch_at(times, rounds.drop(columns="stretch"))) == [1] * 6
    hourly, part = _load_of(_record([100.0] * 300, paced=True), rounds)
    # First hour: (1 + 2 + 1 + 2) / 2 / 4 = 0.75; second: 0.5 / 3.
    assert np.allclose(hourly["checkins_per_s"], [0.75, 0.5 / 3], rtol=1e-12, atol=0)
    assert math.isclose(part["checkins_per_s_mean"], (3 + 1 / 3) / 6, rel_tol=1e-12)
    # Unpaced, the same counts give the rate without the stretch.
    hourly, _ = _load_of(_record([100.0] * 300), rounds)
    assert np.allclose(hourly["checkins_per_s"], [1.5, 0.5], rtol=1e-12, atol=0)


def test_held_time_by_hand():
    hourly, part = _load_of(_record([100.0]), _held_rounds())
    assert part["rounds_held"] == 2 and part["held_s"] == 800.0 + 600.0
    # Holds [-300, 500] and [4400, 5000] s: 500 + 600 s inside the horizon of 5400 s.
    assert math.isclose(part["held_share"], 1100 / 5400, rel_tol=1e-12)
    # By the hour each round opened: 800 + 0 s in the first, 600 s in the second.
    assert list(hourly["held_s"]) == [800.0, 600.0] and hourly["held_s"].sum() == part["held_s"]


def test_rounds_open_at_once_by_hand():
    # [0, 1000], [500, 1500] and [900, 2000]: all three open over [900, 1000].
    rounds = pd.DataFrame({"opened_s": [0.0, 500.0, 900.0], "ended_s": [1000.0, 1500.0, 2000.0]})
    peak, mean = rounds_open(rounds, HORIZON)
    assert peak == 3 and math.isclose(mean, (1000 + 1000 + 1100) / 5400, rel_tol=1e-12)
    assert np.allclose(open_by_hour(rounds["opened_s"].to_numpy(), rounds["ended_s"].to_numpy(), 2, HORIZON),
                       [3100 / 3600, 0.0], rtol=1e-12, atol=0)
    # One ending as the next opens is one at a time; a round across an hour counts in both.
    back_to_back = pd.DataFrame({"opened_s": [0.0, 3000.0], "ended_s": [3000.0, 4500.0]})
    assert rounds_open(back_to_back, HORIZON)[0] == 1
    # Only the time inside the horizon counts: 100 s of [-100, 100] and 400 s of [5000, 6000].
    edges = pd.DataFrame({"opened_s": [-100.0, 5000.0], "ended_s": [100.0, 6000.0]})
    assert rounds_open(edges, HORIZON) == (1, 500 / 5400)
    assert np.allclose(open_by_hour(back_to_back["opened_s"].to_numpy(), back_to_back["ended_s"].to_numpy(), 2,
                                    HORIZON), [1.0, 900 / 1800], rtol=1e-12, atol=0)


def test_the_masked_upload_by_hand():
    # 4 MB of 32-bit weights = 1e6 weights; 8 bits, a full round of 130: ceil(log2 130) = 8
    # more bits, 16 in all: 2e6 bytes.
    work = SimpleNamespace(model_size=4e6, update_encoding=SimpleNamespace(
        bits_per_weight=8, weights=lambda size: size / 4))
    rounds = round_frame(_rounds(), START, SecureAggregation(threshold=0.6))
    part = secure_part(rounds, SecureAggregation(threshold=0.6), accept_count=130, workload=work)
    assert part is not None and part["masked_upload_bytes"] == 2e6
    assert secure_part(rounds, SecureAggregation(threshold=0.6), 128, work)["masked_upload_bytes"] == 1.875e6


@pytest.mark.parametrize(("metric", "direction"), [
    ("waste_examples_processed", None), ("waste_examples", "lower"), ("waste_examples_fraction", "lower"),
    ("waste_compute_fraction", "lower"), ("waste_by_cause_late_examples", "lower"),
    ("server_load_turned_away_share", None), ("server_load_held_share", None), ("rounds_open_mean", None),
])
def test_work_totals_are_neutral_and_waste_is_better_lower(metric, direction):
    # The study's own rule (docs/studies.md): waste is better lower, a total of work done is not waste.
    assert direction_of(metric) == direction


# ------------------------------------------------------------------------------ small runs


@pytest.fixture(scope="module")
def plain() -> fleetsim.Result:
    """At acceptance, no secure aggregation; examples capped so that weight and samples differ."""
    config = fleetsim.load_config(fleetsim.example_path(), UNPACED + ["workload.max_examples=40",
                                                                     "rounds.configure=at-acceptance"])
    return fleetsim.simulate(config, seed=3)


@pytest.fixture(scope="module")
def secure_dir(tmp_path_factory: pytest.TempPathFactory) -> Path:
    config = fleetsim.load_config(fleetsim.example_path(), SECURE)
    folder = write_run(fleetsim.simulate(config, seed=1), tmp_path_factory.mktemp("secure") / "run")
    write_report(folder)
    return folder


def test_a_run_reports_its_protocol_and_examples(plain):
    s, parts = plain.summary, plain.participations
    assert s["rounds"]["configure"] == "at-acceptance" and s["rounds"]["secure_aggregation"] is False
    assert s["secure_aggregation"] is None and plain.tables["unmasking_by_accepted"].empty
    examples = parts["examples_processed"].to_numpy()
    wasted = examples[~parts["used"].to_numpy()].sum()
    assert math.isclose(s["waste"]["examples_processed"], examples.sum(), rel_tol=1e-12)
    assert math.isclose(s["waste"]["examples_fraction"], wasted / examples.sum(), rel_tol=1e-12)
    assert 0 < s["waste"]["examples_fraction"] < 1


def test_a_runs_weight_share_is_the_capped_fedavg_weight(plain):
    # The weight of a used report by hand from the protocol: n' = min(samples, 40),
    # steps = epochs x ceil(n' / batch), weight = min(n', steps x batch).
    work = plain.config.workload
    used = plain.participations[plain.participations["used"]]
    n = np.minimum(used["samples"].to_numpy(), 40)
    steps = work.epochs * np.ceil(n / work.batch_size)
    weight = np.minimum(n, steps * work.batch_size)
    by_type = pd.Series(weight).groupby(used["device_type"].astype(str).to_numpy()).sum()
    shares = plain.summary["bias"]["by_device_type"]
    for name, total in by_type.items():
        assert math.isclose(shares[name]["weight_share"], total / weight.sum(), rel_tol=1e-9), name
    # The cap matters here: shares of the data sizes would differ.
    by_samples = used.groupby("device_type", observed=True)["samples"].sum()
    assert any(abs(shares[k]["weight_share"] - v / by_samples.sum()) > 0.01 for k, v in by_samples.items())


def test_a_secure_run_by_hand_from_its_event_log(secure_dir: Path):
    summary = json.loads((secure_dir / "summary.json").read_text())
    s, r = summary["secure_aggregation"], summary["rounds"]
    assert r["configure"] == "after-selection" and r["secure_aggregation"] is True
    rounds = pd.read_parquet(secure_dir / "rounds.parquet")
    events = pd.read_parquet(secure_dir / "events.parquet")
    reached = rounds[rounds["status"].isin(["committed", "unmasking-failed"])]
    # t = ceil(0.75 x 130) = 98 for a full round (target 100 x over-selection 1.3).
    assert s["needed"] == 98 and s["threshold"] == 0.75
    assert s["reached_unmasking"] == len(reached) > 0
    assert s["failed"] == r["ended_by"]["unmasking_failed"] == int((rounds["status"] == "unmasking-failed").sum())
    assert 0 < s["failed"] < s["reached_unmasking"]
    # On-time reporters that did not answer carry the dropout phase "unmasking": counted from
    # the participations, not from the rounds' answer counts.
    on_time = events[(events["outcome"] == "on-time") & events["round"].isin(reached["round"])]
    lost = on_time.groupby("round")["dropout_phase"].apply(lambda p: (p == "unmasking").sum())
    assert math.isclose(s["reporters_lost_mean"], lost.reindex(reached["round"], fill_value=0).mean(), rel_tol=1e-12)
    margin = reached["unmask_responses"] - np.ceil(0.75 * reached["accepted"] - 1e-9)
    assert math.isclose(s["margin_mean"], margin.mean(), rel_tol=1e-12, abs_tol=1e-12)
    assert math.isclose(s["margin_p10"], float(np.quantile(margin, 0.1)), rel_tol=1e-12, abs_tol=1e-12)
    assert ((margin < 0) == (reached["status"] == "unmasking-failed")).all()
    # Devices working: the integral over the horizon of devices between task start and end.
    horizon = 12 * 3600.0
    overlap = np.clip(events["ended_s"], 0, horizon) - np.clip(events["started_s"], 0, horizon)
    assert math.isclose(summary["load"]["mean_working"], overlap.sum() / horizon, rel_tol=1e-9)
    waited = np.clip(events["ended_s"], 0, horizon) - np.clip(events["accepted_s"], 0, horizon)
    assert waited.sum() / horizon > 1.01 * summary["load"]["mean_working"]  # waiting is not working


def test_the_report_shows_the_unmasking(secure_dir: Path):
    summary = json.loads((secure_dir / "summary.json").read_text())
    s = summary["secure_aggregation"]
    parsed = parse((secure_dir / "report.html").read_text(encoding="utf-8"))
    assert len(parsed.answers) == 12  # the secure aggregation section joins the eleven
    shown = frame(parsed, "unmasking")["value"]
    expected = [s["threshold"], s["needed"], s["reached_unmasking"], s["failed"], s["failed_share"],
                s["responses_mean"], s["responses_p10"], s["margin_mean"], s["margin_p10"], s["reporters_lost_mean"],
                s["unmasking_s"]["p50"], s["unmasking_s"]["p90"]]
    assert np.allclose(numbers(shown), expected, rtol=1e-12, atol=0)
    table = pd.read_csv(secure_dir / "tables" / "unmasking_by_accepted.csv")
    by_accepted = frame(parsed, "unmasking-accepted")
    for column in by_accepted.columns:
        assert np.allclose(numbers(by_accepted[column]), table[column].to_numpy(float), rtol=1e-12), column
    headline = frame(parsed, "headline").set_index("figure")["value"]
    assert int(headline["Rounds ended by a failed unmasking"]) == s["failed"]
    assert math.isclose(float(headline["Straggler waste: share of examples processed"]),
                        summary["waste"]["examples_fraction"], rel_tol=1e-12)
    drops = summary["participations"]["round_dropout_share"]
    assert math.isclose(float(headline["Dropouts per round: mean share of its accepted devices"]), drops["mean"],
                        rel_tol=1e-12)
    by_type = pd.read_csv(secure_dir / "tables" / "waste_by_device_type.csv")
    waste = frame(parsed, "waste-type")
    assert np.allclose(numbers(waste["wasted_examples_m"]), by_type["wasted_examples"] / 1e6, rtol=1e-12)
    assert np.allclose(numbers(waste["examples_fraction"]), by_type["examples_fraction"], rtol=1e-12)
    assert "secure aggregation on" in parsed.answers[0] and "after-selection" in parsed.answers[0]


# ------------------------------------------------------------------------------ server load and overlap in runs


@pytest.fixture(scope="module")
def paced() -> fleetsim.Result:
    """Pacing on, two rounds in flight, a fleet small enough that the server holds rounds."""
    return fleetsim.simulate(fleetsim.load_config(fleetsim.example_path(), PACED), seed=5)


@pytest.fixture(scope="module")
def stretched() -> fleetsim.Result:
    """Pacing on with a fleet large enough that turned-away devices are told to stay away (stretch > 1)."""
    config = fleetsim.load_config(fleetsim.example_path(), PACED + ["fleet.devices=100000", "horizon.duration=6h",
                                                                    "rounds.pacing.margin=1.2"])
    return fleetsim.simulate(config, seed=5)


def _estimate_by_hand(result: fleetsim.Result, paced: bool) -> tuple[np.ndarray, float]:
    """Check-ins per second by hour and over the run from the census: each count's eligible
    total / (the stretch of the last round opened by then, the first round's before it, x period)."""
    period = float(result.config.rounds.checkin_every)
    totals = result.census.groupby("time_s")["eligible_est"].sum()
    opened, stretch = result.rounds["opened_s"].to_numpy(), result.rounds["stretch"].to_numpy()
    rates = []
    for t, total in totals.items():
        before = np.flatnonzero(opened <= t)
        m = (stretch[before[-1]] if before.size else stretch[0]) if paced else 1
        rates.append(total / (m * period))
    hours = np.floor(totals.index.to_numpy() / 3600.0).astype(int)
    return pd.Series(rates).groupby(hours).mean().to_numpy(), float(np.mean(rates))


def test_an_unpaced_runs_load_is_the_census_over_the_checkin_period(plain):
    s, hourly, parts = plain.summary, plain.tables["hourly"], plain.participations
    load, horizon = s["server_load"], 12 * 3600.0
    assert s["rounds"]["pacing"] is False and s["rounds"]["in_flight"] == 1 and load["basis"] == "estimated"
    by_hour, mean = _estimate_by_hand(plain, paced=False)
    assert np.allclose(hourly["checkins_per_s"], by_hour, rtol=1e-12, atol=0)
    assert np.allclose(hourly["checkins_per_s"], hourly["eligible"] / 600.0, rtol=1e-12, atol=0)
    assert math.isclose(load["checkins_per_s_mean"], mean, rel_tol=1e-12)
    accepted = int((parts["accepted_s"] < horizon).sum())
    assert load["accepted"] == accepted <= len(parts)  # not those accepted after the horizon's end
    assert math.isclose(load["turned_away_share"], 1 - accepted / (mean * horizon), rel_tol=1e-12)
    assert np.allclose(hourly["turned_away_share"],
                       1 - hourly["accepted"] / (hourly["checkins_per_s"] * 3600), rtol=1e-12, atol=0)
    at = int(np.argmax(by_hour))
    assert load["checkins_per_s_peak"] == hourly["checkins_per_s"].max() == s["load"]["checkins_per_s_peak_hour"]
    assert load["peak_hour_utc"] == hourly["hour_utc"][at]
    # Without pacing nothing is held, and one round is open at a time.
    assert (load["rounds_held"], load["held_s"], load["held_share"]) == (0, 0.0, 0.0)
    assert s["rounds"]["open_peak"] == 1 and (hourly["held_s"] == 0).all()


def test_a_paced_runs_estimate_divides_by_its_stretch(stretched):
    s, hourly = stretched.summary, stretched.tables["hourly"]
    assert s["rounds"]["pacing"] is True and stretched.rounds["stretch"].min() > 1
    by_hour, mean = _estimate_by_hand(stretched, paced=True)
    if getattr(stretched.record, "load", None) is None:  # the engine keeps no counts: an estimate
        assert s["server_load"]["basis"] == "estimated"
        assert np.allclose(hourly["checkins_per_s"], by_hour, rtol=1e-12, atol=0)
        assert math.isclose(s["server_load"]["checkins_per_s_mean"], mean, rel_tol=1e-12)
        # Unpaced the same census would give several times the rate.
        assert (hourly["eligible"] / 600.0 > 5 * hourly["checkins_per_s"]).all()


def test_a_paced_runs_holds_and_overlapping_rounds(paced):
    s, rounds, hourly = paced.summary, paced.rounds, paced.tables["hourly"]
    load, horizon = s["server_load"], 12 * 3600.0
    held = rounds["held_s"].to_numpy()
    assert s["rounds"]["pacing"] is True and s["rounds"]["in_flight"] == 2
    assert load["rounds_held"] == int((held > 0).sum()) > 0
    assert load["held_s"] == held.sum() == hourly["held_s"].sum()
    start, end = rounds["opened_s"] - rounds["held_s"], rounds["opened_s"]
    inside = (np.clip(end, 0, horizon) - np.clip(start, 0, horizon)).sum()
    assert math.isclose(load["held_share"], inside / horizon, rel_tol=1e-12) and inside < held.sum()
    # Rounds overlapped: at most two open at once, and their durations add up to more than the
    # time they cover (the union of [opened_s, ended_s], merged by hand).
    assert s["rounds"]["open_peak"] == 2
    spans = sorted(zip(rounds["opened_s"], rounds["ended_s"], strict=True))
    covered, (lo, hi) = 0.0, spans[0]
    for a, b in spans[1:]:
        if a > hi:
            covered, lo, hi = covered + hi - lo, a, b
        else:
            hi = max(hi, b)
    covered += hi - lo
    durations = (rounds["ended_s"] - rounds["opened_s"]).sum()
    assert durations > 1.05 * covered
    open_time = (np.clip(rounds["ended_s"], 0, horizon) - np.clip(rounds["opened_s"], 0, horizon)).sum()
    assert math.isclose(s["rounds"]["open_mean"], open_time / horizon, rel_tol=1e-12) and s["rounds"]["open_mean"] > 1
    assert math.isclose(hourly["rounds_open"].mean(), s["rounds"]["open_mean"], rel_tol=1e-9)


def test_the_report_shows_load_holds_overlap_and_the_workload(paced, tmp_path):
    folder = write_run(paced, tmp_path / "run")
    write_report(folder)
    summary = json.loads((folder / "summary.json").read_text())
    load, ro = summary["server_load"], summary["rounds"]
    parsed = parse((folder / "report.html").read_text(encoding="utf-8"))
    words = {"counted": "counted by the pacing server", "estimated": "estimated from the census"}[load["basis"]]
    headline = frame(parsed, "headline").set_index("figure")["value"]
    assert math.isclose(float(headline[f"Peak check-ins per second (highest hourly mean, {words})"]),
                        load["checkins_per_s_peak"], rel_tol=1e-12)
    assert math.isclose(float(headline[f"Share of check-ins turned away ({words})"]), load["turned_away_share"],
                        rel_tol=1e-12)
    assert words in parsed.answers[1] and "turned away" in parsed.answers[1]
    shown = frame(parsed, "load")["value"].tolist()
    expected = [load["checkins_per_s_mean"], load["checkins"], load["accepted"], load["turned_away_share"],
                load["rounds_held"], load["held_s"], load["held_share"], ro["in_flight"], ro["open_peak"],
                ro["open_mean"]]
    assert shown[3] == words and shown[5] == load["peak_hour_utc"]
    assert np.allclose(numbers(pd.Series(shown[4:5] + shown[6:])), expected, rtol=1e-12, atol=0)
    table = pd.read_csv(folder / "tables" / "hourly.csv")
    by_hour = frame(parsed, "load-hourly")
    for column in ("checkins_per_s", "turned_away_share", "held_s", "rounds_open"):
        assert np.allclose(numbers(by_hour[column]), table[column].to_numpy(float), rtol=1e-12, equal_nan=True), column
    assert "Rounds overlapped" in parsed.answers[3] and f"up to {ro['open_peak']} were open" in parsed.answers[3]
    assert "held" in parsed.answers[9]
    # The workload row: the work cap and the update encoding, from the run's settings.
    work = paced.config.workload
    settings = frame(parsed, "run").set_index("setting")["value"]
    assert f"{work.update_encoding.bits_per_weight} bits per weight" in settings["Workload"]
    assert (f"at most {work.max_examples:,} examples" in settings["Workload"]) == (work.max_examples is not None)
    assert settings["Rounds in flight (in_flight)"].startswith("2 ") and settings["Pacing"].startswith("on:")


def test_a_secure_run_states_its_masked_upload(secure_dir: Path):
    summary = json.loads((secure_dir / "summary.json").read_text())
    config = json.loads((secure_dir / "config.json").read_text())
    work, rounds = config["workload"], config["rounds"]
    accepted = math.ceil(rounds["target_reports"] * rounds["over_selection"] - 1e-9)
    masked = work["model_size"] / 4 * (work["update_encoding"]["bits_per_weight"] + math.ceil(math.log2(accepted))) / 8
    assert summary["secure_aggregation"]["masked_upload_bytes"] == masked
    parsed = parse((secure_dir / "report.html").read_text(encoding="utf-8"))
    settings = frame(parsed, "run").set_index("setting")["value"]
    assert f"masked upload {masked / 1e6:.3g} MB for a full round of {accepted} devices" in settings["Workload"]


def test_the_terminal_summary_shows_examples_waste_and_load(plain, paced):
    text = render_summary(plain.summary)
    w, load = plain.summary["waste"], plain.summary["server_load"]
    assert (f"{100 * w['energy_fraction']:.1f}% of energy, {100 * w['examples_fraction']:.1f}% of examples "
            "processed") in text
    assert (f"server load (estimated from the census): {load['checkins_per_s_mean']:.3g} check-ins/s" in text
            and f"{100 * load['turned_away_share']:.1f}% turned away" in text)
    assert "rounds overlap" not in text and "rounds overlap (up to 2 open at once" in render_summary(paced.summary)
