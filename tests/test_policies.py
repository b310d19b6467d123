"""Selection policies: each built-in does what its documentation says, plug-ins load by name."""

import numpy as np
import pytest

import fleetsim
from fleetsim.config import example_path
from fleetsim.config import load_config as _load_config
from fleetsim.errors import ConfigError
from fleetsim.policies import BUILTIN_POLICIES, SelectionPolicy, make_policy

from . import CLASSIC_ROUNDS


def load_config(path, overrides=()):
    """The example with its classic round protocol (tests.CLASSIC_ROUNDS), then ``overrides``."""
    return _load_config(path, CLASSIC_ROUNDS + list(overrides))

# Short rests keep the eligible pool large, so policies have a real choice to make.
SMALL = ["fleet.devices=40000", "horizon.duration=1d", "rounds.rest=2h"]


def run(policy, *overrides, seed=2):
    config = load_config(example_path(), SMALL + [f"selection.policy={policy}"] + list(overrides))
    return fleetsim.simulate(config, seed=seed)


@pytest.fixture(scope="module")
def results():
    return {name: run(name) for name in BUILTIN_POLICIES}


def test_every_builtin_policy_runs_rounds(results):
    for name, result in results.items():
        assert result.summary["rounds"]["committed"] > 0, name


def test_quick_finish_accepts_faster_devices_than_first_come(results):
    def predicted(result):
        parts = result.participations
        return (parts["download_s"] + parts["train_s"] + parts["upload_s"]).median()
    assert predicted(results["quick-finish"]) < 0.8 * predicted(results["first-come"])


def test_share_quota_brings_accepted_shares_closer_to_fleet_shares():
    def distance(result):
        rows = result.summary["bias"]["by_device_type"].values()
        return sum(abs(v["accepted_share"] - v["fleet_share"]) for v in rows)
    # Budget phones whose batteries are often below the minimum: first come under-serves them.
    low = ["fleet.device_types.budget-phone.battery_level.charging.mean=38%"]
    first, quota = run("first-come", *low), run("share-quota", *low)
    assert distance(first) > 0.05
    assert distance(quota) < 0.5 * distance(first)


def test_rested_first_reaches_at_least_as_many_devices(results):
    coverage = {name: r.summary["bias"]["coverage"] for name, r in results.items()}
    assert coverage["rested-first"] >= coverage["first-come"] - 0.01


def test_lottery_holds_checkins_to_the_window_end(results):
    parts, rounds = results["lottery"].participations, results["lottery"].rounds
    opened = rounds.set_index("round")["opened_s"]
    offset = parts["accepted_s"].to_numpy() - opened.reindex(parts["round"]).to_numpy()
    window = make_policy("lottery", {}).window_s
    remainder = np.mod(offset + 1e-6, window)
    last = np.isclose(offset, results["lottery"].config.rounds.selection_timeout)
    assert ((remainder < 1e-3) | last).all()


class DropTablets(SelectionPolicy):
    """A plug-in for the tests: arrival order, but never a tablet."""

    name = "drop-tablets"
    holds_checkins = False

    def __init__(self, window: float = 30.0):
        self.window_s = window

    def choose(self, candidates, round, rng):
        tablet = candidates.type_names.index("tablet")
        return np.flatnonzero(candidates.device_type != tablet)[: round.needed]


def test_plugin_policy_by_module_path():
    result = run("tests.test_policies:DropTablets")
    types = result.participations["device_type"].astype(str).to_numpy()
    assert len(types) > 0 and "tablet" not in set(types)
    assert result.summary["bias"]["by_device_type"]["tablet"]["report_share"] == 0


