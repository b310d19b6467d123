"""Kaplan-Meier estimate of task survival (time from acceptance to dropout) with 95% bands,
and the task-survival tables built from it (pure functions, no I/O).

A participation's duration is ``ended_s - started_s``; it is an event when its outcome is
``dropout`` and right-censored otherwise (the task reported, was late or was stopped at
close, so its dropout time is only known to exceed the duration).

Sources (cited from memory):

- the product-limit estimator: E. L. Kaplan and P. Meier, "Nonparametric estimation from
  incomplete observations", Journal of the American Statistical Association 53 (1958),
  457-481;
- its variance: M. Greenwood, "The natural duration of cancer", Reports on Public Health and
  Medical Subjects 33, HMSO, London (1926): Var S(t) = S(t)^2 sum_{t_j <= t} d_j / (n_j (n_j - d_j));
- bands on the log(-log S) scale, which stay inside [0, 1] ("exponential Greenwood"):
  J. D. Kalbfleisch and R. L. Prentice, The Statistical Analysis of Failure Time Data,
  2nd ed., Wiley (2002), section 4.3: S(t)^exp(+-z sigma(t)) with
  sigma(t)^2 = sum d_j / (n_j (n_j - d_j)) / (log S(t))^2.

The tests compare this estimator and its bands with lifelines' KaplanMeierFitter.
"""

from __future__ import annotations

from collections.abc import Sequence
from dataclasses import dataclass

import numpy as np
import pandas as pd

__all__ = [
    "Survival", "kaplan_meier", "Z_95", "MIN_AT_RISK", "MAX_POINTS", "task_durations", "survival_curves",
    "last_time", "survival_grid", "task_survival_tables", "SURVIVAL_COLUMNS",
]

Z_95 = 1.959963984540054
"""The standard normal 97.5% quantile (two-sided 95%)."""


@dataclass(frozen=True)
class Survival:
    """A step function: ``survival[i]`` holds on ``[time[i], time[i + 1])``; 1 before ``time[0]``.

    ``time`` (s) are the distinct observed durations in ascending order; ``at_risk`` and
    ``events`` are the number still at risk just before each time and the dropouts at it;
    ``low`` and ``high`` bound a pointwise 95% interval.
    """

    time: np.ndarray
    at_risk: np.ndarray
    events: np.ndarray
    survival: np.ndarray
    low: np.ndarray
    high: np.ndarray

    def _index(self, t: np.ndarray | float) -> np.ndarray:
        return np.searchsorted(self.time, np.asarray(t, dtype=float), side="right") - 1

    def _at(self, values: np.ndarray, t: np.ndarray | float) -> np.ndarray:
        i = self._index(t)
        padded = np.concatenate([[1.0], values])
        return padded[i + 1]

    def at(self, t: np.ndarray | float) -> np.ndarray:
        """S(t) at the times ``t`` (s)."""
        return self._at(self.survival, t)

    def band_at(self, t: np.ndarray | float) -> tuple[np.ndarray, np.ndarray]:
        """The 95% band (low, high) at the times ``t`` (s)."""
        return self._at(self.low, t), self._at(self.high, t)

    def at_risk_at(self, t: np.ndarray | float) -> np.ndarray:
        """Tasks still at risk just before the times ``t`` (s): those lasting at least ``t``."""
        i = np.searchsorted(self.time, np.asarray(t, dtype=float), side="left")
        padded = np.concatenate([self.at_risk, [0]])
        return padded[i]

    def change_points(self) -> np.ndarray:
        """Indices where the estimate steps down (times with at least one dropout)."""
        return np.flatnonzero(self.events > 0)


def kaplan_meier(durations: np.ndarray, dropped: np.ndarray, z: float = Z_95) -> Survival:
    """Kaplan-Meier estimate from durations (s) and event flags (True: dropped out).

    Raises ValueError if the two arrays differ in length or a duration is negative or NaN.
    """
    d = np.asarray(durations, dtype=float)
    e = np.asarray(dropped, dtype=bool)
    if d.shape != e.shape or d.ndim != 1:
        raise ValueError(f"durations ({d.shape}) and dropped ({e.shape}) must be 1-D of one length")
    if d.size and (not np.isfinite(d).all() or (d < 0).any()):
        raise ValueError("durations must be finite and >= 0")
    time, inverse = np.unique(d, return_inverse=True)
    removed = np.bincount(inverse, minlength=time.size)
    events = np.bincount(inverse, weights=e.astype(float), minlength=time.size).astype(np.int64)
    at_risk = d.size - np.concatenate([[0], np.cumsum(removed)[:-1]]).astype(np.int64)
    with np.errstate(divide="ignore", invalid="ignore"):
        survival = np.cumprod(1.0 - events / at_risk)
        # Greenwood's sum; a time where everyone at risk drops out makes it infinite, and S = 0.
        terms = np.where(events > 0, events / (at_risk.astype(float) * (at_risk - events)), 0.0)
        greenwood = np.cumsum(terms)
        log_s = np.log(survival)
        sigma = np.sqrt(greenwood) / np.abs(log_s)
        low = survival ** np.exp(z * sigma)
        high = survival ** np.exp(-z * sigma)
    flat = survival >= 1.0  # no dropout yet: the estimate is exactly 1 and so is its band
    low[flat] = high[flat] = 1.0
    gone = survival <= 0.0
    low[gone] = high[gone] = 0.0
    return Survival(time=time, at_risk=at_risk, events=events, survival=survival, low=low, high=high)


