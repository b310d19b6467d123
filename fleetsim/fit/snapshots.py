"""Maximum-likelihood rates from check-in snapshots alone.

A snapshot says whether each signal was on at one instant. Between a device's consecutive
check-ins, a two-state chain with rates piecewise constant on the 15-minute UTC grid moves its
on-probability through one affine map per grid piece, the map the engine uses
(:meth:`fleetsim.signals.SignalTables.on_probability`): q' = p + (q - p) exp(-h / ((1 - p) d)).
Starting from the state seen at the first check-in (q = 0 or 1), the composed map gives the
probability of the state seen at the next; the log-likelihood is the sum over all gaps
(conditional on each device's first check-in). It is maximised over the hourly p and d of
each (device type, region, chain), weekday and weekend hours together (a gap may cross
midnight), with scipy's L-BFGS-B on log d and logit p, using the exact gradient. The gaps are
first grouped into classes of equal likelihood (:mod:`fleetsim.fit.gapclasses`: pattern of
cells, steps covered, states, offsets within their step binned), so an evaluation costs a few
operations per class rather than a pass over every grid piece of every gap;
:func:`gap_layout` and :func:`chain_loglik` keep the likelihood over every gap, against which
the classes are tested. Intervals:
95% Wald intervals on the logit / log scale from the observed information (the inverse of
the numerically differentiated gradient's Jacobian, i.e. the Hessian), mapped back.

The chains are the three signals and ``settled`` (all three on at the check-in), each seen
as a two-state chain of its own. Gaps longer than :data:`MAX_GAP_S` (a device unheard for a
day) start afresh. A cell (hour and day kind) in which fewer than :data:`MIN_CHANGES` gaps
show a change of state cannot pin down d: such cells share one (p, d) with the other sparse
hours of their day kind, or, if those together still show too few changes, with the sparse
hours of both day kinds; a warning names them.
"""

from __future__ import annotations

from collections.abc import Callable, Mapping

import numpy as np
import pandas as pd
from scipy import optimize, special

from ..config import SIGNALS
from ..signals import STEP_S
from .gapclasses import class_hessian, class_loglik, gap_classes, gap_geometry, one_blas_thread
from .rates import ESTIMATE_COLUMNS, LEVEL, hour_ranges
from .stats import DAY_KINDS, DEFAULT_WEEKEND, MARGINAL, region_zones, step_calendar

__all__ = ["MAX_GAP_S", "MIN_CHANGES", "fit_snapshots", "gap_layout", "chain_loglik", "snapshot_occupancy"]

MAX_GAP_S = 86400.0
"""Longest gap between two check-ins that is followed; a longer one starts afresh."""
MIN_CHANGES = 10
"""Fewest gaps showing a change of state that a cell needs for its own (p, d)."""
_CELLS = 48
_LOGIT_BOUND = 12.0
_LOG_D_BOUNDS = (np.log(60.0), np.log(30 * 86400.0))


def gap_layout(times: np.ndarray, device: np.ndarray, calendar: Callable[[int, int], np.ndarray]) -> dict:
    """The gaps between consecutive check-ins of each device cut at the grid, laid out piece by
    piece: gaps sorted by their number of pieces (most first), so that piece j of every gap
    that has one is a prefix of the gap arrays. ``calendar(k0, k1)`` gives the cell (day kind
    x 24 + hour) of grid steps k0..k1."""
    same = (device[1:] == device[:-1]) & (times[1:] - times[:-1] <= MAX_GAP_S) & (times[1:] > times[:-1])
    first = np.flatnonzero(same)
    t0, t1 = times[first], times[first + 1]
    k0 = np.floor(t0 / STEP_S).astype(np.int64)
    k1 = np.maximum(np.ceil(t1 / STEP_S).astype(np.int64) - 1, k0)
    count = k1 - k0 + 1
    order = np.argsort(-count, kind="stable")
    first, t0, t1, k0, count = first[order], t0[order], t1[order], k0[order], count[order]
    cal = calendar(int(k0.min()), int((k0 + count).max())) if first.size else np.empty(0, np.int64)
    base = int(k0.min()) if first.size else 0
    pieces = []
    for j in range(int(count.max()) if first.size else 0):
        n = int(np.searchsorted(-count, -j, side="left"))  # gaps with more than j pieces (a prefix)
        k = k0[:n] + j
        h = np.minimum(t1[:n], (k + 1) * STEP_S) - np.maximum(t0[:n], k * STEP_S)
        pieces.append((cal[k - base], np.maximum(h, 0.0)))
    return {"first": first, "cell0": cal[k0 - base] if first.size else np.empty(0, np.int64), "pieces": pieces}


