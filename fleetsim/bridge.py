"""Interval logs from check-in snapshots: the time between logged states filled by a bridge.

A snapshot log knows each device's signals only at its check-ins. To replay it
(:mod:`fleetsim.replay`), each signal's path between two consecutive check-ins of a device is
drawn from the fleet file's law of that signal alone (its hourly on-probability and mean
on-duration on the device's local time: the two-state chain of
:func:`fleetsim.signals.chain_parameters` with ``marginal``) conditioned on the states logged
at both ends: a Markov bridge. Every logged state is kept exactly: the path is in the logged
state at every logged time.

The bridge is drawn on sub-steps of at most ``step_s`` (one minute by default) within each
gap, with the rates of each sub-step's start: backward messages beta_k(x) = P(state at the
gap's end | x at sub-step k), then forward draws x_{k+1} ~ P(x_{k+1} | x_k) beta_{k+1}(x_{k+1})
(forward filtering, backward sampling in reverse; e.g. Hobolth and Stone, 2009, for bridges
of continuous-time chains, from memory). Over a sub-step of length h with on-rate a and
off-rate b (lambda = a + b, pi = a / lambda): P(on | on) = pi + (1 - pi) exp(-lambda h) and
P(on | off) = pi (1 - exp(-lambda h)). Changes fall on sub-step boundaries, so spell lengths
are resolved to a sub-step. The signals are bridged one by one: their correlation between
check-ins (the settled state) is not carried into the fill; at the check-ins it is the logged one.
"""

from __future__ import annotations

import numpy as np
import pandas as pd

from .config import SIGNALS, Config
from .errors import FleetsimError
from .fleet import stream
from .signals import build_signal_tables

__all__ = ["bridge_intervals"]


def bridge_intervals(snapshots: pd.DataFrame, config: Config, seed: int, step_s: float = 60.0) -> pd.DataFrame:
    """Interval-log rows (``device_id``, ``device_type``, ``region``, ``signal``, ``start_s``,
    ``end_s``; Unix seconds) from snapshot rows (``device_id``, ``device_type``, ``region``,
    ``time_s``, and a boolean column per signal), sorted by device and time: each device is
    observed from its first check-in to one sub-step after its last, which holds the last
    logged state. Deterministic given ``seed`` (stream
    ``bridge``). FleetsimError names a device type or region the fleet file lacks."""
    frame = snapshots.sort_values(["device_id", "time_s"], kind="stable")
    types, regions = tuple(config.fleet.device_types), tuple(config.fleet.regions)
    for column, known in (("device_type", types), ("region", regions)):
        unknown = sorted(set(frame[column].astype(str)) - set(known))
        if unknown:
            raise FleetsimError(f"replay: the snapshots name {column.replace('_', ' ')} {unknown[0]!r}, not in the "
                                f"fleet file ({', '.join(known)})")
    ids = frame["device_id"].astype(str).to_numpy()
    t = frame["time_s"].to_numpy(dtype=float)
    origin = config.horizon.start.timestamp()
    rel = t - origin
    tables = build_signal_tables(config, types, regions, float(rel.max()) + 3600.0, float(rel.min()) - 3600.0,
                                 marginal=True)
    type_code = {name: i for i, name in enumerate(types)}
    region_code = {name: i for i, name in enumerate(regions)}
    group = (frame["device_type"].astype(str).map(type_code).to_numpy() * len(regions)
             + frame["region"].astype(str).map(region_code).to_numpy())
    same = np.r_[ids[1:] == ids[:-1], False]  # row i and i + 1 belong to one device: a gap
    rng = stream(seed, "bridge")
    rows = []
    for s, name in enumerate(SIGNALS):
        state = frame[name].to_numpy(dtype=bool)
        gap = np.flatnonzero(same)
        lo, hi = _bridge(tables, group[gap], 1 + s, rel[gap], rel[gap + 1], state[gap], state[gap + 1], step_s, rng)
        rows.append(pd.DataFrame({"device_id": ids[gap][lo[0]], "signal": name,
                                  "start_s": lo[1] + origin, "end_s": hi + origin}))
        # The last check-in's state holds for one sub-step, so that it is in the replay too.
        held = ~same & state
        rows.append(pd.DataFrame({"device_id": ids[held], "signal": name, "start_s": t[held],
                                  "end_s": t[held] + step_s}))
    first = np.r_[True, ids[1:] != ids[:-1]]
    last = ~same
    rows.append(pd.DataFrame({"device_id": ids[first], "signal": "observed", "start_s": t[first],
                              "end_s": t[last] + step_s}))
    out = pd.concat(rows, ignore_index=True)
    names = frame.drop_duplicates("device_id").set_index("device_id")[["device_type", "region"]]
    out = out.join(names, on="device_id")
    return out[["device_id", "device_type", "region", "signal", "start_s", "end_s"]]


