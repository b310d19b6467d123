"""The fitted fleet as a fleet-file dict, one row per estimate, and the comments of the YAML.

Signals and the settled state. Each signal's ``hourly`` is its fitted on-probability (the
marginal: how often the signal is on, settled or not, which is what the fleet file's
``hourly`` means). The data show the settled state only as all three signals on at once; but
that also happens, now and then, when the device is not settled and its three own chains are
on together. So the settled state's p is the value x for which the engine's all-on
probability, x + (1 - x) prod_s p_own,s with p_own,s = 1 - (1 - p_s) / (1 - x), equals the
fitted all-on probability A (increasing in x, so unique; 0 when A is at most the product of
the signals' p, i.e. no more togetherness than independent signals show; at most the least
signal's p, as the fleet file requires); its interval is A's mapped the same way, the signals'
p held at their estimates. The all-on state is left at rate r = 1 / (its fitted mean
duration); in the engine it is left when the settled state ends while some own chain is off,
or, when not settled, as soon as one own chain turns off, so that (the chains near their
hour's stationary law) r = w (1 - prod_s p_own,s) / d_settled + (1 - w) sum_s 1 / d_own,s with
w = x / A the share of all-on time that is settled: the settled state's ``mean_on`` solves
this (:func:`settled_duration`), kept within half and three times the all-on mean (where w
is small the solution would follow the noise), its interval r's mapped the same way. A device
type gets a settled state when its settled p averages at least :data:`MIN_SETTLED` over its
cells. A signal's ``mean_on`` is then its own chain's (the ``own-*`` statistics, exact under
the model; see :mod:`fleetsim.fit.stats`); with snapshots alone, or without a settled
state, it is the signal's fitted mean on-duration.

Regions: a device type's values sit at its own level for the region where it has most
devices, and in ``by_region`` for every other region it is seen in.
"""

from __future__ import annotations

from typing import Any

import numpy as np
import pandas as pd
from scipy import optimize

from ..config import SIGNALS, WEEKDAYS
from .stats import DAY_KINDS

__all__ = ["MIN_SETTLED", "settled_probability", "settled_duration", "duration_text", "signal_patterns", "Collector"]

MIN_SETTLED = 0.02
"""Least mean settled on-probability (over a type's cells) for which a type gets a settled state."""
_DIGITS = 4


def settled_probability(all_on: np.ndarray, signals: list[np.ndarray]) -> np.ndarray:
    """The settled p giving the engine's all-on probability ``all_on`` with the signals' p
    (see the module doc), element by element."""
    all_on = np.asarray(all_on, float)
    p = np.stack([np.asarray(s, float) for s in signals])
    out = np.empty(all_on.shape)
    for index in np.ndindex(all_on.shape):
        ps = p[(slice(None),) + index]
        top = float(ps.min())
        target = float(all_on[index])

        def gap(x: float, ps: np.ndarray = ps, target: float = target) -> float:
            return x + (1.0 - x) * float(np.prod(1.0 - (1.0 - ps) / (1.0 - x))) - target

        if not (np.isfinite(target) and np.isfinite(ps).all()):
            out[index] = np.nan  # an interval bound the data cannot give stays undefined
        elif top <= 0.0 or gap(0.0) >= 0.0:
            out[index] = 0.0
        elif gap(top) <= 0.0 or top >= 1.0:
            out[index] = min(top, 1.0 - 1e-6)
        else:
            out[index] = optimize.brentq(gap, 0.0, top, xtol=1e-12)
    return out


