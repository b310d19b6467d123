"""The Pareto front: the cells that no other cell beats on every objective at once.

Cell a dominates cell b when a is at least as good as b on every objective and strictly
better on at least one. The front is every cell that no other dominates; cells with equal
objectives are all kept. A cell with an objective that is not finite cannot be compared and
is left off the front (it dominates nothing either).
"""

from __future__ import annotations

from collections.abc import Sequence

import numpy as np

__all__ = ["pareto_front", "dominates"]


def dominates(a: np.ndarray, b: np.ndarray, maximise: Sequence[bool]) -> bool:
    """True when ``a`` is at least as good as ``b`` everywhere and better somewhere."""
    sign = np.where(np.asarray(maximise, dtype=bool), 1.0, -1.0)
    x, y = sign * np.asarray(a, dtype=float), sign * np.asarray(b, dtype=float)
    return bool(np.all(x >= y) and np.any(x > y))


def pareto_front(points: np.ndarray, maximise: Sequence[bool]) -> np.ndarray:
    """Boolean mask of the rows of ``points`` (cells x objectives) on the front.

    ``maximise[j]`` says whether objective j is maximised. Rows are scanned in decreasing
    lexicographic order (a dominating row always comes before the rows it dominates), each
    checked only against the front found so far: by transitivity, a row dominated by
    anything is dominated by a front row. Raises ValueError if the shapes disagree.
    """
    values = np.asarray(points, dtype=float)
    if values.ndim != 2 or values.shape[1] != len(maximise):
        raise ValueError(f"points must be (cells, {len(maximise)}), got shape {values.shape}")
    signed = values * np.where(np.asarray(maximise, dtype=bool), 1.0, -1.0)
    finite = np.all(np.isfinite(signed), axis=1)
    on_front = np.zeros(len(values), dtype=bool)
    rows = np.flatnonzero(finite)
    # lexsort sorts by the last key first; reverse the columns so column 0 leads.
    order = rows[np.lexsort(signed[rows].T[::-1])[::-1]]
    front: list[np.ndarray] = []
    for i in order:
        p = signed[i]
        beaten = any(np.all(q >= p) and np.any(q > p) for q in front)
        if not beaten:
            front.append(p)
            on_front[i] = True
    return on_front