def chain_loglik(theta: np.ndarray, layout: dict, x0: np.ndarray, x1: np.ndarray,
                 cell_param: np.ndarray) -> tuple[float, np.ndarray]:
    """Log-likelihood of the states ``x1`` seen at the ends of the gaps given ``x0`` at their
    starts, and its gradient in theta = (logit p, log d) of each free parameter."""
    n_free = theta.size // 2
    p_free, d_free = special.expit(theta[:n_free]), np.exp(theta[n_free:])
    p, d = p_free[cell_param], d_free[cell_param]
    lam = 1.0 / ((1.0 - p) * d)
    q = x0.astype(float)
    before, decay = [], []
    for cells, h in layout["pieces"]:
        n = cells.size
        a = np.exp(-lam[cells] * h)
        before.append(q[:n].copy())
        decay.append(a)
        q[:n] = p[cells] + (q[:n] - p[cells]) * a
    q = np.clip(q, 1e-12, 1.0 - 1e-12)
    ll = float(np.sum(np.where(x1, np.log(q), np.log1p(-q))))
    g = np.where(x1, 1.0 / q, -1.0 / (1.0 - q))
    grad_p, grad_d = np.zeros(_CELLS), np.zeros(_CELLS)
    for j in range(len(layout["pieces"]) - 1, -1, -1):
        cells, h = layout["pieces"][j]
        n = cells.size
        a, qprev, pj, lj = decay[j], before[j], p[cells], lam[cells]
        gj = g[:n]
        grad_p += np.bincount(cells, gj * (1.0 - a - (qprev - pj) * h * a * lj / (1.0 - pj)), minlength=_CELLS)
        grad_d += np.bincount(cells, gj * (qprev - pj) * h * a * lj / d[cells], minlength=_CELLS)
        g[:n] = gj * a
    gp = np.bincount(cell_param, grad_p, minlength=n_free) * p_free * (1.0 - p_free)
    gd = np.bincount(cell_param, grad_d, minlength=n_free) * d_free
    return ll, np.concatenate([gp, gd])


def _ties(changes: np.ndarray, min_changes: int) -> tuple[np.ndarray, list[str]]:
    """Cell -> free parameter map and the label of each cell's pooling ('' for its own)."""
    labels = [""] * _CELLS
    sparse = changes < min_changes
    groups: list[list[int]] = [[c] for c in range(_CELLS) if not sparse[c]]
    wide = []
    for day in range(2):
        cells = [c for c in range(day * 24, day * 24 + 24) if sparse[c]]
        if cells and changes[cells].sum() >= min_changes:
            groups.append(cells)
            for c in cells:
                labels[c] = "the sparse hours of its day kind"
        else:
            wide += cells
    if wide:
        groups.append(wide)
        enough = changes[wide].sum() >= min_changes
        for c in wide:
            labels[c] = "the sparse hours of both day kinds" + ("" if enough else " (still too few changes)")
    cell_param = np.empty(_CELLS, dtype=np.int64)
    for i, cells in enumerate(groups):
        cell_param[cells] = i
    return cell_param, labels


def _hessian(fun: Callable[[np.ndarray], np.ndarray], theta: np.ndarray, step: float = 1e-4) -> np.ndarray:
    """Jacobian of the gradient ``fun`` by central differences, symmetrised."""
    n = theta.size
    out = np.empty((n, n))
    for i in range(n):
        e = np.zeros(n)
        e[i] = step
        out[:, i] = (fun(theta + e) - fun(theta - e)) / (2 * step)
    return (out + out.T) / 2


