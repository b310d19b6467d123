"""Group-sequential comparisons: seeds added in batches until the primary metrics are decided.

Looking at a comparison after every batch of seeds and stopping when it looks decided
inflates the false-claim rate: five looks at 5% each make a false "better" about twice as
likely. A group-sequential design fixes the looks in advance (after ``batch``, ``2 batch``,
... seeds, up to the ``budget``) and spends the error rate alpha over them.

Method: **Lan-DeMets alpha spending with the O'Brien-Fleming-type spending function** (Lan
and DeMets, Biometrika 70, 1983), applied to the paired t statistics by the significance
level approach of Jennison and Turnbull (*Group Sequential Methods with Applications to
Clinical Trials*, 2000, section 3.8 and chapter 11). At information fraction t (seeds so far
/ budget) the error spent at level a is

    a(t) = 2 - 2 Phi(Phi^-1(1 - a/2) / sqrt(t)),     a(1) = a,

so almost nothing is spent at the early looks and nearly the whole level at the last; a
two-sided test at level a spends a/2 on each side by this function (so five equally spaced
looks at 5% give the published boundaries 4.877, 3.357, 2.680, 2.290, 2.031). The
boundaries c_1..c_K on the z scale solve P(no crossing before look k, crossing at k) =
a(t_k) - a(t_{k-1}) for the standardised score process (independent normal increments,
corr(Z_j, Z_k) = sqrt(t_j / t_k)), computed by numerical integration over the continuation
region (Armitage, McPherson and Rowe, JRSS A 132, 1969; Jennison and Turnbull ch. 19). A t
statistic with n - 1 degrees of freedom is compared on the z scale after matching p-values:
z = Phi^-1(F_t(t; n - 1)). Two-sided boundaries serve the tests of "no difference"; one-sided
ones (the same spending function at the one-sided level) serve each side of the TOST.

**Repeated p-values** (Jennison and Turnbull, ch. 9): the repeated p-value at look k is the
smallest level a at which the level-a design would have crossed at some look up to k. It is a
valid p-value whenever the comparison stops, so Holm's and Benjamini-Hochberg's adjustments
(:mod:`fleetsim.study.multiple`) apply to it unchanged; with one look it is the ordinary
p-value. The primary metrics' decisions use :func:`step_down`, Holm's method on exact
boundaries. The references are cited from memory.
"""

from __future__ import annotations

import math
from collections.abc import Sequence
from dataclasses import dataclass
from functools import lru_cache

import numpy as np
from scipy import optimize, stats

from .stats import one_sample_t

__all__ = ["METHOD", "REPEATED_P", "Schedule", "schedule", "spent", "boundaries", "z_of_t", "z_history",
           "repeated_p", "crosses", "step_down"]

METHOD = ("group-sequential design: Lan-DeMets alpha spending, O'Brien-Fleming type (Lan and DeMets 1983), "
          "on the paired t statistics (Jennison and Turnbull 2000)")
REPEATED_P = "repeated p-values of the group-sequential design (Jennison and Turnbull 2000, ch. 9)"

_CAP = 12.0  # z beyond which the continuation region is cut (density below 1e-30)
_LEVELS = np.geomspace(1e-10, 1.0, 61)


@dataclass(frozen=True)
class Schedule:
    """The looks of a sequential comparison: seeds in hand at each look, the last = the budget."""

    looks: tuple[int, ...]

    @property
    def fractions(self) -> tuple[float, ...]:
        return tuple(n / self.looks[-1] for n in self.looks)


def schedule(budget: int, batch: int) -> Schedule:
    """Looks after ``batch``, ``2 batch``, ... seeds and at ``budget``. Raises ValueError when the
    batch is below 2 or the budget below the batch."""
    if batch < 2:
        raise ValueError(f"batch(={batch}) must be at least 2 (a t statistic needs 2 seeds)")
    if budget < batch:
        raise ValueError(f"budget(={budget}) must be at least the batch (={batch})")
    looks = list(range(batch, budget + 1, batch))
    if looks[-1] != budget:
        looks.append(budget)
    return Schedule(tuple(looks))


def spent(fraction: float | np.ndarray, level: float, two_sided: bool = True) -> np.ndarray:
    """The O'Brien-Fleming-type error spent by information ``fraction`` at ``level``: one-sided
    a(t) = 2 - 2 Phi(Phi^-1(1 - a/2) / sqrt(t)); two-sided, each side spends the one-sided
    function at a / 2 (the convention of published symmetric boundaries)."""
    t = np.asarray(fraction, dtype=float)
    side = level / 2.0 if two_sided else level
    one = 2.0 - 2.0 * stats.norm.cdf(stats.norm.isf(side / 2.0) / np.sqrt(t))
    return 2.0 * one if two_sided else one


