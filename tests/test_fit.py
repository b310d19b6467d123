"""Fitting the fleet model to telemetry: closed forms, calendars, round trips, the command.

References: Garwood's exact Poisson interval is checked through scipy.stats.poisson (the
limits are where the count's tail probability is 2.5%), the conditional interval for p
through scipy.stats.binomtest's exact (Clopper-Pearson) interval, lognormal fits through
scipy.stats.lognorm.fit, local hours through the IANA rules of America/New_York (daylight
saving time from 2026-03-08 07:00 UTC to 2026-11-01 06:00 UTC). Round trips draw logs from a
known fleet with the engine's own chain tables (fleetsim.signals.SignalTables.next_flip) and
check that the true values fall in the 95% intervals at about the nominal rate.
"""

from __future__ import annotations

import json
import sys
from datetime import datetime
from types import SimpleNamespace

import numpy as np
import pandas as pd
import pytest
import typer
from scipy import stats
from typer.testing import CliRunner

from fleetsim.config import SIGNALS, build_config, example_path, load_yaml_text, read_yaml
from fleetsim.fit import (
    FIT_HEADER,
    battery_laws,
    dask_interval_statistics,
    device_table,
    estimate_rates,
    fit_fleet,
    fit_snapshots,
    fleet_mix,
    held_out_mask,
    interval_statistics,
    render_yaml,
    settled_probability,
    sum_statistics,
    trait_laws,
)
from fleetsim.signals import CHAINS, build_signal_tables, chain_parameters

CATS = ["idle", "charging", "unmetered", "observed"]


def _ts(text: str) -> float:
    return datetime.fromisoformat(text.replace("Z", "+00:00")).timestamp()


def _frame(rows, zone="Etc/UTC", region="r", kind="k"):
    df = pd.DataFrame(rows, columns=["device_id", "signal", "start_s", "end_s"])
    df["device_type"], df["region"], df["timezone"] = kind, region, zone
    df["signal"] = pd.Categorical(df["signal"], categories=CATS)
    return df[["device_id", "device_type", "region", "timezone", "signal", "start_s", "end_s"]]


# ------------------------------------------------------------------ logs drawn from a fleet


def _fleet(kind: str, region: str, weekend_charging: bool = False):
    raw = read_yaml(example_path())
    spec = raw["fleet"]["device_types"][kind]
    spec["share"] = 1.0
    spec.pop("by_region", None)
    if weekend_charging:  # weekend hours that differ from the weekday ones
        phone = raw["fleet"]["device_types"]["budget-phone"]["signals"]["charging"]["weekend"]["hourly"]
        spec["signals"]["charging"]["weekend"] = {"hourly": phone}
    raw["fleet"]["device_types"] = {kind: spec}
    raw["fleet"]["regions"] = {region: dict(raw["fleet"]["regions"][region], share=1.0)}
    return raw, build_config(raw)


