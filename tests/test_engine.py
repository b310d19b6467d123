"""The engine's invariants, determinism and the effect of each setting it exposes."""

import json

import numpy as np
import pytest

import fleetsim
from fleetsim.config import example_path, load_config
from fleetsim.errors import FleetsimError
from fleetsim.events import OUTCOMES, ROUND_STATUS, WASTE_CAUSES
from fleetsim.policies import BUILTIN_POLICIES

SMALL = ["fleet.devices=6000", "horizon.duration=1d", "rounds.rest=4h"]


def run(*overrides, seed=1):
    return fleetsim.simulate(load_config(example_path(), SMALL + list(overrides)), seed=seed)


@pytest.fixture(scope="module")
def base():
    return run()


def test_same_seed_same_summary_bit_for_bit_and_other_seed_differs():
    a, b, c = run(seed=5), run(seed=5), run(seed=6)
    assert json.dumps(a.summary, sort_keys=True) == json.dumps(b.summary, sort_keys=True)
    assert a.participations.equals(b.participations)
    assert not a.participations.equals(c.participations)


def test_round_protocol_invariants(base):
    rounds, parts = base.rounds, base.participations
    settings = base.config.rounds
    assert len(rounds) > 20
    assert (rounds["accepted"] <= settings.accept_count).all()
    assert (rounds["selected_s"] - rounds["opened_s"] <= settings.selection_timeout + 1e-6).all()
    assert (rounds["closed_s"] - rounds["selected_s"] <= settings.report_deadline + 1e-6).all()
    # Rounds never overlap and are separated by the aggregation time.
    gaps = rounds["opened_s"].to_numpy()[1:] - rounds["closed_s"].to_numpy()[:-1]
    assert (gaps >= settings.aggregation_time - 1e-6).all()
    status = rounds["status"].to_numpy()
    committed = rounds[status == "committed"]
    assert (committed["reports"] >= settings.required_reports).all()
    assert (committed["reports"] <= settings.accept_count).all()
    timed_out = rounds[status == "selection-timeout"]
    assert (timed_out["accepted"] < settings.required_reports).all()
    # Used reports belong to committed rounds only, and each committed round's used count is its reports.
    used_per_round = parts[parts["used"]].groupby("round").size()
    assert set(used_per_round.index) <= set(committed["round"])
    assert (used_per_round.reindex(committed["round"]).to_numpy() == committed["reports"].to_numpy()).all()
    per_round = parts.groupby("round").size()
    assert (per_round.reindex(rounds["round"], fill_value=0).to_numpy() == rounds["accepted"].to_numpy()).all()


def test_participations_respect_rest_and_never_overlap(base):
    parts = base.participations.sort_values(["device", "accepted_s"])
    same = parts["device"].to_numpy()[1:] == parts["device"].to_numpy()[:-1]
    gap = parts["accepted_s"].to_numpy()[1:] - parts["ended_s"].to_numpy()[:-1]
    assert (gap[same] >= base.config.rounds.rest - 1e-6).all()
    assert (parts["ended_s"] >= parts["accepted_s"]).all()


def test_outcomes_and_waste_are_consistent(base):
    parts = base.participations
    outcome = parts["outcome"].to_numpy()
    waste = parts["waste_cause"].to_numpy()
    assert (waste[parts["used"]] == "used").all()
    assert (outcome[parts["used"]] == "on-time").all()
    dropped = outcome == "dropout"
    assert (parts["dropout_cause"][dropped] != "none").all() and (parts["dropout_cause"][~dropped] == "none").all()
    # A completed task did all its work; an interrupted one did at most that.
    done = outcome == "on-time"
    assert np.allclose(parts["compute_s"][done], parts["train_s"][done])
    assert (parts["compute_s"] <= parts["train_s"] + 1e-9).all()
    w = base.summary["waste"]
    total = parts["compute_s"].sum()
    assert w["compute_fraction"] == pytest.approx(parts.loc[~parts["used"], "compute_s"].sum() / total)
    by_cause = sum(v["compute_s"] for v in w["by_cause"].values())
    assert by_cause == pytest.approx(w["compute_s"])


def test_only_devices_whose_memory_fits_take_part():
    result = run("workload.memory_needed=5GB")
    mem = result.fleet.memory_bytes[result.participations["device"].to_numpy()]
    assert (mem >= 5e9).all()
    assert (result.fleet.memory_bytes < 5e9).any()