# ------------------------------------------------------------------------------ task survival tables

MIN_AT_RISK = 10
"""Curves and minute values stop where fewer tasks than this remain at risk."""

MAX_POINTS = 400
"""A curve with more steps than this is given on a grid of this many times instead."""

SURVIVAL_COLUMNS = ("scope", "device_type", "time_s", "survival", "low", "high", "at_risk")
"""Columns of both task-survival tables; ``scope`` is ``device_type`` or ``all`` (the whole
fleet, with an empty ``device_type``), so that no device type name can be mistaken for it."""


def task_durations(participations: pd.DataFrame) -> tuple[np.ndarray, np.ndarray, np.ndarray, int]:
    """(duration s, dropped out, device type, rows left out) of the participations.

    Reads ``started_s``, ``ended_s``, ``outcome`` and ``device_type``. A row whose end
    precedes its acceptance (or is not a number) has no duration to analyse; it is left out
    and counted.
    """
    duration = (participations["ended_s"] - participations["started_s"]).to_numpy(dtype=float)
    ok = np.isfinite(duration) & (duration >= 0)
    dropped = (participations["outcome"] == "dropout").to_numpy(dtype=bool)
    kind = participations["device_type"].astype(str).to_numpy()
    return duration[ok], dropped[ok], kind[ok], int((~ok).sum())


def survival_curves(participations: pd.DataFrame, type_names: Sequence[str]) -> dict[str, Survival]:
    """Kaplan-Meier curve of time to dropout per device type (types without a task left out)."""
    duration, dropped, kind, _ = task_durations(participations)
    return {name: kaplan_meier(duration[kind == name], dropped[kind == name]) for name in type_names
            if (kind == name).any()}


def last_time(s: Survival) -> float:
    """The last time (s) with at least MIN_AT_RISK tasks at risk: the curve stops there (0 if none)."""
    ok = np.flatnonzero(s.at_risk >= MIN_AT_RISK)
    return float(s.time[ok[-1]]) if ok.size else 0.0


def survival_grid(curves: Sequence[Survival]) -> np.ndarray:
    """Whole minutes (s) from 1 to the last time any curve still has enough tasks at risk."""
    end = max((last_time(s) for s in curves), default=0.0)
    return np.arange(1, int(end // 60) + 1) * 60.0


def _curve_times(s: Survival) -> np.ndarray:
    """0, each time the estimate steps down up to :func:`last_time`, and that end.

    More than MAX_POINTS steps: an even grid of MAX_POINTS times from 0 to the end instead.
    """
    end = last_time(s)
    steps = s.time[s.change_points()]
    steps = steps[steps <= end]
    if steps.size > MAX_POINTS:
        steps = np.linspace(0.0, end, MAX_POINTS)
    return np.concatenate([[0.0], steps, [end]])


def _rows(scope: str, name: str, s: Survival, t: np.ndarray, shown: np.ndarray) -> pd.DataFrame:
    """Table rows of curve ``s`` at times ``t``; estimates are NaN where ``shown`` is False."""
    low, high = s.band_at(t)
    return pd.DataFrame({
        "scope": scope, "device_type": name, "time_s": t,
        "survival": np.where(shown, s.at(t), np.nan), "low": np.where(shown, low, np.nan),
        "high": np.where(shown, high, np.nan), "at_risk": s.at_risk_at(t).astype(np.int64),
    }, columns=list(SURVIVAL_COLUMNS))


def task_survival_tables(participations: pd.DataFrame, type_names: Sequence[str]) -> tuple[pd.DataFrame, pd.DataFrame]:
    """The task-survival curves and their minute-by-minute values, per device type and fleet-wide.

    First table (``task_survival``): each curve at 0, at every time it steps down while at
    least MIN_AT_RISK tasks remain at risk, and at that last time (see :func:`_curve_times`).
    Second (``task_survival_by_minute``): each curve at every whole minute up to the last
    time any device type's curve reaches, NaN estimates after the curve's own end. Columns:
    SURVIVAL_COLUMNS; device types in ``type_names`` order, then the whole fleet.
    """
    curves = [("device_type", name, s) for name, s in survival_curves(participations, type_names).items()]
    duration, dropped, _, _ = task_durations(participations)
    if duration.size:
        curves.append(("all", "", kaplan_meier(duration, dropped)))
    grid = survival_grid([s for scope, _, s in curves if scope == "device_type"])
    steps, minutes = [], []
    for scope, name, s in curves:
        t = _curve_times(s)
        steps.append(_rows(scope, name, s, t, np.ones(t.size, dtype=bool)))
        minutes.append(_rows(scope, name, s, grid, grid <= last_time(s)))
    empty = pd.DataFrame({c: pd.Series(dtype=object if c in ("scope", "device_type") else float)
                          for c in SURVIVAL_COLUMNS})
    return (pd.concat(steps, ignore_index=True) if steps else empty,
            pd.concat(minutes, ignore_index=True) if minutes else empty.copy())
