"""Wiring: ``simulate(config, seed) -> Result``.

The engine builds the run's :class:`fleetsim.record.RunRecord` and hands it to a
:class:`fleetsim.result.Result`, which computes the figures on demand.

Random streams, each derived from the seed and its name. Drawn in order from a
``numpy.random.Generator`` (:func:`fleetsim.fleet.stream`): ``fleet`` (device traits and
check-in phases, once for the whole fleet in device order), ``pacing`` (each device's pacing
offset, once), ``census`` (the measurement of eligible devices; it never changes the run)
and ``policy`` (the ``rng`` a policy's hooks are handed). Keyed (:mod:`fleetsim.keyed`, every
draw a pure function of the seed, the stream, the device, a check-in tick of the device and
a lane; :data:`fleetsim.runtime.KEYED_STREAMS`): ``checkin`` (chain states and the battery
score seen at check-ins, by the tick looked at, one lane each), ``task`` (chain
paths and crashes during a task, by the tick of the check-in that started it) and
``policy`` (the built-in ``lottery``'s keys, per device and tick). Two runs of one seed then
see the same draws for a device wherever the device's own history agrees.
"""

from __future__ import annotations

import dataclasses
from collections.abc import Callable, Generator
from datetime import datetime, timezone
from typing import Any

import numpy as np
import pandas as pd
import simpy

from .config import Config, check_memory
from .desk import Desk
from .errors import FleetsimError
from .events import EventLog
from .fleet import Fleet, sample_fleet, stream
from .keyed import KeyedStream
from .policies import make_policy
from .record import RunRecord
from .replay import Replay, ReplaySignals
from .result import Result
from .runtime import KEYED_STREAMS, FleetRuntime
from .server import RoundServer
from .signals import build_signal_tables
from .units import format_duration, format_instant

__all__ = ["Result", "simulate", "STREAMS"]

MAX_SEED = 2**63 - 1
"""The largest seed (seeds are whole numbers from 0 on)."""

STREAMS = ("fleet", "checkin", "task", "policy", "census", "pacing")

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
    replay: Replay | None = None,
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

    ``replay`` (:mod:`fleetsim.replay`): the logged devices take the fleet's place, their
    logged signals the chains' (their traits, batteries, workload and rounds from ``config``);
    FleetsimError if a logged device type or region is not in the file's fleet, or the
    horizon does not lie within the logs' span.
    """
    if isinstance(seed, bool) or not isinstance(seed, (int, np.integer)) or not 0 <= seed <= MAX_SEED:
        raise FleetsimError(f"seed: expected a whole number from 0 to 2**63 - 1 (got {seed!r})")
    jobs = config.jobs
    policies = [make_policy(job.config.selection.policy, job.config.selection.params) for job in jobs]
    for job, policy in zip(jobs, policies, strict=True):
        check_memory(job.config, policy.window_s, source="config")
    horizon_s = float(config.horizon.duration)
    fleet = sample_fleet(config, seed, None if replay is None else _replay_pairs(config, replay, horizon_s))
    tail_s = max(job.config.rounds.selection_timeout + job.config.rounds.report_deadline for job in jobs) + 2 * 3600.0
    warmup_s = warmup_of(config)
    tables = build_signal_tables(config, fleet.type_names, fleet.region_names, horizon_s + tail_s, -warmup_s)
    paced = any(job.config.rounds.pacing is not None for job in jobs)
    signals = None
    if replay is not None:  # the logs hold the signals as they were: no settled state to derive
        tables = dataclasses.replace(tables, covers=np.zeros_like(tables.covers), has_settled=False)
        signals = ReplaySignals(tables, fleet.group, replay)
    rngs, keys = {n: stream(seed, n) for n in STREAMS}, {n: KeyedStream(seed, n) for n in KEYED_STREAMS}
    runtime = FleetRuntime(jobs[0].config, fleet, tables, rngs, paced=paced, signals=signals, keys=keys)
    views = [runtime] if len(jobs) == 1 else [runtime.for_workload(job.config) for job in jobs]
    logs = [EventLog() for _ in jobs]
    servers = [RoundServer(job.config, view, policy, log, rngs)
               for job, view, policy, log in zip(jobs, views, policies, logs, strict=True)]
    rule = config.sharing.rule if config.sharing is not None else "priority"
    env = simpy.Environment(initial_time=-warmup_s)
    desk = Desk(env, servers, rule, [job.share for job in jobs], horizon_s, on_progress)

    census_times: list[float] = []
    census_rows: list[list[tuple[np.ndarray, ...]]] = [[] for _ in jobs]

    def census() -> Generator[Any, Any, None]:
        if env.now < 0:
            yield env.timeout(-env.now)  # count from the horizon start, after the warm-up
        while env.now < horizon_s:
            for view, rows in zip(views, census_rows, strict=True):
                rows.append(view.census(env.now, CENSUS_SAMPLE, CENSUS_MIN_PER_GROUP))
            census_times.append(env.now)
            yield env.timeout(CENSUS_EVERY_S)

    env.process(census())
    env.process(desk.run())
    env.run()

    names = [job.name for job in jobs]
    parts_frame, rounds_frame, census_frame = _frames(fleet, logs, census_times, census_rows, names)
    record = RunRecord(
        config=config,
        seed=seed,
        fleet=fleet,
        participations=parts_frame,
        rounds=rounds_frame,
        census=census_frame,
        policy=_policy_name(policies[0]) if len(jobs) == 1 else ", ".join(
            f"{name}: {_policy_name(policy)}" for name, policy in zip(names, policies, strict=True)),
        policies={name: _policy_name(policy) for name, policy in zip(names, policies, strict=True)},
        replay=None if replay is None else _replay_part(config, replay),
    )
    return Result(record)


def _replay_part(config: Config, replay: Replay) -> dict[str, Any]:
    """What summary.json says of replayed logs: their devices and span (ISO 8601 UTC)."""
    start = config.horizon.start.timestamp()
    return {
        "devices": replay.size,
        "logs_start": format_instant(datetime.fromtimestamp(start + replay.first_s, tz=timezone.utc)),
        "logs_end": format_instant(datetime.fromtimestamp(start + replay.last_s, tz=timezone.utc)),
    }


def _replay_pairs(config: Config, replay: Replay, horizon_s: float) -> np.ndarray:
    """Each logged device's (type, region) pair in the file's fleet; refuses names the file
    does not know and a horizon outside the logs' span."""
    types, regions = list(config.fleet.device_types), list(config.fleet.regions)
    for names, known, key in ((replay.device_type, types, "fleet.device_types"),
                              (replay.region, regions, "fleet.regions")):
        unknown = sorted(set(names.tolist()) - set(known))
        if unknown:
            raise FleetsimError(f"replay: the logs name {', '.join(map(repr, unknown[:5]))}, not in the fleet "
                                f"file's {key} ({', '.join(known)}); add them or fit the file from these logs")
    # Within one check-in period of the logs' ends: the first and last check-ins of snapshot
    # logs fall anywhere in a period (the device is unobserved, its signals off, until then).
    slack = float(config.rounds.checkin_every)
    if replay.first_s > slack or replay.last_s < horizon_s - slack:
        start = config.horizon.start.timestamp()

        def at(s: float) -> str:
            return format_instant(datetime.fromtimestamp(start + s, tz=timezone.utc))

        early, late = max(replay.first_s, 0.0), max(horizon_s - replay.last_s, 0.0)
        raise FleetsimError(
            f"replay: the horizon {at(0.0)} to {at(horizon_s)} is not within the logs' span {at(replay.first_s)} "
            f"to {at(replay.last_s)} (it starts {format_duration(early)} before the logs do and ends "
            f"{format_duration(late)} after; one check-in period, {format_duration(slack)}, is allowed); set "
            "horizon.start and horizon.duration within the logs")
    lookup_t = {name: i for i, name in enumerate(types)}
    lookup_r = {name: i for i, name in enumerate(regions)}
    return np.array([lookup_t[t] * len(regions) + lookup_r[r] for t, r in zip(replay.device_type, replay.region,
                                                                              strict=True)], dtype=np.int64)