def _fit_chain(geometry: dict, x: np.ndarray, min_changes: int, level: float) -> tuple[dict, list[str]]:
    """One chain of one group: per cell p, d and intervals, counts and pooling labels, from
    the gaps' classes (:mod:`fleetsim.fit.gapclasses`)."""
    first = geometry["first"]
    x0, x1 = x[first], x[first + 1]
    cell0 = geometry["cell0"]
    up = np.bincount(cell0, (~x0 & x1), minlength=_CELLS)
    down = np.bincount(cell0, (x0 & ~x1), minlength=_CELLS)
    cell_param, labels = _ties(up + down, min_changes)
    n_free = int(cell_param.max()) + 1
    gaps = np.bincount(cell0, minlength=_CELLS).astype(float)
    on = np.bincount(cell0, x0, minlength=_CELLS).astype(float)
    free_gaps = np.maximum(np.bincount(cell_param, gaps, n_free), 1)
    p0 = np.clip(np.bincount(cell_param, on, n_free) / free_gaps, 0.02, 0.98)
    # Start d where a short gap h shows a change with probability 2 p h / d (stationary chain).
    changed = np.bincount(cell_param, (up + down).astype(float), n_free) / free_gaps
    d0 = np.clip(2 * p0 * geometry["span_s"] / np.maximum(changed, 1e-6), 120.0, 10 * 86400.0)
    theta0 = np.concatenate([special.logit(p0), np.log(d0)])
    classes = gap_classes(geometry, x0.astype(np.int64), x1.astype(np.int64))
    scale = max(first.size, 1)

    def objective(theta: np.ndarray) -> tuple[float, np.ndarray]:
        ll, grad = class_loglik(theta, classes, cell_param)
        return -float(ll[0]) / scale, -grad[0] / scale

    bounds = [(-_LOGIT_BOUND, _LOGIT_BOUND)] * n_free + [_LOG_D_BOUNDS] * n_free
    with one_blas_thread():
        result = optimize.minimize(objective, theta0, jac=True, method="L-BFGS-B", bounds=bounds,
                                   options={"maxiter": 2000, "ftol": 1e-13, "gtol": 1e-9})
    theta = result.x
    info = -class_hessian(theta, classes, cell_param)
    warnings = [] if result.success else [f"optimiser: {result.message}"]
    try:
        cov = np.linalg.inv(info)
        se = np.sqrt(np.where(np.diag(cov) > 0, np.diag(cov), np.nan))
    except np.linalg.LinAlgError:
        se = np.full(theta.size, np.nan)
        warnings.append("observed information is singular: intervals not available")
    z = float(special.ndtri(0.5 + level / 2))
    lo, hi = np.maximum(theta - z * se, -700.0), np.minimum(theta + z * se, 700.0)
    pick = cell_param
    out = {
        "p": special.expit(theta[:n_free])[pick], "d": np.exp(theta[n_free:])[pick],
        "p_low": special.expit(lo[:n_free])[pick], "p_high": special.expit(hi[:n_free])[pick],
        "d_low": np.exp(lo[n_free:])[pick], "d_high": np.exp(hi[n_free:])[pick],
        "up": up.astype(float), "down": down.astype(float), "pooled": labels,
    }
    return out, warnings


def _chain_states(frame: pd.DataFrame) -> dict[str, np.ndarray]:
    states = {s: frame[s].to_numpy(dtype=bool) for s in SIGNALS}
    states["settled"] = states["idle"] & states["charging"] & states["unmetered"]
    return states