def _draw(config, devices: int, seed: int, days: float) -> pd.DataFrame:
    """Interval logs of ``devices`` devices over ``days`` from the engine's chain tables."""
    end = days * 86400.0
    (kind,), (region,) = tuple(config.fleet.device_types), tuple(config.fleet.regions)
    tables = build_signal_tables(config, (kind,), (region,), end)
    rng = np.random.default_rng(seed)
    group = np.zeros(devices, dtype=np.int64)
    spells = []  # per chain: (device, start, end) of its on-spells within [0, end)
    for c in range(len(CHAINS)):
        t = np.full(devices, tables.origin_s)
        on = rng.random(devices) < tables.p[group, c, 0]
        began = np.where(on, 0.0, np.nan)
        dev, a, b = [], [], []
        alive = np.arange(devices)
        while alive.size:
            nxt = tables.next_flip(group[alive], np.full(alive.size, c), t[alive], on[alive].astype(np.int64),
                                   rng.exponential(size=alive.size))
            nxt = np.minimum(nxt, end)
            ending = on[alive]
            dev.append(alive[ending])
            a.append(np.maximum(began[alive[ending]], 0.0))
            b.append(np.maximum(nxt[ending], 0.0))
            began[alive[~ending]] = nxt[~ending]
            on[alive] ^= True
            t[alive] = nxt
            alive = alive[nxt < end]
        dev, a, b = np.concatenate(dev), np.concatenate(a), np.concatenate(b)
        keep = b > a
        spells.append((dev[keep], a[keep], b[keep]))
    rows = []
    for s, name in enumerate(SIGNALS):
        dev, a, b = spells[1 + s]
        if tables.covers[0, s]:  # the signal is on when its own chain or the settled state is
            dev, a, b = (np.concatenate([x, y]) for x, y in zip(spells[1 + s], spells[0], strict=True))
        order = np.lexsort((a, dev))
        dev, a, b = dev[order], a[order], b[order]
        run_end = pd.Series(b).groupby(dev).cummax().to_numpy()
        new = np.ones(dev.size, dtype=bool)
        new[1:] = (dev[1:] != dev[:-1]) | (a[1:] > run_end[:-1])
        label = np.cumsum(new)
        merged = pd.DataFrame({"dev": dev, "a": a, "b": b, "k": label}).groupby("k").agg(
            dev=("dev", "first"), a=("a", "min"), b=("b", "max"))
        rows.append(pd.DataFrame({"dev": merged["dev"], "signal": name, "start_s": merged["a"], "end_s": merged["b"]}))
    rows.append(pd.DataFrame({"dev": np.arange(devices), "signal": "observed", "start_s": 0.0, "end_s": end}))
    df = pd.concat(rows, ignore_index=True)
    t0 = config.horizon.start.timestamp()
    df["start_s"] += t0
    df["end_s"] += t0
    df["device_id"] = [f"{kind}-{i:04d}" for i in df["dev"]]
    out = _frame(df[["device_id", "signal", "start_s", "end_s"]].itertuples(index=False),
                 config.fleet.regions[region].timezone, region, kind)
    return out.sort_values(["device_id", "signal", "start_s"]).reset_index(drop=True)


def _snapshots(intervals: pd.DataFrame, seed: int, every: float = 600.0, keep: float = 0.7) -> pd.DataFrame:
    """Check-ins every ``every`` seconds (random phase), each heard with probability ``keep``."""
    rng = np.random.default_rng(seed)
    obs = intervals[intervals["signal"] == "observed"]
    parts = []
    for row in obs.itertuples(index=False):
        t = np.arange(row.start_s + rng.uniform(0, every), row.end_s, every)
        parts.append(pd.DataFrame({"device_id": row.device_id, "device_type": row.device_type, "region": row.region,
                                   "timezone": row.timezone, "time_s": t[rng.random(t.size) < keep]}))
    snap = pd.concat(parts, ignore_index=True)
    for s in SIGNALS:
        on = np.zeros(len(snap), dtype=bool)
        rows = intervals[intervals["signal"] == s]
        for dev, spells in rows.groupby("device_id"):
            m = (snap["device_id"] == dev).to_numpy()
            t = snap["time_s"].to_numpy()[m]
            i = np.searchsorted(spells["start_s"].to_numpy(), t, side="right") - 1
            on[m] = (i >= 0) & (t < spells["end_s"].to_numpy()[np.maximum(i, 0)])
        snap[s] = on
    snap["battery"] = np.where(snap["charging"], rng.beta(6, 2, len(snap)), rng.beta(3, 3, len(snap))) * 100
    return snap.sort_values(["device_id", "time_s"]).reset_index(drop=True)


@pytest.fixture(scope="module")
def tablets():
    """14 days of 200 tablets in north-atlantic (no settled state; across a DST change)."""
    raw, config = _fleet("tablet", "north-atlantic", weekend_charging=True)
    return raw, config, _draw(config, 200, 11, 14.0)


def _coverage(estimates: pd.DataFrame, config, chains, key="p") -> list[bool]:
    (kind,), (region,) = tuple(config.fleet.device_types), tuple(config.fleet.regions)
    spec = config.fleet.group_spec(kind, region)
    hits = []
    for chain in chains:
        pattern = spec.signals[chain.removeprefix("own-")]
        for weekend, day in ((False, "weekday"), (True, "weekend")):
            e = estimates[(estimates["chain"] == chain) & (estimates["day"] == day)].sort_values("hour")
            alone = (e["pooled"] == "").to_numpy()
            p, d = (np.array(v) for v in pattern.profile(weekend))
            if key == "p":
                hits += list(((e["p_low"] <= p) & (p <= e["p_high"])).to_numpy()[alone])
            hits += list(((e["d_low"] <= d) & (d <= e["d_high"])).to_numpy()[alone])
    return hits


# ------------------------------------------------------------------------------ closed forms