def _simpson(lo: float, hi: float, spacing: float) -> tuple[np.ndarray, np.ndarray]:
    """Simpson's rule nodes and weights on [lo, hi] with about ``spacing`` between nodes."""
    count = int(min(1201, max(101, 2 * math.ceil((hi - lo) / spacing / 2) + 1)))
    nodes = np.linspace(lo, hi, count)
    weights = np.ones(count)
    weights[1:-1:2], weights[2:-1:2] = 4.0, 2.0
    return nodes, weights * (nodes[1] - nodes[0]) / 3.0


def _region(c: float, t: float, two_sided: bool) -> tuple[float, float]:
    hi = min(c, _CAP) * math.sqrt(t)
    return (-hi if two_sided else -_CAP * math.sqrt(t)), hi


def _crossing(c: float, root_t: float, nodes: np.ndarray, mass: np.ndarray, sd: float, two_sided: bool) -> float:
    """P(still going at the last look and crossing boundary ``c`` at this one), from the
    sub-density ``mass`` of the score on ``nodes`` and the increment's sd."""
    b = c * root_t
    far = stats.norm.sf((b - nodes) / sd)
    if two_sided:
        far = far + stats.norm.cdf((-b - nodes) / sd)
    return float(mass @ far)


def _next_boundary(target: float, root_t: float, nodes: np.ndarray, mass: np.ndarray, sd: float,
                   two_sided: bool) -> float:
    """The boundary at which this look spends ``target`` (inf when it spends nothing)."""
    if target <= 1e-300:
        return math.inf
    low = 0.0 if two_sided else -_CAP

    def gap(c: float) -> float:
        return _crossing(c, root_t, nodes, mass, sd, two_sided) - target

    if gap(40.0) >= 0:
        return math.inf
    if gap(low) <= 0:
        return low
    return float(optimize.brentq(gap, low, 40.0, xtol=1e-10))


@lru_cache(maxsize=4096)
def boundaries(fractions: tuple[float, ...], level: float, two_sided: bool) -> tuple[float, ...]:
    """The z-scale boundaries c_1..c_K of the design at ``level`` (inf where nothing is spent).

    Raises ValueError for fractions that do not rise strictly to 1 or a level outside (0, 1].
    """
    t = np.asarray(fractions, dtype=float)
    if t.size == 0 or not (np.all(np.diff(t) > 0) and t[0] > 0 and abs(t[-1] - 1.0) < 1e-12):
        raise ValueError(f"fractions {fractions} must rise strictly from above 0 to 1")
    if not 0.0 < level <= 1.0:
        raise ValueError(f"level(={level}) must be in (0, 1]")
    steps = np.diff(np.concatenate([[0.0], spent(t, level, two_sided)]))
    first = steps[0] / 2.0 if two_sided else steps[0]
    out = [float(stats.norm.isf(first)) if first > 0 else math.inf]
    spacing = math.sqrt(float(np.diff(np.concatenate([[0.0], t])).min())) / 8.0
    nodes, weights = _simpson(*_region(out[0], t[0], two_sided), spacing)
    density = stats.norm.pdf(nodes / math.sqrt(t[0])) / math.sqrt(t[0])
    for k in range(1, t.size):
        sd = math.sqrt(t[k] - t[k - 1])
        mass = weights * density
        c = _next_boundary(float(steps[k]), math.sqrt(t[k]), nodes, mass, sd, two_sided)
        out.append(c)
        new_nodes, new_weights = _simpson(*_region(c, t[k], two_sided), spacing)
        kernel = np.exp(-0.5 * ((new_nodes[:, None] - nodes[None, :]) / sd) ** 2) / (sd * math.sqrt(2 * math.pi))
        density = kernel @ mass
        nodes, weights = new_nodes, new_weights
    return tuple(out)


def z_of_t(t: float, df: int) -> float:
    """The z with the same one-sided p-value as ``t`` with ``df`` degrees of freedom."""
    if math.isnan(t) or df < 1:
        return math.nan
    if math.isinf(t):
        return t
    return float(stats.norm.isf(stats.t.sf(t, df))) if t > 0 else float(stats.norm.ppf(stats.t.cdf(t, df)))