def fit_snapshots(
    snapshots: pd.DataFrame, weekend_days: Mapping[str, frozenset[int]] | None = None,
    min_changes: int = MIN_CHANGES, level: float = LEVEL, on_progress: Callable[[float], None] | None = None,
) -> tuple[pd.DataFrame, list[str]]:
    """Per cell p, d and 95% intervals of each chain (:data:`~fleetsim.fit.stats.MARGINAL`)
    of each (device type, region) in ``snapshots`` (the reader's columns, sorted by device
    and time), in the estimate table of :func:`fleetsim.fit.rates.estimate_rates` (its
    ``up``/``down`` count gaps showing a change; ``on_s``/``off_s`` are NaN); and warnings."""
    weekend_days = weekend_days or {}
    zones = region_zones(snapshots, "snapshots")
    frame = snapshots.sort_values(["device_id", "time_s"], kind="stable")
    groups = sorted(frame.groupby(["device_type", "region"], sort=True, observed=True).groups)
    rows, warnings = [], []
    total, done = len(groups) * len(MARGINAL), 0
    for tname, rname in groups:
        part = frame[(frame["device_type"] == tname) & (frame["region"] == rname)]
        zone, weekend = zones[rname], weekend_days.get(rname, DEFAULT_WEEKEND)

        def calendar(k0: int, k1: int, zone: str = zone, weekend: frozenset[int] = weekend) -> np.ndarray:
            hours, is_weekend = step_calendar(zone, weekend, k0, k1)
            return is_weekend * 24 + hours

        device = pd.factorize(part["device_id"])[0]
        geometry = gap_geometry(part["time_s"].to_numpy(float), device, calendar, MAX_GAP_S)
        if not geometry["first"].size:
            warnings.append(f"{tname} in {rname}: no two check-ins of one device within a day; not fitted")
            done += len(MARGINAL)
            continue
        for chain, x in _chain_states(part).items():
            fitted, problems = _fit_chain(geometry, x, min_changes, level)
            warnings += [f"{tname} in {rname}, {chain}: {line}" for line in problems]
            cells = pd.DataFrame(fitted)
            cells.insert(0, "hour", np.tile(np.arange(24), 2))
            cells.insert(0, "day", np.repeat(DAY_KINDS, 24))
            cells.insert(0, "chain", chain)
            cells.insert(0, "region", rname)
            cells.insert(0, "device_type", tname)
            for label, day in sorted({(lab, dk) for lab, dk in zip(cells["pooled"], cells["day"], strict=True) if lab}):
                hours = cells.loc[(cells["pooled"] == label) & (cells["day"] == day), "hour"].tolist()
                warnings.append(f"{tname} in {rname}, {chain}, {day} hours {hour_ranges(hours)}: fewer than "
                                f"{min_changes} changes seen at check-ins; d not identified alone, pooled over {label}")
            rows.append(cells)
            done += 1
            if on_progress is not None:
                on_progress(done / total)
    out = pd.concat(rows, ignore_index=True) if rows else pd.DataFrame(columns=ESTIMATE_COLUMNS)
    out["on_s"], out["off_s"] = np.nan, np.nan
    return out[ESTIMATE_COLUMNS], warnings


def snapshot_occupancy(snapshots: pd.DataFrame,
                       weekend_days: Mapping[str, frozenset[int]] | None = None) -> pd.DataFrame:
    """Share of check-ins at which each chain was on, per cell (columns device_type, region,
    chain, day, hour, occupancy)."""
    weekend_days = weekend_days or {}
    zones = region_zones(snapshots, "snapshots")
    parts = []
    for rname, frame in snapshots.groupby("region", sort=True, observed=True):
        k = np.floor(frame["time_s"].to_numpy(float) / STEP_S).astype(np.int64)
        hours, weekend = step_calendar(zones[str(rname)], weekend_days.get(str(rname), DEFAULT_WEEKEND),
                                       int(k.min()), int(k.max()))
        codes, names = pd.factorize(frame["device_type"].astype(str), sort=True)
        cell = codes * _CELLS + weekend[k - k.min()] * 24 + hours[k - k.min()]  # counted, not grouped: fast
        size = len(names) * _CELLS
        seen = np.bincount(cell, minlength=size)
        where = np.flatnonzero(seen)
        for chain, x in _chain_states(frame).items():
            parts.append(pd.DataFrame({
                "device_type": np.asarray(names, dtype=object)[where // _CELLS], "region": str(rname), "chain": chain,
                "day": np.array(DAY_KINDS)[where % _CELLS // 24], "hour": where % 24,
                "occupancy": np.bincount(cell, x, minlength=size)[where] / seen[where]}))
    table = pd.concat(parts, ignore_index=True)
    keys = ["device_type", "region", "chain", "day", "hour"]
    return table.sort_values(keys, kind="stable").reset_index(drop=True)