def test_worked_example_gives_exact_p_d_and_garwood_intervals():
    # One device in UTC, observed all of Monday 2026-03-02; idle on for 12 spells of 2 minutes
    # in hour 10, each followed by 3 minutes off: 24 min on, 36 min off, 12 ups and 12 downs.
    day = _ts("2026-03-02T00:00:00Z")
    rows = [("a", "observed", day, day + 86400)]
    rows += [("a", "idle", day + 36000 + 300 * i + 60, day + 36000 + 300 * i + 180) for i in range(12)]
    est, _ = estimate_rates(interval_statistics(_frame(rows)))
    cell = est[(est["chain"] == "idle") & (est["day"] == "weekday") & (est["hour"] == 10)].iloc[0]
    assert cell["pooled"] == "" and cell["up"] == 12 and cell["down"] == 12
    assert cell["on_s"] == 1440 and cell["off_s"] == 2160
    # p = a / (a + b) with a = 12 / 36 min, b = 12 / 24 min: 24 / 60; d = 2 min
    assert cell["p"] == pytest.approx(0.4, abs=1e-12) and cell["d"] == pytest.approx(120.0, abs=1e-9)
    # Garwood: the rate limits are where P(N >= 12) and P(N <= 12) are 2.5% (scipy.stats.poisson)
    low_rate, high_rate = 1 / cell["d_high"], 1 / cell["d_low"]
    assert stats.poisson.sf(11, low_rate * 1440) == pytest.approx(0.025, abs=1e-9)
    assert stats.poisson.cdf(12, high_rate * 1440) == pytest.approx(0.025, abs=1e-9)
    # p's interval: Clopper-Pearson for up / (up + down), mapped by r = pi / (1 - pi) x T1 / T0
    ci = stats.binomtest(12, 24).proportion_ci(0.95, method="exact")
    for pi, got in ((ci.low, cell["p_low"]), (ci.high, cell["p_high"])):
        r = pi / (1 - pi) * 1440 / 2160
        assert got == pytest.approx(r / (1 + r), abs=1e-9)


def test_local_hours_follow_new_york_daylight_saving():
    # Sunday 2026-03-08: 06:10Z is 01:10 EST, 07:20Z is 03:20 EDT (02:00-03:00 does not exist).
    # Sunday 2026-11-01: 05:00Z-07:00Z is 01:00 EDT then 01:00 EST: two hours of local hour 1.
    s, f = _ts("2026-03-08T05:00:00Z"), _ts("2026-11-01T05:00:00Z")
    rows = [("a", "observed", s, s + 4 * 3600), ("a", "idle", s + 4200, s + 8400),
            ("b", "observed", f, f + 7200)]
    st = interval_statistics(_frame(rows, zone="America/New_York"))
    idle = st[(st["chain"] == "idle") & (st["device_type"] == "k")].set_index(["day", "hour"])
    weekend = idle.loc["weekend"]
    assert weekend.loc[1, "on_ms"] == 3000_000 and weekend.loc[1, "up"] == 1  # 01:10-02:00 EST
    assert weekend.loc[3, "on_ms"] == 1200_000 and weekend.loc[3, "down"] == 1  # 03:00-03:20 EDT
    assert weekend.loc[2, ["on_ms", "off_ms"]].sum() == 0
    assert weekend.loc[0, "off_ms"] == 3600_000 and weekend.loc[4, "off_ms"] == 3600_000
    assert weekend.loc[1, "off_ms"] == 600_000 + 7200_000  # 01:00-01:10 in March; both 01:00s in November
    assert idle.loc["weekday", ["on_ms", "off_ms"]].to_numpy().sum() == 0


def test_settled_is_all_three_on_and_own_spells_are_counted_outside_it():
    day = _ts("2026-03-02T10:00:00Z")
    m = 60.0
    rows = [("a", "observed", day, day + 60 * m),
            ("a", "idle", day + 5 * m, day + 40 * m), ("a", "charging", day + 10 * m, day + 30 * m),
            ("a", "unmetered", day, day + 50 * m)]
    st = interval_statistics(_frame(rows)).set_index(["chain", "day", "hour"])
    settled = st.loc[("settled", "weekday", 10)]
    assert (settled["on_ms"], settled["up"], settled["down"]) == (20 * 60_000, 1, 1)  # 10:10-10:30
    own = st.loc[("own-idle", "weekday", 10)]
    # idle on and not all on: 10:05-10:10 and 10:30-10:40; the spell ends at 10:40 (counted);
    # 10:10 (all on) closes the window uncounted
    assert (own["on_ms"], own["down"]) == (15 * 60_000, 1)
    unmetered = st.loc[("own-unmetered", "weekday", 10)]
    assert (unmetered["on_ms"], unmetered["down"]) == (30 * 60_000, 1)