def settled_duration(rate: np.ndarray, x: np.ndarray, all_on: np.ndarray, signals: list[np.ndarray],
                     own_d: list[np.ndarray]) -> np.ndarray:
    """The settled mean on-duration for an all-on leaving rate ``rate`` (see the module doc)."""
    x = np.asarray(x, float)
    with np.errstate(divide="ignore", invalid="ignore"):
        own_p = [np.clip(1.0 - (1.0 - s) / (1.0 - x), 0.0, 1.0) for s in signals]
        w = np.where(all_on > 0, x / all_on, 0.0)
        others = (1.0 - w) * np.sum([1.0 / d for d in own_d], axis=0)
        settled_rate = np.maximum(rate - others, 0.1 * rate) / (w * (1.0 - np.prod(own_p, axis=0)))
        out = 1.0 / settled_rate
    plain = 1.0 / rate
    # A small settled share (w) makes the solution carried by noise: keep it near the plain mean.
    return np.where(np.isfinite(out) & (w > 0), np.clip(out, 0.5 * plain, 3.0 * plain), plain)


def duration_text(seconds: float) -> str:
    """A duration as the fleet file writes it, to 4 significant digits (``37.52m``, ``6.998h``)."""
    seconds = max(float(seconds), 0.001)
    if seconds < 90:
        return f"{seconds:.4g}s"
    if seconds < 7200:
        return f"{seconds / 60:.4g}m"
    return f"{seconds / 3600:.4g}h"


def _grid(frame: pd.DataFrame, column: str) -> np.ndarray:
    """[2, 24] values of one column of a (type, region, chain)'s 48 cells, weekday first."""
    out = np.full((2, 24), np.nan)
    days = frame["day"].map({d: i for i, d in enumerate(DAY_KINDS)}).to_numpy()
    out[days, frame["hour"].to_numpy()] = frame[column].to_numpy()
    return out


def _labels(frame: pd.DataFrame) -> np.ndarray:
    out = np.full((2, 24), "", dtype=object)
    days = frame["day"].map({d: i for i, d in enumerate(DAY_KINDS)}).to_numpy()
    out[days, frame["hour"].to_numpy()] = frame["pooled"].to_numpy()
    return out


class Collector:
    """Rows of the side file and comments of the YAML, gathered while the dict is built."""

    def __init__(self) -> None:
        self.rows: list[dict[str, Any]] = []
        self.comments: dict[tuple[str, ...], tuple[list[str], str]] = {}

    def scalar(self, path: tuple[str, ...], value: float, low: float, high: float, n: int, unit: str,
               what: str, pooled: str = "") -> None:
        self.rows.append({"key": ".".join(path), "estimate": value, "low": low, "high": high,
                          "observations": int(n), "unit": unit, "pooled": pooled})
        self.comments[path] = ([], f"95% [{_show(low)}, {_show(high)}], {int(n):,} {what}")

    def hourly(self, path: tuple[str, ...], values: np.ndarray, low: np.ndarray, high: np.ndarray,
               n: np.ndarray, unit: str, what: str, pooled: np.ndarray) -> None:
        """24 values of one list: a row each, and a comment block of 6 hours a line."""
        show = duration_text if unit == "s" else _show
        lines = [f"{path[-1]}: 95% intervals by hour [low, high] ({what}); * pooled"]
        for start in range(0, 24, 6):
            cells = []
            for h in range(start, start + 6):
                star = "*" if pooled[h] else ""
                cells.append(f"{h}: [{show(low[h])}, {show(high[h])}] ({int(n[h])}){star}")
            lines.append("  " + "; ".join(cells))
            for h in range(start, start + 6):
                self.rows.append({"key": ".".join(path + (str(h),)), "estimate": float(values[h]),
                                  "low": float(low[h]), "high": float(high[h]), "observations": int(n[h]),
                                  "unit": unit, "pooled": pooled[h]})
        self.comments[path] = (lines, "")


def _show(value: float) -> str:
    if not np.isfinite(value):
        return "inf" if value > 0 else "nan"
    return f"{value:.4g}"


