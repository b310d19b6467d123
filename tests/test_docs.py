"""The examples in docs/ run as written."""

import sys
from pathlib import Path

import numpy as np
import pytest

import fleetsim
from fleetsim.config import example_path
from fleetsim.config import load_config as _load_config

from . import CLASSIC_ROUNDS


def load_config(path, overrides=()):
    """The example with its classic round protocol (tests.CLASSIC_ROUNDS), then ``overrides``."""
    return _load_config(path, CLASSIC_ROUNDS + list(overrides))

EXAMPLES = Path(__file__).resolve().parents[1] / "docs" / "examples"


@pytest.fixture()
def on_path(monkeypatch):
    monkeypatch.syspath_prepend(str(EXAMPLES))
    yield
    sys.modules.pop("charge_first", None)


def test_worked_plugin_from_policies_doc_prefers_full_batteries(on_path):
    settings = ["fleet.devices=40000", "horizon.duration=12h", "rounds.rest=2h"]
    plugin = fleetsim.simulate(load_config(example_path(), settings + [
        "selection.policy=charge_first:ChargeFirst", "selection.params.floor=60"]), seed=1)
    baseline = fleetsim.simulate(load_config(example_path(), settings + ["selection.policy=lottery"]), seed=1)
    levels = plugin.participations["battery_start_pct"].to_numpy()
    assert len(levels) > 0 and (levels >= 60).all()
    assert np.median(levels) > np.median(baseline.participations["battery_start_pct"]) + 10


def test_the_three_forms_of_the_plugin_choose_alike(on_path):
    settings = ["fleet.devices=20000", "horizon.duration=6h", "rounds.rest=2h", "selection.params.floor=40"]
    runs = [fleetsim.simulate(load_config(example_path(), settings + [f"selection.policy=charge_first:{name}"]), seed=2)
            for name in ("ChargeFirst", "ChargeFirstPandas", "ChargeFirstLoop")]
    first = runs[0].participations
    for other in runs[1:]:
        assert other.participations["device"].equals(first["device"])


@pytest.fixture()
def ranked_on_path(monkeypatch):
    monkeypatch.syspath_prepend(str(EXAMPLES))
    yield
    sys.modules.pop("fewest_first", None)


def _fewest_settings():
    return ["fleet.devices=40000", "horizon.duration=12h", "rounds.rest=2h"]


def test_worked_ranked_plugin_spreads_reports_more_evenly_than_lottery(ranked_on_path):
    settings = _fewest_settings()
    fewest = fleetsim.simulate(load_config(example_path(), settings + [
        "selection.policy=fewest_first:FewestFirst"]), seed=3)
    lottery = fleetsim.simulate(load_config(example_path(), settings + ["selection.policy=lottery"]), seed=3)
    # Gini of used reports per device (Gini 1912, from memory): preferring the fewest
    # participations must even the spread out and reach more devices than a uniform draw.
    assert fewest.summary["bias"]["gini"] < lottery.summary["bias"]["gini"] - 0.02
    assert fewest.summary["bias"]["coverage"] > lottery.summary["bias"]["coverage"]


def test_worked_ranked_plugin_chooses_like_its_unranked_form(ranked_on_path):
    # The rank contract (docs/policies.md): a ranked window chooses like a full window, in
    # distribution; only the number of check-ins looked at may differ.
    settings = _fewest_settings() + ["selection.params.window=60"]
    ranked, full = (fleetsim.simulate(load_config(example_path(), settings + [
        f"selection.policy=fewest_first:{name}"]), seed=5) for name in ("FewestFirst", "FewestFirstUnranked"))
    assert ranked.summary["rounds"]["committed"] == pytest.approx(full.summary["rounds"]["committed"], rel=0.05)
    assert ranked.summary["bias"]["gini"] == pytest.approx(full.summary["bias"]["gini"], abs=0.02)
    # Shown able to fail: a rank in the reverse order of choose (most participations first)
    # gave Gini 0.74 against 0.58.
    assert ranked.rounds["checkins"].sum() < 0.5 * full.rounds["checkins"].sum()
