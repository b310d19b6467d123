"""Intervals across seeds and the seeds a paired comparison needs.

- :func:`mean_interval`: Student t interval for a mean from n independent runs
  (mean +- t_{(1+level)/2, n-1} s / sqrt(n); Student, Biometrika 6, 1908).
- :func:`paired_interval`: the same interval on per-seed differences candidate - baseline
  (the paired t interval; any textbook, e.g. Montgomery and Runger, Applied Statistics and
  Probability for Engineers, section 10-4).
- :func:`paired_power` and :func:`seeds_needed`: power of the two-sided paired t test from
  the noncentral t distribution, power = P(|T'| > t_crit) with T' ~ t(n - 1, delta sqrt(n)
  / sigma) (Cohen, Statistical Power Analysis for the Behavioral Sciences, 2nd ed., 1988,
  ch. 2; the paired test is the one-sample test on differences).
- :func:`paired_t`: the paired t test of "no difference": t = mean(d) / (s_d / sqrt(n)) with
  n - 1 degrees of freedom, its two-sided p-value and its one-sided ones.
- :func:`tost`: two one-sided tests for equivalence within a margin delta (Schuirmann,
  Journal of Pharmacokinetics and Biopharmaceutics 15, 1987): H01 mean <= -delta is refuted
  when t_low = (mean(d) + delta) / se is large, H02 mean >= delta when t_high = (mean(d) -
  delta) / se is very negative; the TOST p-value is the larger of the two one-sided p-values,
  and p <= alpha exactly when the 1 - 2 alpha interval lies inside (-delta, delta).
  The references are cited from memory.

When every difference is the same (s_d = 0) the tests take their limits: no difference has
p = 1 and a difference has p = 0; a mean inside the margin is equivalent with p = 0.

Values that are not finite (a metric a run could not measure) are left out; ``n`` says how
many runs an interval rests on.
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np
from scipy import stats

__all__ = ["Interval", "PairedTest", "Tost", "mean_interval", "paired_interval", "one_sample_t", "paired_t", "tost",
           "paired_power", "seeds_needed", "LEVEL"]

LEVEL = 0.95
"""Confidence level of every interval a study reports."""


@dataclass(frozen=True)
class Interval:
    """A mean of ``n`` values with its sample sd and two-sided interval [low, high].

    With n < 2 the sd and the bounds are NaN; with every value equal the bounds equal the mean.
    """

    n: int
    mean: float
    sd: float
    low: float
    high: float

    def excludes_zero(self) -> bool:
        """True when the whole interval lies on one side of 0 (False if it is unknown)."""
        if not (math.isfinite(self.low) and math.isfinite(self.high)):
            return False
        return self.low > 0 or self.high < 0

    def contains(self, value: float) -> bool:
        return bool(self.low <= value <= self.high)


def mean_interval(values: np.ndarray | list[float], level: float = LEVEL) -> Interval:
    """Student t interval for the mean of the finite ``values`` at ``level`` (default 95%).

    Raises ValueError if ``level`` is not in (0, 1).
    """
    if not 0.0 < level < 1.0:
        raise ValueError(f"level(={level}) must be in (0, 1)")
    v = np.asarray(values, dtype=float)
    v = v[np.isfinite(v)]
    n = int(v.size)
    if n == 0:
        return Interval(0, math.nan, math.nan, math.nan, math.nan)
    mean = float(v.mean())
    if n == 1:
        return Interval(1, mean, math.nan, math.nan, math.nan)
    sd = float(v.std(ddof=1))
    half = float(stats.t.ppf(0.5 + level / 2.0, n - 1)) * sd / math.sqrt(n)
    return Interval(n, mean, sd, mean - half, mean + half)


def paired_interval(baseline: np.ndarray | list[float], candidate: np.ndarray | list[float],
                    level: float = LEVEL) -> Interval:
    """Paired t interval for the mean of ``candidate - baseline`` (pairs with both finite).

    Raises ValueError if the arrays differ in length.
    """
    b = np.asarray(baseline, dtype=float)
    c = np.asarray(candidate, dtype=float)
    if b.shape != c.shape:
        raise ValueError(f"paired values need equal lengths, got {b.size} and {c.size}")
    return mean_interval(c - b, level)


@dataclass(frozen=True)
class PairedTest:
    """The paired t test of ``n`` finite differences: their mean, standard error, t statistic
    (n - 1 degrees of freedom), the two-sided p-value and the one-sided ones for a mean above
    0 (``p_above``) and below 0 (``p_below``). NaN statistics and p-values when n < 2."""

    n: int
    mean: float
    se: float
    t: float
    p: float
    p_above: float
    p_below: float


def one_sample_t(d: np.ndarray | list[float], shift: float = 0.0) -> PairedTest:
    """The one-sample t test of mean(d) = ``shift`` on the finite values of ``d`` (the paired
    test when ``d`` holds the per-seed differences)."""
    values = np.asarray(d, dtype=float)
    kept = values[np.isfinite(values)]
    n = int(kept.size)
    if n < 2:
        mean = float(kept.mean()) if n else math.nan
        return PairedTest(n, mean, math.nan, math.nan, math.nan, math.nan, math.nan)
    mean = float(kept.mean())
    se = float(kept.std(ddof=1)) / math.sqrt(n)
    gap = mean - shift
    if se == 0.0:
        t = 0.0 if gap == 0 else math.copysign(math.inf, gap)
    else:
        t = gap / se
    above = float(stats.t.sf(t, n - 1))
    below = float(stats.t.cdf(t, n - 1))
    return PairedTest(n, mean, se, t, min(1.0, 2.0 * min(above, below)), above, below)


def paired_t(baseline: np.ndarray | list[float], candidate: np.ndarray | list[float]) -> PairedTest:
    """The paired t test of candidate - baseline = 0 (pairs with both values finite).

    Raises ValueError if the arrays differ in length.
    """
    b = np.asarray(baseline, dtype=float)
    c = np.asarray(candidate, dtype=float)
    if b.shape != c.shape:
        raise ValueError(f"paired values need equal lengths, got {b.size} and {c.size}")
    return one_sample_t(c - b)


@dataclass(frozen=True)
class Tost:
    """Two one-sided tests of ``|mean difference| >= margin`` on ``n`` differences: the t
    statistics against -margin (``t_low``) and +margin (``t_high``), their one-sided p-values
    and the TOST p-value (the larger). NaN when n < 2."""

    n: int
    margin: float
    t_low: float
    p_low: float
    t_high: float
    p_high: float
    p: float


def tost(differences: np.ndarray | list[float], margin: float) -> Tost:
    """Schuirmann's two one-sided tests for equivalence of the mean of ``differences`` to 0
    within ``margin`` (> 0). Raises ValueError for a margin that is not a positive number."""
    if not (math.isfinite(margin) and margin > 0):
        raise ValueError(f"margin(={margin}) must be a positive finite number")
    d = np.asarray(differences, dtype=float)
    low = one_sample_t(d, -margin)
    high = one_sample_t(d, margin)
    p = max(low.p_above, high.p_below) if low.n >= 2 else math.nan
    return Tost(low.n, margin, low.t, low.p_above, high.t, high.p_below, p)


def paired_power(n: int, change: float, sd: float, alpha: float = 1.0 - LEVEL) -> float:
    """Power of the two-sided paired t test at level ``alpha`` with ``n`` pairs.

    ``change`` is the true mean difference and ``sd`` the sd of the differences. Raises
    ValueError for n < 2 or sd <= 0.
    """
    if n < 2:
        raise ValueError(f"n(={n}) must be >= 2")
    if not sd > 0:
        raise ValueError(f"sd(={sd}) must be > 0")
    df = n - 1
    critical = float(stats.t.ppf(1.0 - alpha / 2.0, df))
    shift = abs(change) * math.sqrt(n) / sd
    return float(stats.nct.sf(critical, df, shift) + stats.nct.cdf(-critical, df, shift))


def seeds_needed(change: float, sd: float, power: float = 0.8, alpha: float = 1.0 - LEVEL,
                 limit: int = 1_000_000) -> int | None:
    """Fewest seeds (pairs) for which the paired t test detects ``change`` with ``power``.

    ``sd`` is the sd of per-seed differences (estimated from a pilot run). Returns 2 when the
    differences did not vary (sd == 0) and ``change`` is not 0; None when ``change`` is 0 or
    not finite, ``sd`` is unknown, or more than ``limit`` seeds would be needed. Raises
    ValueError if ``power`` is not in (0, 1).
    """
    if not 0.0 < power < 1.0:
        raise ValueError(f"power(={power}) must be in (0, 1)")
    if not (math.isfinite(change) and math.isfinite(sd)) or change == 0:
        return None
    if sd == 0:
        return 2
    if paired_power(limit, change, sd, alpha) < power:
        return None
    # Normal approximation as a starting point, then the exact noncentral t by bisection.
    z = stats.norm.ppf(1.0 - alpha / 2.0) + stats.norm.ppf(power)
    guess = max(2, math.ceil((z * sd / abs(change)) ** 2))
    low, high = 1, min(limit, guess)
    while paired_power(high, change, sd, alpha) < power:
        low, high = high, min(limit, high * 2)
    low = max(low, 1)
    while high - low > 1:
        mid = (low + high) // 2
        if mid >= 2 and paired_power(mid, change, sd, alpha) >= power:
            high = mid
        else:
            low = mid
    return high
