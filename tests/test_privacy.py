"""Privacy accounting per device (fleetsim.metrics.privacy), against closed forms, an independent
quadrature and a general-purpose DP accounting library (dp-accounting, the RDP accountant)."""

from __future__ import annotations

import math
import time
from types import SimpleNamespace

import dp_accounting  # the test extras' reference library (dp-accounting), in tests only
import numpy as np
import pandas as pd
import pytest
from dp_accounting import rdp
from scipy import integrate

import fleetsim
from fleetsim.config import Privacy, example_path, load_config
from fleetsim.errors import ConfigError
from fleetsim.metrics import CAUTION
from fleetsim.metrics.privacy import (
    ORDERS,
    PRIVACY_CAUTION,
    device_epsilons,
    epsilon_from_rdp,
    gaussian_rdp,
    privacy_account,
    privacy_by_device,
    privacy_summary,
    sampled_gaussian_rdp,
    uniform_sampling_epsilon,
)

from .test_names import missing, summary_names, table_names

SMALL = ["fleet.devices=3000", "horizon.duration=12h", "rounds.rest=2h"]
PRIVATE = ["workload.privacy={clipping_norm: 1.0, noise_multiplier: 1.1}"]

# (noise multiplier, participations, delta): from a handful of releases to hundreds.
GAUSSIAN_CASES = [(1.0, 1, 1e-5), (1.0, 10, 1e-5), (0.7, 100, 1e-6), (3.0, 1, 2e-5), (2.0, 400, 1e-7)]
# (noise multiplier, sampling rate, steps, delta) of the uniform-sampling claim.
SAMPLED_CASES = [(1.1, 0.01, 1000, 1e-5), (0.8, 0.002, 700, 2e-5), (2.0, 0.05, 50, 1e-6),
                 (1.0, 1e-4, 10000, 1e-5), (0.6, 0.02, 300, 1e-5), (5.0, 0.3, 20, 1e-5)]


def _closed_form(sigma, k, delta):
    """The Gaussian mechanism composed k times with Mironov's conversion, minimised over every
    real order. RDP k a / (2 sigma^2) at order a (Mironov 2017: the Gaussian mechanism's RDP,
    composed by Proposition 1) and epsilon = rdp + L / (a - 1), L = log(1/delta) (Proposition 3): with
    c = k / (2 sigma^2) and b = a - 1, f(b) = c + c b + L / b is least at b = sqrt(L / c), where
    f = c + 2 sqrt(c L) = k / (2 sigma^2) + sqrt(2 k L) / sigma."""
    return k / (2 * sigma**2) + math.sqrt(2 * k * math.log(1 / delta)) / sigma


@pytest.mark.parametrize(("sigma", "k", "delta"), GAUSSIAN_CASES)
def test_gaussian_composition_and_conversion_match_the_closed_form(sigma, k, delta):
    exact = _closed_form(sigma, k, delta)
    fine = 1.0 + np.geomspace(1e-4, 5000.0, 1_000_001)  # every case's optimum lies inside
    on_fine = float(epsilon_from_rdp(fine, k * gaussian_rdp(fine, sigma), delta, conversion="standard"))
    assert on_fine == pytest.approx(exact, rel=1e-6)
    # The standard grid can only be above the optimum over every order, and close to it.
    on_grid = float(epsilon_from_rdp(ORDERS, k * gaussian_rdp(ORDERS, sigma), delta, conversion="standard"))
    assert exact - 1e-12 <= on_grid <= exact * 1.01
    # The improved conversion (the one the figures use) is never looser than the standard one.
    assert device_epsilons([k], sigma, delta)[0] < on_grid


@pytest.mark.parametrize(("sigma", "k", "delta"), GAUSSIAN_CASES)
def test_per_device_epsilon_matches_the_rdp_accountant_without_amplification(sigma, k, delta):
    # dp-accounting's RDP accountant, the Gaussian event composed k times, on the same orders
    # and with the same conversion (its compute_epsilon cites the same proposition).
    accountant = rdp.RdpAccountant(orders=list(ORDERS))
    accountant.compose(dp_accounting.GaussianDpEvent(sigma), k)
    assert device_epsilons([k], sigma, delta)[0] == pytest.approx(accountant.get_epsilon(delta), rel=1e-9)


