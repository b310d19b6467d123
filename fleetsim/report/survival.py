"""Kaplan-Meier estimate of task survival (time from acceptance to dropout) with 95% bands.

A participation's duration is ``ended_s - accepted_s``; it is an event when its outcome is
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

from dataclasses import dataclass

import numpy as np

__all__ = ["Survival", "kaplan_meier", "Z_95"]

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
