"""Goodness of fit (fleetsim.fit.goodness): logs drawn from the model pass at about the nominal
rate; logs with non-exponential on-spells, and a model with its charging hours moved, are
rejected and the report names where.

The logs come from fleetsim.telemetry.generate_telemetry, written apart from the module under
test: every chain of every device followed exactly from the tables' origin (inverting the
cumulative hazard; the time-rescaling construction, Brown et al. 2002, from memory), signals
as own chain OR (settled AND covered), check-ins at jittered ticks. A four-hour hole is cut
out of every device's log so that the checks also meet logs in several windows.
"""

from __future__ import annotations

import json
import math
import re
from types import SimpleNamespace

import numpy as np
import pandas as pd
import pytest
from matplotlib.figure import Figure
from scipy import linalg, stats

from fleetsim.config import build_config
from fleetsim.errors import ConfigError
from fleetsim.fit import goodness as gof
from fleetsim.fit.verdicts import holm
from fleetsim.signals import SETTLED, build_signal_tables
from fleetsim.telemetry import generate_telemetry

_NIGHT = ["7h"] * 6 + ["2h"] + ["40m"] * 14 + ["2h", "5h", "7h"]
_IDLE = ["6h"] * 6 + ["1h"] + ["30m"] * 14 + ["1h", "3h", "5h"]
_P = {
    "idle": [0.90, 0.92, 0.93, 0.93, 0.92, 0.88, 0.70, 0.45, 0.35, 0.35, 0.38, 0.40,
             0.35, 0.38, 0.40, 0.40, 0.38, 0.35, 0.30, 0.28, 0.30, 0.40, 0.60, 0.80],
    "charging": [0.70, 0.75, 0.78, 0.78, 0.76, 0.70, 0.50, 0.25, 0.15, 0.12, 0.12, 0.12,
                 0.14, 0.14, 0.12, 0.12, 0.14, 0.18, 0.22, 0.25, 0.30, 0.40, 0.55, 0.65],
    "unmetered": [0.88, 0.88, 0.88, 0.88, 0.88, 0.86, 0.80, 0.55, 0.40, 0.45, 0.50, 0.50,
                  0.45, 0.50, 0.50, 0.50, 0.45, 0.45, 0.60, 0.72, 0.80, 0.84, 0.86, 0.88],
}
_SETTLED = [0.60, 0.66, 0.70, 0.70, 0.68, 0.60, 0.40, 0.15, 0.05, 0.04, 0.04, 0.04,
            0.05, 0.05, 0.04, 0.04, 0.05, 0.06, 0.08, 0.10, 0.15, 0.25, 0.40, 0.52]
_TRAITS = {
    "sample_cost": {"median": "60ms", "spread": 0.3}, "memory": {"median": "4GB", "spread": 0.2},
    "battery_capacity": {"median": "15Wh", "spread": 0.1}, "train_power": {"median": "3.5W", "spread": 0.2},
    "download_rate": {"median": "20Mbit/s", "spread": 0.8}, "upload_rate": {"median": "6Mbit/s", "spread": 0.8},
    "samples": {"median": 180, "spread": 1.5},
}
HOLE = (2 * 86400.0, 2 * 86400.0 + 4 * 3600.0)  # unobserved, from the horizon's start, s


def _config(devices: int = 40, shift_hours: int = 0, settled_mean_on=_NIGHT):
    """A small invented Inkwren fleet over four days (Lisbon's clocks change on the third): a
    phone whose settled state holds idle and charging on, a tablet with three independent
    chains, check-ins every 30 minutes. ``shift_hours`` moves charging (and the phone's settled
    state, kept within it) that many hours later."""
    signals = {"idle": {"hourly": _P["idle"], "mean_on": _IDLE},
               "charging": {"hourly": list(np.roll(_P["charging"], shift_hours)), "mean_on": _NIGHT},
               "unmetered": {"hourly": _P["unmetered"], "mean_on": "3h"}}
    settled = [min(a, b) for a, b in zip(_SETTLED, signals["charging"]["hourly"], strict=True)]
    phone = {"share": 0.6, **_TRAITS, "signals": signals,
             "settled": {"hourly": settled, "mean_on": settled_mean_on, "turns_on": ["idle", "charging"]}}
    return build_config({
        "scenario": "Inkwren goodness test fleet (invented)",
        "horizon": {"start": "2026-03-27T00:00:00Z", "duration": "4d"},
        "fleet": {"devices": devices, "device_types": {"reader-phone": phone,
                                                       "reader-tablet": {"share": 0.4, **_TRAITS, "signals": signals}},
                  "regions": {"harbour": {"share": 0.5, "timezone": "Europe/Lisbon"},
                              "ridge": {"share": 0.5, "timezone": "Asia/Kolkata", "weekend_days": ["sunday"]}}},
        "workload": {"model_size": "20MB", "requires": ["idle", "charging", "unmetered"]},
        "rounds": {"target_reports": 10, "min_reports": 8, "selection_timeout": "2m", "report_deadline": "6m",
                   "checkin_every": "30m"},
    }, source="<goodness test>")


