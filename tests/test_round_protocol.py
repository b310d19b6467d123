"""The round protocol's additions against hand-worked arithmetic and scipy.stats: capped local
work, the update's encoding, configuration after selection, secure aggregation, and the
validation of their settings.

Sources, named again at each check: the closed forms of docs/fleet-file.md ("Local work and
its cap", "`update_encoding`", "`configure`", "`secure_aggregation`"), worked by hand on
small numbers below; the per-client costs of secure aggregation after Bonawitz et al., 2017,
Practical Secure Aggregation for Privacy-Preserving Machine Learning (from memory); the
exponential survival exp(-h t) of a constant hazard (Ross, Introduction to Probability
Models, ch. 5; from memory) and the binomial tail (scipy.stats.binom, scipy.stats.binomtest).
Runs use fixed seeds; the stochastic check states its bound and shows two wrong models failing it.
"""

from __future__ import annotations

import math

import numpy as np
import pytest
from scipy import stats
from typer.testing import CliRunner

import fleetsim
from fleetsim.cli import app
from fleetsim.config import Workload, build_config, example_path, load_config
from fleetsim.config.protocol import SecureAggregation, UpdateEncoding
from fleetsim.errors import ConfigError

from . import CLASSIC_ROUNDS

TYPES = ("budget-phone", "midrange-phone", "flagship-phone", "tablet")
ALPHA = 1e-3  # a binomial test of a true model fails with probability 0.1%
COMPLETED = ("on-time", "late")  # outcomes of a participation whose task ran to its end
runner = CliRunner()


def run(overrides: list[str], seed: int) -> fleetsim.Result:
    # From the example's classic protocol (tests.CLASSIC_ROUNDS); each case sets what it tests.
    return fleetsim.simulate(load_config(example_path(), CLASSIC_ROUNDS + overrides), seed=seed)


def every_type(key: str, value: object) -> list[str]:
    return [f"fleet.device_types.{name}.{key}={value}" for name in TYPES]


def labels(frame, column: str) -> np.ndarray:
    return frame[column].to_numpy().astype(str)


def close(a, b, rtol: float = 1e-12, atol: float = 1e-9) -> bool:
    return bool(np.allclose(np.asarray(a, float), np.asarray(b, float), rtol=rtol, atol=atol))


# ------------------------------------------------------------------ 1. capped local work

# Local work (docs/fleet-file.md, "Local work and its cap"): n' = min(samples, max_examples),
# steps = min(E ceil(n' / B), max_steps), processed = steps B, weight = min(n', steps B).
# Hand-worked with B = 16, E = 2 on samples 1, 16, 17, 100, 180:
#   n' (cap 100)        = 1, 16, 17, 100, 100; ceil(n' / 16) = 1, 1, 2, 7, 7
#   steps (no step cap) = 2, 2, 4, 14, 14 -> processed 32, 32, 64, 224, 224; weight = n'
#   steps (cap 5)       = 2, 2, 4, 5, 5   -> processed 32, 32, 64, 80, 80;   weight 1, 16, 17, 80, 80
LOCAL_WORK_CASES = [
    (None, None, [32, 32, 64, 224, 384], [1, 16, 17, 100, 180]),  # ceil(180 / 16) = 12: 24 steps
    (100, None, [32, 32, 64, 224, 224], [1, 16, 17, 100, 100]),
    (100, 5, [32, 32, 64, 80, 80], [1, 16, 17, 80, 80]),
    (None, 5, [32, 32, 64, 80, 80], [1, 16, 17, 80, 80]),
    (None, 1, [16, 16, 16, 16, 16], [1, 16, 16, 16, 16]),  # one step: 16 distinct examples at most
]


@pytest.mark.parametrize(("max_examples", "max_steps", "processed", "weight"), LOCAL_WORK_CASES)
def test_local_work_matches_hand_worked_values(max_examples, max_steps, processed, weight):
    work = Workload.model_validate({"model_size": "24MB", "batch_size": 16, "epochs": 2,
                                    "max_examples": max_examples, "max_steps": max_steps})
    got_processed, got_weight = work.local_work(np.array([1, 16, 17, 100, 180]))
    assert got_processed.tolist() == processed
    assert got_weight.tolist() == weight
    one_processed, one_weight = work.local_work(17)  # a single device: the same arithmetic
    assert (float(one_processed), float(one_weight)) == (processed[2], weight[2])


