"""Maximum-likelihood rates from interval statistics, with exact 95% intervals and pooling.

For a two-state chain observed over time T0 off and T1 on with ``up`` off->on and ``down``
on->off changes (rates constant in the cell), the likelihood is a product of two Poisson
laws: the MLEs are leaving-off rate a = up / T0 and leaving-on rate b = down / T1, so the
mean on-duration is d = 1 / b = T1 / down and the on-probability the fleet model uses is
p = a / (a + b) (the chain's stationary on-fraction; the model's off-rate p / ((1 - p) d)
is a).

Intervals (95%):

- each rate: the exact Poisson interval of its count over its exposure (Garwood 1936,
  Biometrika 28, 437-442): [chi2(0.025; 2n) / 2T, chi2(0.975; 2n + 2) / 2T], lower 0 for n = 0;
- d: the inverse of the leaving-on rate's interval;
- p: conditional on the total count n = up + down, ``up`` is binomial with success
  probability pi = a T0 / (a T0 + b T1) (the classical conditional test for a ratio of two
  Poisson rates, e.g. Lehmann and Romano, Testing Statistical Hypotheses, section 4.5; from
  memory), so the exact Clopper-Pearson interval for pi, mapped through the increasing
  function p = r / (1 + r), r = pi / (1 - pi) x T1 / T0, is an exact interval for p.

Pooling. A cell with fewer than :data:`MIN_TRANSITIONS` changes of either kind takes both
rates from the sums over a wider pool: the hours of its day kind around it, widened an hour
on each side at a time (h - 1 to h + 1, then h - 2 to h + 2, ..., around midnight) up to all
24 hours of the day kind, then both day kinds of its region, then every region of its device
type; the first pool that has enough changes of both kinds is used (else the widest, with a
warning). Neighbouring hours first because the rates move with the clock: a night hour pooled
with the whole day would take the day's short spells. Every pooled cell is named in a
warning saying what was done.
"""

from __future__ import annotations

import re

import numpy as np
import pandas as pd
from scipy import stats

from .stats import KEYS, OWN

__all__ = ["MIN_TRANSITIONS", "LEVEL", "garwood", "p_interval", "hour_ranges", "estimate_rates", "ESTIMATE_COLUMNS"]

MIN_TRANSITIONS = 10
"""Fewest changes of each kind (up and down) a cell needs to be estimated on its own."""
LEVEL = 0.95
ESTIMATE_COLUMNS = KEYS + ["p", "p_low", "p_high", "d", "d_low", "d_high", "up", "down", "on_s", "off_s", "pooled"]
_DEFAULT_D_S = 3600.0  # a chain never seen on: any positive mean on-duration serves
_MIN_D_S = 0.001


def garwood(count: np.ndarray, exposure: np.ndarray, level: float = LEVEL) -> tuple[np.ndarray, np.ndarray]:
    """Exact Poisson interval of a rate: ``count`` events over ``exposure`` (Garwood)."""
    count = np.asarray(count, dtype=float)
    exposure = np.asarray(exposure, dtype=float)
    alpha = 1.0 - level
    with np.errstate(divide="ignore", invalid="ignore"):
        low = np.where(count > 0, stats.chi2.ppf(alpha / 2, 2 * count) / (2 * exposure), 0.0)
        high = stats.chi2.ppf(1 - alpha / 2, 2 * count + 2) / (2 * exposure)
    return low, np.where(exposure > 0, high, np.inf)


def p_interval(up: np.ndarray, down: np.ndarray, off_s: np.ndarray, on_s: np.ndarray,
               level: float = LEVEL) -> tuple[np.ndarray, np.ndarray]:
    """Exact interval of p = a / (a + b) from the conditional binomial law of ``up`` given
    up + down (Clopper-Pearson), mapped to p."""
    up, down = np.asarray(up, float), np.asarray(down, float)
    alpha = 1.0 - level
    with np.errstate(divide="ignore", invalid="ignore"):
        pi_low = np.where(up > 0, stats.beta.ppf(alpha / 2, up, down + 1), 0.0)
        pi_high = np.where(down > 0, stats.beta.ppf(1 - alpha / 2, up + 1, down), 1.0)
        scale = np.asarray(on_s, float) / np.asarray(off_s, float)

        def to_p(pi: np.ndarray) -> np.ndarray:
            r = pi / (1.0 - pi) * scale
            return np.where(pi >= 1.0, 1.0, np.where(pi <= 0.0, 0.0, r / (1.0 + r)))

        return np.nan_to_num(to_p(pi_low), nan=0.0), np.nan_to_num(to_p(pi_high), nan=1.0)


