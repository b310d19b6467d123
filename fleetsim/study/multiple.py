"""Adjusted p-values for many metrics tested at once.

A comparison tests a few primary metrics and some two hundred secondary ones per condition.
Tested one by one at 5%, about ten of two hundred unchanged metrics would be called changed
by chance. Two adjustments keep that in check:

- :func:`holm`: Holm's step-down method (Holm, Scandinavian Journal of Statistics 6, 1979).
  Sort the m p-values, p_(1) <= ... <= p_(m); the adjusted p_(i) is
  max_{j <= i} min(1, (m - j + 1) p_(j)). Rejecting where the adjusted p <= alpha keeps the
  family-wise error rate (the chance of any false claim) at most alpha, whatever the
  dependence between the tests. Used for the primary metrics.
- :func:`benjamini_hochberg`: the false discovery rate method of Benjamini and Hochberg
  (Journal of the Royal Statistical Society B 57, 1995). The adjusted p_(i) is
  min_{j >= i} min(1, m p_(j) / j). Rejecting where it is <= q keeps the expected share of
  false claims among the claims made at most q, for independent or positively dependent
  tests. Used for the secondary metrics.

Values that are not finite (a metric not tested) are left out of the family and stay NaN.
Both functions agree with ``statsmodels.stats.multitest.multipletests`` (methods ``holm`` and
``fdr_bh``), which the tests check. The references are cited from memory.
"""

from __future__ import annotations

from collections.abc import Callable

import numpy as np

__all__ = ["holm", "benjamini_hochberg", "HOLM", "BENJAMINI_HOCHBERG"]

HOLM = "holm"
BENJAMINI_HOCHBERG = "bh"
"""The codes of the two adjustments (column ``adjustment`` of ``differences.csv``)."""


def _finite(p: np.ndarray | list[float]) -> tuple[np.ndarray, np.ndarray]:
    values = np.asarray(p, dtype=float)
    if values.ndim != 1:
        raise ValueError(f"p-values must be one-dimensional, got shape {values.shape}")
    keep = np.isfinite(values)
    if ((values[keep] < 0) | (values[keep] > 1)).any():
        raise ValueError("p-values must lie in [0, 1]")
    return values, keep


def _adjusted(p: np.ndarray | list[float], step: Callable[[np.ndarray], np.ndarray]) -> np.ndarray:
    """``step`` (sorted finite p-values -> their adjusted values) applied to ``p`` in its own
    order, NaN where ``p`` is not finite."""
    values, keep = _finite(p)
    out = np.full(values.shape, np.nan)
    tested = values[keep]
    if tested.size == 0:
        return out
    order = np.argsort(tested, kind="stable")
    result = np.empty(tested.size)
    result[order] = step(tested[order])
    out[keep] = result
    return out


def _holm_step(ordered: np.ndarray) -> np.ndarray:
    m = ordered.size
    return np.minimum(1.0, np.maximum.accumulate((m - np.arange(m)) * ordered))


def _bh_step(ordered: np.ndarray) -> np.ndarray:
    m = ordered.size
    scaled = m * ordered / np.arange(1, m + 1)
    return np.minimum(1.0, np.minimum.accumulate(scaled[::-1])[::-1])


def holm(p: np.ndarray | list[float]) -> np.ndarray:
    """Holm-adjusted p-values of ``p`` (NaN where ``p`` is not finite).

    Raises ValueError for a p-value outside [0, 1] or a non-flat array.
    """
    return _adjusted(p, _holm_step)


def benjamini_hochberg(p: np.ndarray | list[float]) -> np.ndarray:
    """Benjamini-Hochberg adjusted p-values of ``p`` (NaN where ``p`` is not finite).

    Raises ValueError for a p-value outside [0, 1] or a non-flat array.
    """
    return _adjusted(p, _bh_step)
