"""Battery levels that follow the device: a law at every look, memory between looks.

The law. At a look, a device's level has its (type, region) Beta law for its charging state
(``battery_level.charging`` / ``.unplugged``, by mean and sd). Each device carries a latent
standard-normal score Z; the level is F^-1(Phi(Z)), F the Beta law of the charging state
then (a Gaussian copula). Between looks the score is an Ornstein-Uhlenbeck process with time
constant ``battery_level.correlation_time`` (tau): given Z at t0, the score at t is
w Z + sqrt(1 - w^2) N(0, 1) with w = exp(-(t - t0) / tau). A device with no history draws
Z ~ N(0, 1). So a device left alone shows the documented law at every look, and two looks
close together see nearly the same level (tasks feed their levels back, below).

The fresh N(0, 1) of a look at a check-in is a keyed draw (:mod:`fleetsim.keyed`): the
runtime hands it in, from the ``checkin`` stream at (device, the index of the check-in tick,
lane ``BATTERY_LANE`` of :mod:`fleetsim.runtime`), so a device's levels depend only on its
own looks and tasks (a ``numpy.random.Generator`` handed in draws in order).

During a task the level moves physically (:mod:`fleetsim.client`); at the participation's
end the level reached is recorded as the score that gives it under the law of the charging
state then, so the next look starts from it.

Sources (from memory): the Ornstein-Uhlenbeck transition law (Uhlenbeck and Ornstein,
Physical Review 36, 1930); the Gaussian copula (Nelsen, An Introduction to Copulas, 2nd ed.,
Springer 2006, section 2.3).
"""

from __future__ import annotations

import numpy as np
from scipy import special

from .config import Config
from .keyed import OrderedDraws, TickDraws, as_draws

__all__ = ["BatteryState", "beta_params", "battery_path", "battery_crossing", "Z_GRID"]

Z_GRID = np.linspace(-8.5, 8.5, 4097)
"""Scores at which each level law's quantile function is tabulated (linear in between)."""


def beta_params(mean_pct: float, sd_pct: float) -> tuple[float, float]:
    """Beta(a, b) on [0, 1] with the given mean and sd, in percent (method of moments)."""
    m, s = mean_pct / 100.0, sd_pct / 100.0
    k = m * (1.0 - m) / (s * s) - 1.0
    return m * k, (1.0 - m) * k


class BatteryState:
    """Each device's battery score and the time it was set (NaN: no history yet)."""

    def __init__(self, config: Config, type_names: tuple[str, ...], region_names: tuple[str, ...], group: np.ndarray):
        self.group = group
        n_groups = len(type_names) * len(region_names)
        # Per group, [unplugged, charging]: Beta parameters, quantile table, correlation time.
        self.params = np.empty((n_groups, 2, 2))
        self.tau_s = np.empty(n_groups)
        for ti, tname in enumerate(type_names):
            for ri, rname in enumerate(region_names):
                g = ti * len(region_names) + ri
                levels = config.fleet.group_spec(tname, rname).battery_level
                self.params[g, 0] = beta_params(levels.unplugged.mean, levels.unplugged.sd)
                self.params[g, 1] = beta_params(levels.charging.mean, levels.charging.sd)
                self.tau_s[g] = levels.correlation_time
        u = special.ndtr(Z_GRID)
        # Tabulate each distinct law once (groups often share their levels).
        laws, which = np.unique(self.params.reshape(-1, 2), axis=0, return_inverse=True)
        table = 100.0 * special.betaincinv(laws[:, 0, None], laws[:, 1, None], u)
        self.quantiles = table[which.reshape(-1)].reshape(n_groups, 2, Z_GRID.size)
        self.min_battery = config.workload.min_battery
        self._floors: dict[float, np.ndarray] = {}
        self.score = np.zeros(group.size)
        self.since = np.full(group.size, np.nan)

    def _weight(self, devices: np.ndarray, t: np.ndarray) -> np.ndarray:
        since = self.since[devices]
        w = np.exp(-np.maximum(t - since, 0.0) / self.tau_s[self.group[devices]])
        return np.where(np.isnan(since), 0.0, w)

    def _level(self, groups: np.ndarray, charging: np.ndarray, z: np.ndarray) -> np.ndarray:
        """Level (%) of score ``z`` under each device's law (linear in the quantile table)."""
        size = Z_GRID.size
        x = np.clip((z - Z_GRID[0]) / (Z_GRID[1] - Z_GRID[0]), 0.0, size - 1.000001)
        i = x.astype(np.int64)
        flat = self.quantiles.reshape(-1)
        at = (groups.astype(np.int64) * 2 + charging) * size + i
        lo, hi = flat[at], flat[at + 1]
        return lo + (x - i) * (hi - lo)

    def look(self, devices: np.ndarray, t: np.ndarray, charging: np.ndarray,
             draws: TickDraws | OrderedDraws | np.random.Generator | np.ndarray) -> np.ndarray:
        """The level (%) each device shows at a look at ``t`` with this charging state (the fresh
        normal: ``draws`` at lane 0, or ``draws`` itself, one normal per device); recorded."""
        w = self._weight(devices, t)
        fresh = draws if isinstance(draws, np.ndarray) else as_draws(draws).normal(devices, t, 0)
        z = w * self.score[devices] + np.sqrt(1.0 - w * w) * fresh
        self.score[devices] = z
        self.since[devices] = t
        return self._level(self.group[devices], charging, z)

    def record(self, devices: np.ndarray, t: np.ndarray, charging: np.ndarray, level_pct: np.ndarray) -> None:
        """A task left each device at ``level_pct`` at ``t`` with this charging state."""
        g = self.group[devices]
        c = charging.astype(np.int64)
        u = special.betainc(self.params[g, c, 0], self.params[g, c, 1], np.clip(level_pct / 100.0, 0.0, 1.0))
        self.score[devices] = np.clip(special.ndtri(u), Z_GRID[0], Z_GRID[-1])
        self.since[devices] = t

    def z_floor(self, min_battery: float) -> np.ndarray:
        """The score below which a level falls short of ``min_battery`` (%), [G, 2]."""
        if min_battery not in self._floors:
            floor = min_battery / 100.0
            self._floors[min_battery] = special.ndtri(special.betainc(self.params[..., 0], self.params[..., 1], floor))
        return self._floors[min_battery]

    def ok_probability(self, devices: np.ndarray, t: np.ndarray, charging: bool,
                       min_battery: float | None = None) -> np.ndarray:
        """Probability that a look at ``t`` with this charging state finds the level at or above
        ``min_battery`` (%; default the workload's minimum), given the history (nothing drawn
        or recorded)."""
        w = self._weight(devices, t)
        least = self.min_battery if min_battery is None else min_battery
        floor = self.z_floor(least)[self.group[devices], int(charging)]
        spread = np.sqrt(1.0 - w * w)
        mean = w * self.score[devices]
        with np.errstate(divide="ignore", invalid="ignore"):
            p = special.ndtr((mean - floor) / spread)
        return np.where(spread > 0, p, (mean >= floor).astype(float))


