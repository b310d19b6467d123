"""The snapshot likelihood over classes of gaps against the likelihood over every gap.

References: the probability of the state seen at a check-in given the one before is computed
independently of fleetsim with scipy.linalg.expm, as the product of the two-state chain's
transition matrices exp(Q_c h) over the gap's pieces (Q_c the generator with leaving-off rate
p / ((1 - p) d) and leaving-on rate 1 / d in cell c); the gradient is checked against
scipy.optimize.approx_fprime; the estimates of the fast path against a maximisation of the
likelihood over every gap (fleetsim.fit.snapshots.chain_loglik, the per-gap likelihood the
fit used before gaps were grouped) by scipy's L-BFGS-B.
"""

from __future__ import annotations

import numpy as np
import pandas as pd
import pytest
from scipy import linalg, optimize, special

import fleetsim
from fleetsim.fit.gapclasses import class_hessian, class_loglik, gap_classes, gap_geometry
from fleetsim.fit.snapshots import MAX_GAP_S, _hessian, _ties, chain_loglik, fit_snapshots, gap_layout
from fleetsim.fit.stats import step_calendar
from fleetsim.signals import STEP_S
from fleetsim.telemetry.generate import generate_telemetry

ZONE = "America/New_York"


def _calendar(k0: int, k1: int) -> np.ndarray:
    hours, weekend = step_calendar(ZONE, frozenset({6, 7}), k0, k1)
    return weekend * 24 + hours


def _random_gaps(seed: int, devices: int = 12, regular: bool = False):
    """Check-in times over 3 days (across the 2026-03-08 spring-forward night) and states."""
    rng = np.random.default_rng(seed)
    start = pd.Timestamp("2026-03-06T00:00:00Z").timestamp()
    times, device = [], []
    for i in range(devices):
        if regular:  # every 20 minutes from a whole 5 minutes: the offsets within a step repeat
            t = start + 300.0 * rng.integers(0, 4) + 1200.0 * np.arange(216)
        else:
            t = start + np.cumsum(rng.exponential(2400.0, 60))
        times.append(t)
        device.append(np.full(t.size, i))
    times, device = np.concatenate(times), np.concatenate(device)
    return times, device, rng.random(times.size) < 0.5


