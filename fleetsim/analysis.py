"""Statistics of a run's tables: pure functions on arrays and frames, no I/O.

:mod:`fleetsim.metrics` calls these to build the tables and summary figures that reports and
studies read (docs/metrics.md); nothing here knows where the numbers came from.
"""

from __future__ import annotations

import math
from collections.abc import Mapping, Sequence

import numpy as np
import pandas as pd
from scipy import stats

__all__ = [
    "gini", "wilson_interval", "quantiles", "chi_square", "chi_square_table", "lorenz", "lorenz_table",
    "top_share", "correlation", "daily_table", "concurrency", "mean_working", "share_at_limit", "finite_or_none",
]

Z_95 = 1.959963984540054
"""The standard normal 97.5% quantile (two-sided 95%)."""


def gini(values: np.ndarray) -> float:
    """Gini coefficient of non-negative values (0: all equal; NaN when all are zero).

    G = sum_i (2 i - n - 1) x_(i) / (n sum x), x sorted ascending, i = 1..n.
    """
    x = np.sort(np.asarray(values, dtype=float))
    n = x.size
    total = x.sum()
    if n == 0 or total <= 0:
        return float("nan")
    ranks = np.arange(1, n + 1)
    return float(np.sum((2 * ranks - n - 1) * x) / (n * total))


def wilson_interval(
    successes: np.ndarray, trials: float, z: float = Z_95
) -> tuple[np.ndarray, np.ndarray]:
    """Wilson score interval for binomial proportions (Wilson, JASA 22, 1927); 95% by default.

    NaN bounds when ``trials`` is 0.
    """
    k = np.asarray(successes, dtype=float)
    if trials <= 0:
        nan = np.full(k.shape, np.nan)
        return nan, nan
    p = k / trials
    denom = 1 + z * z / trials
    centre = (p + z * z / (2 * trials)) / denom
    half = z * np.sqrt(p * (1 - p) / trials + z * z / (4 * trials * trials)) / denom
    return centre - half, centre + half


def quantiles(values: pd.Series | np.ndarray) -> dict[str, float | None]:
    """p50, p90 and p99 of the finite values (numpy's linear interpolation); None when there are none."""
    v = np.asarray(values, dtype=float)
    v = v[np.isfinite(v)]
    if v.size == 0:
        return {"p50": None, "p90": None, "p99": None}
    q = np.quantile(v, [0.5, 0.9, 0.99])
    return {"p50": float(q[0]), "p90": float(q[1]), "p99": float(q[2])}


# ------------------------------------------------------------------------------ chi-square


def chi_square(reports: np.ndarray, fleet_share: np.ndarray) -> tuple[float, float]:
    """Pearson chi-square of report counts against counts proportional to fleet shares.

    Returns (statistic, p) from ``scipy.stats.chisquare``; both NaN when there are no
    reports, fewer than two groups, or a group with no devices (an expected count of 0).
    """
    counts = np.asarray(reports, dtype=float)
    expected = np.asarray(fleet_share, dtype=float) * counts.sum()
    if counts.size < 2 or counts.sum() <= 0 or not (expected > 0).all():
        return float("nan"), float("nan")
    test = stats.chisquare(counts, expected)
    return float(test.statistic), float(test.pvalue)


def chi_square_table(bias_tables: Mapping[str, pd.DataFrame]) -> pd.DataFrame:
    """One chi-square test per grouping, from the bias tables' ``reports`` and ``fleet_share``.

    ``bias_tables`` maps a grouping name (``device_type``, ...) to its bias table. Columns:
    ``grouping``, ``groups``, ``reports`` (total), ``statistic``, ``dof`` (groups - 1), ``p``.
    """
    rows = []
    for grouping, table in bias_tables.items():
        reports = table["reports"].to_numpy(dtype=float)
        statistic, p = chi_square(reports, table["fleet_share"].to_numpy(dtype=float))
        rows.append({"grouping": grouping, "groups": int(reports.size), "reports": int(reports.sum()),
                     "statistic": statistic, "dof": int(reports.size) - 1, "p": p})
    return pd.DataFrame(rows, columns=["grouping", "groups", "reports", "statistic", "dof", "p"])


# ------------------------------------------------------------------------------ concentration


