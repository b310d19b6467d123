"""Wiring: ``simulate(config, seed) -> Result``.

The engine builds the run's :class:`fleetsim.record.RunRecord` and hands it to a
:class:`fleetsim.result.Result`, which computes the figures on demand.

Random streams (each a ``numpy.random.Generator`` derived from the seed and its name, see
:func:`fleetsim.fleet.stream`): ``fleet`` (device traits and check-in phases), ``checkin``
(chain states seen at check-ins), ``battery`` (battery scores at check-in), ``task``
(chain paths and crashes during tasks), ``policy`` (a policy's own draws) and ``census``
(the measurement of eligible devices; it never changes the run).
"""

from __future__ import annotations

from collections.abc import Callable, Generator
from typing import Any

import numpy as np
import pandas as pd
import simpy

from .config import Config, check_memory
from .errors import FleetsimError
from .events import EventLog
from .fleet import Fleet, sample_fleet, stream
from .policies import make_policy
from .record import RunRecord
from .result import Result
from .runtime import FleetRuntime
from .server import RoundServer
from .signals import build_signal_tables

__all__ = ["Result", "simulate", "STREAMS"]

MAX_SEED = 2**63 - 1
"""The largest seed (seeds are whole numbers from 0 on)."""

STREAMS = ("fleet", "checkin", "battery", "task", "policy", "census", "pacing")

CENSUS_EVERY_S = 900.0
"""How often the eligible devices are counted (the counts feed eligible shares and hourly load)."""

CENSUS_SAMPLE = 4096
"""Devices drawn for each count, spread over (type, region) groups in proportion to size."""

CENSUS_MIN_PER_GROUP = 64
"""At least this many devices are drawn from each group (all of a smaller group), so that a
rare group's estimate rests on devices of its own rather than on a share of a uniform draw."""


def simulate(
    config: Config,
    seed: int = 0,
    on_progress: Callable[[float], None] | None = None,
) -> Result:
    """Simulate the fleet and the server's rounds over the configured horizon.

    The server starts ``horizon.warmup`` before the horizon (default: the rest period, at most
    two days) so that rest periods are in their running state when the horizon begins; the
    result holds only rounds opened from the horizon start on.

    ``seed`` fixes every random stream; the same config and seed give the same result bit for
    bit. ``on_progress`` is called with the simulated time (s) after each round. Raises
    FleetsimError if ``seed`` is not a whole number from 0 to 2**63 - 1, and ConfigError if
    the selection policy cannot be built or the run would need more memory than the machine
    allows (:func:`fleetsim.config.check_memory`), before anything large is allocated.
    """
    if isinstance(seed, bool) or not isinstance(seed, (int, np.integer)) or not 0 <= seed <= MAX_SEED:
        raise FleetsimError(f"seed: expected a whole number from 0 to 2**63 - 1 (got {seed!r})")
    policy = make_policy(config.selection.policy, config.selection.params)
    check_memory(config, policy.window_s, source="config")
    rngs = {name: stream(seed, name) for name in STREAMS}
    fleet = sample_fleet(config, seed)
    horizon_s = float(config.horizon.duration)
    rounds = config.rounds
    tail_s = rounds.selection_timeout + rounds.report_deadline + 2 * 3600.0
    warmup_s = warmup_of(config)
    tables = build_signal_tables(config, fleet.type_names, fleet.region_names, horizon_s + tail_s, -warmup_s)
    runtime = FleetRuntime(config, fleet, tables, rngs)
    log = EventLog()
    env = simpy.Environment(initial_time=-warmup_s)
    server = RoundServer(env, config, runtime, policy, log, rngs, horizon_s, on_progress)

    census_times: list[float] = []
    census_rows: list[tuple[np.ndarray, ...]] = []

    def census() -> Generator[Any, Any, None]:
        if env.now < 0:
            yield env.timeout(-env.now)  # count from the horizon start, after the warm-up
        while env.now < horizon_s:
            census_rows.append(runtime.census(env.now, CENSUS_SAMPLE, CENSUS_MIN_PER_GROUP))
            census_times.append(env.now)
            yield env.timeout(CENSUS_EVERY_S)

    env.process(census())
    env.process(server.run())
    env.run()

    census_frame = _census_frame(fleet, census_times, census_rows)
    rounds_frame, parts_frame = _after_warmup(log.rounds(), log.participations(fleet.type_names, fleet.region_names))
    record = RunRecord(
        config=config,
        seed=seed,
        fleet=fleet,
        participations=parts_frame,
        rounds=rounds_frame,
        census=census_frame,
        policy=getattr(policy, "name", type(policy).__name__),
    )
    return Result(record)


def warmup_of(config: Config) -> float:
    """The warm-up before the horizon start, s: as set, else the rest period (at most 2 days)."""
    if config.horizon.warmup is not None:
        return float(config.horizon.warmup)
    return float(min(config.rounds.rest, 2 * 86400.0))


def _after_warmup(rounds: pd.DataFrame, parts: pd.DataFrame) -> tuple[pd.DataFrame, pd.DataFrame]:
    """Drop the rounds opened during the warm-up (and their participations); renumber from 0."""
    kept = rounds["opened_s"].to_numpy() >= 0
    if kept.all():
        return rounds, parts
    first = int(rounds["round"].to_numpy()[kept][0]) if kept.any() else int(rounds["round"].max()) + 1
    rounds = rounds[kept].reset_index(drop=True)
    parts = parts[parts["round"].to_numpy() >= first].reset_index(drop=True)
    rounds["round"] -= first
    parts["round"] -= first
    return rounds, parts


def _census_frame(fleet: Fleet, times: list[float], rows: list[tuple[np.ndarray, ...]]) -> pd.DataFrame:
    """Long table, one row per count and (type, region) group: ``time_s``, ``device_type``,
    ``region``, ``devices`` (the group's size), ``sampled`` (devices drawn), ``eligible``
    (their summed eligibility probability), ``eligible_est`` (the group's expected eligible
    devices, stratified estimate) and ``eligible_se`` (its standard error)."""
    columns = ["time_s", "device_type", "region", "devices", "sampled", "eligible", "eligible_est", "eligible_se"]
    if not times:
        return pd.DataFrame(columns=columns)
    n_regions = len(fleet.region_names)
    n_groups = len(fleet.type_names) * n_regions
    group_size = np.bincount(fleet.group, minlength=n_groups)
    groups = np.tile(np.arange(n_groups), len(times))
    drawn, total, estimate, variance = (np.concatenate(parts) for parts in zip(*rows, strict=True))
    return pd.DataFrame(
        {
            "time_s": np.repeat(np.asarray(times), n_groups),
            "device_type": pd.Categorical.from_codes(groups // n_regions, fleet.type_names),
            "region": pd.Categorical.from_codes(groups % n_regions, fleet.region_names),
            "devices": group_size[groups],
            "sampled": drawn,
            "eligible": total,
            "eligible_est": estimate,
            "eligible_se": np.sqrt(variance),
        }
    )