def battery_path(
    ends: np.ndarray, powers: np.ndarray, start_pct: np.ndarray, charge_changes: np.ndarray,
    charging0: np.ndarray, charge_w: np.ndarray, battery_wh: np.ndarray,
) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """The battery level as a piecewise-linear path from the task's start to its end.

    ``ends`` [K, n] are the relative times each of the task's K phases ends (in time order)
    and ``powers`` [K, n] each phase's draw, W. ``charge_changes`` [n, M] are the relative
    times the charging signal changed (inf-padded; negative: while the device waited to
    start), ``charging0`` its state at check-in. Returns the points [n, P], the level at each
    (%) and the slope (%/s) from each to the next; the level is capped at 100% (a capped
    stretch is flat)."""
    t_end = ends[-1]
    inside = np.where(np.isfinite(charge_changes), np.clip(charge_changes, 0.0, None), np.inf)
    points = np.concatenate([np.zeros((t_end.size, 1)), ends.T, np.minimum(inside, t_end[:, None])], axis=1)
    points.sort(axis=1)
    scale = 100.0 / (3600.0 * battery_wh)  # percent per joule
    levels = np.empty(points.shape)
    slopes = np.zeros(points.shape)
    level = start_pct.copy()
    for j in range(points.shape[1]):
        levels[:, j] = level
        if j == points.shape[1] - 1:
            break
        a, b = points[:, j], points[:, j + 1]
        mid = 0.5 * (a + b)
        phase = np.minimum((ends <= mid[None, :]).sum(axis=0), ends.shape[0] - 1)
        draw = powers[phase, np.arange(mid.size)]
        changes = (charge_changes <= mid[:, None]).sum(axis=1)
        charging = charging0 ^ (changes % 2 == 1)
        slope = (np.where(charging, charge_w, 0.0) - draw) * scale
        slope = np.where(level >= 100.0, np.minimum(slope, 0.0), slope)
        slopes[:, j] = slope
        level = np.minimum(level + slope * (b - a), 100.0)
    return points, levels, slopes


def battery_crossing(points: np.ndarray, levels: np.ndarray, slopes: np.ndarray, min_pct: float) -> np.ndarray:
    """Relative time the level first falls below ``min_pct`` (inf if never)."""
    crossing = np.full(points.shape[0], np.inf)
    for j in range(points.shape[1] - 1):
        a, b = points[:, j], points[:, j + 1]
        level, slope = levels[:, j], slopes[:, j]
        falls = np.isinf(crossing) & (b > a) & (slope < 0) & (level + slope * (b - a) < min_pct)
        with np.errstate(divide="ignore", invalid="ignore"):
            when = a + (level - min_pct) / -slope
        crossing = np.where(falls, np.maximum(when, a), crossing)
    return crossing
