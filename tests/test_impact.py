"""Model impact: the invented task, vectorised local training, FedAvg and its private form,
and the replay of a run's committed rounds."""

from __future__ import annotations

import json
import time

import numpy as np
import pandas as pd
import pytest
from scipy import stats
from scipy.optimize import check_grad, minimize
from scipy.special import logsumexp, softmax

import fleetsim
from fleetsim.config import ImpactSettings, Workload, example_path, load_config
from fleetsim.errors import ConfigError, FleetsimError
from fleetsim.fleet import sample_fleet
from fleetsim.impact import GROUPINGS, model_impact
from fleetsim.impact.data import QUARTILES, DeviceData, build_task, data_quartile, held_out
from fleetsim.impact.replay import replay_plan, train_rounds
from fleetsim.impact.train import (
    Model,
    _batches,
    _schedule,
    clip,
    cross_entropy,
    local_work,
    private_aggregate,
    with_ones,
)

IID = ["impact.shift.feature_shift=0", "impact.shift.label_skew=0", "impact.shift.concept_shift=0"]


def config_with(*overrides):
    return load_config(example_path(), list(overrides))


def frames(config, fleet, cohorts):
    """Participations and rounds of committed rounds, round i reporting ``cohorts[i]``, each
    row's samples and FedAvg weight as the engine gives them (Workload.local_work)."""
    device = np.concatenate(cohorts).astype(np.int64)
    samples = fleet.samples[device]
    _, weight = config.workload.local_work(samples)
    parts = pd.DataFrame({"round": np.repeat(np.arange(len(cohorts)), [len(c) for c in cohorts]),
                          "device": device, "used": True, "samples": samples, "weight": weight})
    rounds = pd.DataFrame({"round": np.arange(len(cohorts)), "status": "committed",
                           "closed_s": 60.0 * (1 + np.arange(len(cohorts)))})
    return parts, rounds


def uniform_cohorts(pool, size, count, seed=0):
    rng = np.random.default_rng(seed)
    return [rng.choice(pool, size, replace=False) for _ in range(count)]


def pooled(config, fleet, seed):
    """Every device's first min(samples, max_examples) examples, end to end, with the bias input."""
    settings = config.impact or ImpactSettings()
    task = build_task(settings, fleet.type_names, fleet.region_names, seed)
    used = np.minimum(fleet.samples, config.workload.max_examples or np.iinfo(np.int32).max)
    x, y, _ = DeviceData(task, fleet, seed).cohort(np.arange(fleet.size), used)
    return np.hstack([x, np.ones((x.shape[0], 1))]), y


def logistic_objective(theta, xa, y, classes, decay):
    """Mean cross-entropy of multinomial logistic regression plus decay/2 |theta|^2, and its
    gradient, written out from the textbook form (C. M. Bishop, Pattern Recognition and
    Machine Learning, 2006, section 4.3.4): grad = (softmax(X L^T) - Y)^T X / N."""
    L = theta.reshape(classes, xa.shape[1])
    z = xa @ L.T
    lse = logsumexp(z, axis=1)
    rows = np.arange(y.size)
    value = (lse - z[rows, y]).mean() + 0.5 * decay * theta @ theta
    p = softmax(z, axis=1)
    p[rows, y] -= 1.0
    return value, (p.T @ xa / y.size).ravel() + decay * theta


# --- configuration --------------------------------------------------------------------------


def test_absent_section_means_defaults_and_left_out_keys_fall_back_to_shift():
    assert config_with().impact is None
    config = config_with("impact.shift.concept_shift=2", "impact.by_region.west-europe.label_skew=3")
    west = config.impact.region_shift("west-europe")
    assert (west.feature_shift, west.label_skew, west.concept_shift) == (1.0, 3.0, 2.0)
    other = config.impact.type_shift("tablet")
    assert (other.feature_shift, other.label_skew, other.concept_shift) == (1.0, 0.5, 2.0)


