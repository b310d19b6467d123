"""Check-in gaps reduced to classes, and the snapshot likelihood summed over the classes.

The likelihood of one gap between two check-ins of a device (:mod:`fleetsim.fit.snapshots`)
depends on the gap only through the cells (day kind x 24 + local hour) of the 15-minute grid
steps it covers, the time it spends in its first and last step, and the states seen at its two
ends. The cells of the steps from a gap's first step on are one of a few *patterns* (one per
quarter hour of the day and pair of day kinds, plus the daylight-saving nights): a week of logs
has about 400, a year a few thousand. So the gaps fall into classes (pattern, steps covered,
signals seen at both ends, and the bin of each end's offset within its step, :data:`OFFSET_BINS`
bins per step); a class is evaluated once, at its gaps' mean offsets, and counted (by each
chain's pair of states at its ends, seen or expected) as often as it occurs. The likelihood
is then exact for gaps whose offsets repeat (a class of identical gaps)
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

__all__ = ["OFFSET_BINS", "gap_geometry", "gap_classes", "seen_codes", "pair_weights", "class_loglik", "class_hessian",
           "one_blas_thread", "gap_layout", "chain_loglik"]

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


def gap_classes(geometry: dict, bins: int = OFFSET_BINS, seen: np.ndarray | None = None) -> dict:
    """The classes of the gaps (pattern, steps covered, bin of each end's offset, and ``seen``,
    a code of what was seen at both ends, if given): for each, the cells and lengths of its
    first and last pieces, its table entry and its number of gaps; ``inverse`` gives each gap's
    class. A chain's states are not part of a class: the weights of its four (start, end) pairs
    (:func:`pair_weights`) say what was seen or, for a hidden chain, what is expected. With
    ``seen`` (the snapshot fit passes the three signals at both ends) every gap of a class
    shows the same signals, so for each signal's pairs the first-order term of the offsets'
    spread still vanishes at the class mean; without it, a class mixes gaps whose offsets
    differ by state, and the error is of first order."""
    seq, n, pattern = geometry["seq"], geometry["n"], geometry["pattern"]
    off0, off1 = geometry["off0"], geometry["off1"]
    b0 = np.minimum((off0 * bins / STEP_S).astype(np.int64), bins - 1)
    b1 = np.minimum((off1 * bins / STEP_S).astype(np.int64), bins - 1)
    key = ((pattern * seq.shape[1] + n - 1) * bins + b0) * bins + b1
    if seen is not None:
        key = key * (int(seen.max()) + 1 if seen.size else 1) + seen
    _, at, inverse, count = np.unique(key, return_index=True, return_inverse=True, return_counts=True)
    inverse = inverse.reshape(-1)
    mean0 = np.bincount(inverse, off0, count.size) / np.maximum(count, 1)
    mean1 = np.bincount(inverse, off1, count.size) / np.maximum(count, 1)
    pat, steps = pattern[at], n[at]
    single = steps == 1
    # One step: one piece of length t1 - t0. Else the first piece, m = n - 2 full steps, the last.
    h0 = np.where(single, mean1 - mean0, STEP_S - mean0)
    h1 = np.where(single, 0.0, mean1)
    return {"pattern": pat, "m": np.maximum(steps - 2, 0), "cell0": seq[pat, 0], "cell1": seq[pat, steps - 1],
            "h0": h0, "h1": h1, "steps": steps, "count": count, "inverse": inverse,
            "table": seq[:, 1:max(int(steps.max()) - 1, 1)] if steps.size else seq[:, :0], "seq": seq,
            "first_step": _first_steps(seq)}


def seen_codes(y: np.ndarray, first: np.ndarray) -> np.ndarray:
    """A code (0..63) of the three signals seen at both ends of each gap, for :func:`gap_classes`."""
    code = (y.astype(np.int64) * np.array([4, 2, 1])).sum(axis=1)
    return code[first] * 8 + code[first + 1]


def pair_weights(classes: dict, x0: np.ndarray, x1: np.ndarray, gaps: np.ndarray | None = None,
                 weight: np.ndarray | None = None) -> np.ndarray:
    """[classes, 4] counts of the (start, end) pairs 00, 01, 10, 11 over the gaps ``gaps``
    (indices; default all), with states ``x0``, ``x1`` given for those gaps (0/1), each gap
    counted ``weight`` times (default once)."""
    inverse = classes["inverse"] if gaps is None else classes["inverse"][gaps]
    key = inverse * 4 + np.asarray(x0, np.int64) * 2 + np.asarray(x1, np.int64)
    size = classes["count"].size * 4
    return np.bincount(key, weight, size).reshape(-1, 4).astype(float)


_CLASS_KEYS = ("m", "cell0", "cell1", "h0", "h1", "steps", "count")


def _subset(classes: dict, keep: np.ndarray) -> dict:
    """The classes ``keep`` (indices), with the table cut to their patterns and lengths."""
    patterns, pat = np.unique(classes["pattern"][keep], return_inverse=True)
    out = {key: classes[key][keep] for key in _CLASS_KEYS}
    out["pattern"] = pat.reshape(-1)
    out["table"] = classes["table"][patterns, : max(int(out["m"].max()), 1)]
    return out


def _first_steps(seq: np.ndarray) -> np.ndarray:
    """[patterns, 48]: the first step of each pattern in each cell (its length if none)."""
    first = np.full((seq.shape[0], _CELLS), seq.shape[1], dtype=np.int64)
    for j in range(seq.shape[1] - 1, -1, -1):
        first[np.arange(seq.shape[0]), seq[:, j]] = j
    return first


def reach(classes: dict, cells: np.ndarray) -> np.ndarray:
    """Whether each class's gaps cover a grid step in one of ``cells`` (bool per class)."""
    return classes["first_step"][:, cells].min(axis=1)[classes["pattern"]] <= classes["steps"] - 1