@pytest.mark.parametrize(("sigma", "q", "steps", "delta"), SAMPLED_CASES)
def test_uniform_claim_matches_the_rdp_accountant_with_amplification(sigma, q, steps, delta):
    event = dp_accounting.SelfComposedDpEvent(
        dp_accounting.PoissonSampledDpEvent(q, dp_accounting.GaussianDpEvent(sigma)), steps)
    # Integer orders: both use the closed form of Mironov, Talwar and Zhang 2019: equal.
    whole = [float(a) for a in range(2, 257)]
    accountant = rdp.RdpAccountant(orders=whole)
    accountant.compose(event)
    assert uniform_sampling_epsilon(q, steps, sigma, delta, orders=whole) == pytest.approx(
        accountant.get_epsilon(delta), rel=1e-9)
    # The standard grid, fractional orders included: the library bounds a fractional order by a
    # series, we integrate; ours is never above its figure and at most 1% below it.
    accountant = rdp.RdpAccountant(orders=list(ORDERS))
    accountant.compose(event)
    reference = accountant.get_epsilon(delta)
    ours = uniform_sampling_epsilon(q, steps, sigma, delta)
    assert reference * 0.99 <= ours <= reference * (1 + 1e-9)
    # Amplification lowers the figure below the same releases without it.
    assert ours < device_epsilons([steps], sigma, delta)[0]


@pytest.mark.parametrize(("sigma", "q", "alpha"), [(0.6, 0.02, 1.1), (0.6, 0.02, 1.5), (2.0, 0.05, 1.1),
                                                   (0.3, 0.001, 3.5), (1.0, 0.01, 7.7), (5.0, 0.3, 10.9)])
def test_fractional_orders_match_adaptive_quadrature(sigma, q, alpha):
    # The definition (Mironov, Talwar and Zhang 2019, Section 3): log E_{z~N(0,s^2)}[((1-q) +
    # q exp((2z-1)/(2 s^2)))^alpha] / (alpha - 1), integrated by scipy's adaptive quad instead.
    def log_integrand(z):
        ratio = np.logaddexp(np.log1p(-q), np.log(q) + (2 * z - 1) / (2 * sigma**2))
        return -z * z / (2 * sigma**2) - np.log(np.sqrt(2 * np.pi) * sigma) + alpha * ratio

    lo, hi = -50 * sigma, alpha + 50 * sigma
    peak = log_integrand(np.linspace(lo, hi, 100_001)).max()
    value, _ = integrate.quad(lambda z: np.exp(log_integrand(z) - peak), lo, hi, points=[0.0, 0.5, alpha],
                              limit=2000, epsabs=0.0, epsrel=1e-13)
    expected = (math.log(value) + peak) / (alpha - 1)
    assert sampled_gaussian_rdp([alpha], sigma, q)[0] == pytest.approx(expected, rel=1e-8)


def test_full_sampling_is_the_gaussian_mechanism_and_no_sampling_releases_nothing():
    # q = 1 samples every device: the claim is T unamplified releases; q = 0 releases nothing.
    assert uniform_sampling_epsilon(1.0, 30, 1.3, 1e-5) == pytest.approx(device_epsilons([30], 1.3, 1e-5)[0])
    assert uniform_sampling_epsilon(0.0, 30, 1.3, 1e-5) == 0.0
    # The integer closed form at q = 1 - 1e-12 is the Gaussian's alpha / (2 sigma^2) too.
    whole = np.arange(2.0, 40.0)
    assert sampled_gaussian_rdp(whole, 1.3, 1 - 1e-12) == pytest.approx(gaussian_rdp(whole, 1.3), rel=1e-9)


def test_a_device_that_never_reports_has_epsilon_zero_and_more_participations_cost_more():
    eps = device_epsilons(np.arange(0, 300), 1.1, 1e-5)
    assert eps[0] == 0.0
    assert (np.diff(eps) > 0).all()
    # Order of the counts does not matter: each device gets its own count's figure.
    counts = np.array([5, 0, 2, 5, 299])
    assert device_epsilons(counts, 1.1, 1e-5) == pytest.approx(eps[counts])