def _point(up: np.ndarray, down: np.ndarray, off_s: np.ndarray, on_s: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """MLE (p, d), with the limits where a count or an exposure is 0 (see the module doc)."""
    with np.errstate(divide="ignore", invalid="ignore"):
        a = up / off_s
        b = down / on_s
        p = a / (a + b)
        occupancy = on_s / (on_s + off_s)
    p = np.where(on_s <= 0, 0.0, np.where(off_s <= 0, 1.0, p))
    p = np.where((up == 0) & (down == 0) & (on_s > 0) & (off_s > 0), occupancy, p)
    p = np.nan_to_num(p, nan=0.0)
    with np.errstate(divide="ignore", invalid="ignore"):
        d = np.where(down > 0, on_s / down, np.where(on_s > 0, on_s, _DEFAULT_D_S))
    return p, np.maximum(d, _MIN_D_S)


def _pool_sums(stats_frame: pd.DataFrame, by: list[str]) -> pd.DataFrame:
    cols = ["on_ms", "off_ms", "up", "down"]
    return stats_frame.groupby(by, sort=True, observed=True)[cols].transform("sum")


def estimate_rates(statistics: pd.DataFrame, min_transitions: int = MIN_TRANSITIONS,
                   level: float = LEVEL) -> tuple[pd.DataFrame, list[str]]:
    """Per cell: p, d and their intervals (columns :data:`ESTIMATE_COLUMNS`), and the
    warnings about pooled cells. ``statistics`` holds every cell of every (type, region)
    (as :func:`fleetsim.fit.stats.interval_statistics` gives them). The own chains
    (``own-*``) need only on->off changes: their p is not used."""
    frame = statistics.sort_values(KEYS, kind="stable").reset_index(drop=True)
    if len(frame) % 24 or not (frame["hour"].to_numpy().reshape(-1, 24) == np.arange(24)).all():
        raise ValueError("statistics must hold all 24 hours of every (type, region, chain, day kind)")
    own = frame["chain"].isin(OWN).to_numpy()
    cols = ["on_ms", "off_ms", "up", "down"]
    values = frame[cols].to_numpy(dtype=float).copy()
    pooled = np.full(len(frame), "", dtype=object)

    def enough(v: np.ndarray) -> np.ndarray:
        return (v[:, 3] >= min_transitions) & ((v[:, 2] >= min_transitions) | own)

    need = ~enough(values)
    hours = frame["hour"].to_numpy()
    blocks = values.reshape(-1, 24, 4)
    window = blocks.copy()
    for k in range(1, 12):  # neighbouring hours of the same day kind, h - k to h + k (around midnight)
        if not need.any():
            break
        window = window + np.roll(blocks, k, axis=1) + np.roll(blocks, -k, axis=1)
        sums = window.reshape(-1, 4)
        take = need & enough(sums)
        values[take] = sums[take]
        pooled[take] = [f"hours {(h - k) % 24}-{(h + k) % 24} of its day kind" for h in hours[take]]
        need &= ~take
    levels = [
        ("the 24 hours of its day kind", ["device_type", "region", "chain", "day"]),
        ("both day kinds of its region", ["device_type", "region", "chain"]),
        ("every region of its device type", ["device_type", "chain"]),
    ]
    for label, by in levels:
        if not need.any():
            break
        sums = _pool_sums(frame, by)[cols].to_numpy(dtype=float)
        take = need & (enough(sums) | (label == levels[-1][0]))
        values[take] = sums[take]
        pooled[take] = label
        need &= ~take
    up, down, on_s, off_s = values[:, 2], values[:, 3], values[:, 0] / 1000.0, values[:, 1] / 1000.0
    p, d = _point(up, down, off_s, on_s)
    p_low, p_high = p_interval(up, down, off_s, on_s, level)
    b_low, b_high = garwood(down, on_s, level)
    with np.errstate(divide="ignore"):
        d_low, d_high = 1.0 / b_high, 1.0 / b_low
    out = frame[KEYS].copy()
    out["p"], out["p_low"], out["p_high"] = p, np.minimum(p_low, p), np.maximum(p_high, p)
    out["d"], out["d_low"], out["d_high"] = d, np.minimum(d_low, d), d_high
    out["up"], out["down"], out["on_s"], out["off_s"] = up, down, on_s, off_s
    out["pooled"] = pooled
    out.loc[own, ["p", "p_low", "p_high"]] = np.nan
    warnings = _pool_warnings(frame, out, min_transitions)
    return out[ESTIMATE_COLUMNS], warnings


def _pool_warnings(frame: pd.DataFrame, out: pd.DataFrame, min_transitions: int) -> list[str]:
    """One line per (type, region, chain, day kind) with pooled hours: which, and how. Cells
    never observed (a region without weekend days has no weekend hours) need no warning."""
    lines = []
    seen = ((frame["on_ms"] + frame["off_ms"]) > 0).to_numpy()
    marked = out[(out["pooled"] != "").to_numpy() & seen]
    for key, rows in marked.groupby(["device_type", "region", "chain", "day"], sort=True):
        tname, rname, chain, day = key
        how = []
        near = rows["pooled"].str.startswith("hours ")
        if near.any():
            widest = max(_reach(label) for label in rows.loc[near, "pooled"])
            how.append(f"hours {hour_ranges(sorted(rows.loc[near, 'hour']))} with their neighbours (up to {widest} "
                       f"on each side)")
        for label, part in rows[~near].groupby("pooled", sort=True):
            how.append(f"hours {hour_ranges(sorted(part['hour']))} over {label}")
        enough = rows["down"].min() >= min_transitions and (chain in OWN or rows["up"].min() >= min_transitions)
        tail = "" if enough else f" (still fewer than {min_transitions} changes: poorly determined)"
        lines.append(f"{tname} in {rname}, {chain}, {day}: fewer than {min_transitions} changes of each kind; "
                     f"pooled {'; '.join(how)}{tail}")
    return lines


def _reach(label: str) -> int:
    """k of a label 'hours a-b of its day kind' (b = a + 2k around the clock)."""
    first, last = (int(v) for v in re.findall(r"\d+", label)[:2])
    return (last - first) % 24 // 2


def hour_ranges(hours: list[int]) -> str:
    """'0-5, 9, 22-23' for a sorted list of hours."""
    parts, start = [], None
    for i, h in enumerate(hours):
        if start is None:
            start = h
        if i + 1 == len(hours) or hours[i + 1] != h + 1:
            parts.append(f"{start}" if start == h else f"{start}-{h}")
            start = None
    return ", ".join(parts)