def class_hessian(theta: np.ndarray, classes: dict, cell_param: np.ndarray, weights: np.ndarray,
                  step: float = 1e-4, linear: np.ndarray | None = None) -> np.ndarray:
    """Jacobian of :func:`class_loglik`'s gradient by central differences, symmetrised. The
    pair of evaluations for a free parameter runs only over the classes whose gaps cover one of
    its cells: the other classes' gradients do not depend on it, so their differences are 0.
    ``linear`` [classes, 2]: terms g0 q0 + g1 q1 added to each class's log-likelihood."""
    n_free = theta.size // 2
    out = np.zeros((theta.size, theta.size))
    used = weights.sum(axis=1) > 0
    if linear is not None:
        used |= np.abs(linear).sum(axis=1) > 0
    for f in range(n_free):
        keep = np.flatnonzero(reach(classes, np.flatnonzero(cell_param == f)) & used)
        if not keep.size:
            continue
        shifts = np.zeros((4, theta.size))
        shifts[[0, 1], f], shifts[[2, 3], n_free + f] = [step, -step], [step, -step]
        grads = class_loglik(theta + shifts, _subset(classes, keep), cell_param, weights[keep],
                             None if linear is None else linear[keep])[1]
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


def class_maps(p: np.ndarray, d: np.ndarray, classes: dict) -> dict:
    """Each class's chance of ending on from off (``q0``) and from on (``q1``), [rows, classes],
    for the on-probabilities ``p`` and mean on-durations ``d`` (s) of each cell, [rows, 48]; the
    rest of the dict is kept for :func:`class_map_gradient`. A gap's map is affine in its start
    state q: p1 + (A (p0 + (q - p0) e0) + B - p1) e1 over its first piece, m full steps (A, B
    from the pattern's table) and last piece, so q1 = q0 + e1 A e0."""
    rows = p.shape[0]
    lam = 1.0 / ((1.0 - p) * d)
    table, pat, m = classes["table"], classes["pattern"], classes["m"]
    a, ps = np.exp(-lam[:, table] * STEP_S), p[:, table]  # [rows, patterns, width]
    scanned_a, scanned_b = _scan(a, (1.0 - a) * ps)
    A = np.concatenate([np.ones(a.shape[:2] + (1,)), scanned_a], axis=2)
    B = np.concatenate([np.zeros(a.shape[:2] + (1,)), scanned_b], axis=2)
    c0, c1, h0, h1 = classes["cell0"], classes["cell1"], classes["h0"], classes["h1"]
    p0, p1 = p[:, c0], p[:, c1]
    e0, e1 = np.exp(-lam[:, c0] * h0), np.exp(-lam[:, c1] * h1)
    entry = pat * A.shape[2] + m  # one gather from the flat table (faster than indexing two axes)
    Am, Bm = A.reshape(rows, -1)[:, entry], B.reshape(rows, -1)[:, entry]
    start = p0 * (1.0 - e0)  # after the first piece, from off
    qm = Am * start + Bm
    q0 = p1 + (qm - p1) * e1
    q1 = q0 + e1 * Am * e0
    return {"rows": rows, "p": p, "d": d, "lam": lam, "a": a, "ps": ps, "A": A, "B": B, "p0": p0, "p1": p1,
            "e0": e0, "e1": e1, "Am": Am, "entry": entry, "start": start, "qm": qm, "classes": classes,
            "q0": np.clip(q0, 1e-12, 1.0 - 1e-12), "q1": np.clip(q1, 1e-12, 1.0 - 1e-12)}


