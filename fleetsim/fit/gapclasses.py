"""Check-in gaps reduced to classes, and the snapshot likelihood summed over the classes.

The likelihood of one gap between two check-ins of a device (:mod:`fleetsim.fit.snapshots`)
depends on the gap only through the cells (day kind x 24 + local hour) of the 15-minute grid
steps it covers, the time it spends in its first and last step, and the states seen at its two
ends. The cells of the steps from a gap's first step on are one of a few *patterns* (one per
quarter hour of the day and pair of day kinds, plus the daylight-saving nights): a week of logs
has about 400, a year a few thousand. So the gaps fall into classes (pattern, steps covered,
states at both ends, and the bin of each end's offset within its step, :data:`OFFSET_BINS` bins
per step); a class is evaluated once, at its gaps' mean offsets, and counted as often as it
occurs. The likelihood is then exact for gaps whose offsets repeat (a class of identical gaps)
and otherwise off by a second-order term in the offsets' spread within a bin (the first-order
term vanishes at the mean); tests/test_fit_snapshots.py bounds the effect on the estimates
against the likelihood over every gap.

Within a class the composed map of the full steps between the first and the last is read from
a table per pattern (the first m full steps' map q -> A q + B, built once per evaluation), so a
class costs a few operations whatever its length, and the gradient is one backward pass through
the classes and the table. The functions take a batch of parameter vectors (rows) at once, so
that the Hessian's finite differences are one evaluation.
"""

from __future__ import annotations

from collections.abc import Callable, Iterator
from contextlib import contextmanager

import numpy as np
from scipy import special

from ..signals import STEP_S

__all__ = ["OFFSET_BINS", "gap_geometry", "gap_classes", "class_loglik", "class_hessian", "one_blas_thread"]

OFFSET_BINS = 5
"""Bins per grid step for the offsets of a gap's two ends (3 minutes each)."""
_CELLS = 48


@contextmanager
def one_blas_thread() -> Iterator[None]:
    """Run the block with the linear algebra libraries on one thread, then restore them.

    The optimiser's steps are small dense products (at most 96 parameters); with several BLAS
    threads on a busy machine each step waits for the threads (measured: 4 ms a step against
    0.1 ms on one)."""
    from threadpoolctl import threadpool_limits

    with threadpool_limits(limits=1, user_api="blas"):
        yield


def gap_geometry(times: np.ndarray, device: np.ndarray, calendar: Callable[[int, int], np.ndarray],
                 max_gap_s: float) -> dict:
    """The gaps between consecutive check-ins of each device (``first``: index of the gap's
    first check-in) as pattern, steps covered and end offsets; ``seq`` holds each pattern's
    cells step by step. ``calendar(k0, k1)`` gives the cell of grid steps k0..k1."""
    same = (device[1:] == device[:-1]) & (times[1:] - times[:-1] <= max_gap_s) & (times[1:] > times[:-1])
    first = np.flatnonzero(same)
    t0, t1 = times[first], times[first + 1]
    k0 = np.floor(t0 / STEP_S).astype(np.int64)
    k1 = np.maximum(np.ceil(t1 / STEP_S).astype(np.int64) - 1, k0)
    n = k1 - k0 + 1
    if not first.size:
        return {"first": first, "n": n, "pattern": n, "off0": t0, "off1": t1, "seq": np.zeros((0, 1), np.int64),
                "cell0": n, "span_s": 0.0}
    width = int(n.max())
    base = int(k0.min())
    cal = calendar(base, int(k0.max()) + width)
    starts = np.unique(k0)
    seq, of_start = np.unique(cal[(starts - base)[:, None] + np.arange(width)], axis=0, return_inverse=True)
    pattern = of_start.reshape(-1)[np.searchsorted(starts, k0)]
    return {"first": first, "n": n, "pattern": pattern, "off0": t0 - k0 * STEP_S, "off1": t1 - k1 * STEP_S,
            "seq": seq, "cell0": seq[pattern, 0], "span_s": float(np.mean(t1 - t0))}