def expected_work(samples: np.ndarray, work: Workload) -> tuple[np.ndarray, np.ndarray]:
    """(processed, weight) by the closed form above, in integers."""
    used = samples if work.max_examples is None else np.minimum(samples, work.max_examples)
    steps = work.epochs * (-(-used // work.batch_size))
    if work.max_steps is not None:
        steps = np.minimum(steps, work.max_steps)
    return steps * work.batch_size, np.minimum(used, steps * work.batch_size)


DRIFT = 1.5  # compute-drift factor on tasks starting in the first 6 hours
CAPPED = [
    "fleet.devices=3000", "horizon.duration=12h", "rounds.rest=2h",
    "rounds.target_reports=20", "rounds.min_reports=15",
    "workload.batch_size=16", "workload.epochs=2",
    # 6e6 weights: encode_s = 6 x (1 s + 1.5 s) = 15 s (docs/fleet-file.md, "`update_encoding`")
    "workload.update_encoding={bits_per_weight: 8, rotation: true, encode_time: 1s, rotation_time: 1.5s}",
    f"disruptions=[{{kind: compute-drift, start: 0s, duration: 6h, factor: {DRIFT}}}]",
]
ENCODE_S = 15.0


@pytest.mark.parametrize(("max_examples", "max_steps"), [(None, None), (60, None), (None, 5), (100, 9)])
def test_capped_work_sets_training_time_weight_and_examples(max_examples, max_steps):
    caps = [f"workload.max_examples={max_examples or 'null'}", f"workload.max_steps={max_steps or 'null'}"]
    result = run(CAPPED + caps, seed=3)
    parts, fleet, work = result.participations, result.fleet, result.config.workload
    assert work.encode_s == ENCODE_S
    dev = parts["device"].to_numpy()
    samples = fleet.samples[dev].astype(np.int64)
    assert (parts["samples"].to_numpy() == samples).all()
    processed, weight = expected_work(samples, work)
    started = parts["started_s"].to_numpy()
    f = np.where((started >= 0) & (started < 6 * 3600), DRIFT, 1.0)
    cost = fleet.sample_cost_s[dev]
    # train_s = (steps B c + encode_s) f, every participation, whether or not it finished.
    assert close(parts["train_s"], (processed * cost + ENCODE_S) * f)
    assert not close(parts["train_s"], processed * cost * f)  # the encoding time is in it
    assert (parts["weight"].to_numpy() == weight).all()
    done = np.isin(labels(parts, "outcome"), COMPLETED)
    assert done.sum() > 500 and (~done).sum() > 20
    assert (parts["examples_processed"].to_numpy()[done] == processed[done]).all()
    assert close(parts["compute_s"][done], parts["train_s"][done])
    # By its end a participation processed steps B min(1, train_done / local_s) examples:
    # local_s = steps B c f the local steps' time, train_done its time spent training (after the download).
    elapsed = parts.eval("ended_s - started_s").to_numpy()
    train_done = np.clip(elapsed - parts["download_s"].to_numpy(), 0.0, parts["train_s"].to_numpy())
    partial = processed * np.minimum(1.0, train_done / (processed * cost * f))
    assert close(parts["examples_processed"], partial, rtol=1e-9, atol=1e-6)
    # Energy of a finished task: radio power while moving bytes, training power while training
    # (the encoding included): (radio (download + upload) + train_power train_s) / 3600 Wh.
    radio, train_w = fleet.radio_power_w[dev], fleet.train_power_w[dev]
    energy = (radio * parts.eval("download_s + upload_s").to_numpy() + train_w * parts["train_s"].to_numpy()) / 3600
    assert close(parts["energy_wh"][done], energy[done], rtol=1e-9)
    # The premise: each cap binds on some devices and not on others.
    if max_examples is not None:
        assert (samples > max_examples).any() and (samples < max_examples).any()
    if max_steps is not None:
        uncapped = work.epochs * (-(-np.minimum(samples, max_examples or samples) // work.batch_size))
        assert (uncapped > max_steps).any() and (uncapped < max_steps).any()


# ------------------------------------------------------------------------ 2. update encoding

# Upload bytes (docs/fleet-file.md, "`update_encoding`"), n_w = model_size / 4:
#   n_w keep bits / 8 + (0 if keep == 1 else min(4 n_w keep, n_w / 8)).
# Hand-worked for a 24 MB model (n_w = 6e6 weights; the one-bit mask is 6e6 / 8 = 750,000 B):
ENCODINGS = [
    ({"bits_per_weight": 32}, 24_000_000.0),  # the model itself
    ({"bits_per_weight": 8}, 6_000_000.0),  # a quarter: 32 -> 8 bits is 4x fewer bytes (common practice)
    ({"bits_per_weight": 8, "keep_fraction": 0.1}, 600_000.0 + 750_000.0),  # indices 2.4e6 B > mask
    ({"bits_per_weight": 8, "keep_fraction": 0.01}, 60_000.0 + 240_000.0),  # indices 240,000 B < mask
    ({"bits_per_weight": 8, "keep_fraction": 0.03125}, 187_500.0 + 750_000.0),  # 1/32: both 750,000 B
    ({"bits_per_weight": 4, "keep_fraction": 0.5}, 1_500_000.0 + 750_000.0),
    ({"bits_per_weight": 1}, 750_000.0),
]


@pytest.mark.parametrize(("encoding", "expected"), ENCODINGS)
def test_encoded_upload_bytes_match_hand_worked_values(encoding, expected):
    assert UpdateEncoding(**encoding).upload_bytes(24e6) == pytest.approx(expected, rel=1e-12)
    work = Workload.model_validate({"model_size": "24MB", "update_encoding": encoding})
    assert work.upload_bytes == pytest.approx(expected, rel=1e-12)


def test_eight_bits_is_exactly_a_quarter_of_thirty_two():
    # 32-bit floats to 8-bit values, every weight kept: exactly 4x fewer bytes (common practice).
    for size in (24e6, 4e5, 1234.0 * 4):
        assert UpdateEncoding(bits_per_weight=32).upload_bytes(size) == 4 * UpdateEncoding(
            bits_per_weight=8).upload_bytes(size)


def test_encoding_time_per_million_weights():
    # encode_s = n_w / 1e6 (encode_time + rotation_time if rotating): 6e6 weights at 2 s and 3 s.
    assert UpdateEncoding(encode_time=2.0, rotation_time=3.0, rotation=True).encode_s(24e6) == pytest.approx(30.0)
    assert UpdateEncoding(encode_time=2.0, rotation_time=3.0).encode_s(24e6) == pytest.approx(12.0)
    assert UpdateEncoding().encode_s(24e6) == 0.0


ENGINE_ENCODINGS = [ENCODINGS[0], ENCODINGS[1], ENCODINGS[2], ENCODINGS[3]]
SMALL = ["fleet.devices=2000", "horizon.duration=6h", "rounds.rest=2h", "rounds.target_reports=20",
         "rounds.min_reports=15"]


@pytest.mark.parametrize(("encoding", "expected"), ENGINE_ENCODINGS)
def test_engine_uploads_the_encoded_bytes(encoding, expected):
    block = "{" + ", ".join(f"{k}: {v}" for k, v in encoding.items()) + "}"
    result = run(SMALL + [f"workload.update_encoding={block}"], seed=4)
    parts, fleet = result.participations, result.fleet
    up = fleet.up_mbps[parts["device"].to_numpy()]
    done = np.isin(labels(parts, "outcome"), COMPLETED)
    assert done.sum() > 300
    # Equal to the last bits: the engine counts a phase's bytes by the share of it done, which
    # for a finished upload comes to 1 within a few ulps (relative error below 1e-14 seen).
    assert close(parts["upload_bytes"][done], np.full(done.sum(), expected), rtol=1e-12, atol=0.0)
    # upload time = bytes x 8 / rate (docs/architecture.md, "Client runtime and dropouts")
    assert close(parts["upload_s"], expected * 8.0 / (up * 1e6))
    # A dropout during the upload sent its share of the bytes, in proportion to the time spent.
    hit = labels(parts, "dropout_phase") == "upload"
    spent = parts.eval("ended_s - started_s - download_s - train_s").to_numpy()[hit]
    assert close(parts["upload_bytes"][hit], expected * spent / parts["upload_s"].to_numpy()[hit], rtol=1e-6)


# ------------------------------------------------------------- 3. secure aggregation: bytes

def test_masked_bits_widen_by_ceil_log2_n():
    # ceil(log2 n) extra bits so that the sum of n values does not wrap (hand-worked).
    assert [SecureAggregation.masked_bits(8, n) for n in (1, 2, 3, 8, 9, 10, 16, 17, 130)] == [
        8, 9, 10, 11, 12, 12, 12, 13, 16]


SECURE = [
    "fleet.devices=3000", "horizon.duration=8h", "rounds.rest=2h", "rounds.target_reports=8",
    "rounds.min_reports=6", "rounds.configure=after-selection", "workload.update_encoding.bits_per_weight=8",
    "rounds.secure_aggregation={threshold: 0.6, key_advertisement: 5s, key_sharing: 7s, unmasking: 9s, "
    "key_bytes: 1kB, share_bytes: 50kB}",
]
KEY, SHARE, KA, KS, UNMASK = 1000.0, 50_000.0, 5.0, 7.0, 9.0


@pytest.mark.parametrize("over_selection", [1.0, 1.25])  # n = 8 (a power of two) and n = 10
def test_secure_aggregation_moves_the_documented_bytes(over_selection):
    result = run(SECURE + [f"rounds.over_selection={over_selection}"], seed=5)
    parts, rounds, fleet = result.participations, result.rounds, result.fleet
    n_model = result.config.rounds.accept_count
    assert n_model == round(8 * over_selection)
    by_round = rounds.set_index("round")
    n = by_round.loc[parts["round"], "accepted"].to_numpy()
    closed = by_round.loc[parts["round"], "closed_s"].to_numpy()
    dev = parts["device"].to_numpy()
    down, up = fleet.down_mbps[dev] * 1e6, fleet.up_mbps[dev] * 1e6  # bit/s
    log2_up = np.array([(int(k) - 1).bit_length() for k in n])  # ceil(log2 n), exact in integers
    masked = 6e6 * (8 + log2_up) / 8  # n_w (bits + ceil(log2 n)) / 8: 11 bits for n = 8, 12 for n = 10
    # Per client (docs/fleet-file.md, "`secure_aggregation`"; Bonawitz et al. 2017, from memory):
    # key advertisement 2k up, 2kn down; key sharing (n-1)s each way; unmasking (n-1)s up.
    ka = KA + 2 * KEY * n * 8 / down + 2 * KEY * 8 / up
    ks = KS + (n - 1) * SHARE * 8 / down + (n - 1) * SHARE * 8 / up
    u = UNMASK + (n - 1) * SHARE * 8 / up
    outcome, cause, phase = labels(parts, "outcome"), labels(parts, "dropout_cause"), labels(parts, "dropout_phase")
    on_time = outcome == "on-time"
    answered = on_time & (cause == "none")
    assert answered.sum() > 200 and (on_time & (phase == "unmasking")).sum() > 0
    assert close(parts["upload_s"][on_time], (masked * 8 / up)[on_time])
    assert close(parts["download_bytes"][on_time], (24e6 + 2 * KEY * n + (n - 1) * SHARE)[on_time])
    before = 2 * KEY + (n - 1) * SHARE + masked  # up to the unmasking
    spent = np.where(answered, u, np.clip(parts["ended_s"].to_numpy() - closed, 0.0, u))
    assert close(parts["upload_bytes"][on_time], (before + (n - 1) * SHARE * spent / u)[on_time], rtol=1e-9)
    # An answering device ends at close + u_i; the round at close + the longest u_i.
    assert close(parts["ended_s"][answered], (closed + u)[answered], rtol=1e-12, atol=1e-6)
    ends = parts.assign(end=closed + np.where(on_time, u, 0.0))[on_time].groupby("round")["end"].max()
    assert close(by_round.loc[ends.index, "ended_s"], ends, atol=1e-6)
    # Its report arrived at start + download + ka + ks + train + upload, no later than the close;
    # a round closed by its target_reports-th report closed at the last on-time report.
    report = parts["started_s"].to_numpy() + parts.eval("download_s + train_s + upload_s").to_numpy() + ka + ks
    assert (report[on_time] <= closed[on_time] + 1e-6).all()
    last = parts.assign(report=report)[on_time].groupby("round")["report"].max()
    row = by_round.loc[last.index]
    by_target = (row["reports"] >= 8) & (row["closed_s"] < row["selected_s"] + result.config.rounds.report_deadline)
    assert by_target.sum() > 20
    assert close(last[by_target], row.loc[by_target, "closed_s"], atol=1e-6)
    # Energy of an answering device: radio power in every phase but training, plus the unmasking.
    radio, train_w = fleet.radio_power_w[dev], fleet.train_power_w[dev]
    radio_s = parts.eval("download_s + upload_s").to_numpy() + ka + ks + u
    energy = (radio * radio_s + train_w * parts["train_s"].to_numpy()) / 3600
    assert close(parts["energy_wh"][answered], energy[answered], rtol=1e-9)


# ------------------------------------------------------- 3. secure aggregation: threshold

# Survival known by construction: no signal required, batteries near full with no floor, no
# execution limit in reach, identical devices (every trait fixed), so a crash at h = 9/h is the
# only interruption. All n = 10 tasks start at the selection's end and take the same time T, so
# every survivor reports at one instant, which closes the round: an on-time reporter waits for
# nothing and then answers the unmasking if it survives u = 90 s + 9 x 1000 B x 8 / 8 Mbit/s
# = 90.009 s, with probability p = exp(-h u) independently (exponential survival, memoryless:
# Ross, ch. 5, from memory). The test keeps the rounds where all 10 reported, so the number of
# reporters is fixed; being memoryless, each one's life after its report is still exponential.
# Such a round fails when fewer than t = ceil(0.75 x 10) = 8 answer: P(fail) = P(Bin(10, p) <= 7)
# (scipy.stats.binom.cdf).
CRASH_PER_HOUR = 9.0
THRESHOLD_RUN = [
    "fleet.devices=2000", "horizon.duration=12h",
    *[f"fleet.device_types.{name}.by_region={{}}" for name in TYPES[:2]],  # the same rates in every region
    *every_type("samples", 10), *every_type("sample_cost", "0.1s"),
    *every_type("download_rate", "100Mbit/s"), *every_type("upload_rate", "8Mbit/s"),
    *every_type("battery_level", "{charging: {mean: 95%, sd: 2%}, unplugged: {mean: 95%, sd: 2%}}"),
    "workload.model_size=400kB", "workload.batch_size=10", "workload.epochs=1", "workload.requires=[]",
    "workload.min_battery=0", "workload.memory_needed=0", "workload.execution_limit=1d",
    f"workload.crash_rate={CRASH_PER_HOUR}/h", "workload.update_encoding.bits_per_weight=8",
    "rounds.target_reports=10", "rounds.over_selection=1.0", "rounds.min_reports=10",
    "rounds.selection_timeout=1m", "rounds.report_deadline=5m", "rounds.aggregation_time=1s",
    "rounds.rest=0s", "rounds.checkin_every=1m", "rounds.configure=after-selection",
    "rounds.secure_aggregation={threshold: 0.75, key_advertisement: 1s, key_sharing: 1s, unmasking: 90s, "
    "key_bytes: 32B, share_bytes: 1000B}",
]
N, NEEDED, U_S = 10, 8, 90.0 + 9 * 1000 * 8 / 8e6


@pytest.fixture(scope="module")
def threshold_run() -> fleetsim.Result:
    return run(THRESHOLD_RUN, seed=7)


def test_unmasking_failures_follow_the_binomial_tail(threshold_run):
    rounds, parts = threshold_run.rounds, threshold_run.participations
    assert (rounds["accepted"] == N).all()
    assert set(labels(parts, "dropout_cause")) <= {"none", "crash"}  # the premise: crashes only
    full = rounds[rounds["reports"] == N]
    # The premise: every full round closed at its reports' one instant and ended u later.
    span = full.eval("closed_s - selected_s").to_numpy()
    assert np.ptp(span) < 1e-6 and span[0] < 10
    assert close(full.eval("ended_s - closed_s"), U_S, atol=1e-6)
    status = labels(full, "status")
    assert set(status) <= {"committed", "unmasking-failed"}
    assert ((status == "unmasking-failed") == (full["unmask_responses"].to_numpy() < NEEDED)).all()
    failed, total = int((status == "unmasking-failed").sum()), len(full)
    assert total >= 300
    p = math.exp(-CRASH_PER_HOUR / 3600 * U_S)
    # Bound: a two-sided binomial test of the failure count at ALPHA.
    assert stats.binomtest(failed, total, stats.binom.cdf(NEEDED - 1, N, p)).pvalue >= ALPHA, (failed, total)
    # Wrong models fail the same test: no crash exposure in the unmasking (no round could fail),
    # and a threshold rounded down (t = 7).
    assert stats.binomtest(failed, total, 0.0).pvalue < ALPHA
    assert stats.binomtest(failed, total, stats.binom.cdf(NEEDED - 2, N, p)).pvalue < ALPHA


def test_unmasking_answers_outcomes_and_waste_agree(threshold_run):
    rounds, parts = threshold_run.rounds, threshold_run.participations
    outcome, cause, phase = labels(parts, "outcome"), labels(parts, "dropout_cause"), labels(parts, "dropout_phase")
    on_time = outcome == "on-time"
    # A reporter interrupted after its upload stays on time, with its cause and phase "unmasking".
    assert (phase[on_time & (cause != "none")] == "unmasking").all()
    answers = parts[on_time & (cause == "none")].groupby("round").size()
    assert (answers.reindex(rounds["round"], fill_value=0).to_numpy() == rounds["unmask_responses"].to_numpy()).all()
    failed = np.isin(parts["round"].to_numpy(), rounds.loc[labels(rounds, "status") == "unmasking-failed", "round"])
    assert failed.sum() > 0
    assert not parts["used"].to_numpy()[failed].any()
    waste = labels(parts, "waste_cause")
    assert (waste[failed & (outcome != "dropout")] == "unmasking-failed").all()


# --------------------------------------------------------- 4. configuration after selection

# docs/fleet-file.md, "`configure`": after selection, the cohort starts when the selection ends;
# a round abandoned at selection starts no task, so it costs no download, energy or training.
REST_S = 2 * 3600.0
SCARCE = ["fleet.devices=3000", "horizon.duration=8h", "rounds.rest=2h", "rounds.target_reports=60",
          "rounds.min_reports=50"]


@pytest.fixture(scope="module")
def configured_runs() -> dict[str, fleetsim.Result]:
    return {mode: run(SCARCE + [f"rounds.configure={mode}"], seed=8) for mode in ("after-selection", "at-acceptance")}


def rows_of(result: fleetsim.Result, rounds) -> object:
    parts = result.participations
    return parts[np.isin(parts["round"].to_numpy(), rounds["round"].to_numpy())]


def assert_no_work(rows, cause: str) -> None:
    for column in ("download_bytes", "upload_bytes", "energy_wh", "examples_processed", "compute_s"):
        assert (rows[column] == 0).all(), column
    assert (rows["ended_s"] == rows["started_s"]).all()
    assert set(labels(rows, "outcome")) == {"stopped"}
    assert set(labels(rows, "waste_cause")) == {cause}


def test_after_selection_abandoned_rounds_cost_nothing(configured_runs):
    result = configured_runs["after-selection"]
    parts, rounds = result.participations, result.rounds
    selected = rounds.set_index("round").loc[parts["round"], "selected_s"].to_numpy()
    assert (parts["started_s"].to_numpy() == selected).all()
    assert (parts["accepted_s"] <= parts["started_s"]).all()
    status = labels(rounds, "status")
    gone = rows_of(result, rounds[status == "selection-timeout"])
    assert len(gone) > 20
    assert_no_work(gone, "selection-timeout")
    # In a started round, a device whose required signal ended while it waited drops out at its start.
    ran = rows_of(result, rounds[status != "selection-timeout"])
    at_start = ran[ran["ended_s"] == ran["started_s"]]
    assert len(at_start) > 0 and (at_start["download_bytes"] == 0).all()
    assert set(labels(at_start, "dropout_cause")) <= {"idle-ended", "charging-ended", "unmetered-ended"}
    # Its devices still rest for `rest` after the participation's end.
    order = parts.sort_values(["device", "accepted_s"])
    same = order["device"].to_numpy()[1:] == order["device"].to_numpy()[:-1]
    gap = order["accepted_s"].to_numpy()[1:] - order["ended_s"].to_numpy()[:-1]
    assert (gap[same] >= REST_S - 1e-6).all()


def test_at_acceptance_abandoned_rounds_do_cost_downloads(configured_runs):
    result = configured_runs["at-acceptance"]
    parts, rounds = result.participations, result.rounds
    assert (parts["started_s"] == parts["accepted_s"]).all()
    gone = rows_of(result, rounds[labels(rounds, "status") == "selection-timeout"])
    assert len(gone) > 20
    assert gone["download_bytes"].sum() > 0 and gone["energy_wh"].sum() > 0


# A one-minute server outage every six minutes, a ten-minute selection that never fills: each
# outage cuts a selection that has accepted at least min_reports, so the round is lost at its
# selection and (docs/fleet-file.md, "`configure`") starts no task.
OUTAGES = ", ".join(f"{{kind: server-outage, start: {6 * k}m, duration: 1m}}" for k in range(1, 40))
CUT = ["fleet.devices=3000", "horizon.duration=4h", "rounds.rest=2h", "rounds.target_reports=60",
       "rounds.min_reports=5", "rounds.selection_timeout=10m", "rounds.configure=after-selection",
       f"disruptions=[{OUTAGES}]"]


@pytest.fixture(scope="module")
def cut_rows():
    result = run(CUT, seed=8)
    rounds = result.rounds
    short = rounds["accepted"] < result.config.rounds.accept_count  # the selection did not fill
    cut = rounds[(labels(rounds, "status") == "server-outage") & short]
    assert len(cut) > 10 and (cut["closed_s"] == cut["selected_s"]).all()  # lost at the selection's end
    return rows_of(result, cut)


def test_a_selection_cut_by_an_outage_costs_nothing(cut_rows):
    for column in ("download_bytes", "upload_bytes", "energy_wh", "examples_processed", "compute_s"):
        assert (cut_rows[column] == 0).all(), column
    assert (cut_rows["ended_s"] == cut_rows["started_s"]).all()


def test_a_selection_cut_by_an_outage_stops_every_device(cut_rows):
    assert_no_work(cut_rows, "server-outage")


# ------------------------------------------------------------------------------ 5. validation

def check_error(*sets: str) -> str:
    """The one error line of ``fleetsim check`` on the bundled file with ``--set`` options."""
    args = ["check", str(example_path())]
    for item in [*CLASSIC_ROUNDS, *sets]:
        args += ["--set", item]
    result = runner.invoke(app, args)
    assert result.exit_code == 2, result.stdout
    lines = result.stderr.splitlines()
    assert len(lines) == 1 and lines[0].startswith("error: "), lines
    return lines[0]


AFTER = "rounds.configure=after-selection"


@pytest.mark.parametrize(("sets", "path"), [
    (["rounds.secure_aggregation={threshold: 0.5}"], "rounds.configure"),
    ([AFTER, "rounds.secure_aggregation={}", "workload.update_encoding.keep_fraction=0.5"],
     "workload.update_encoding.keep_fraction"),
    # ceil(100 x 1.3) = 130 accepted; ceil(0.77 x 130) = 101 answers > 100 reports: every round fails.
    ([AFTER, "rounds.secure_aggregation={threshold: 0.77}"], "rounds.secure_aggregation.threshold"),
    ([AFTER, "rounds.secure_aggregation={threshold: 1}", "rounds.over_selection=1.01"],
     "rounds.secure_aggregation.threshold"),
])
def test_secure_aggregation_settings_that_cannot_work_are_refused(sets, path):
    line = check_error(*sets)
    assert f": {path}: " in line and "(got " in line, line


def test_the_threshold_at_the_bound_is_allowed():
    # ceil(0.7692 x 130) = ceil(99.996) = 100 = target_reports: some rounds can commit.
    config = load_config(example_path(), CLASSIC_ROUNDS + [AFTER, "rounds.secure_aggregation={threshold: 0.7692}"])
    assert config.rounds.secure_aggregation.needed(config.rounds.accept_count) == 100
    with pytest.raises(ConfigError, match=r"rounds\.secure_aggregation\.threshold: every round would fail"):
        load_config(example_path(), CLASSIC_ROUNDS + [AFTER, "rounds.secure_aggregation={threshold: 0.7693}"])


@pytest.mark.parametrize(("old", "value"), [("update_compression", "4"), ("update_size", "6MB")])
def test_removed_encoding_keys_are_refused_naming_update_encoding(tmp_path, old, value):
    text = example_path().read_text(encoding="utf-8")
    block = "  update_encoding:\n    bits_per_weight: 8"
    assert block in text
    path = tmp_path / "fleet.yaml"
    path.write_text(text.replace(block, f"  {old}: {value}"), encoding="utf-8")
    result = runner.invoke(app, ["check", str(path)])
    assert result.exit_code == 2
    (line,) = result.stderr.splitlines()
    assert line.startswith(f"error: {path}: workload.{old}: renamed to update_encoding"), line
    with pytest.raises(ConfigError) as info:
        build_config({"workload": {"model_size": "1MB", old: value}})
    assert any(f"workload.{old}: renamed to update_encoding" in p for p in info.value.problems)