def test_summary_holds_the_documented_keys(base):
    s = base.summary
    for key in ("seed", "config_hash", "devices", "simulated_hours", "rounds", "waste", "bias", "caution"):
        assert key in s
    for key in ("attempted", "committed", "ended_by", "committed_per_hour", "duration_s"):
        assert key in s["rounds"]
    assert set(s["rounds"]["duration_s"]) == {"p50", "p90", "p99"}
    for key in ("compute_fraction", "bytes_fraction", "energy_fraction", "by_cause", "by_device_type"):
        assert key in s["waste"]
    shares = {"fleet_share", "eligible_share", "accepted_share", "report_share", "weight_share", "representation_ratio"}
    for name, row in s["bias"]["by_device_type"].items():
        assert shares <= set(row), name
    for key in ("coverage", "gini", "chi_square_device_type_p"):
        assert key in s["bias"]
    fleet_shares = [v["fleet_share"] for v in s["bias"]["by_device_type"].values()]
    assert sum(fleet_shares) == pytest.approx(1.0)


def test_more_over_selection_fills_rounds_faster_and_wastes_more():
    plenty = ["fleet.devices=40000", "rounds.rest=2h", "rounds.min_reports=60"]  # check-ins are not scarce
    low = run(*plenty, "rounds.over_selection=1.0")
    high = run(*plenty, "rounds.over_selection=1.6")
    assert high.summary["rounds"]["duration_s"]["p50"] < low.summary["rounds"]["duration_s"]["p50"]
    assert high.summary["waste"]["compute_fraction"] > low.summary["waste"]["compute_fraction"]


def test_a_shorter_deadline_closes_rounds_sooner():
    short = run("rounds.report_deadline=90s", "rounds.min_reports=20")
    assert short.rounds.eval("closed_s - selected_s").max() <= 90 + 1e-6
    assert short.summary["waste"]["by_cause"]["stopped"]["participations"] > 0


def test_server_outage_opens_no_round_inside_its_window():
    result = run("disruptions=[{kind: server-outage, start: 6h, duration: 3h}]")
    rounds = result.rounds
    inside = (rounds["opened_s"] >= 6 * 3600) & (rounds["opened_s"] < 9 * 3600)
    assert not inside.any()
    cut = rounds[(rounds["opened_s"] < 6 * 3600) & (rounds["closed_s"] >= 6 * 3600 - 1e-6)]
    assert (cut["status"] == "server-outage").all()


def test_network_slowdown_lengthens_downloads_where_and_when_it_applies():
    spec = "disruptions=[{kind: network-slowdown, start: 0s, duration: 12h, factor: 0.25, regions: [south-asia]}]"
    result = run(spec)
    parts = result.participations
    region = parts["region"].to_numpy()
    early = parts["started_s"] < 12 * 3600  # a disruption applies by the factor at the task start
    rate = 24e6 * 8 / parts["download_s"] / 1e6  # achieved Mbit/s
    nominal = result.fleet.down_mbps[parts["device"].to_numpy()]
    hit = (region == "south-asia") & early
    assert np.allclose(rate[hit], 0.25 * nominal[hit])
    assert np.allclose(rate[~hit], nominal[~hit])


def test_crash_surge_raises_crash_dropouts():
    calm = run("workload.crash_rate=0.2/h")
    surge = run("workload.crash_rate=0.2/h", "disruptions=[{kind: crash-surge, start: 0s, duration: 1d, factor: 10}]")
    def crash_share(r):
        d = r.summary["participations"]["dropouts_by_cause"].get("crash", 0)
        return d / r.summary["participations"]["accepted"]
    assert crash_share(surge) > 4 * crash_share(calm)


def test_without_charging_requirement_batteries_drop_out():
    result = run("workload.requires=[idle, unmetered]", "workload.min_battery=45")
    assert result.summary["participations"]["dropouts_by_cause"].get("battery_low", 0) > 0
    parts = result.participations
    assert (parts["battery_start_pct"] >= 45).all()


def test_result_renders_html_with_escaped_names():
    html = run()._repr_html_()
    assert "fleetsim-summary" in html and "budget-phone" in html


def test_an_outage_during_selection_cuts_it_short():
    result = run("disruptions=[{kind: server-outage, start: 2h, duration: 1h}]", "fleet.devices=2000")
    parts = result.participations
    assert (parts["ended_s"] >= parts["accepted_s"]).all()
    inside = (parts["accepted_s"] > 2 * 3600) & (parts["accepted_s"] < 3 * 3600)
    assert not inside.any()


def test_signal_grid_sits_on_utc_quarter_hours_for_any_start():
    # Every IANA offset in use is a multiple of 15 minutes (IANA tz database, from memory), so a
    # grid on UTC quarter hours keeps each step inside one local hour.
    from fleetsim.fleet import sample_fleet
    from fleetsim.signals import build_signal_tables

    config = load_config(example_path(), SMALL + ["horizon.start=2026-03-02T00:10:00Z"])
    fleet = sample_fleet(config, 0)
    tables = build_signal_tables(config, fleet.type_names, fleet.region_names, 86400.0)
    origin = config.horizon.start.timestamp() + tables.origin_s
    assert origin % 900 == 0