def gap_classes(geometry: dict, x0: np.ndarray, x1: np.ndarray, bins: int = OFFSET_BINS) -> dict:
    """The classes of one chain's gaps (states ``x0``, ``x1`` at their ends): for each, the
    cells and lengths of its first and last pieces, its table entry, start state and counts."""
    seq, n, pattern = geometry["seq"], geometry["n"], geometry["pattern"]
    off0, off1 = geometry["off0"], geometry["off1"]
    b0 = np.minimum((off0 * bins / STEP_S).astype(np.int64), bins - 1)
    b1 = np.minimum((off1 * bins / STEP_S).astype(np.int64), bins - 1)
    key = (((pattern * seq.shape[1] + n - 1) * bins + b0) * bins + b1) * 4 + x0 * 2 + x1
    _, at, inverse, count = np.unique(key, return_index=True, return_inverse=True, return_counts=True)
    inverse = inverse.reshape(-1)
    mean0 = np.bincount(inverse, off0, count.size) / count
    mean1 = np.bincount(inverse, off1, count.size) / count
    pat, steps = pattern[at], n[at]
    single = steps == 1
    # One step: one piece of length t1 - t0. Else the first piece, m = n - 2 full steps, the last.
    h0 = np.where(single, mean1 - mean0, STEP_S - mean0)
    h1 = np.where(single, 0.0, mean1)
    last = seq[pat, steps - 1]
    up = x1[at].astype(float)
    return {"pattern": pat, "m": np.maximum(steps - 2, 0), "cell0": seq[pat, 0], "cell1": last, "h0": h0, "h1": h1,
            "x0": x0[at].astype(float), "w1": count * up, "w0": count * (1.0 - up), "steps": steps,
            "table": seq[:, 1:max(int(steps.max()) - 1, 1)] if steps.size else seq[:, :0], "seq": seq}


def _subset(classes: dict, keep: np.ndarray) -> dict:
    """The classes ``keep`` (indices), with the table cut to their patterns and lengths."""
    patterns, pat = np.unique(classes["pattern"][keep], return_inverse=True)
    out = {key: classes[key][keep] for key in ("m", "cell0", "cell1", "h0", "h1", "x0", "w1", "w0", "steps")}
    out["pattern"] = pat.reshape(-1)
    out["table"] = classes["table"][patterns, : int(out["m"].max())]
    return out


def class_hessian(theta: np.ndarray, classes: dict, cell_param: np.ndarray, step: float = 1e-4) -> np.ndarray:
    """Jacobian of :func:`class_loglik`'s gradient by central differences, symmetrised. The
    pair of evaluations for a free parameter runs only over the classes whose gaps cover one of
    its cells: the other classes' gradients do not depend on it, so their differences are 0."""
    seq, n_free = classes["seq"], theta.size // 2
    first = np.full((seq.shape[0], _CELLS), seq.shape[1], dtype=np.int64)  # first step of each cell per pattern
    for j in range(seq.shape[1] - 1, -1, -1):
        first[np.arange(seq.shape[0]), seq[:, j]] = j
    out = np.zeros((theta.size, theta.size))
    for f in range(n_free):
        reach = first[:, cell_param == f].min(axis=1)
        keep = np.flatnonzero(reach[classes["pattern"]] <= classes["steps"] - 1)
        if not keep.size:
            continue
        shifts = np.zeros((4, theta.size))
        shifts[[0, 1], f], shifts[[2, 3], n_free + f] = [step, -step], [step, -step]
        grads = class_loglik(theta + shifts, _subset(classes, keep), cell_param)[1]
        out[:, f] = (grads[0] - grads[1]) / (2 * step)
        out[:, n_free + f] = (grads[2] - grads[3]) / (2 * step)
    return (out + out.T) / 2