def _frames(fleet: Fleet, logs: list[EventLog], census_times: list[float],
            census_rows: list[list[tuple[np.ndarray, ...]]], names: list[str]) -> tuple[pd.DataFrame, ...]:
    """Participations, rounds and census of the run (after the warm-up); of several workloads,
    each workload's rows led by a ``workload`` column."""
    frames = []
    for log, rows in zip(logs, census_rows, strict=True):
        parts = log.participations(fleet.type_names, fleet.region_names)
        rounds_frame, parts_frame = _after_warmup(log.rounds(), parts)
        frames.append((parts_frame, rounds_frame, _census_frame(fleet, census_times, rows)))
    if len(names) == 1:
        return frames[0]
    return tuple(_by_workload([f[i] for f in frames], names) for i in range(3))


def _policy_name(policy: object) -> str:
    return str(getattr(policy, "name", type(policy).__name__))


def _by_workload(frames: list[pd.DataFrame], names: list[str]) -> pd.DataFrame:
    """One frame of several workloads' frames, led by a ``workload`` column (a label)."""
    joined = pd.concat(frames, ignore_index=True)
    codes = np.repeat(np.arange(len(names)), [len(frame) for frame in frames])
    joined.insert(0, "workload", pd.Categorical.from_codes(codes, names))
    return joined


def warmup_of(config: Config) -> float:
    """The warm-up before the horizon start, s: as set, else the longest rest period (at most 2 days)."""
    if config.horizon.warmup is not None:
        return float(config.horizon.warmup)
    rest = max(job.config.rounds.rest for job in config.jobs)
    return float(min(rest, 2 * 86400.0))


def _after_warmup(rounds: pd.DataFrame, parts: pd.DataFrame) -> tuple[pd.DataFrame, pd.DataFrame]:
    """Drop the rounds opened during the warm-up (and their participations); renumber from 0."""
    kept = rounds["opened_s"].to_numpy() >= 0
    if kept.all():
        return rounds, parts
    first = int(rounds["round"].to_numpy()[kept][0]) if kept.any() else int(rounds["round"].max()) + 1
    rounds = rounds[kept].reset_index(drop=True)
    in_run = parts["round"].to_numpy() >= first
    if not in_run.all():  # the server logs no warm-up participations; a log that holds some is cut
        parts = parts[in_run].reset_index(drop=True)
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