def _bridge(tables, group, chain, t_a, t_b, x_a, x_b, step_s, rng) -> tuple[tuple[np.ndarray, np.ndarray], np.ndarray]:
    """Bridge every gap (arrays, one entry per gap); returns ((gap index, start), end) of the
    on-spells the bridged paths hold, each cut to its gap [t_a, t_b]."""
    n = t_a.size
    if n == 0:
        return (np.empty(0, np.int64), np.empty(0)), np.empty(0)
    steps = np.maximum(1, np.ceil((t_b - t_a) / step_s - 1e-9)).astype(np.int64)
    h = (t_b - t_a) / steps
    first = np.concatenate([[0], np.cumsum(steps)[:-1]])  # each gap's first sub-step in the flat arrays
    total = int(steps.sum())
    which = np.repeat(np.arange(n), steps)
    k = np.arange(total) - first[which]
    start = t_a[which] + k * h[which]
    at = tables.step_of(start)
    line = group[which].astype(np.int64) * tables.p.shape[1] + chain
    flat = tables.leave_rate.reshape(2, -1)
    a = flat[0][line * tables.steps + at]  # off -> on
    b = flat[1][line * tables.steps + at]  # on -> off
    lam = a + b
    with np.errstate(invalid="ignore", divide="ignore"):
        pi = np.where(lam > 0, a / lam, 0.0)
    decay = np.exp(-lam * h[which])
    p_on = np.stack([pi * (1.0 - decay), pi + (1.0 - pi) * decay])  # [from off, from on] -> P(on next)
    # Backward messages at each sub-step's end: beta[x, i] = P(logged end state | x at the end of sub-step i).
    beta = np.empty((2, total))
    last = first + steps - 1
    end_state = x_b.astype(np.int64)
    beta[:, last] = np.stack([end_state == 0, end_state == 1]).astype(float)
    for r in range(1, int(steps.max())):
        live = np.flatnonzero(steps > r)
        i = last[live] - r  # sub-step i; its end is sub-step i + 1's start
        for x in (0, 1):
            on = p_on[x, i + 1]
            beta[x, i] = (1.0 - on) * beta[0, i + 1] + on * beta[1, i + 1]
    # Forward draws: the state over each sub-step, from the logged start state.
    state = np.zeros(total, dtype=bool)
    current = x_a.astype(bool).copy()
    u = rng.random(total)
    for kk in range(int(steps.max())):
        live = np.flatnonzero(steps > kk)
        i = first[live] + kk
        x = current[live]
        state[i] = x
        if kk + 1 < int(steps.max()):
            go = steps[live] > kk + 1
            nxt = i[go]
            on = p_on[x[go].astype(np.int64), nxt]
            w_on = on * beta[1, nxt]
            w_off = (1.0 - on) * beta[0, nxt]
            with np.errstate(invalid="ignore"):
                prob = np.where(w_on + w_off > 0, w_on / (w_on + w_off), on)
            current[live[go]] = u[nxt] < prob
    # Sub-step i holds `state[i]` over [start_i, start_i + h); the last sub-step ends at t_b.
    # The state at the end of the last sub-step is the logged x_b: the draw above for the last
    # sub-step conditions on it through beta.
    change = np.r_[True, (state[1:] != state[:-1]) | (which[1:] != which[:-1])]
    run = np.cumsum(change) - 1
    run_start = start[change]
    run_end = np.zeros(run_start.size)
    np.maximum.at(run_end, run, start + h[which])
    on_run = state[change]
    gap_of = which[change]
    return (gap_of[on_run], run_start[on_run]), run_end[on_run]