def _recount(result, workload=None):
    """Used reports in committed rounds per device, from the run's own frames."""
    parts, rounds = result.participations, result.rounds
    if workload is not None:
        parts, rounds = (f[f["workload"] == workload] for f in (parts, rounds))
    committed = rounds.loc[rounds["status"] == "committed", "round"]
    used = parts[parts["used"] & parts["round"].isin(committed)]
    return np.bincount(used["device"].to_numpy(), minlength=result.fleet.size)


@pytest.fixture(scope="module")
def private_run():
    return fleetsim.simulate(load_config(example_path(), SMALL + PRIVATE), seed=1)


def test_summary_of_a_small_run(private_run):
    result = private_run
    p = result.summary["privacy"]
    counts = _recount(result)
    assert counts.max() >= 2 and (counts == 0).any()  # a run that can tell devices apart
    n = result.fleet.size
    assert p["devices"] == n and p["reporting_devices"] == int((counts > 0).sum())
    assert p["never_reported"] == n - p["reporting_devices"]
    assert p["delta"] == pytest.approx(1 / n) and p["noise_multiplier"] == 1.1 and p["clipping_norm"] == 1.0
    assert p["committed_rounds"] == result.summary["rounds"]["committed"]
    assert p["sampling_rate"] == pytest.approx(result.config.rounds.target_reports / n)
    worst = p["worst_device"]
    assert worst["participations"] == counts.max() == p["participations_max"]
    assert counts[worst["device"]] == counts.max() and worst["device"] == int(np.argmax(counts))
    assert worst["tied"] == int((counts == counts.max()).sum())
    assert worst["epsilon"] == p["epsilon"]["worst"] == pytest.approx(device_epsilons([counts.max()], 1.1, 1 / n)[0])
    reported = device_epsilons(counts[counts > 0], 1.1, 1 / n)
    assert p["epsilon"]["median"] == pytest.approx(np.median(reported))
    assert p["epsilon"]["p90"] == pytest.approx(np.quantile(reported, 0.9))
    claim = uniform_sampling_epsilon(p["sampling_rate"], p["committed_rounds"], 1.1, 1 / n)
    assert p["epsilon_uniform_sampling"] == pytest.approx(claim)
    assert p["devices_over_uniform_claim"] == pytest.approx((device_epsilons(counts, 1.1, 1 / n) > claim).mean())
    assert result.summary["caution"] == f"{CAUTION} {PRIVACY_CAUTION}"


def test_tables_and_the_per_device_frame(private_run):
    result = private_run
    counts = _recount(result)
    for grouping in ("device_type", "region"):
        table = result.tables[f"privacy_by_{grouping}"]
        assert table["devices"].sum() == result.fleet.size
        assert table["reporting_devices"].sum() == int((counts > 0).sum())
        assert table["epsilon_worst"].max() == pytest.approx(result.summary["privacy"]["epsilon"]["worst"])
        names = result.fleet.type_names if grouping == "device_type" else result.fleet.region_names
        assert list(table[grouping]) == list(names)
        by_summary = result.summary["privacy"][f"by_{grouping}"]
        for row in table.to_dict("records"):
            assert by_summary[row[grouping]]["reporting_devices"] == row["reporting_devices"]
    frame = privacy_by_device(result.config, result.participations, result.rounds, result.fleet)
    assert list(frame.columns) == ["device", "device_type", "region", "participations", "epsilon"]
    assert (frame["participations"].to_numpy() == counts).all()
    assert privacy_summary(result.config, result.participations, result.rounds, result.fleet.frame())["epsilon"] == \
        result.summary["privacy"]["epsilon"]


def test_every_privacy_key_and_column_is_documented(private_run):
    problems = missing(summary_names(private_run) + table_names(private_run))
    assert not problems, "\n".join(problems)


def test_without_privacy_there_is_no_block_and_no_table():
    result = fleetsim.simulate(load_config(example_path(), ["fleet.devices=1500", "horizon.duration=4h"]), seed=1)
    assert "privacy" not in result.summary and not any(name.startswith("privacy") for name in result.tables)
    assert result.summary["caution"] == CAUTION
    assert privacy_summary(result.config, result.participations, result.rounds, result.fleet) is None


