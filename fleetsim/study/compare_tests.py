"""The tests behind a comparison's verdicts: each metric's p-values, and each family's decisions.

Per tested metric (:func:`examine_metric`): the two-sided paired t test of "no change" on the
per-seed improvement, and with a margin Schuirmann's TOST on the per-seed difference
candidate - baseline. With a fixed number of seeds these are the ordinary p-values
(:mod:`fleetsim.study.stats`); in a sequential comparison they are the repeated p-values of
the group-sequential design (:mod:`fleetsim.study.compare_sequential`), valid whenever it
stops.

Per family (:func:`decide`): the primary metrics under Holm's method, the secondary ones under
Benjamini-Hochberg's (:mod:`fleetsim.study.multiple`), each adjustment applied separately to
the tests of "no change" and to the TOST p-values of the metrics that have a margin. In a
sequential comparison the primary decisions are Holm's step-down method on the design's exact
boundaries (:func:`fleetsim.study.compare_sequential.step_down`).
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np

from .compare_rules import Margin
from .compare_sequential import repeated_p, step_down, z_history
from .multiple import BENJAMINI_HOCHBERG, HOLM, benjamini_hochberg, holm
from .stats import one_sample_t, tost

__all__ = ["Design", "Tested", "Decisions", "examine_metric", "decide"]


@dataclass(frozen=True)
class Design:
    """When a comparison looks: ``looks`` the seeds in hand at each look so far, ``fractions``
    the planned information fraction of every look (one look at 1 for a fixed design)."""

    looks: tuple[int, ...]
    fractions: tuple[float, ...] = (1.0,)

    @property
    def sequential(self) -> bool:
        return len(self.fractions) > 1


@dataclass(frozen=True)
class Tested:
    """One tested metric: p-value of no change, TOST p-value and the absolute margin (NaN
    without a margin), and the z histories the sequential decisions use."""

    p: float
    tost_p: float
    margin: float
    z: np.ndarray
    z_low: np.ndarray | None = None
    z_high: np.ndarray | None = None


def _margins(margin: Margin | None, baseline: np.ndarray, looks: tuple[int, ...]) -> np.ndarray:
    """The absolute margin at each look (a relative one follows the baseline mean so far)."""
    if margin is None:
        return np.full(len(looks), math.nan)
    out = []
    for n in looks:
        part = baseline[:n][np.isfinite(baseline[:n])]
        out.append(margin.absolute(float(part.mean()) if part.size else math.nan))
    return np.asarray(out)


def examine_metric(gain: np.ndarray, difference: np.ndarray, baseline: np.ndarray, design: Design,
                margin: Margin | None, exact: bool = False) -> Tested:
    """The tests of one metric; ``gain`` the per-seed improvement (the difference for a
    neutral metric), ``difference`` candidate - baseline, rows in seed order. ``exact``
    solves repeated p-values exactly rather than from the table (sequential only)."""
    deltas = _margins(margin, baseline, design.looks)
    delta = float(deltas[-1])
    if not design.sequential:
        p = one_sample_t(gain).p
        tost_p = tost(difference, delta).p if math.isfinite(delta) else math.nan
        return Tested(p, tost_p, delta, z_history(gain, design.looks))
    z = z_history(gain, design.looks)
    p = repeated_p(z, design.fractions, True, exact)
    if not math.isfinite(delta):
        return Tested(p, math.nan, delta, z)
    z_low = z_history(difference, design.looks, np.nan_to_num(-deltas, nan=math.inf))
    z_high = -z_history(difference, design.looks, np.nan_to_num(deltas, nan=-math.inf))
    sides = [repeated_p(side, design.fractions, False, exact) for side in (z_low, z_high)]
    tost_p = max(sides) if all(math.isfinite(s) for s in sides) else math.nan
    return Tested(p, tost_p, delta, z, z_low, z_high)


@dataclass(frozen=True)
class Decisions:
    """A family's adjusted p-values and decisions, one entry per tested metric in order."""

    adjustment: str
    p_adjusted: np.ndarray
    changed: np.ndarray
    tost_adjusted: np.ndarray
    equivalent: np.ndarray


def decide(tested: list[Tested], primary: bool, design: Design, alpha: float) -> Decisions:
    """Adjust and decide one family: Holm for the primary metrics, Benjamini-Hochberg for
    the secondary ones; changes and equivalences each form a family of their own."""
    adjust = holm if primary else benjamini_hochberg
    p = np.array([t.p for t in tested], dtype=float)
    tost_p = np.array([t.tost_p for t in tested], dtype=float)
    p_adjusted = adjust(p) if p.size else p
    tost_adjusted = adjust(tost_p) if tost_p.size else tost_p
    changed = np.nan_to_num(p_adjusted, nan=2.0) <= alpha
    equivalent = np.nan_to_num(tost_adjusted, nan=2.0) <= alpha
    if primary and design.sequential and tested:
        testable = [i for i, t in enumerate(tested) if math.isfinite(t.p)]
        found = step_down([[tested[i].z] for i in testable], design.fractions, alpha)
        changed = np.zeros(len(tested), dtype=bool)
        changed[[i for i, hit in zip(testable, found, strict=True) if hit]] = True
        sided = [i for i, t in enumerate(tested)
                 if t.z_low is not None and t.z_high is not None and math.isfinite(t.tost_p)]
        found = step_down([[tested[i].z_low, tested[i].z_high] for i in sided],  # type: ignore[list-item]
                          design.fractions, alpha, two_sided=False)
        equivalent = np.zeros(len(tested), dtype=bool)
        equivalent[[i for i, hit in zip(sided, found, strict=True) if hit]] = True
    return Decisions(HOLM if primary else BENJAMINI_HOCHBERG, p_adjusted, changed, tost_adjusted, equivalent)