@pytest.mark.parametrize("override, line", [
    ("impact.by_device_type.watch.concept_shift=1",
     "impact.by_device_type.watch: unknown name 'watch'; expected one of budget-phone, midrange-phone, "
     "flagship-phone, tablet"),
    ("impact.by_region.mars={}", "impact.by_region.mars: unknown name 'mars'; expected one of north-atlantic"),
    ("impact.model=forest", "impact.model: Input should be 'logistic' or 'mlp' (got 'forest')"),
    ("impact.shift.label_skew=-1", "impact.shift.label_skew: Input should be greater than or equal to 0 (got -1)"),
    ("impact.eval_every=0", "impact.eval_every: Input should be greater than or equal to 1 (got 0)"),
])
def test_bad_impact_settings_get_one_line_naming_the_key_path(override, line):
    with pytest.raises(ConfigError) as info:
        config_with(override)
    assert len(info.value.problems) == 1 and line in info.value.problems[0]


# --- data -----------------------------------------------------------------------------------


def test_device_data_is_a_prefix_of_its_stream_and_independent_of_the_cohort():
    config = config_with("fleet.devices=50")
    fleet = sample_fleet(config, 3)
    task = build_task(ImpactSettings(), fleet.type_names, fleet.region_names, 3)
    x, y, off = DeviceData(task, fleet, 3).cohort(np.array([7, 2]), np.array([30, 5]))
    alone_x, alone_y, _ = DeviceData(task, fleet, 3, budget_bytes=0).cohort(np.array([7]), np.array([12]))
    assert np.array_equal(x[:12], alone_x) and np.array_equal(y[:12], alone_y)
    again = DeviceData(task, fleet, 3).cohort(np.array([2]), np.array([5]))
    assert np.array_equal(x[off[1]:off[2]], again[0])
    other = DeviceData(task, fleet, 4).cohort(np.array([7]), np.array([12]))
    assert not np.array_equal(other[0], alone_x)


def test_feature_shift_moves_the_mean_and_label_skew_moves_the_class_mix():
    config = config_with("fleet.devices=2000", "impact.shift.feature_shift=2", "impact.shift.label_skew=0",
                         "impact.shift.concept_shift=0")
    fleet = sample_fleet(config, 1)
    task = build_task(config.impact, fleet.type_names, fleet.region_names, 1)
    x, y = held_out(task, 1, np.array([0, 7]), 20_000)
    # Sample mean of N(m, I): standard error 1 / sqrt(n) per coordinate; the shift is
    # f_t u_t + f_r u_r with unit directions, so its length lies in [0, 4].
    assert np.abs(x[0].mean(axis=0) - task.mean[0]).max() < 5 / np.sqrt(20_000)
    assert 0.5 < np.linalg.norm(task.mean[0]) <= 4.0 + 1e-12
    skewed = config_with("fleet.devices=2000", "impact.shift.feature_shift=0", "impact.shift.label_skew=2",
                         "impact.shift.concept_shift=0")
    flat = config_with("fleet.devices=2000", *IID)
    for settings, different in ((skewed.impact, True), (flat.impact, False)):
        task = build_task(settings, fleet.type_names, fleet.region_names, 1)
        _, labels = held_out(task, 1, np.array([0, 7]), 5000)
        counts = np.array([np.bincount(row, minlength=4) for row in labels])
        p = stats.chi2_contingency(counts).pvalue  # chi-square test of one class mix (Pearson 1900)
        assert (p < 1e-6) if different else (p > 1e-4)


def test_data_quartiles_hold_equal_shares_in_sample_order():
    samples = np.random.default_rng(2).integers(1, 500, size=1003)
    q = data_quartile(samples)
    # floor(4 rank / n), n = 1003: ranks 0-250, 251-501, 502-752, 753-1002.
    assert np.bincount(q).tolist() == [251, 251, 251, 250]
    for i in range(3):
        assert samples[q == i].max() <= samples[q == i + 1].min()


# --- local work and its schedule -------------------------------------------------------------