def z_history(values: np.ndarray, looks: Sequence[int], shift: float | Sequence[float] = 0.0) -> np.ndarray:
    """The p-matched z of the t statistic of mean(values[:n]) - shift at each look n (NaN
    with fewer than 2 finite values). ``shift`` may give one value per look."""
    shifts = np.broadcast_to(np.asarray(shift, dtype=float), (len(looks),))
    v = np.asarray(values, dtype=float)
    out = np.empty(len(looks))
    for i, n in enumerate(looks):
        test = one_sample_t(v[:n], float(shifts[i]))
        out[i] = z_of_t(test.t, test.n - 1) if test.n >= 2 else math.nan
    return out


@lru_cache(maxsize=64)
def _table(fractions: tuple[float, ...], two_sided: bool) -> np.ndarray:
    """Boundaries at the levels of _LEVELS (rows) for each look (columns); one-sided up to 0.5."""
    levels = _LEVELS if two_sided else _LEVELS[_LEVELS <= 0.5]
    return np.array([boundaries(fractions, float(a), two_sided) for a in levels])


def _first_p(z: float, t1: float, two_sided: bool) -> float:
    """The smallest level at which the first look's boundary is crossed (closed form)."""
    one = 2.0 * stats.norm.sf(math.sqrt(t1) * stats.norm.isf(stats.norm.sf(abs(z) if two_sided else z) / 2.0))
    return float(min(1.0, 2.0 * one if two_sided else one))


def _look_p(z: float, look: int, fractions: tuple[float, ...], two_sided: bool, exact: bool) -> float:
    """The smallest level at which look ``look`` (0-based, > 0) is crossed by ``z``."""
    table = _table(fractions, two_sided)
    levels = _LEVELS[: table.shape[0]]
    column = table[:, look]
    if not z >= column[-1]:
        return 1.0
    if z >= column[0]:
        return float(levels[0])
    i = int(np.searchsorted(-column, -z))  # column falls with the level
    lo, hi = math.log(levels[i - 1]), math.log(levels[i])
    if not exact:
        c0, c1 = column[i - 1], column[i]
        share = 0.0 if c0 == c1 else (c0 - z) / (c0 - c1) if math.isfinite(c0) else 1.0
        return float(math.exp(lo + min(1.0, max(0.0, share)) * (hi - lo)))

    def gap(log_a: float) -> float:
        return min(boundaries(fractions, math.exp(log_a), two_sided)[look], 1e3) - z

    return float(math.exp(optimize.brentq(gap, lo, hi, xtol=1e-9)))


def repeated_p(z: np.ndarray, fractions: tuple[float, ...], two_sided: bool = True, exact: bool = False) -> float:
    """The repeated p-value after the looks whose p-matched z are ``z`` (NaN: a look where the
    metric was not tested). With one look at fraction 1 it is the ordinary p-value.
    ``exact`` solves for each look's level instead of interpolating a table (slower)."""
    values = np.asarray(z, dtype=float)
    best = math.nan
    for look, value in enumerate(values):
        if math.isnan(value):
            continue
        x = abs(value) if two_sided else value
        p = _first_p(x, fractions[0], two_sided) if look == 0 else _look_p(x, look, fractions, two_sided, exact)
        best = p if math.isnan(best) else min(best, p)
    return best


def crosses(z: np.ndarray, fractions: tuple[float, ...], level: float, two_sided: bool = True) -> bool:
    """True when any look's z (absolute value if two-sided) reaches its boundary at ``level``."""
    values = np.asarray(z, dtype=float)
    if level <= 0:
        return False
    bounds = np.asarray(boundaries(fractions, min(1.0, level), two_sided))[: values.size]
    shown = np.abs(values) if two_sided else values
    return bool(np.any(np.where(np.isnan(shown), False, shown >= bounds)))


def step_down(hypotheses: Sequence[Sequence[np.ndarray]], fractions: tuple[float, ...], alpha: float,
              two_sided: bool = True) -> np.ndarray:
    """Holm's step-down method on the design's repeated p-values, by exact boundaries.

    Each hypothesis is a list of z histories that must all cross (one for a test of no
    difference; the two sides of a TOST, ``two_sided=False``). With r hypotheses rejected of
    m, every remaining one whose components all cross at level alpha / (m - r) is rejected;
    this repeats until none is. Returns which hypotheses are rejected.
    """
    m = len(hypotheses)
    rejected = np.zeros(m, dtype=bool)
    while not rejected.all():
        level = alpha / (m - int(rejected.sum()))
        new = [i for i in range(m) if not rejected[i]
               and all(crosses(z, fractions, level, two_sided) for z in hypotheses[i])]
        if not new:
            break
        rejected[new] = True
    return rejected