def _logs(config, seed: int, durations: str = "exponential", snapshots: bool = True) -> SimpleNamespace:
    """Telemetry of ``config``'s model (or of ``durations``), with the HOLE cut out of every log."""
    tel = generate_telemetry(config, seed, durations=durations)
    g0, g1 = (config.horizon.start.timestamp() + h for h in HOLE)
    iv = tel.intervals
    iv = pd.concat([iv[iv["start_s"] < g0].assign(end_s=lambda f: np.minimum(f["end_s"], g0)),
                    iv[iv["end_s"] > g1].assign(start_s=lambda f: np.maximum(f["start_s"], g1))], ignore_index=True)
    snaps = tel.snapshots[(tel.snapshots["time_s"] < g0) | (tel.snapshots["time_s"] >= g1)].reset_index(drop=True)
    return SimpleNamespace(intervals=iv[iv["end_s"] > iv["start_s"]], snapshots=snaps if snapshots else None)


def _rejected(report) -> set[str]:
    return {c.name for c in report.checks if c.verdict == "rejected"}


def test_logs_from_the_model_pass_at_about_the_nominal_rate():
    config, seeds, verdicts, p = _config(), range(20), [], {}
    for seed in seeds:
        report = gof.goodness_of_fit(config, _logs(config, 100 + seed), seed=seed, draws=199)
        verdicts.append(report.verdict.startswith("the model is rejected"))
        for c in report.checks:
            p.setdefault(c.name, []).append(c.p_value)
    # Holm keeps the family-wise error at or below 5%, so over 20 independent seeds the count of
    # rejected models is no larger in law than Binomial(20, 0.05): P(4 or more) = 0.016 (scipy.stats.binom).
    assert stats.binom.sf(3, 20, 0.05) < 0.02
    assert sum(verdicts) <= 3, verdicts
    # Each check's p-values over the seeds are uniform under the model (KS against U(0, 1),
    # Bonferroni over the checks at 1%): a check that says "accepted" whatever it sees fails here.
    assert len(p) == 10
    for name, values in p.items():
        assert len(values) == 20
        assert stats.kstest(values, "uniform").pvalue > 0.01 / len(p), (name, np.round(values, 3))


@pytest.mark.parametrize("shape", [0.5, 3.0])
def test_weibull_on_spells_with_the_model_means_are_rejected(shape):
    # Measured power on these seeds (intervals only, 99 draws): shape 0.5 and 3 are both rejected
    # by the time-rescaled on-spell checks on 10 of 10 seeds; the test asks for 9.
    config, caught = _config(), 0
    for seed in range(10):
        report = gof.goodness_of_fit(config, _logs(config, 300 + seed, f"weibull:{shape:g}", snapshots=False),
                                     seed=seed, draws=99)
        caught += any(name.startswith("on-spell durations") for name in _rejected(report))
    assert caught >= 9


def test_a_model_with_its_charging_hours_moved_is_rejected_naming_where():
    truth, wrong = _config(), _config(shift_hours=6)
    report = gof.goodness_of_fit(wrong, _logs(truth, 7), seed=1, draws=199)
    assert report.verdict.startswith("the model is rejected: ")
    assert "Holm's method over 10 checks" in report.verdict
    share = next(c for c in report.checks if c.name == "eligible share by hour (intervals)")
    assert share.verdict == "rejected"
    # The hours the check names are hours where the two charging patterns differ by 0.15 or more.
    named = [int(h) for h in re.findall(r"(\d\d)h: logs", share.where)]
    assert named
    moved = np.roll(_P["charging"], 6)
    assert all(abs(_P["charging"][h] - moved[h]) >= 0.15 for h in named), share.where
    assert {"next check-in state: charging"} <= _rejected(report)
    # The report: JSON for a side file, lines for the terminal with the standing caution, figures.
    text = json.dumps(report.to_dict())
    assert "holm" in text and report.lines()[-1].startswith("caution: ") and "review" in report.lines()[-1]
    assert set(report.figures) == {"eligible-share-intervals", "eligible-share-snapshots", "rescaled-durations",
                                   "transition-calibration"}
    assert all(isinstance(f, Figure) and f.axes and f.axes[0].has_data() for f in report.figures.values())


def test_only_the_held_out_devices_are_judged():
    truth, wrong = _config(), _config(shift_hours=6)
    good, bad = _logs(truth, 11), _logs(wrong, 12)
    for frame in ("intervals", "snapshots"):
        part = getattr(bad, frame)
        setattr(bad, frame, part.assign(device_id="moved-" + part["device_id"]))
    both = SimpleNamespace(**{f: pd.concat([getattr(good, f), getattr(bad, f)], ignore_index=True)
                              for f in ("intervals", "snapshots")})
    ids = set(good.intervals["device_id"])
    kept = gof.goodness_of_fit(truth, both, held_out=ids, seed=2, draws=199)
    assert not _rejected(kept), kept.lines()
    judged = gof.goodness_of_fit(truth, both, held_out=set(bad.intervals["device_id"]), seed=2, draws=199)
    assert judged.verdict.startswith("the model is rejected")