@pytest.mark.parametrize("epochs, batch, max_examples, max_steps", [
    (1, 16, None, None), (2, 16, 256, None), (3, 7, 50, 9), (5, 64, None, 3)])
def test_local_work_matches_the_engine_and_batches_touch_the_weight_in_examples(epochs, batch, max_examples,
                                                                               max_steps):
    samples = np.array([1, 5, 16, 17, 100, 300, 1000])
    work = Workload(model_size=1e6, epochs=epochs, batch_size=batch, max_examples=max_examples, max_steps=max_steps)
    processed, weight = work.local_work(samples)
    local = local_work(samples, epochs, batch, max_examples, max_steps)
    assert np.array_equal(local.steps * batch, processed)
    offsets = np.concatenate([[0], np.cumsum(local.n)])
    order, start = _schedule(local, offsets, np.random.default_rng(0))
    pick, share = _batches(np.arange(local.steps.max()), local.n, local.per_epoch, local.steps, start, order, batch)
    for k in range(samples.size):
        touched = pick[:, k][share[:, k] > 0]
        assert (share[:, k].sum(axis=1) > 0).sum() == local.steps[k]  # one batch mean per step
        assert np.unique(touched).size == weight[k]  # the distinct examples trained on
        assert offsets[k] <= touched.min() and touched.max() < offsets[k + 1]
        for e in range(-(-local.steps[k] // local.per_epoch[k])):  # each epoch: a permutation
            seg = order[start[k] + e * local.n[k]: start[k] + (e + 1) * local.n[k]]
            assert np.array_equal(np.sort(seg), np.arange(offsets[k], offsets[k + 1]))


@pytest.mark.parametrize("kind", ["logistic", "mlp"])
def test_gradients_match_finite_differences(kind):
    # scipy.optimize.check_grad: forward differences against the analytic gradient.
    model = Model(kind, 5, 3, 6)
    rng = np.random.default_rng(1)
    theta = 0.5 * rng.standard_normal(model.size)
    x, y = rng.standard_normal((1, 9, 5)), rng.integers(0, 3, (1, 9))

    def loss(t):
        return cross_entropy(model.logits(t[None], x)[0], y[0]).mean()

    def grad(t):
        return model.gradient(t[None], with_ones(x), y, np.full((1, 9), 1 / 9))[0]

    assert check_grad(loss, grad, theta) < 1e-6 * max(1.0, np.linalg.norm(grad(theta)))


# --- Federated Averaging ----------------------------------------------------------------------


def test_one_full_batch_step_per_device_is_gradient_descent_on_the_pooled_data():
    # McMahan et al. 2017 (Communication-Efficient Learning of Deep Networks from Decentralized
    # Data, section 2, FedSGD): with one full-batch step per client, the example-weighted
    # average of the client models is one gradient step on the pooled data,
    # theta - lr sum_k (n_k / n) grad F_k = theta - lr grad F.
    config = config_with("fleet.devices=60", "workload.epochs=1", "workload.batch_size=400",
                         "workload.max_examples=400", "workload.max_steps=null", "impact.learning_rate=0.3",
                         "impact.weight_decay=0.02", "impact.server_learning_rate=0.7")
    fleet = sample_fleet(config, 5)
    everyone = np.arange(fleet.size)
    parts, rounds = frames(config, fleet, [everyone] * 3)
    result = model_impact(config, parts, rounds, fleet, 5)
    xa, y = pooled(config, fleet, 5)
    theta = np.zeros(xa.shape[1] * 4)
    for _ in range(3):
        theta = theta - 0.7 * 0.3 * logistic_objective(theta, xa, y, 4, 0.02)[1]
    assert np.abs(result.model - theta).max() < 1e-12
    assert np.abs(theta).max() > 0.05  # the steps moved the model


def test_iid_data_and_uniform_participation_converge_to_the_pooled_optimum():
    # With every group alike, FedAvg's fixed point is the minimiser of the example-weighted sum
    # of the client losses (McMahan et al. 2017); the reference is L-BFGS (scipy.optimize) on
    # the pooled loss with the same L2 term, which makes the optimum unique.
    config = config_with("fleet.devices=200", "workload.epochs=1", "workload.batch_size=8",
                         "workload.max_examples=32", "impact.features=4", "impact.classes=3",
                         "impact.weight_decay=0.01", "impact.learning_rate=0.03", "impact.eval_every=100000", *IID)
    fleet = sample_fleet(config, 4)
    parts, rounds = frames(config, fleet, uniform_cohorts(fleet.size, 20, 3000))
    result = model_impact(config, parts, rounds, fleet, 4)
    xa, y = pooled(config, fleet, 4)
    best = minimize(logistic_objective, np.zeros(15), args=(xa, y, 3, 0.01), jac=True, method="L-BFGS-B",
                    options={"gtol": 1e-12, "ftol": 1e-15, "maxiter": 10_000})
    assert best.success
    # Measured: 0.35% and 1e-5 (lr 0.03: SGD noise and client drift keep it near, not at,
    # the optimum); after ten rounds it is 85% off, trained without the decay term 70% off.
    assert np.linalg.norm(result.model - best.x) < 0.01 * np.linalg.norm(best.x)
    assert logistic_objective(result.model, xa, y, 3, 0.01)[0] - best.fun < 5e-5


def accuracy_when(config, fleet, seed, pool, rounds=150, size=50):
    parts, table = frames(config, fleet, uniform_cohorts(pool, size, rounds))
    return model_impact(config, parts, table, fleet, seed).summary["by_device_type"]


def test_a_device_type_never_selected_is_served_worse_when_its_data_differs():
    config = config_with("fleet.devices=2000", "impact.eval_every=100000")
    fleet = sample_fleet(config, 2)
    left_out = fleet.type_names[0]
    others = np.flatnonzero(fleet.device_type != 0)
    everyone = accuracy_when(config, fleet, 2, np.arange(fleet.size))
    without = accuracy_when(config, fleet, 2, others)
    assert without[left_out] < everyone[left_out] - 0.05
    rest = np.mean([a for name, a in without.items() if name != left_out])
    assert without[left_out] < rest - 0.05
    # The same exclusion costs nothing when every group's data is alike.
    iid = accuracy_when(config_with("fleet.devices=2000", "impact.eval_every=100000", *IID), fleet, 2, others)
    assert abs(iid[left_out] - np.mean([a for name, a in iid.items() if name != left_out])) < 0.02


# --- the private aggregate -------------------------------------------------------------------


def test_clipping_bounds_each_update_and_keeps_its_direction():
    rng = np.random.default_rng(3)
    deltas = rng.standard_normal((200, 30)) * rng.uniform(0.01, 3.0, size=(200, 1))
    clipped = clip(deltas, 1.0)
    norms, before = np.linalg.norm(clipped, axis=1), np.linalg.norm(deltas, axis=1)
    assert (norms <= 1.0 + 1e-12).all()
    assert np.array_equal(clipped[before <= 1.0], deltas[before <= 1.0])
    assert np.allclose(norms[before > 1.0], 1.0, atol=1e-12)
    cosine = (clipped * deltas).sum(axis=1) / (norms * before)
    assert np.allclose(cosine, 1.0, atol=1e-12)


def test_private_aggregate_noise_has_the_stated_deviation_and_one_device_moves_it_by_at_most_s_over_m():
    rng = np.random.default_rng(4)
    deltas = rng.standard_normal((40, 100_000)) * 0.01
    noisy = private_aggregate(deltas, 0.5, 1.3, 50.0, np.random.default_rng(5))
    quiet = private_aggregate(deltas, 0.5, 0.0, 50.0, np.random.default_rng(5))
    noise = (noisy - quiet) * 50.0  # the noise on the sum
    # Sample variance of n normals: (n - 1) s^2 / sigma^2 ~ chi-square(n - 1) (Cochran 1934).
    n, sigma = noise.size, 1.3 * 0.5
    low, high = stats.chi2.ppf([1e-6, 1 - 1e-6], n - 1) / (n - 1)
    assert low < noise.var(ddof=1) / sigma**2 < high
    # Add/remove one device: the noiseless aggregate moves by at most S / m (its sensitivity).
    extra = np.vstack([deltas, 1e3 * rng.standard_normal((1, 100_000))])
    moved = private_aggregate(extra, 0.5, 0.0, 50.0, rng) - quiet
    assert np.linalg.norm(moved) <= 0.5 / 50.0 + 1e-12


def test_replay_with_privacy_noise_differs_and_tiny_noise_is_the_clipped_average():
    base = ["fleet.devices=300", "impact.eval_every=100000", "workload.privacy.clipping_norm=0.05"]
    noisy = config_with(*base, "workload.privacy.noise_multiplier=1")
    tiny = config_with(*base, "workload.privacy.noise_multiplier=1e-12")
    fleet = sample_fleet(noisy, 6)
    parts, rounds = frames(noisy, fleet, uniform_cohorts(fleet.size, 30, 40))
    plan = replay_plan(parts, rounds, fleet)
    clipped = train_rounds(tiny, plan, fleet, 6, (0.05, 0.0), lambda i, t: None)
    plain = train_rounds(tiny, plan, fleet, 6, None, lambda i, t: None)
    with_tiny = model_impact(tiny, parts, rounds, fleet, 6)
    with_noise = model_impact(noisy, parts, rounds, fleet, 6)
    assert with_tiny.summary["private"] and with_noise.summary["private"]
    assert np.abs(with_tiny.model - clipped).max() < 1e-9
    # Each round adds N(0, (z S / m)^2) per parameter to the model: over 40 rounds about
    # sqrt(40 P) z S / m in all (training damps it a little; measured 0.85 of it).
    spread = np.sqrt(40 * clipped.size) * 1.0 * 0.05 / noisy.rounds.target_reports
    assert 0.5 * spread < np.linalg.norm(with_noise.model - clipped) < 1.5 * spread
    assert np.linalg.norm(plain - clipped) > 0.01 * np.linalg.norm(clipped)  # the clipping bites


# --- the replay of a run ------------------------------------------------------------------------


@pytest.fixture(scope="module")
def run():
    config = load_config(example_path(), ["fleet.devices=6000", "horizon.duration=1d", "rounds.rest=4h",
                                          "impact.eval_every=20"])
    return fleetsim.simulate(config, seed=1)


@pytest.fixture(scope="module")
def replayed(run):
    steps = []
    result = model_impact(run.config, run.participations, run.rounds, run.fleet, run.seed,
                          on_progress=lambda done, total: steps.append((done, total)))
    return result, steps


def test_replay_of_an_engine_run_follows_its_committed_rounds_and_used_reports(run, replayed):
    result, steps = replayed
    committed = int((run.rounds["status"].astype(str) == "committed").sum())
    used = run.participations[run.participations["used"]]
    s = result.summary
    assert s["rounds_trained"] == committed > 20 and s["reports_trained"] == len(used)
    assert steps[-1] == (committed, committed) and len(steps) == committed
    assert json.loads(json.dumps(s)) == s and s["synthetic"] is True
    assert list(result.curves.columns) == ["round", "time_s", "rounds_trained", "grouping", "group", "accuracy",
                                           "loss"]
    assert sorted(set(result.curves["rounds_trained"])) == [0, *range(20, committed, 20), committed]
    assert set(result.final["grouping"]) == set(GROUPINGS)
    assert set(s["by_device_type"]) == set(run.fleet.type_names) and set(s["by_data_quartile"]) == set(QUARTILES)
    assert s["gap"] == pytest.approx(s["best_group"]["accuracy"] - s["worst_group"]["accuracy"])
    start = result.curves[result.curves["rounds_trained"] == 0]
    assert np.allclose(start["loss"], np.log(4))  # the zero model: uniform over 4 classes
    assert s["overall"]["accuracy"] > 0.5  # four classes: chance is about 0.25
    final = result.final.set_index(["grouping", "group"])
    assert final.loc[("overall", "overall"), "reports"] == len(used)
    overall_w = final.xs("device_type")
    # The overall figure is the device-weighted mean of the types' (each a mixture of its pairs).
    assert s["overall"]["accuracy"] == pytest.approx(
        (overall_w["accuracy"] * overall_w["devices"]).sum() / overall_w["devices"].sum(), abs=1e-12)


def test_same_seed_same_result_and_another_seed_differs(run, replayed):
    a = replayed[0]
    b = model_impact(run.config, run.participations, run.rounds, run.fleet, run.seed)
    c = model_impact(run.config, run.participations, run.rounds, run.fleet, run.seed + 1)
    assert a.curves.equals(b.curves) and np.array_equal(a.model, b.model) and a.summary == b.summary
    assert not np.array_equal(a.model, c.model)


def test_rows_not_used_and_rounds_not_committed_are_not_trained_on_and_bad_input_is_refused():
    config = config_with("fleet.devices=100", "impact.eval_every=1")
    fleet = sample_fleet(config, 1)
    parts, rounds = frames(config, fleet, uniform_cohorts(fleet.size, 10, 4))
    parts.loc[parts["round"] == 1, "used"] = False
    rounds["status"] = pd.Categorical(["committed", "committed", "selection-timeout", "committed"])
    plan = replay_plan(parts, rounds, fleet)
    assert plan.round.tolist() == [0, 1, 3] and np.diff(plan.bounds).tolist() == [10, 0, 10]
    several = parts.assign(workload="main")
    with pytest.raises(FleetsimError, match="several workloads"):
        model_impact(config, several, rounds, fleet, 1)
    with pytest.raises(FleetsimError, match="device 100 but the fleet has 100 devices"):
        model_impact(config, parts.assign(device=100), rounds, fleet, 1)
    big = config_with("fleet.devices=100", "impact.test_examples=100000", "impact.features=1000")
    with pytest.raises(FleetsimError, match="^impact.test_examples: the held-out sets of the fleet's"):
        model_impact(big, parts, rounds, fleet, 1)
    wild = config_with("fleet.devices=100", "impact.learning_rate=50", "impact.weight_decay=1")  # |1 - 50| > 1
    with pytest.raises(FleetsimError, match="^impact.learning_rate: the model diverged in committed round"):
        model_impact(wild, *frames(wild, fleet, uniform_cohorts(fleet.size, 10, 30)), fleet, 1)


def test_mlp_trains_too():
    config = config_with("fleet.devices=500", "impact.model=mlp", "impact.hidden=16", "impact.eval_every=100000")
    fleet = sample_fleet(config, 3)
    parts, rounds = frames(config, fleet, uniform_cohorts(fleet.size, 30, 60))
    s = model_impact(config, parts, rounds, fleet, 3).summary
    assert s["model"] == "mlp" and s["overall"]["accuracy"] > 0.5


# --- speed ------------------------------------------------------------------------------------


def timed_rounds(count):
    config = config_with("fleet.devices=20000", "impact.eval_every=50")  # the example's work: up to 32 steps
    fleet = sample_fleet(config, 3)
    parts, rounds = frames(config, fleet, uniform_cohorts(fleet.size, 100, count))
    began = time.perf_counter()
    result = model_impact(config, parts, rounds, fleet, 3)
    return time.perf_counter() - began, result


def test_two_hundred_rounds_of_a_hundred_reports_train_in_seconds():
    elapsed, result = timed_rounds(200)
    assert result.summary["reports_trained"] == 20_000
    assert elapsed < 10.0  # measured about 2 to 4 s on two shared cores


@pytest.mark.slow
def test_two_thousand_rounds_of_a_hundred_reports_train_within_a_minute():
    elapsed, result = timed_rounds(2000)
    assert result.summary["rounds_trained"] == 2000
    assert elapsed < 60.0