def _expm_loglik(theta: np.ndarray, times, device, x) -> float:
    """Log-likelihood of every gap by matrix exponentials of the generator, piece by piece."""
    p, d = special.expit(theta[:48]), np.exp(theta[48:])
    base = int(times.min() // STEP_S)
    cells = _calendar(base, int(times.max() // STEP_S) + 1)
    total = 0.0
    for i in range(times.size - 1):
        t0, t1 = times[i], times[i + 1]
        if device[i] != device[i + 1] or not 0 < t1 - t0 <= MAX_GAP_S:
            continue
        probs = np.eye(2)[int(x[i])]
        t = t0
        while t < t1:
            k = int(np.floor(t / STEP_S))
            end = min(t1, (k + 1) * STEP_S)
            c = int(cells[k - base])
            up, down = p[c] / ((1 - p[c]) * d[c]), 1 / d[c]
            probs = probs @ linalg.expm(np.array([[-up, up], [down, -down]]) * (end - t))
            t = end
        total += np.log(probs[int(x[i + 1])])
    return total


def _theta(seed: int) -> np.ndarray:
    rng = np.random.default_rng(seed)
    return np.concatenate([rng.normal(0.0, 1.0, 48), np.log(2400.0) + rng.normal(0.0, 0.7, 48)])


def test_one_gap_per_class_is_the_likelihood_over_every_gap():
    times, device, x = _random_gaps(1)
    geometry = gap_geometry(times, device, _calendar, MAX_GAP_S)
    x0, x1 = (x[geometry["first"] + k].astype(np.int64) for k in (0, 1))
    classes = gap_classes(geometry, x0, x1, bins=10**6)  # offsets binned to 1 ms: a class per gap
    theta, free = _theta(2), np.arange(48)
    ll, grad = class_loglik(theta, classes, free)
    assert ll[0] == pytest.approx(_expm_loglik(theta, times, device, x), rel=1e-9)
    numeric = optimize.approx_fprime(theta, lambda t: class_loglik(t, classes, free)[0][0], 1e-6)
    assert np.allclose(grad[0], numeric, rtol=1e-4, atol=1e-3)
    layout = gap_layout(times, device, _calendar)
    ll_ref, grad_ref = chain_loglik(theta, layout, x[layout["first"]], x[layout["first"] + 1], free)
    assert ll[0] == pytest.approx(ll_ref, rel=1e-12) and np.allclose(grad[0], grad_ref, rtol=1e-9, atol=1e-9)


def test_repeated_offsets_are_exact_at_the_default_bins():
    times, device, x = _random_gaps(3, regular=True)
    geometry = gap_geometry(times, device, _calendar, MAX_GAP_S)
    x0, x1 = (x[geometry["first"] + k].astype(np.int64) for k in (0, 1))
    classes = gap_classes(geometry, x0, x1)
    assert classes["w1"].size < geometry["first"].size / 2  # the gaps did fall into classes
    theta = _theta(4)
    assert class_loglik(theta, classes, np.arange(48))[0][0] == pytest.approx(
        _expm_loglik(theta, times, device, x), rel=1e-9)


def test_hessian_over_the_classes_a_parameter_reaches_is_the_full_one():
    times, device, x = _random_gaps(5)
    geometry = gap_geometry(times, device, _calendar, MAX_GAP_S)
    x0, x1 = (x[geometry["first"] + k].astype(np.int64) for k in (0, 1))
    classes = gap_classes(geometry, x0, x1)
    free = np.arange(48) // 2  # tied pairs of hours, as pooling ties sparse cells
    theta = _theta(6)[np.r_[0:48:2, 48:96:2]]
    full = _hessian(lambda t: class_loglik(t, classes, free)[1][0], theta)  # every class, both shifts
    assert np.allclose(class_hessian(theta, classes, free), full, rtol=1e-6, atol=1e-6 * np.abs(full).max())


@pytest.fixture(scope="module")
def snapshots():
    """The example fleet's check-ins, one kept every 30 minutes, a week: its largest group."""
    config = fleetsim.load_config(fleetsim.example_path(), ["fleet.devices=700", "horizon.duration=7d",
                                                           "horizon.warmup=0s"])
    snap = generate_telemetry(config, 0, snapshots_every=1800.0).snapshots
    sizes = snap.groupby(["device_type", "region"]).size()
    kind, region = sizes.idxmax()
    return snap[(snap["device_type"] == kind) & (snap["region"] == region)].reset_index(drop=True)


def test_fast_estimates_agree_with_the_full_likelihood(snapshots):
    est, _ = fit_snapshots(snapshots)
    zone = snapshots["timezone"].iloc[0]
    calendar = lambda k0, k1: (lambda h, w: w * 24 + h)(*step_calendar(zone, frozenset({6, 7}), k0, k1))  # noqa: E731
    device = pd.factorize(snapshots["device_id"])[0]
    layout = gap_layout(snapshots["time_s"].to_numpy(float), device, calendar)
    x = snapshots["idle"].to_numpy(bool)
    x0, x1 = x[layout["first"]], x[layout["first"] + 1]
    changes = np.bincount(layout["cell0"], x0 != x1, 48)
    free, _ = _ties(changes, 10)
    mine = est[est["chain"] == "idle"]
    theta0 = np.concatenate([special.logit(np.bincount(free, mine["p"], free.max() + 1) / np.bincount(free)),
                             np.log(np.bincount(free, mine["d"], free.max() + 1) / np.bincount(free))])
    scale = layout["first"].size
    result = optimize.minimize(lambda t: tuple(-v / scale for v in chain_loglik(t, layout, x0, x1, free)),
                               theta0, jac=True, method="L-BFGS-B", options={"ftol": 1e-14, "gtol": 1e-10},
                               bounds=[(-12.0, 12.0)] * (free.max() + 1) + [(np.log(60.0), np.log(30 * 86400.0))]
                               * (free.max() + 1))
    n = free.max() + 1
    info = -_hessian(lambda t: chain_loglik(t, layout, x0, x1, free)[1], result.x)
    se = np.sqrt(np.diag(np.linalg.inv(info)))[np.r_[free, n + free]]
    fast = np.r_[special.logit(mine["p"].to_numpy()), np.log(mine["d"].to_numpy())]
    exact = result.x[np.r_[free, n + free]]
    # Offsets binned to 3 minutes: the estimates move by a small share of their standard error
    # (here under 0.03 of it; at 10 million check-ins at most 0.09), the interval widths by
    # under 2%. One bin per step (no sub-bins) moves them by about 0.6 of it here.
    assert np.all(np.abs(fast - exact) < 0.05 * se), np.abs(fast - exact) / se
    assert np.abs(fast - exact).max() < 0.01
    width = np.r_[special.logit(mine["p_high"]) - special.logit(mine["p_low"]),
                  np.log(mine["d_high"] / mine["d_low"])]
    assert np.allclose(width, 2 * 1.959964 * se, rtol=0.02)
