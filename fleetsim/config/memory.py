"""A memory estimate of a run, refused before anything is allocated when too large."""

from __future__ import annotations

import math
import os

from ..errors import ConfigError
from .fields import MIN_STEP_S, SIGNALS, _show
from .models import _SETTLING_S, _TAIL_MARGIN_S, Config

# Bytes a run holds per unit of each driver, from the peak resident memory of `fleetsim run`
# on the example fleet (1,000 to 1,000,000 devices, 0.5 to 7 days, check-ins every 1 s to
# 10 min: 250 to 500 MB, about 200 B per device and 850 B per participation), rounded up.
_BASE_BYTES = 300e6  # interpreter, numpy, pandas, pyarrow, simpy
_PER_DEVICE = 340.0  # traits, runtime state, four chains' last looks, battery score, output tables
_PER_TICK = 120.0  # one check-in tick of a collection window (ids, times, masks, gathered traits)
_PER_STEP = 100.0  # one 15-minute grid step of one (type, region, chain) signal table
_PER_PARTICIPATION = 1000.0  # one row of the event log, its frames, tables and the Parquet writer
_PER_ROUND = 400.0
_GRID_S = 900.0  # fleetsim.signals.STEP_S


def estimate_memory(config: Config, window_s: float) -> dict[str, float]:
    """A rough upper estimate of the memory a run needs, bytes, by driver.

    Keys: ``base``, ``devices`` (fleet size), ``ticks`` (check-ins of one collection window:
    devices x window / checkin_every), ``signals`` (device types x regions x 15-minute steps
    of the simulated span), ``events`` (participations: at most each device once per
    max(rest, checkin_every), and at most accept_count per round, a round lasting at least
    the aggregation time plus the fleet's median task time), and ``total``. ``window_s`` is the
    selection policy's collection window.
    """
    fleet, rounds, horizon = config.fleet, config.rounds, config.horizon
    n = fleet.devices
    warmup = horizon.warmup if horizon.warmup is not None else min(rounds.rest, 2 * 86400.0)
    span = warmup + horizon.duration
    window = min(window_s, rounds.selection_timeout)
    ticks = n * (window / rounds.checkin_every + 1.0)
    steps = (span + _SETTLING_S + rounds.selection_timeout + rounds.report_deadline + _TAIL_MARGIN_S) / _GRID_S
    lines = len(fleet.device_types) * len(fleet.regions) * (len(SIGNALS) + 1)  # the settled chain too
    cycle = rounds.aggregation_time + min(rounds.selection_timeout, rounds.report_deadline, _typical_task_s(config))
    n_rounds = span / max(cycle, MIN_STEP_S) + 1.0
    per_device = n * (span / max(rounds.rest, rounds.checkin_every) + 1.0)
    participations = min(per_device, n_rounds * rounds.accept_count)
    terms = {
        "base": _BASE_BYTES,
        "devices": n * _PER_DEVICE,
        "ticks": ticks * _PER_TICK,
        "signals": lines * steps * _PER_STEP,
        "events": participations * _PER_PARTICIPATION + n_rounds * _PER_ROUND,
    }
    terms["total"] = sum(terms.values())
    return terms


def _typical_task_s(config: Config) -> float:
    """The fleet's median task time, s: each type's task at its median traits, the median
    over device types weighted by share (a round waits for most of its reports)."""
    work = config.workload
    times = []
    for kind in config.fleet.device_types.values():
        samples = max(1.0, kind.samples.median)
        train = float(work.local_work(samples)[0]) * kind.sample_cost.median + work.encode_s
        transfer = (work.model_size / kind.download_rate.median + work.upload_bytes / kind.upload_rate.median) * 8
        times.append((train + transfer, kind.share))
    times.sort()
    total = sum(share for _, share in times)
    running = 0.0
    for seconds, share in times:
        running += share
        if running >= total / 2:
            return seconds
    return times[-1][0]


def memory_limit(fraction: float = 0.75) -> float:
    """``fraction`` of this machine's physical memory, bytes (inf where it cannot be told)."""
    try:
        return fraction * os.sysconf("SC_PHYS_PAGES") * os.sysconf("SC_PAGE_SIZE")
    except (ValueError, OSError, AttributeError):
        return math.inf


def check_memory(config: Config, window_s: float, source: str, limit: float | None = None,
                 names: dict[str, str] | None = None) -> None:
    """Refuse a run whose estimated memory (:func:`estimate_memory`) exceeds ``limit`` bytes
    (default: :func:`memory_limit`), before anything is allocated.

    The error names the key that drives the estimate most; ``names`` maps a key path to the
    option that set it (``{"fleet.devices": "--devices"}``). Raises ConfigError.
    """
    limit = memory_limit() if limit is None else limit
    terms = estimate_memory(config, window_s)
    if terms["total"] <= limit:
        return
    driver = max(("devices", "ticks", "signals", "events"), key=lambda k: terms[k])
    key, value = {
        "devices": ("fleet.devices", config.fleet.devices),
        "ticks": ("rounds.checkin_every", config.rounds.checkin_every),
        "signals": ("horizon.duration", config.horizon.duration),
        "events": ("horizon.duration", config.horizon.duration),
    }[driver]
    where = (names or {}).get(key) or f"{source}: {key}"
    raise ConfigError([
        f"{where}: a run would need about {_gb(terms['total'])} of memory, more than the {_gb(limit)} allowed "
        f"(75% of physical memory); mostly for {_DRIVERS[driver]}: use fewer devices, a shorter horizon or "
        f"less frequent check-ins (got {_show(value)})"
    ])


_DRIVERS = {
    "devices": "the fleet's devices",
    "ticks": "the check-ins of one collection window",
    "signals": "the signal tables of the horizon",
    "events": "the rounds and participations of the horizon",
}


def _gb(value: float) -> str:
    return f"{value / 1e9:,.1f} GB" if math.isfinite(value) else "unbounded"