def _scan(a: np.ndarray, b: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Along the last axis, x_j = a_j x_{j-1} + b_j from x_{-1} = 0: the products of the a's and
    the x's, by recursive doubling (log2 of the length passes over whole arrays, not a loop)."""
    a, b = a.copy(), b.copy()
    shift = 1
    while shift < a.shape[-1]:
        b[..., shift:] = a[..., shift:] * b[..., :-shift] + b[..., shift:]
        a[..., shift:] = a[..., shift:] * a[..., :-shift]
        shift *= 2
    return a, b


def _cell_sum(cells: np.ndarray, values: np.ndarray, rows: int) -> np.ndarray:
    """Sum ``values`` [rows, ...] by cell (``cells`` broadcast to them): [rows, 48]."""
    flat = (np.arange(rows).reshape((rows,) + (1,) * cells.ndim) * _CELLS + cells).ravel()
    return np.bincount(flat, values.ravel(), rows * _CELLS).reshape(rows, _CELLS)


def class_loglik(theta: np.ndarray, classes: dict, cell_param: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Log-likelihood of the classes and its gradient in theta = (logit p, log d) of each free
    parameter, for each row of ``theta`` [rows, 2 x free] (one vector: rows = 1)."""
    theta = np.atleast_2d(theta)
    rows, n_free = theta.shape[0], theta.shape[1] // 2
    p = special.expit(theta[:, :n_free])[:, cell_param]
    d = np.exp(theta[:, n_free:])[:, cell_param]
    lam = 1.0 / ((1.0 - p) * d)
    table, pat, m = classes["table"], classes["pattern"], classes["m"]
    width = table.shape[1]
    a, ps = np.exp(-lam[:, table] * STEP_S), p[:, table]  # [rows, patterns, width]
    scanned_a, scanned_b = _scan(a, (1.0 - a) * ps)
    A = np.concatenate([np.ones(a.shape[:2] + (1,)), scanned_a], axis=2)
    B = np.concatenate([np.zeros(a.shape[:2] + (1,)), scanned_b], axis=2)
    c0, c1, h0, h1, x0 = classes["cell0"], classes["cell1"], classes["h0"], classes["h1"], classes["x0"]
    p0, p1 = p[:, c0], p[:, c1]
    e0, e1 = np.exp(-lam[:, c0] * h0), np.exp(-lam[:, c1] * h1)
    q1 = p0 + (x0 - p0) * e0
    Am, Bm = A[:, pat, m], B[:, pat, m]
    qm = Am * q1 + Bm
    q = np.clip(p1 + (qm - p1) * e1, 1e-12, 1.0 - 1e-12)
    w1, w0 = classes["w1"], classes["w0"]
    ll = (w1 * np.log(q) + w0 * np.log1p(-q)).sum(axis=1)
    g = w1 / q - w0 / (1.0 - q)
    gqm = g * e1
    gq1 = gqm * Am
    grad_p = _cell_sum(c1, g * (1.0 - e1), rows) + _cell_sum(c0, gq1 * (1.0 - e0), rows)
    grad_l = (_cell_sum(c1, -g * (qm - p1) * h1 * e1, rows) + _cell_sum(c0, -gq1 * (x0 - p0) * h0 * e0, rows))
    entry = pat * (width + 1) + m
    size = A.shape[1] * (width + 1)
    flat = (np.arange(rows)[:, None] * size + entry).ravel()
    dA = np.bincount(flat, (gqm * q1).ravel(), rows * size).reshape(A.shape)
    dB = np.bincount(flat, gqm.ravel(), rows * size).reshape(A.shape)
    # Backward through the table: T_j = dB_j + a_j T_{j+1} (entries j = width..1, a reversed scan)
    # and the reversed cumulative sum of dA_j A_j.
    multiplier = np.concatenate([np.zeros(a.shape[:2] + (1,)), a[..., :0:-1]], axis=2)
    T = _scan(multiplier, dB[..., :0:-1])[1][..., ::-1]
    RA = np.cumsum((dA * A)[..., :0:-1], axis=2)[..., ::-1]
    dp_step = T * (1.0 - a)
    dl_step = -STEP_S * (RA + a * T * (B[..., :-1] - ps))
    grad_p += _cell_sum(table, dp_step, rows)
    grad_l += _cell_sum(table, dl_step, rows)
    # lam = 1 / ((1 - p) d): d lam / d p = lam / (1 - p), d lam / d d = -lam / d.
    gp = (grad_p + grad_l * lam / (1.0 - p)) * p * (1.0 - p)
    gd = -grad_l * lam
    out_p = np.stack([np.bincount(cell_param, r, n_free) for r in gp])
    out_d = np.stack([np.bincount(cell_param, r, n_free) for r in gd])
    return ll, np.concatenate([out_p, out_d], axis=1)