def signal_patterns(
    estimates: pd.DataFrame, tname: str, rname: str, base: tuple[str, ...], settled: bool, collect: Collector,
    joint: bool = False,
) -> dict[str, Any]:
    """The ``signals`` (and ``settled``, if ``settled``) entries of one (type, region), with
    their rows and comments under the key path ``base``. With ``joint`` the ``settled`` rows
    are the settled chain's own fit (from snapshots, :mod:`fleetsim.fit.joint`), written as
    they are; else the all-on state's, converted as the module doc says."""
    part = estimates[(estimates["device_type"] == tname) & (estimates["region"] == rname)]
    chains = {c: rows.sort_values(["day", "hour"]) for c, rows in part.groupby("chain", sort=True)}
    p = {c: _grid(chains[c], "p") for c in SIGNALS}
    out: dict[str, Any] = {"signals": {}}
    for s in SIGNALS:
        d_source = chains.get(f"own-{s}") if settled and f"own-{s}" in chains else chains[s]
        out["signals"][s] = _pattern(chains[s], d_source, base + ("signals", s), collect,
                                     p_values=np.round(p[s], _DIGITS))
    if settled:
        table = chains["settled"]
        if joint:
            x = {col: _grid(table, col) for col in ("p", "p_low", "p_high")}
            d = {col: _grid(table, col) for col in ("d", "d_low", "d_high")}
        else:
            x = {col: settled_probability(_grid(table, col), [p[s] for s in SIGNALS])
                 for col in ("p", "p_low", "p_high")}
            own_d = [_grid(chains.get(f"own-{s}", chains[s]), "d") for s in SIGNALS]
            all_on = _grid(table, "p")
            d = {col: settled_duration(1.0 / _grid(table, col), x["p"], all_on, [p[s] for s in SIGNALS], own_d)
                 for col in ("d", "d_low", "d_high")}
        # floor the rounding: the settled state must stay within every signal it holds on
        fixed = np.floor(np.minimum(x["p"], np.min([np.round(p[s], _DIGITS) for s in SIGNALS], axis=0))
                         * 10**_DIGITS) / 10**_DIGITS
        out["settled"] = _pattern(table, table, base + ("settled",), collect, p_values=fixed,
                                  p_low=x["p_low"], p_high=x["p_high"], durations=d)
        out["settled"]["turns_on"] = list(SIGNALS)
    return out


def _pattern(p_rows: pd.DataFrame, d_rows: pd.DataFrame, path: tuple[str, ...], collect: Collector,
             p_values: np.ndarray, p_low: np.ndarray | None = None, p_high: np.ndarray | None = None,
             durations: dict[str, np.ndarray] | None = None) -> dict:
    """One signal pattern (weekday lists and a ``weekend`` block), its rows and comments."""
    p_low = _grid(p_rows, "p_low") if p_low is None else p_low
    p_high = _grid(p_rows, "p_high") if p_high is None else p_high
    changes = _grid(p_rows, "up") + _grid(p_rows, "down")
    p_pooled, d_pooled = _labels(p_rows), _labels(d_rows)
    d, d_low, d_high, d_n = (_grid(d_rows, c) for c in ("d", "d_low", "d_high", "down"))
    if durations is not None:
        d, d_low, d_high = durations["d"], durations["d_low"], durations["d_high"]
    out: dict[str, Any] = {}
    for day, where in ((0, path), (1, path + ("weekend",))):
        target = out if day == 0 else out.setdefault("weekend", {})
        target["hourly"] = [float(v) for v in p_values[day]]
        target["mean_on"] = [duration_text(v) for v in d[day]]
        collect.hourly(where + ("hourly",), p_values[day], np.minimum(p_low[day], p_values[day]),
                       np.maximum(p_high[day], p_values[day]), changes[day], "probability", "changes",
                       p_pooled[day])
        collect.hourly(where + ("mean_on",), d[day], d_low[day], d_high[day], d_n[day], "s", "on->off changes",
                       d_pooled[day])
    return out


def weekend_names(isodays: frozenset[int]) -> list[str]:
    """ISO day numbers as the fleet file's day names, Monday first."""
    return [WEEKDAYS[d - 1] for d in sorted(isodays)]
