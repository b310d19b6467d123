"""Sweep throughput: the engine's fast paths give the figures of the plain formulas.

The chains' look-ahead (:meth:`fleetsim.signals.SignalTables.on_probability`) is checked
against the two-state Markov chain's transition matrix, exp(Q h) per grid step (the
Kolmogorov forward equations; matrix exponential by scipy.linalg.expm), and its two ways of
carrying looks across steps (a subset, or every look under a mask) against each other bit
for bit. A tiny sweep run in this process and on two worker processes gives each run the
summary that ``fleetsim.simulate`` gives it directly.
"""

from __future__ import annotations

import numpy as np
import pytest
from scipy.linalg import expm

import fleetsim
from fleetsim.config import load_config
from fleetsim.engine import simulate
from fleetsim.events import ROUND_COLUMNS, EventLog
from fleetsim.signals import build_signal_tables
from fleetsim.study import InProcess, LocalProcesses, parse_axis, run_sweep
from fleetsim.study.cells import cell_jobs
from fleetsim.study.runs import gather
from fleetsim.study.settings import FleetFile, grid_cells

TINY = ["fleet.devices=2000", "horizon.duration=8h", "rounds.target_reports=20", "rounds.min_reports=15",
        "rounds.rest=2h"]


@pytest.fixture(scope="module")
def tables():
    config = load_config(fleetsim.example_path(), ["fleet.devices=100", "horizon.duration=2d"])
    return build_signal_tables(config, tuple(config.fleet.device_types), tuple(config.fleet.regions),
                               2 * 86400.0, -86400.0)


def _reference(tables, g: int, c: int, t_from: float, q: float, t_to: float) -> float:
    """On-probability at ``t_to`` by the generator's matrix exponential over each grid step:
    off -> on at nu = p / ((1 - p) d), on -> off at mu = 1 / d (docs/architecture.md, Rates)."""
    t = t_from
    state = np.array([1.0 - q, q])
    while t < t_to:
        k = min(max(int(np.floor((t - tables.origin_s) / tables.step_s)), 0), tables.steps - 1)
        end = min(tables.origin_s + (k + 1) * tables.step_s, t_to)
        p, d = tables.p[g, c, k], tables.d[g, c, k]
        mu, nu = 1.0 / d, p / ((1.0 - p) * d)
        generator = np.array([[-nu, nu], [mu, -mu]])
        state = state @ expm(generator * (end - t))
        t = end
    return float(state[1])


def test_on_probability_matches_matrix_exponential(tables):
    rng = np.random.default_rng(7)
    n = 60
    groups = rng.integers(0, tables.p.shape[0], n)
    chains = rng.integers(0, tables.p.shape[1], n)
    t_from = rng.uniform(-86400.0, 86400.0, n)
    gaps = np.where(np.arange(n) % 3 == 0, rng.uniform(0.0, 600.0, n), rng.exponential(7200.0, n))
    t_to = t_from + gaps
    q = np.where(np.arange(n) % 2 == 0, rng.random(n), (rng.random(n) < 0.5) * 1.0)
    fast = tables.on_probability(groups, chains, t_from, q, t_to)
    for i in range(n):
        expected = _reference(tables, int(groups[i]), int(chains[i]), t_from[i], q[i], t_to[i])
        assert fast[i] == pytest.approx(expected, abs=1e-9)


def test_both_ways_across_steps_agree_bit_for_bit(tables):
    """The same looks give the same bits whether few or most of their batch cross a step."""
    rng = np.random.default_rng(11)
    n = 400
    groups = rng.integers(0, tables.p.shape[0], n)
    chains = rng.integers(0, tables.p.shape[1], n)
    t_from = tables.origin_s + tables.step_s * (rng.integers(100, 200, n) + 0.01)  # just after a grid point
    q = rng.random(n)
    crossing = t_from + rng.uniform(tables.step_s, 20 * tables.step_s, n)
    staying = t_from + rng.uniform(0.0, 0.5 * tables.step_s, n)  # within the same step
    few = np.arange(n) < n // 10  # a tenth cross a step: carried as a subset
    most = np.arange(n) < 9 * n // 10  # nine tenths do: carried whole, the rest kept by a mask
    by_subset = tables.on_probability(groups, chains, t_from, q, np.where(few, crossing, staying))
    by_mask = tables.on_probability(groups, chains, t_from, q, np.where(most, crossing, staying))
    alone = tables.on_probability(groups[few], chains[few], t_from[few], q[few], crossing[few])
    assert np.array_equal(by_subset[few], by_mask[few])
    assert np.array_equal(by_subset[few], alone)
    assert np.array_equal(by_mask[~most], by_subset[~most])


def test_round_rows_keep_their_types():
    log = EventLog()
    values = {key: 1 for key in ROUND_COLUMNS} | {"opened_s": -3.5, "held_s": 0.25, "status": 2}
    log.add_round(**values)
    log.add_round(**(values | {"round": 1, "opened_s": 7.0}))
    frame = log.rounds()
    assert [str(frame[key].dtype) for key in ROUND_COLUMNS if key != "status"] == [
        np.dtype(dtype).name for key, dtype in ROUND_COLUMNS.items() if key != "status"]
    assert frame["opened_s"].tolist() == [-3.5, 7.0]
    assert frame["status"].tolist() == ["report-deadline", "report-deadline"]
    assert EventLog().rounds().shape == (0, len(ROUND_COLUMNS))


def test_tiny_sweep_gives_the_direct_summaries(tmp_path):
    base = FleetFile.read(fleetsim.example_path(), TINY)
    axes = [parse_axis("rounds.over_selection=1.0,1.4")]
    seeds = [0, 1]
    result = run_sweep(base, axes, seeds, executor=InProcess(), folder=tmp_path / "study")
    assert len(result.runs) == 4
    grid = grid_cells(base, axes)
    keys, jobs = cell_jobs(grid, seeds)
    here, _ = gather(jobs, InProcess())
    there, _ = gather(jobs, LocalProcesses(2))
    for cell, config in grid:
        for seed in seeds:
            direct = simulate(config, seed).summary
            assert here[keys[cell.index, seed]] == direct
            assert there[keys[cell.index, seed]] == direct
    # A warm-up (the rest period, 2 h) runs rounds before the horizon; none of them is reported.
    first = simulate(grid[0][1], 0)
    assert (first.record.rounds["opened_s"] >= 0).all()
    assert first.record.rounds["round"].tolist() == list(range(len(first.record.rounds)))
    assert set(first.record.participations["round"]) <= set(first.record.rounds["round"])


def test_the_throughput_benchmark_times_a_whole_sweep(tmp_path):
    # Smoke version of benchmarks/throughput.py: one whole `fleetsim sweep` of this checkout, untimed.
    import argparse
    import importlib.util
    from pathlib import Path

    root = Path(__file__).resolve().parents[1]
    spec = importlib.util.spec_from_file_location("throughput", root / "benchmarks" / "throughput.py")
    module = importlib.util.module_from_spec(spec)
    spec.loader.exec_module(module)
    args = argparse.Namespace(devices=2000, days=0.25, cells=2, seeds=1, workers=1)
    row = module.run_sweep(root, args, tmp_path / "study")
    assert row["runs"] == 2 and row["wall_s"] > row["run_s_sum"] > 0
    assert "load average" in row["load_before"]
    full = module.extrapolate(row, 1)
    assert full["full_s"] == pytest.approx(full["fixed_s"] + row["run_s_mean"] * 500)
    assert module.same_runs(tmp_path / "study", tmp_path / "study").startswith("identical")
