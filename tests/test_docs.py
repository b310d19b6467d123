"""The examples in docs/ run as written."""

import sys
from pathlib import Path

import numpy as np
import pytest

import fleetsim
from fleetsim.config import example_path, load_config

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