def _fleet(config):
    types, regions = tuple(config.fleet.device_types), tuple(config.fleet.regions)
    tables = build_signal_tables(config, types, regions, end_s=3 * 86400.0)
    return gof._Fleet(tables, np.zeros((4, tables.steps), int), types, regions, [0, 1, 2], 1), tables


def test_the_matrix_exponential_and_the_on_spell_law():
    rng = np.random.default_rng(3)
    rates = rng.exponential(1.0, (50, 3, 3)) * rng.choice([1e-3, 1.0, 40.0], (50, 1, 1))
    q = rates - np.eye(3) * (rates.sum(-1)[..., None] + rng.uniform(0, 1, (50, 1, 1)))  # leaky generators
    assert np.allclose(gof._expm(q), np.stack([linalg.expm(m) for m in q]), rtol=1e-9, atol=1e-12)  # scipy
    fl, tables = _fleet(_config())
    t, x = np.array([3600.0, 40000.0]), np.array([5400.0, 20000.0])
    # A signal the settled state does not cover (the tablet's idle, group 2) is one chain: the
    # survival is exp(-integrated leaving rate), SignalTables.survival's closed form.
    g, s = np.array([2, 2]), np.array([0, 0])
    assert np.allclose(gof._survival(fl, g, s, t, x), tables.survival(g, 1 + s, t, t + x, np.ones(2, bool)), rtol=1e-9)
    # A covered one (the phone's idle, group 0, in a fleet whose settled spells last 10 minutes
    # against idle's 30 by day): against spells simulated with next_flip, the chain that turned
    # the signal on picked as the on-rates split it (about 3 to 1 here, so the split matters).
    fl, tables = _fleet(_config(settled_mean_on="10m"))
    n, t0 = 20000, np.full(20000, 30000.0)
    k0 = tables.step_of(t0[:1])
    up_own, up_settled = tables.leave_rate[0, 0, 1, k0], tables.leave_rate[0, 0, SETTLED, k0]
    own = rng.random(n) < up_own / (up_own + up_settled)
    state, now, left = np.stack([~own, own]), np.stack([t0, t0]), np.full(n, np.inf)  # [settled, own]
    chain, group = np.array([[SETTLED], [1]]).repeat(n, 1), np.zeros((2, n), int)
    alive = np.ones(n, bool)
    while alive.any():
        nxt = tables.next_flip(group.ravel(), chain.ravel(), now.ravel(), state.ravel().astype(np.int64),
                               rng.exponential(size=2 * n)).reshape(2, n)
        first = np.argmin(nxt, axis=0)
        when = nxt[first, np.arange(n)]
        state[first, np.arange(n)] ^= alive
        now[:] = np.where(alive, when, now)
        ended = alive & ~state.any(0)
        left[ended] = when[ended] - t0[ended]
        alive &= ~ended & np.isfinite(when)  # past the tables' end: longer than any length asked below
    assert 0.6 < up_own / (up_own + up_settled) < 0.85
    for length in (600.0, 1800.0, 7200.0):
        model = gof._survival(fl, np.zeros(1, int), np.array([0]), t0[:1], np.array([length]))[0]
        seen = np.mean(left > length)
        assert abs(seen - model) < 4 * math.sqrt(model * (1 - model) / n), (length, seen, model)


def test_holm_on_a_worked_example():
    # Holm (1979): sorted p 0.005, 0.01, 0.03, 0.04 against 0.05/4, 0.05/3, 0.05/2, 0.05/1; the
    # third fails, so only the first two are rejected. Adjusted p: 0.02, 0.03, 0.06, 0.06 (worked by hand).
    checks = [gof.Check(name, 0.0, 1, p, "", "") for name, p in zip("abcd", [0.01, 0.04, 0.03, 0.005], strict=True)]
    out = holm(checks, 0.05)
    assert [c.verdict for c in out] == ["rejected", "accepted", "accepted", "rejected"]
    assert np.allclose([c.holm_p for c in out], [0.03, 0.06, 0.06, 0.02])


def test_bad_input_is_one_line_naming_the_key_and_the_value():
    config = _config()
    logs = _logs(config, 5)
    for frame in ("intervals", "snapshots"):
        part = getattr(logs, frame)
        setattr(logs, frame, part.assign(device_type=part["device_type"].replace("reader-tablet", "slate")))
    with pytest.raises(ConfigError) as err:
        gof.goodness_of_fit(config, logs)
    assert len(str(err.value).splitlines()) == 1
    assert "fleet.device_types" in str(err.value) and "'slate'" in str(err.value)
    with pytest.raises(ConfigError, match="no interval or snapshot rows of the held-out devices"):
        gof.goodness_of_fit(config, _logs(config, 5), held_out=["nobody"])
    with pytest.raises(ValueError, match="replicas must be at least 1"):
        gof.goodness_of_fit(config, _logs(config, 5), replicas=0)