def test_summary_survives_a_group_with_no_devices():
    # Equal sample counts collapse the data-size quartiles: some quartiles hold no device.
    names = load_config(example_path()).fleet.device_types
    result = run(*[f"fleet.device_types.{n}.samples=300" for n in names], "fleet.devices=2000", "horizon.duration=2h")
    assert result.summary["bias"]["by_data_quartile"]


@pytest.mark.parametrize("policy", sorted(BUILTIN_POLICIES))
def test_a_device_is_in_a_round_at_most_once_with_checkins_inside_the_window(policy):
    # Check-ins every 10 s with 20-30 s collection windows: each device ticks two or three
    # times per window, and must still be one candidate (and at most one acceptance) a round.
    result = run(f"selection.policy={policy}", "rounds.checkin_every=10s", "fleet.devices=400",
                 "horizon.duration=3h", "rounds.rest=0s")
    parts = result.participations
    assert len(parts) > 100
    assert not parts.duplicated(["round", "device"]).any()
    # Nor in two rounds at once: a device's participations follow one another.
    ordered = parts.sort_values(["device", "accepted_s"])
    same = ordered["device"].to_numpy()[1:] == ordered["device"].to_numpy()[:-1]
    gap = ordered["accepted_s"].to_numpy()[1:] - ordered["ended_s"].to_numpy()[:-1]
    assert (gap[same] >= -1e-9).all()


def test_frames_carry_the_documented_labels(base):
    # docs/metrics.md names the labels; the frames hold them (Categorical), not codes.
    parts, rounds = base.participations, base.rounds
    assert list(parts["outcome"].cat.categories) == list(OUTCOMES)
    assert list(rounds["status"].cat.categories) == list(ROUND_STATUS)
    assert list(parts["waste_cause"].cat.categories) == list(WASTE_CAUSES)
    assert set(parts["device_type"].unique()) <= set(base.fleet.type_names)
    dropouts = parts.query("outcome == 'dropout'")
    assert len(dropouts) == base.summary["participations"]["by_outcome"]["dropout"] > 0
    assert (dropouts["dropout_cause"] != "none").all() and (dropouts["dropout_phase"] != "none").all()
    assert len(rounds.query("status == 'committed'")) == base.summary["rounds"]["committed"]


def test_round_checkins_are_the_eligible_checkins_of_the_selection():
    # First-come accepts each eligible check-in as it comes, so a round that fills sees exactly
    # its accepted devices' check-ins: none after the selection ends (docs/metrics.md).
    result = run("fleet.devices=3000", "horizon.duration=12h", "rounds.rest=30m")
    rounds = result.rounds
    full = rounds["accepted"] == result.config.rounds.accept_count
    assert full.sum() > 10
    assert (rounds.loc[full, "checkins"] == rounds.loc[full, "accepted"]).all()
    assert (rounds["checkins"] >= rounds["accepted"]).all()


class _Twice(BUILTIN_POLICIES["first-come"]):
    """Returns its first candidate twice: the engine must refuse it."""

    def choose(self, candidates, round, rng):
        return np.zeros(min(2, len(candidates)), dtype=np.int64)


def test_a_policy_naming_a_device_twice_is_an_error_naming_policy_round_and_time(monkeypatch):
    from fleetsim import engine

    monkeypatch.setattr(engine, "make_policy", lambda *a, **k: _Twice())
    with pytest.raises(FleetsimError, match=r"_Twice .*in round 0 at t=-?[0-9.]+ s: device \d+ twice"):
        run("fleet.devices=1000", "horizon.duration=1h")


def test_a_device_already_in_the_round_is_refused_even_if_a_window_offers_it_again(monkeypatch):
    # Break the window so that it offers the devices it offered before (a device already
    # accepted in this round comes back): the engine's own check must catch it.
    from fleetsim.selecting import Selector

    original = Selector._window
    seen = {}

    def stale(self, start, end, view, rng):
        out = original(self, start, end, view, rng)
        if view.round_index not in seen and out[0].size:
            seen[view.round_index] = out
        return seen.get(view.round_index, out)

    monkeypatch.setattr(Selector, "_window", stale)
    with pytest.raises(FleetsimError, match=r"FirstCome .*in round \d+ at t=.* already accepted in this round"):
        run("fleet.devices=400", "horizon.duration=2h", "rounds.rest=0s")


@pytest.mark.parametrize("seed", [-1, True, 1.5, 2**63])
def test_simulate_refuses_a_seed_that_is_not_a_whole_number_in_range(seed):
    config = fleetsim.load_config(fleetsim.example_path(), ["fleet.devices=500", "horizon.duration=1h"])
    with pytest.raises(fleetsim.FleetsimError, match=r"seed: expected a whole number .*\(got "):
        fleetsim.simulate(config, seed=seed)
