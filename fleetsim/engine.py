"""Wiring: ``simulate(config, seed) -> Result``.

Random streams (each a ``numpy.random.Generator`` derived from the seed and its name, see
:func:`fleetsim.fleet.stream`): ``fleet`` (device traits and check-in phases), ``checkin``
(signal states seen at check-ins), ``battery`` (battery levels at check-in), ``task``
(signal losses and crashes during tasks), ``policy`` (a policy's own draws) and ``census``
(the measurement of eligible devices; it never changes the run).
"""

from __future__ import annotations

from collections.abc import Callable, Generator
from dataclasses import dataclass, field
from typing import Any

import numpy as np
import pandas as pd
import simpy

from .config import Config, config_hash
from .events import EventLog
from .fleet import Fleet, sample_fleet, stream
from .policies import make_policy
from .runtime import FleetRuntime
from .server import RoundServer
from .signals import build_signal_tables

__all__ = ["Result", "simulate", "STREAMS"]

STREAMS = ("fleet", "checkin", "battery", "task", "policy", "census")

CENSUS_EVERY_S = 900.0
"""How often the eligible devices are counted (the counts feed eligible shares and hourly load)."""

CENSUS_SAMPLE = 4096
"""Devices drawn for each count; fleets up to this size are counted whole."""


@dataclass
class Result:
    """One simulation's outcome: the event log, the fleet and the derived tables.

    ``participations``: one row per accepted device (see docs/metrics.md for columns);
    ``rounds``: one row per round; ``census``: eligible devices counted every 15 minutes by
    device type and region; ``fleet``: the sampled devices. ``summary`` and ``tables`` come
    from :mod:`fleetsim.metrics` on first use.
    """

    config: Config
    seed: int
    fleet: Fleet
    participations: pd.DataFrame
    rounds: pd.DataFrame
    census: pd.DataFrame
    policy: str
    source: str | None = None  # the fleet file, when the config came from one
    _metrics: Any = field(default=None, repr=False)

    @property
    def config_hash(self) -> str:
        return config_hash(self.config)

    @property
    def horizon_s(self) -> float:
        return float(self.config.horizon.duration)

    def _computed(self) -> Any:
        if self._metrics is None:
            from .metrics import compute_metrics

            self._metrics = compute_metrics(self)
        return self._metrics

    @property
    def summary(self) -> dict[str, Any]:
        """The run's headline figures as plain JSON-ready values (see docs/metrics.md)."""
        return self._computed().summary

    @property
    def tables(self) -> dict[str, pd.DataFrame]:
        """Derived tables by name (rounds, waste, bias, hourly, participation counts)."""
        return self._computed().tables

    def _repr_html_(self) -> str:
        from .metrics import summary_html

        return summary_html(self)

    def __repr__(self) -> str:
        s = self.summary
        r = s["rounds"]
        return (
            f"<Result seed={self.seed} devices={s['devices']} hours={s['simulated_hours']:g} "
            f"rounds committed={r['committed']}/{r['attempted']}>"
        )


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
    ConfigError if the selection policy cannot be built.
    """
    policy = make_policy(config.selection.policy, config.selection.params)
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
    sampled_rows: list[np.ndarray] = []
    eligible_rows: list[np.ndarray] = []

    def census() -> Generator[Any, Any, None]:
        if env.now < 0:
            yield env.timeout(-env.now)  # count from the horizon start, after the warm-up
        while env.now < horizon_s:
            sampled, eligible = runtime.census(env.now, CENSUS_SAMPLE)
            census_times.append(env.now)
            sampled_rows.append(sampled)
            eligible_rows.append(eligible)
            yield env.timeout(CENSUS_EVERY_S)

    env.process(census())
    env.process(server.run())
    env.run()

    census_frame = _census_frame(fleet, census_times, sampled_rows, eligible_rows)
    rounds_frame, parts_frame = _after_warmup(log.rounds(), log.participations())
    return Result(
        config=config,
        seed=seed,
        fleet=fleet,
        participations=parts_frame,
        rounds=rounds_frame,
        census=census_frame,
        policy=getattr(policy, "name", type(policy).__name__),
    )


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


def _census_frame(
    fleet: Fleet, times: list[float], sampled: list[np.ndarray], eligible: list[np.ndarray]
) -> pd.DataFrame:
    """Long table: time_s, device_type, region, sampled, eligible (expected, among the sampled),
    eligible_est (scaled to the group's size in the fleet)."""
    n_regions = len(fleet.region_names)
    n_groups = len(fleet.type_names) * n_regions
    group_size = np.bincount(fleet.group, minlength=n_groups)
    if not times:
        return pd.DataFrame(columns=["time_s", "device_type", "region", "sampled", "eligible", "eligible_est"])
    t = np.repeat(np.asarray(times), n_groups)
    groups = np.tile(np.arange(n_groups), len(times))
    s = np.concatenate(sampled)
    e = np.concatenate(eligible)
    with np.errstate(invalid="ignore", divide="ignore"):
        est = np.where(s > 0, e / s, 0.0) * group_size[groups]
    return pd.DataFrame(
        {
            "time_s": t,
            "device_type": pd.Categorical.from_codes(groups // n_regions, fleet.type_names),
            "region": pd.Categorical.from_codes(groups % n_regions, fleet.region_names),
            "sampled": s,
            "eligible": e,
            "eligible_est": est,
        }
    )