def lorenz(reports: np.ndarray, devices: np.ndarray) -> tuple[np.ndarray, np.ndarray, float]:
    """Lorenz curve of reports over devices from (reports per device, number of devices) pairs.

    Returns cumulative device shares and report shares (from (0, 0), fewest reports first)
    and the Gini coefficient 1 - 2 * area under the curve (trapezoids; exact here because
    the curve is straight within a group of devices with equal counts). The diagonal and a
    NaN Gini when no device reported.
    """
    order = np.argsort(reports, kind="stable")
    c, m = np.asarray(reports, float)[order], np.asarray(devices, float)[order]
    total_devices, total_reports = m.sum(), (c * m).sum()
    if total_devices <= 0 or total_reports <= 0:
        return np.array([0.0, 1.0]), np.array([0.0, 1.0]), float("nan")
    x = np.concatenate([[0.0], np.cumsum(m) / total_devices])
    y = np.concatenate([[0.0], np.cumsum(c * m) / total_reports])
    area = float(np.sum(np.diff(x) * (y[1:] + y[:-1]) / 2))
    return x, y, 1.0 - 2.0 * area


def lorenz_table(participation_counts: pd.DataFrame) -> pd.DataFrame:
    """The Lorenz curve's points (``device_share``, ``report_share``) from the participation counts."""
    x, y, _ = lorenz(participation_counts["reports"].to_numpy(), participation_counts["devices"].to_numpy())
    return pd.DataFrame({"device_share": x, "report_share": y})


def top_share(reports: np.ndarray, devices: np.ndarray, top: float = 0.1) -> float:
    """Share of reports given by the ``top`` fraction of devices with the most: 1 - L(1 - top).

    L is the Lorenz curve of :func:`lorenz`, linear between its points; NaN when no device
    reported.
    """
    x, y, g = lorenz(reports, devices)
    return 1.0 - float(np.interp(1.0 - top, x, y)) if math.isfinite(g) else float("nan")


# ------------------------------------------------------------------------------ time series


def correlation(a: np.ndarray, b: np.ndarray) -> float:
    """Pearson correlation of two series; NaN when either is empty or constant."""
    x, y = np.asarray(a, float), np.asarray(b, float)
    if x.size == 0 or np.std(x) <= 0 or np.std(y) <= 0:
        return float("nan")
    return float(np.corrcoef(x, y)[0, 1])


def daily_table(hourly: pd.DataFrame, statuses: Sequence[str]) -> pd.DataFrame:
    """Per day of 24 hours from the horizon start: rounds closed by status and eligible devices.

    ``hourly`` needs ``hour_utc``, ``eligible`` and one column per status. Columns: ``day``
    (0, 1, ...), ``day_utc`` (date of the day's first hour), the statuses (sums), and
    ``eligible_min``, ``eligible_mean``, ``eligible_max`` over the day's hours.
    """
    day = np.arange(len(hourly)) // 24
    grouped = hourly.assign(day=day).groupby("day", sort=True)
    out = pd.DataFrame({"day": np.unique(day).astype(np.int64)})
    out["day_utc"] = grouped["hour_utc"].first().str.slice(0, 10).to_numpy()
    for status in statuses:
        out[status] = grouped[status].sum().to_numpy().astype(np.int64)
    for name, how in (("eligible_min", "min"), ("eligible_mean", "mean"), ("eligible_max", "max")):
        out[name] = grouped["eligible"].agg(how).to_numpy(dtype=float)
    return out


def share_at_limit(values: np.ndarray, limit: float, tolerance: float = 1e-6) -> float:
    """Share of ``values`` that reach ``limit`` (within ``tolerance``); NaN when there are none."""
    v = np.asarray(values, dtype=float)
    return float(np.mean(v >= limit - tolerance)) if v.size else float("nan")


def concurrency(starts: np.ndarray, ends: np.ndarray, n_hours: int) -> tuple[int, np.ndarray]:
    """Peak number of devices working at once, overall and per hour of the horizon."""
    if starts.size == 0:
        return 0, np.zeros(n_hours, dtype=np.int64)
    times = np.concatenate([starts, ends])
    delta = np.concatenate([np.ones(starts.size, np.int64), -np.ones(ends.size, np.int64)])
    order = np.lexsort((delta, times))  # ends before starts at equal times
    level = np.cumsum(delta[order])
    t_sorted = times[order]
    hour = np.clip(np.floor(t_sorted / 3600.0).astype(np.int64), 0, max(n_hours - 1, 0))
    per_hour = np.zeros(n_hours, dtype=np.int64)
    np.maximum.at(per_hour, hour, level)
    return int(level.max()), per_hour


def mean_working(starts: np.ndarray, ends: np.ndarray, horizon_s: float) -> float:
    """Time-average number of working devices over the horizon: sum of task time / horizon (s)."""
    clipped = np.clip(ends, 0, horizon_s) - np.clip(starts, 0, horizon_s)
    return float(clipped.sum() / horizon_s) if horizon_s > 0 else float("nan")


def finite_or_none(value: float) -> float | None:
    """A float, or None when it is NaN or infinite (JSON has neither)."""
    return float(value) if math.isfinite(value) else None