def test_settled_probability_inverts_the_engines_all_on_probability():
    raw, _ = _fleet("budget-phone", "north-atlantic")
    config = build_config(raw)
    hours, weekend = np.arange(24), np.zeros(24, dtype=bool)
    p, _ = chain_parameters(config, "budget-phone", "north-atlantic", hours, weekend)
    # The engine's chains are independent: all three on = settled, or all three own chains on.
    all_on = p[0] + (1 - p[0]) * p[1] * p[2] * p[3]
    signals = [np.array(config.fleet.group_spec("budget-phone", "north-atlantic").signals[s].hourly) for s in SIGNALS]
    assert settled_probability(all_on, signals) == pytest.approx(p[0], abs=1e-6)
    assert settled_probability(np.prod(signals, axis=0), signals) == pytest.approx(0.0, abs=1e-9)


# -------------------------------------------------------------------------------- round trips


def test_intervals_round_trip_covers_true_values_at_nominal_rate(tablets):
    _, config, logs = tablets
    est, _ = estimate_rates(interval_statistics(logs))
    hits = _coverage(est, config, SIGNALS)
    # 288 (p, d) cells at nominal 95%: Binomial(288, 0.95) is below 90% or above 99% with
    # probability under 0.001 each; a shifted hour, a wrong rate or a lost change fails it
    assert len(hits) >= 250
    assert 0.90 <= np.mean(hits) <= 0.99, np.mean(hits)


def test_settled_fleet_round_trip():
    _, config = _fleet("budget-phone", "north-atlantic")
    logs = _draw(config, 400, 5, 14.0)
    est, _ = estimate_rates(interval_statistics(logs))
    hits = _coverage(est, config, [f"own-{s}" for s in SIGNALS], key="d")  # exact under the model
    assert len(hits) >= 100 and np.mean(hits) >= 0.88, (len(hits), np.mean(hits))
    raw = read_yaml(example_path())
    fitted = fit_fleet(logs, None, None, raw).fleet["fleet"]["device_types"]["budget-phone"]
    true = config.fleet.group_spec("budget-phone", "north-atlantic").settled
    got, want = np.array(fitted["settled"]["hourly"]), np.array(true.hourly)
    # approximate (the chains taken near their hour's stationary law, which the slow night
    # chains lag behind in the evening): within 0.15 everywhere, 0.035 on average
    assert np.abs(got - want).max() < 0.15 and np.abs(got - want).mean() < 0.035, np.abs(got - want)
    naive = est[(est["chain"] == "settled") & (est["day"] == "weekday")].sort_values("hour")["p"].to_numpy()
    day = slice(9, 17)  # steady daytime hours: all three own chains on at once inflate the naive all-on share
    assert np.abs(got - want)[day].mean() < np.abs(naive - want)[day].mean()


def test_snapshots_round_trip_covers_true_values():
    _, config = _fleet("tablet", "north-atlantic", weekend_charging=True)
    snap = _snapshots(_draw(config, 40, 3, 7.0), seed=3)
    est, warnings = fit_snapshots(snap)
    hits = _coverage(est, config, SIGNALS)
    # Wald intervals from the observed information: asymptotically 95%; 250+ cells, >= 88%
    assert len(hits) >= 250 and np.mean(hits) >= 0.88, (len(hits), np.mean(hits))
    # one line per type says whether the likelihood-ratio test gave it a settled state (a tablet
    # has none); every other line names the check-ins that could not pin a cell down
    decisions = [w for w in warnings if "settled state: likelihood ratio" in w]
    assert len(decisions) == 1 and decisions[0].startswith("tablet: no settled state"), decisions
    assert all("check-ins" in w for w in warnings if w not in decisions), warnings


def test_dask_path_gives_identical_statistics_and_estimates(tablets):
    dd = pytest.importorskip("dask.dataframe")
    _, _, logs = tablets
    logs = logs[logs["device_id"] < "tablet-0040"]
    pandas_stats = sum_statistics(interval_statistics(logs))
    dask_stats = dask_interval_statistics(dd.from_pandas(logs, npartitions=3))
    pd.testing.assert_frame_equal(pandas_stats, dask_stats.reset_index(drop=True), check_dtype=False)
    a, _ = estimate_rates(pandas_stats)
    b, _ = estimate_rates(dask_stats)
    pd.testing.assert_frame_equal(a, b, check_dtype=False, check_exact=True)