def test_each_workload_accounts_its_own_participations_with_its_own_settings():
    path = example_path().parents[2] / "fleets" / "inkwren-two-models.yaml"
    config = load_config(path, ["fleet.devices=6000", "horizon.duration=12h", "rounds.rest=2h",
                                "workload.privacy={clipping_norm: 1.0, noise_multiplier: 1.1}",
                                "workloads.highlights.workload.privacy={noise_multiplier: 0.8, delta: 1e-6}"])
    result = fleetsim.simulate(config, seed=2)
    blocks = result.summary["workloads"]
    assert blocks["ranking"]["privacy"]["noise_multiplier"] == 1.1
    assert blocks["highlights"]["privacy"]["noise_multiplier"] == 0.8
    assert blocks["highlights"]["privacy"]["delta"] == 1e-6
    assert blocks["highlights"]["privacy"]["clipping_norm"] == 1.0  # merged key by key over the file's
    for name, sigma, delta in (("ranking", 1.1, 1 / result.fleet.size), ("highlights", 0.8, 1e-6)):
        counts = _recount(result, name)
        block = blocks[name]["privacy"]
        assert counts.max() >= 2  # both workloads committed rounds, some devices several times
        assert block["reporting_devices"] == int((counts > 0).sum())
        assert block["epsilon"]["worst"] == pytest.approx(device_epsilons(counts, sigma, delta).max())
        assert "privacy_by_region" in result.workloads[name].tables
    assert result.summary["caution"].endswith(PRIVACY_CAUTION)


def test_a_million_devices_are_accounted_in_seconds():
    n, rows, rounds_run = 1_000_000, 3_000_000, 500
    rng = np.random.default_rng(7)
    parts = pd.DataFrame({"round": rng.integers(0, rounds_run, rows), "device": rng.integers(0, n, rows),
                          "used": rng.random(rows) < 0.9})
    status = np.where(rng.random(rounds_run) < 0.8, "committed", "report-deadline")
    rounds = pd.DataFrame({"round": np.arange(rounds_run), "status": pd.Categorical(status)})
    fleet = SimpleNamespace(device_type=rng.integers(0, 4, n).astype(np.int16),
                            region=rng.integers(0, 5, n).astype(np.int16),
                            type_names=("a", "b", "c", "d"), region_names=("v", "w", "x", "y", "z"))
    config = SimpleNamespace(workload=SimpleNamespace(privacy=Privacy(clipping_norm=1.0, noise_multiplier=1.1)),
                             rounds=SimpleNamespace(target_reports=5000))
    start = time.perf_counter()
    account = privacy_account(config, parts, rounds, fleet)
    summary = account.summary()
    elapsed = time.perf_counter() - start
    assert elapsed < 3.0, elapsed  # about 0.2 s measured; a per-device loop takes minutes
    committed = np.flatnonzero(status == "committed")
    keep = parts["used"].to_numpy() & np.isin(parts["round"].to_numpy(), committed)
    assert (account.participations == np.bincount(parts["device"].to_numpy()[keep], minlength=n)).all()
    assert summary["devices"] == n and summary["committed_rounds"] == committed.size


@pytest.mark.parametrize(("setting", "expected"), [
    ("workload.privacy={clipping_norm: 0, noise_multiplier: 1}",
     "workload.privacy.clipping_norm: Input should be greater than 0 (got 0)"),
    ("workload.privacy={clipping_norm: 1, noise_multiplier: -1}",
     "workload.privacy.noise_multiplier: Input should be greater than 0 (got -1)"),
    ("workload.privacy={clipping_norm: 1, noise_multiplier: 1, delta: 1}",
     "workload.privacy.delta: Input should be less than 1 (got 1)"),
    ("workload.privacy={clipping_norm: 1}", "workload.privacy.noise_multiplier: Field required"),
    ("workload.privacy={clipping_norm: 1, noise_multiplier: 1, epsilon: 2}", "workload.privacy.epsilon: unknown key"),
])
def test_bad_privacy_settings_are_one_line_each(setting, expected):
    with pytest.raises(ConfigError) as info:
        load_config(example_path(), [setting])
    (line,) = info.value.problems
    assert expected in line