@pytest.mark.parametrize(
    ("name", "params", "message"),
    [
        ("no-such-policy", {}, "unknown policy"),
        ("no_such_module:Thing", {}, "cannot import plug-in"),
        ("fleetsim.policies:Nothing", {}, "cannot import plug-in"),
        ("lottery", {"windw": 3}, "refused its parameters"),
        ("share-quota", {"relax_after": 2}, "refused its parameters"),
        ("lottery", {"window": -1}, "positive number"),
    ],
)
def test_bad_policies_are_config_errors(name, params, message):
    with pytest.raises(ConfigError, match=message):
        make_policy(name, params)


def test_a_policy_returning_bad_positions_is_named():
    class Broken(SelectionPolicy):
        holds_checkins = False

        def choose(self, candidates, round, rng):
            return np.array([0, 0])

    from fleetsim import engine

    config = load_config(example_path(), SMALL)
    original = engine.make_policy
    engine.make_policy = lambda *a, **k: Broken()
    try:
        with pytest.raises(fleetsim.FleetsimError, match="Broken returned invalid positions"):
            fleetsim.simulate(config, seed=0)
    finally:
        engine.make_policy = original


@pytest.mark.parametrize(("keys", "said"), [(lambda n: np.zeros(n + 1), r"shape \(\d+,\)"),
                                           (lambda n: np.full(n, np.nan), "with NaN")])
def test_a_rank_of_the_wrong_length_or_with_nan_is_named(monkeypatch, keys, said):
    # rank must give one number per candidate; anything else is refused, naming the policy.
    class BadRank(BUILTIN_POLICIES["quick-finish"]):
        def rank(self, candidates, round, rng):
            return keys(candidates.device.size)

    from fleetsim import engine

    monkeypatch.setattr(engine, "make_policy", lambda *a, **k: BadRank())
    with pytest.raises(fleetsim.FleetsimError, match=f"BadRank.rank returned keys of .*{said}"):
        fleetsim.simulate(load_config(example_path(), SMALL), seed=0)


class QuickFinishUnranked(BUILTIN_POLICIES["quick-finish"]):
    """quick-finish without its rank: the engine shows it every eligible check-in."""

    rank = SelectionPolicy.rank  # the default: no ranking


class LotteryUnranked(BUILTIN_POLICIES["lottery"]):
    rank = SelectionPolicy.rank


@pytest.mark.parametrize(("ranked", "unranked"), [("quick-finish", "QuickFinishUnranked"),
                                                  ("lottery", "LotteryUnranked")])
def test_ranked_windows_choose_like_full_windows(ranked, unranked):
    # Looking at check-ins in rank order until enough are eligible must not change what is
    # chosen, only what it costs: compare the accepted devices' task times and round counts.
    def task_times(result):
        p = result.participations
        return (p["download_s"] + p["train_s"] + p["upload_s"]).to_numpy()
    settings = ["fleet.devices=60000", "horizon.duration=12h", "rounds.rest=2h"]
    fast = fleetsim.simulate(load_config(example_path(), settings + [f"selection.policy={ranked}"]), seed=4)
    plugin = f"selection.policy=tests.test_policies:{unranked}"
    full = fleetsim.simulate(load_config(example_path(), settings + [plugin]), seed=4)
    assert np.median(task_times(fast)) == pytest.approx(np.median(task_times(full)), rel=0.05)
    assert fast.summary["rounds"]["committed"] == pytest.approx(full.summary["rounds"]["committed"], rel=0.05)
    assert fast.rounds["checkins"].sum() < full.rounds["checkins"].sum()


# ------------------------------------------------------------------ the plug-in interface


def test_rank_is_declared_on_the_base_class_and_means_no_ranking_by_default():
    # Every hook the engine calls is declared on SelectionPolicy; the default rank is None.
    assert SelectionPolicy.rank(DropTablets(), None, None, None) is None
    ranked = {name for name, cls in BUILTIN_POLICIES.items() if cls.rank is not SelectionPolicy.rank}
    assert ranked == {"lottery", "quick-finish", "rested-first"}


class NoneRank(DropTablets):
    rank = None


class ShortChoose(DropTablets):
    def choose(self, candidates, round):
        return np.arange(0)