# ---------------------------------------------------------------------- mix, traits, battery


def test_mix_gives_a_region_its_own_type_mix_only_beyond_sampling_noise():
    rng = np.random.default_rng(2)
    rows = []
    for region, mix, n in (("a", [0.5, 0.5], 2000), ("b", [0.5, 0.5], 2000), ("c", [0.8, 0.2], 1000)):
        kinds = rng.choice(["x", "y"], size=n, p=mix)
        rows += [(f"{region}{i}", k, region) for i, k in enumerate(kinds)]
    mix = fleet_mix(device_table(pd.DataFrame(rows, columns=["device_id", "device_type", "region"])))
    assert set(mix["type_mix"]) == {"c"}
    assert mix["regions"]["c"][0] == pytest.approx(0.2)
    ci = stats.binomtest(int(mix["regions"]["c"][3]), 5000).proportion_ci(method="exact")
    assert (mix["regions"]["c"][1], mix["regions"]["c"][2]) == pytest.approx((ci.low, ci.high))


def test_traits_are_lognormal_mles_and_battery_moments():
    rng = np.random.default_rng(4)
    x = rng.lognormal(np.log(14.0), 0.7, 500)
    traits = pd.DataFrame({"device_id": range(500), "device_type": "k", "region": "r", "download_mbps": x})
    median, low, high, spread, s_low, s_high, n = trait_laws(traits)["k"]["download_rate"]
    shape, _, scale = stats.lognorm.fit(x, floc=0)  # scipy's MLE: shape = sigma, scale = exp(mu)
    assert (median, spread, n) == (pytest.approx(scale, rel=1e-6), pytest.approx(shape, rel=1e-6), 500)
    assert low < 14.0 < high and s_low < 0.7 < s_high
    snap = pd.DataFrame({"device_id": np.repeat(np.arange(400), 5), "device_type": "k",
                         "charging": np.tile([True, False, True, False, False], 400)})
    snap["battery"] = np.where(snap["charging"], rng.beta(6, 2, 2000), rng.beta(3, 3, 2000)) * 100
    law = battery_laws(snap)["k"]
    beta = stats.beta(6, 2)
    assert law["charging"][0] == pytest.approx(100 * beta.mean(), abs=1.5)
    assert law["charging"][3] == pytest.approx(100 * beta.std(), abs=1.5)
    # independent looks here: the cluster-robust interval is close to the plain t interval
    unplugged = snap.loc[~snap["charging"], "battery"]
    plain = stats.t.interval(0.95, len(unplugged) - 1, loc=unplugged.mean(), scale=stats.sem(unplugged))
    assert law["unplugged"][2] - law["unplugged"][1] == pytest.approx(plain[1] - plain[0], rel=0.2)


def test_held_out_devices_are_a_fixed_hashed_fifth():
    ids = [f"device-{i}" for i in range(10_000)]
    held = held_out_mask(ids, 0.2)
    assert (held == held_out_mask(list(reversed(ids)), 0.2)[::-1]).all()
    # Binomial(10000, 0.2): sd 0.004; 5 sd either side
    assert abs(held.mean() - 0.2) < 0.02
    assert not held_out_mask(ids, 0.0).any()


# ------------------------------------------------------------------------ fleet file, command


def test_fitted_fleet_validates_and_its_yaml_reads_back(tablets):
    raw, config, logs = tablets
    snap = _snapshots(logs[logs["device_id"] < "tablet-0010"], seed=1)
    result = fit_fleet(logs, snap, None, raw)
    text = render_yaml(result.fleet, result.comments, ["test"])
    assert text.startswith(FIT_HEADER + "\n")
    assert load_yaml_text(text) == result.fleet
    fitted = build_config(load_yaml_text(text))
    assert fitted.workload == config.workload and fitted.rounds == config.rounds
    assert fitted.fleet.regions["north-atlantic"].timezone == "America/New_York"
    assert fitted.fleet.device_types["tablet"].settled is None  # independent signals: no settled state
    keys = {row["key"] for row in result.rows}
    assert "fleet.device_types.tablet.signals.idle.weekend.mean_on.23" in keys
    assert "fleet.device_types.tablet.battery_level.charging.mean" in keys
    assert any(w.startswith("tablet: sample_cost: not in the traits table") for w in result.warnings)