def class_map_gradient(maps: dict, g0: np.ndarray, g1: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Gradient of sum(g0 q0 + g1 q1) (``g0``, ``g1`` [rows, classes]: a function's derivatives
    in the two maps) in each cell's logit p and log d, [rows, 48] each: one backward pass
    through the classes and the pattern tables."""
    classes, rows = maps["classes"], maps["rows"]
    p, lam, a, ps, A, B = maps["p"], maps["lam"], maps["a"], maps["ps"], maps["A"], maps["B"]
    c0, c1, h0, h1 = classes["cell0"], classes["cell1"], classes["h0"], classes["h1"]
    table = classes["table"]
    p0, p1, e0, e1, Am = maps["p0"], maps["p1"], maps["e0"], maps["e1"], maps["Am"]
    g = g0 + g1  # the map from off gets g0 and from on g1: the terms linear in the start state take g1 alone
    gqm, gx = g * e1, g1 * e1 * Am
    grad_p = _cell_sum(c1, g * (1.0 - e1), rows) + _cell_sum(c0, gqm * Am * (1.0 - e0), rows)
    grad_l = (_cell_sum(c1, -(g * (maps["qm"] - p1) + g1 * Am * e0) * h1 * e1, rows)
              + _cell_sum(c0, -(gx - gqm * Am * p0) * h0 * e0, rows))
    width = table.shape[1]
    entry = maps["entry"]
    size = A.shape[1] * (width + 1)
    flat = (np.arange(rows)[:, None] * size + entry).ravel()
    dA = np.bincount(flat, (gqm * maps["start"] + g1 * e1 * e0).ravel(), rows * size).reshape(A.shape)
    dB = np.bincount(flat, gqm.ravel(), rows * size).reshape(A.shape)
    # Backward through the table: T_j = dB_j + a_j T_{j+1} (entries j = width..1, a reversed scan)
    # and the reversed cumulative sum of dA_j A_j.
    multiplier = np.concatenate([np.zeros(a.shape[:2] + (1,)), a[..., :0:-1]], axis=2)
    T = _scan(multiplier, dB[..., :0:-1])[1][..., ::-1]
    RA = np.cumsum((dA * A)[..., :0:-1], axis=2)[..., ::-1]
    grad_p += _cell_sum(table, T * (1.0 - a), rows)
    grad_l += _cell_sum(table, -STEP_S * (RA + a * T * (B[..., :-1] - ps)), rows)
    # lam = 1 / ((1 - p) d): d lam / d p = lam / (1 - p), d lam / d d = -lam / d.
    return (grad_p + grad_l * lam / (1.0 - p)) * p * (1.0 - p), -grad_l * lam


def cell_values(theta: np.ndarray, cell_param: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Each cell's p and d, [rows, 48], from rows of theta = (logit p, log d) of the free parameters."""
    theta = np.atleast_2d(theta)
    n_free = theta.shape[1] // 2
    with np.errstate(over="ignore"):  # a log d past float range (an interval's open end) reads as d = inf
        return special.expit(theta[:, :n_free])[:, cell_param], np.exp(theta[:, n_free:])[:, cell_param]


def free_gradient(g_p: np.ndarray, g_d: np.ndarray, cell_param: np.ndarray, n_free: int) -> np.ndarray:
    """Per-cell gradients [rows, 48] summed into the free parameters they are tied to, [rows, 2 x free]."""
    return np.concatenate([np.stack([np.bincount(cell_param, r, n_free) for r in g]) for g in (g_p, g_d)], axis=1)


def pair_loglik(weights: np.ndarray, q0: np.ndarray, q1: np.ndarray) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Log-likelihood of pair counts ``weights`` [..., classes, 4] under the maps, summed over
    the classes, and its derivatives in q0 and q1."""
    w00, w01, w10, w11 = (weights[..., i] for i in range(4))
    ll = (w00 * np.log1p(-q0) + w01 * np.log(q0) + w10 * np.log1p(-q1) + w11 * np.log(q1)).sum(axis=-1)
    return ll, w01 / q0 - w00 / (1.0 - q0), w11 / q1 - w10 / (1.0 - q1)


def class_loglik(theta: np.ndarray, classes: dict, cell_param: np.ndarray, weights: np.ndarray,
                 linear: np.ndarray | None = None) -> tuple[np.ndarray, np.ndarray]:
    """Log-likelihood of the classes' pair counts ``weights`` [classes, 4] and its gradient in
    theta = (logit p, log d) of each free parameter, for each row of ``theta`` [rows, 2 x free]
    (one vector: rows = 1); ``linear`` [classes, 2]: terms g0 q0 + g1 q1 added per class."""
    theta = np.atleast_2d(theta)
    maps = class_maps(*cell_values(theta, cell_param), classes)
    ll, g0, g1 = pair_loglik(weights, maps["q0"], maps["q1"])
    if linear is not None:
        ll = ll + maps["q0"] @ linear[:, 0] + maps["q1"] @ linear[:, 1]
        g0, g1 = g0 + linear[:, 0], g1 + linear[:, 1]
    return ll, free_gradient(*class_map_gradient(maps, g0, g1), cell_param, theta.shape[1] // 2)


# The likelihood over every gap, piece by piece: the reference the classes are tested against.


def gap_layout(times: np.ndarray, device: np.ndarray, calendar: Callable[[int, int], np.ndarray],
               max_gap_s: float = 86400.0) -> dict:
    """The gaps between consecutive check-ins of each device cut at the grid, laid out piece by
    piece: gaps sorted by their number of pieces (most first), so that piece j of every gap
    that has one is a prefix of the gap arrays. ``calendar(k0, k1)`` gives the cell (day kind
    x 24 + hour) of grid steps k0..k1."""
    same = (device[1:] == device[:-1]) & (times[1:] - times[:-1] <= max_gap_s) & (times[1:] > times[:-1])
    first = np.flatnonzero(same)
    t0, t1 = times[first], times[first + 1]
    k0 = np.floor(t0 / STEP_S).astype(np.int64)
    k1 = np.maximum(np.ceil(t1 / STEP_S).astype(np.int64) - 1, k0)
    count = k1 - k0 + 1
    order = np.argsort(-count, kind="stable")
    first, t0, t1, k0, count = first[order], t0[order], t1[order], k0[order], count[order]
    cal = calendar(int(k0.min()), int((k0 + count).max())) if first.size else np.empty(0, np.int64)
    base = int(k0.min()) if first.size else 0
    pieces = []
    for j in range(int(count.max()) if first.size else 0):
        n = int(np.searchsorted(-count, -j, side="left"))  # gaps with more than j pieces (a prefix)
        k = k0[:n] + j
        h = np.minimum(t1[:n], (k + 1) * STEP_S) - np.maximum(t0[:n], k * STEP_S)
        pieces.append((cal[k - base], np.maximum(h, 0.0)))
    return {"first": first, "cell0": cal[k0 - base] if first.size else np.empty(0, np.int64), "pieces": pieces}


def chain_loglik(theta: np.ndarray, layout: dict, x0: np.ndarray, x1: np.ndarray,
                 cell_param: np.ndarray) -> tuple[float, np.ndarray]:
    """Log-likelihood of the states ``x1`` seen at the ends of the gaps given ``x0`` at their
    starts, and its gradient in theta = (logit p, log d) of each free parameter."""
    n_free = theta.size // 2
    p_free, d_free = special.expit(theta[:n_free]), np.exp(theta[n_free:])
    p, d = p_free[cell_param], d_free[cell_param]
    lam = 1.0 / ((1.0 - p) * d)
    q = x0.astype(float)
    before, decay = [], []
    for cells, h in layout["pieces"]:
        n = cells.size
        a = np.exp(-lam[cells] * h)
        before.append(q[:n].copy())
        decay.append(a)
        q[:n] = p[cells] + (q[:n] - p[cells]) * a
    q = np.clip(q, 1e-12, 1.0 - 1e-12)
    ll = float(np.sum(np.where(x1, np.log(q), np.log1p(-q))))
    g = np.where(x1, 1.0 / q, -1.0 / (1.0 - q))
    grad_p, grad_d = np.zeros(_CELLS), np.zeros(_CELLS)
    for j in range(len(layout["pieces"]) - 1, -1, -1):
        cells, h = layout["pieces"][j]
        n = cells.size
        a, qprev, pj, lj = decay[j], before[j], p[cells], lam[cells]
        gj = g[:n]
        grad_p += np.bincount(cells, gj * (1.0 - a - (qprev - pj) * h * a * lj / (1.0 - pj)), minlength=_CELLS)
        grad_d += np.bincount(cells, gj * (qprev - pj) * h * a * lj / d[cells], minlength=_CELLS)
        g[:n] = gj * a
    gp = np.bincount(cell_param, grad_p, minlength=n_free) * p_free * (1.0 - p_free)
    gd = np.bincount(cell_param, grad_d, minlength=n_free) * d_free
    return ll, np.concatenate([gp, gd])