class LongRank(DropTablets):
    def rank(self, candidates, round, rng, extra):
        return None


class InfiniteWindow(DropTablets):
    def __init__(self):
        self.window_s = float("inf")


class BoolWindow(DropTablets):
    def __init__(self):
        self.window_s = True


class TextHolds(DropTablets):
    holds_checkins = "yes"


class RaisingWindow(DropTablets):
    def __init__(self):
        pass

    @property
    def window_s(self):
        raise RuntimeError("no window\nhere")


@pytest.mark.parametrize(
    ("plugin", "message"),
    [
        ("NoneRank", "rank must be a method rank(candidates, round, rng) (got None)"),
        ("ShortChoose", "choose must take (candidates, round, rng) (got choose(candidates, round))"),
        ("LongRank", "rank must take (candidates, round, rng) (got rank(candidates, round, rng, extra))"),
        ("InfiniteWindow", "window_s must be a finite number of seconds, at least 0.001 (got inf)"),
        ("BoolWindow", "window_s must be a finite number of seconds, at least 0.001 (got True)"),
        ("TextHolds", "holds_checkins must be True or False (got 'yes')"),
        ("RaisingWindow", "reading window_s failed (RuntimeError: no window here)"),
    ],
)
def test_a_plugin_the_engine_could_not_drive_is_refused_in_one_line_naming_it(plugin, message):
    name = f"tests.test_policies:{plugin}"
    with pytest.raises(ConfigError) as info:
        make_policy(name, {})
    (line,) = info.value.problems
    assert line == f"selection.policy: policy {name!r}: {message}"


class Frozen(BUILTIN_POLICIES["quick-finish"]):
    """quick-finish that refuses any attribute set after its constructor, and counts calls
    to its hooks without writing onto itself (the counter is a shared list)."""

    calls: list = []

    def __init__(self):
        super().__init__()
        object.__setattr__(self, "_sealed", True)

    def __setattr__(self, key, value):
        if getattr(self, "_sealed", False):
            raise AssertionError(f"the engine set {key!r} on the policy")
        object.__setattr__(self, key, value)

    def rank(self, candidates, round, rng):
        Frozen.calls.append("rank")
        return super().rank(candidates, round, rng)


def test_the_engine_never_writes_onto_a_policy():
    policy = make_policy("tests.test_policies:Frozen", {})
    before = dict(vars(policy))
    from fleetsim import engine

    config = load_config(example_path(), ["fleet.devices=5000", "horizon.duration=3h", "rounds.rest=1h"])
    original = engine.make_policy
    engine.make_policy = lambda *a, **k: policy
    Frozen.calls.clear()
    try:
        result = fleetsim.simulate(config, seed=1)
    finally:
        engine.make_policy = original
    assert result.summary["rounds"]["attempted"] > 0
    assert "rank" in Frozen.calls  # the engine called the hook on the base-class interface
    assert vars(policy) == before


def test_importing_the_policies_does_not_import_pandas():
    # Loaded under a bare parent package, so that only fleetsim.policies' own imports count.
    import subprocess
    import sys
    from pathlib import Path

    package = Path(fleetsim.__file__).parent
    code = (
        "import sys, types\n"
        f"parent = types.ModuleType('fleetsim'); parent.__path__ = [{str(package)!r}]\n"
        "sys.modules['fleetsim'] = parent\n"
        "import fleetsim.policies as p\n"
        "assert 'pandas' not in sys.modules, 'pandas imported'\n"
        "import numpy as np\n"
        "c = p.Candidates(np.array([3]), np.array([1.0]), np.array([50.0]), np.array([True]),\n"
        "    {k: np.zeros(5, dtype=np.int64) for k in p.Candidates._GATHERED}, ('t',), ('r',))\n"
        "assert c.frame()['device'].tolist() == [3] and 'pandas' in sys.modules\n"
    )
    run = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, timeout=120)
    assert run.returncode == 0, run.stderr