def _cli(monkeypatch, logs):
    from fleetsim.cli import fit as command

    monkeypatch.setattr(command, "_read_logs", lambda paths: SimpleNamespace(
        intervals=logs, snapshots=None, traits=None, tasks=None))
    app = typer.Typer()
    app.command()(command.fit)
    return app, CliRunner()


def test_command_writes_fleet_side_file_and_refuses_foreign_files(monkeypatch, tmp_path, tablets):
    raw, _, logs = tablets
    app, runner = _cli(monkeypatch, logs[logs["device_id"] < "tablet-0060"])
    out = tmp_path / "fitted.yaml"
    logfile = tmp_path / "intervals.csv"
    logfile.write_text("x")
    result = runner.invoke(app, [str(logfile), "--out", str(out), "--held-out", "0"])
    assert result.exit_code == 0, result.output
    assert "caution:" in result.output and "not checked" in result.output
    side = json.loads((tmp_path / "fitted.yaml.fit.json").read_text())
    assert side["written_by"] == "fleetsim fit" and side["devices"] == {"fitted": 60, "held_out": 0}
    assert {"key", "estimate", "low", "high", "observations", "pooled"} <= set(side["estimates"][0])
    before = out.read_text()
    again = runner.invoke(app, [str(logfile), "--out", str(out), "--held-out", "0"])
    assert again.exit_code == 2 and "add --force" in again.output
    assert runner.invoke(app, [str(logfile), "--out", str(out), "--held-out", "0", "--force"]).exit_code == 0
    assert out.read_text() == before  # deterministic
    foreign = tmp_path / "mine.yaml"
    foreign.write_text("scenario: mine\n")
    refused = runner.invoke(app, [str(logfile), "--out", str(foreign), "--force"])
    assert refused.exit_code == 2 and "did not write" in refused.output
    assert foreign.read_text() == "scenario: mine\n"


def test_command_guards_missing_goodness_and_bad_options(monkeypatch, tmp_path, tablets):
    _, _, logs = tablets
    app, runner = _cli(monkeypatch, logs[logs["device_id"] < "tablet-0060"])
    monkeypatch.setitem(sys.modules, "fleetsim.fit.goodness", None)  # as if not installed
    out = tmp_path / "f.yaml"
    result = runner.invoke(app, ["logs.csv", "--out", str(out)])
    assert result.exit_code == 0, result.output
    assert "fleetsim.fit.goodness is not installed" in result.output
    assert "held out" in result.output and not (tmp_path / "f.yaml.fit").exists()
    for args, text in ((["--held-out", "1.5"], "--held-out: expected a share"),
                       (["--weekend-days", "north-atlantic=sundy"], "unknown day 'sundy'"),
                       (["--weekend-days", "atlantis=sunday"], "region 'atlantis' is not in the logs")):
        bad = runner.invoke(app, ["logs.csv", "--out", str(tmp_path / "g.yaml"), *args])
        assert bad.exit_code == 2 and text in bad.output and "Traceback" not in bad.output, bad.output
        assert not (tmp_path / "g.yaml").exists()


def test_a_rejection_is_printed_with_the_estimation_noise_note(monkeypatch, tmp_path, tablets):
    """`fleetsim fit` adds the note that the checks take the fitted values as exact when a check
    rejects, and only then (the checks are replaced by fixed reports here; their own tests are
    in tests/test_goodness.py)."""
    import fleetsim.fit.goodness as goodness
    from fleetsim.fit.verdicts import Check, GoodnessReport

    _, _, logs = tablets
    app, runner = _cli(monkeypatch, logs[logs["device_id"] < "tablet-0060"])
    for verdict, noted in (("rejected", True), ("accepted", False)):
        check = Check("eligible share by hour (intervals)", 9.0, 4, 0.001, verdict, "")
        monkeypatch.setattr(goodness, "goodness_of_fit",
                            lambda *a, check=check, **k: GoodnessReport([check], "verdict line", {}))
        out = tmp_path / f"{verdict}.yaml"
        result = runner.invoke(app, ["logs.csv", "--out", str(out)])
        assert result.exit_code == 0, result.output
        assert ("note: the checks take the fitted values as exact" in result.output) is noted, result.output
        side = json.loads((tmp_path / f"{verdict}.yaml.fit.json").read_text())
        assert any("fitted values as exact" in n for n in side["goodness"]["notes"]) is noted
