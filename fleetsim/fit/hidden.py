"""The snapshot likelihood of the fleet model's hidden chains: a forward-backward pass.

In the fleet model (:mod:`fleetsim.signals`) a device of a type with a settled state carries
four independent two-state chains, the settled chain and one own chain per signal; a signal is
on when its own chain is on or the settled chain is on (the fitted settled state holds all
three signals on). The hidden state at a check-in is the product of the chains, 16 states
(index settled x 8 + idle x 4 + charging x 2 + unmetered); the snapshot's three signals are a
function of it. Between two check-ins the product chain moves by the Kronecker product of each
chain's two-state transition over the gap, whose rows are (1 - q0, q0) from off and
(1 - q1, q1) from on (:func:`fleetsim.fit.gapclasses.class_maps`).

A check-in with some signal off shows the whole state: the settled chain is off and each own
chain is as its signal. Only a check-in with all three on hides it (settled, any own states;
or not settled, every own chain on). So the likelihood of a device's check-ins factorises at
every check-in that shows its state: a gap between two of them is a product of one term per
chain (its *hard* pair counts), and a run of all-on check-ins between two of them is a
*segment* whose likelihood sums over the hidden paths through it. Each device's check-ins
start conditionally on the first, as in the fit of each chain alone; a segment that starts at a
device's first check-in (all on) starts from the chains' law there, each chain on with its
hourly p, given that all three signals were on.

The segments' sums are computed by the scaled forward-backward recursions (Baum, Petrie,
Soules and Weiss 1970; Rabiner 1989, section V.A, for the scaling), vectorised over segments:
they are sorted by length, so the k-th gap of every segment that has one is a prefix of the
arrays, and the loop runs over the position within a segment, not over devices. The backward
pass gives the derivative of the log-likelihood in every chain's transition entries of every
gap; the expected counts of a chain's four (start, end) pairs over a gap (the E-step of EM,
Dempster, Laird and Rubin 1977) are those derivatives times the entries, and the derivative of
the log-likelihood in the chains' parameters is the derivative of the per-chain gap likelihood
with those counts held fixed (Fisher's identity; Louis 1982).
"""

from __future__ import annotations

import numpy as np

__all__ = ["HIDDEN_CHAINS", "hidden_layout", "select_segments", "segment_pass"]

HIDDEN_CHAINS = ("settled", "idle", "charging", "unmetered")
"""The chains of the hidden state, in its axis order (as :data:`fleetsim.signals.CHAINS`)."""
_ALL_ON = 7  # own code of all three signals on
_BITS = np.array([4, 2, 1])


def hidden_layout(first: np.ndarray, inverse: np.ndarray, cell0: np.ndarray, y: np.ndarray,
                  settled: bool = True) -> dict:
    """The gaps of one group split into hard pair counts and segments.

    ``first``: index of each gap's first check-in (ascending); ``inverse``: each gap's class;
    ``cell0``: the cell of each gap's first step; ``y`` [check-ins, 3]: the signals seen. Gives
    ``hard`` (the hard gaps, ``gap``, and per chain their states at both ends, ``x0``, ``x1``)
    and the segments, longest first, those that end at a check-in showing its state last among
    equal lengths: ``counts`` (segments with a gap at each position), ``open`` (of those, how
    many end the gap all on), ``cls`` (class of each segment gap, position-major), ``end``
    (own code of the check-in each gap ends at: 7 all on), ``start`` (own code of each
    segment's first check-in), ``prior`` (segments that start all on, at the start of a
    device's check-ins) and ``prior_cell``; ``gap_of`` maps segment gaps to gaps. Without
    ``settled`` every gap is hard."""
    code = (y.astype(np.int64) * _BITS).sum(axis=1)
    allon = code == _ALL_ON
    soft = (allon[first] | allon[first + 1]) if settled else np.zeros(first.size, bool)
    hard = np.flatnonzero(~soft)
    x0 = [np.zeros(hard.size, np.int64)] + [y[first[hard], s].astype(np.int64) for s in range(3)]
    x1 = [np.zeros(hard.size, np.int64)] + [y[first[hard] + 1, s].astype(np.int64) for s in range(3)]
    gaps = np.flatnonzero(soft)
    i0 = first[gaps]
    has_in = np.zeros(y.shape[0] + 1, bool)
    has_in[first + 1] = True
    new = ~(allon[i0] & has_in[i0])  # an all-on check-in reached by a gap carries its segment on
    seg = np.cumsum(new) - 1
    starts = np.flatnonzero(new)
    ends = np.r_[starts[1:], gaps.size] - 1 if gaps.size else np.zeros(0, np.int64)
    length = ends - starts + 1
    shown = ~allon[i0[ends] + 1] if gaps.size else np.zeros(0, bool)  # the last check-in shows its state
    rank = np.lexsort((shown, -length))  # longest first; among equal lengths, open ends first
    place = np.empty_like(rank)
    place[rank] = np.arange(rank.size)
    pos = np.arange(gaps.size) - starts[seg] if gaps.size else np.zeros(0, np.int64)
    top = int(length.max()) if length.size else 0
    counts = np.array([np.count_nonzero(length > j) for j in range(top)], dtype=np.int64)
    open_ = np.array([np.count_nonzero((length > j + 1) | ((length == j + 1) & ~shown)) for j in range(top)],
                     dtype=np.int64)
    offsets = np.r_[0, np.cumsum(counts)]
    order = np.empty(gaps.size, np.int64)
    order[offsets[pos] + place[seg]] = np.arange(gaps.size)  # layout slot -> soft gap
    gap_of = gaps[order]
    start_gap = gaps[starts[rank]]
    prior = np.flatnonzero(allon[first[start_gap]])
    return {"hard": {"gap": hard, "x0": x0, "x1": x1}, "counts": counts, "open": open_, "offsets": offsets,
            "cls": inverse[gap_of], "end": code[first[gap_of] + 1], "start": code[first[start_gap]],
            "prior": prior, "prior_cell": cell0[start_gap[prior]], "gap_of": gap_of, "segment_of": place[seg][order],
            "segments": rank.size}


def select_segments(layout: dict, keep: np.ndarray, copies: int = 1) -> dict:
    """The layout of the segments ``keep`` (ranks, ascending; a rank may repeat), each repeated
    ``copies`` times side by side (copy r of kept segment i has rank i x copies + r), as
    :func:`hidden_layout` gives them; ``slot`` is each new gap's slot in ``layout`` and
    ``copy`` its copy. The hard gaps are not kept."""
    keep = np.asarray(keep, np.int64)
    counts = np.array([np.count_nonzero(keep < n) for n in layout["counts"]], np.int64)
    counts = counts[counts > 0]
    opened = np.array([np.count_nonzero(keep < n) for n in layout["open"][:counts.size]], np.int64)
    slot = np.concatenate([layout["offsets"][j] + keep[:n] for j, n in enumerate(counts)]) if counts.size else keep[:0]
    rank = np.concatenate([np.arange(n) for n in counts]) if counts.size else keep[:0]
    new_prior = np.flatnonzero(np.isin(keep, layout["prior"]))
    cell = dict(zip(layout["prior"].tolist(), layout["prior_cell"].tolist(), strict=True))
    prior_cell = np.array([cell[int(k)] for k in keep[new_prior]], np.int64)
    copy = np.tile(np.arange(copies), slot.size)
    return {"hard": None, "counts": counts * copies, "open": opened * copies,
            "offsets": np.r_[0, np.cumsum(counts * copies)], "cls": np.repeat(layout["cls"][slot], copies),
            "end": np.repeat(layout["end"][slot], copies), "start": np.repeat(layout["start"][keep], copies),
            "prior": (new_prior[:, None] * copies + np.arange(copies)).reshape(-1),
            "prior_cell": np.repeat(prior_cell, copies), "segments": keep.size * copies,
            "slot": np.repeat(slot, copies), "copy": copy, "segment_of": np.repeat(rank, copies) * copies + copy}


def _apply(u: np.ndarray, T: np.ndarray, c: int, forward: bool) -> np.ndarray:
    """Own chain ``c``'s transition applied to [n, 2, 2, 2] on its axis: u T (``forward``,
    out(x') = sum_x u(x) T(x, x')) or T u (out(x) = sum_x' T(x, x') u(x')); T [n, 2, 2]."""
    v = np.moveaxis(u, c + 1, -1)
    t = T[:, None, None] if forward else T.transpose(0, 2, 1)[:, None, None]
    return np.moveaxis(v[..., :1] * t[..., 0, :] + v[..., 1:] * t[..., 1, :], -1, c + 1)


def _outer(vectors: list[np.ndarray]) -> np.ndarray:
    """[n, 2, 2, 2] product of three [n, 2] vectors, one per own chain."""
    return vectors[0][:, :, None, None] * vectors[1][:, None, :, None] * vectors[2][:, None, None, :]


def _bits(code: np.ndarray | int, c: int) -> np.ndarray | int:
    return (code >> (2 - c)) & 1


def _ends(own: np.ndarray, code: np.ndarray | int, into: bool) -> list[np.ndarray]:
    """Each own chain's transitions out of (``into`` False: rows) or into (True: columns) the
    state of ``code``, [n, 2] each."""
    n = own.shape[1]
    if into:
        return [own[c][np.arange(n), :, _bits(code, c)] for c in range(3)]
    return [own[c][np.arange(n), _bits(code, c)] for c in range(3)]


def _dot(u: np.ndarray, v: np.ndarray) -> np.ndarray:
    return (u * v).reshape(u.shape[0], 8).sum(axis=1)


def _initial(layout: dict, p_start: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """The normalised law at the first check-in of the segments that start a device's check-ins
    all on, settled [prior, 2, 2, 2] (own states) and not [prior]: the chains' law there (each
    on with probability ``p_start`` [4, prior]) on the states all three on allows."""
    ps = p_start[0]
    own = _outer([np.stack([1.0 - q, q], axis=1) for q in p_start[1:]])
    u1, u0 = ps[:, None, None, None] * own, (1.0 - ps) * own[:, 1, 1, 1]
    total = u1.reshape(-1, 8).sum(axis=1) + u0
    return u1 / total[:, None, None, None], u0 / total


def _blocks(layout: dict, j: int) -> dict[str, np.ndarray | slice]:
    """The rows of position ``j`` by kind of gap: from all on to all on (``aa``), from all on to
    a check-in showing its state (``ak``), from one showing its state to all on (``ka``, only at
    the first position: a segment's later gaps start all on)."""
    n, k = int(layout["counts"][j]), int(layout["open"][j])
    if j:
        return {"aa": slice(0, k), "ak": slice(k, n), "ka": slice(0, 0)}
    prior = np.zeros(n, bool)
    prior[layout["prior"]] = True
    rows = np.arange(n)
    return {"aa": rows[prior & (rows < k)], "ak": rows[prior & (rows >= k)], "ka": rows[~prior]}


def segment_pass(layout: dict, q0: np.ndarray, q1: np.ndarray, p_start: np.ndarray,
                 gradient: bool = True, pairs: bool = False) -> tuple[float, np.ndarray, np.ndarray, np.ndarray]:
    """Log-likelihood of every segment (summed) given the transition probabilities ``q0``,
    ``q1`` [4, segment gaps] (chain by chain, in the layout's order) and the chains' hourly p at
    the first check-in of the segments that start from the chains' law, ``p_start`` [4, prior];
    with ``gradient``, also its derivatives in q0 and q1 [4, segment gaps] and in the logit of
    p_start [4, prior]. With ``pairs`` the second result is instead the expected counts of each
    chain's pairs 00, 01, 10, 11 over each gap [4, segment gaps, 4] and the third None.

    A check-in that shows its state allows one state (not settled, own chains as seen); one
    with all three on allows nine (settled with any own states, or not settled with every own
    chain on). So the forward variable is, per segment, a weight on each own state while
    settled [n, 2, 2, 2] and one while not settled (at the check-in's own code)."""
    counts, offsets = layout["counts"], layout["offsets"]
    T = np.stack([np.stack([1.0 - q0, q0], axis=-1), np.stack([1.0 - q1, q1], axis=-1)], axis=-2)  # [4, n, 2, 2]
    n0 = int(counts[0]) if counts.size else 0
    u1, u0 = np.zeros((n0, 2, 2, 2)), np.ones(n0)
    if layout["prior"].size:
        u1[layout["prior"]], u0[layout["prior"]] = _initial(layout, p_start)
    states, ll = [], 0.0
    for j, n in enumerate(counts):
        sl, rows = slice(offsets[j], offsets[j + 1]), _blocks(layout, j)
        Tj, e = T[:, sl], layout["end"][sl]
        a1, a0 = u1[:n], u0[:n]
        new1, new0 = np.zeros((n, 2, 2, 2)), np.zeros(n)
        r = rows["aa"]
        s, own = Tj[0, r], Tj[1:, r]
        v = _apply(_apply(_apply(a1[r], own[0], 0, True), own[1], 1, True), own[2], 2, True)
        row = _outer(_ends(own, _ALL_ON, False))
        new1[r] = s[:, 1, 1, None, None, None] * v + (s[:, 0, 1] * a0[r])[:, None, None, None] * row
        new0[r] = s[:, 1, 0] * v[:, 1, 1, 1] + s[:, 0, 0] * a0[r] * row[:, 1, 1, 1]
        r = rows["ak"]
        s, own = Tj[0, r], Tj[1:, r]
        col = _outer(_ends(own, e[r], True))
        new0[r] = s[:, 1, 0] * _dot(a1[r], col) + s[:, 0, 0] * a0[r] * col[:, 1, 1, 1]
        r = rows["ka"]
        s, own = Tj[0, r], Tj[1:, r]
        row = _outer(_ends(own, layout["start"][r], False))
        new1[r] = (s[:, 0, 1] * a0[r])[:, None, None, None] * row
        new0[r] = s[:, 0, 0] * a0[r] * row[:, 1, 1, 1]
        scale = new0 + new1.reshape(n, 8).sum(axis=1)
        states.append((a1, a0, scale))
        ll += float(np.log(scale).sum())
        u1, u0 = new1 / scale[:, None, None, None], new0 / scale
    if not gradient:
        return ll, np.empty(0), np.empty(0), np.empty(0)
    return (ll,) + _backward(layout, T, states, pairs)


def _backward(layout: dict, T: np.ndarray, states: list, pairs: bool) -> tuple:
    """The backward pass of :func:`segment_pass`: the derivatives of the log-likelihood in each
    gap's transition entries, (d/dq0, d/dq1) or the expected pair counts, and the prior's."""
    counts, offsets = layout["counts"], layout["offsets"]
    out = np.zeros((4,) + T.shape[1:2] + (2, 2))  # d log L / d T_c(x, x') per gap
    m = int(counts[-1]) if counts.size else 0
    b1, b0 = np.ones((m, 2, 2, 2)), np.ones(m)  # backward variable at the gap's end check-in
    for j in range(counts.size - 1, -1, -1):
        n, sl, rows = int(counts[j]), slice(offsets[j], offsets[j + 1]), _blocks(layout, j)
        a1, a0, scale = states[j]
        Tj, e, g = T[:, sl], layout["end"][sl], out[:, sl]
        c1, c0 = b1 / scale[:, None, None, None], b0 / scale
        p1, p0 = np.ones((n, 2, 2, 2)), np.ones(n)
        r = rows["aa"]
        g[:, r], p1[r], p0[r] = _between_all_on(a1[r], a0[r], c1[r], c0[r], Tj[0, r], Tj[1:, r])
        r = rows["ak"]
        g[:, r], p1[r], p0[r] = _into_shown(a1[r], a0[r], c0[r], Tj[0, r], Tj[1:, r], e[r])
        r = rows["ka"]
        g[:, r] = _out_of_shown(a0[r], c1[r], c0[r], Tj[0, r], Tj[1:, r], layout["start"][r])
        above = int(counts[j - 1]) if j else n
        b1, b0 = np.ones((above, 2, 2, 2)), np.ones(above)
        b1[:n], b0[:n] = p1, p0
    g_prior = _prior_gradient(layout, states, b1, b0) if counts.size else np.zeros((4, 0))
    if pairs:
        return (out * T).reshape(4, -1, 4), None, g_prior
    return out[:, :, 0, 1] - out[:, :, 0, 0], out[:, :, 1, 1] - out[:, :, 1, 0], g_prior


def _between_all_on(a1, a0, c1, c0, s, own) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """d log L / d T over gaps from all on to all on [4, n, 2, 2], and the backward variable at
    their start. a1, a0: forward variable at the start (settled own states, not settled);
    c1, c0: the scaled backward variable at the end; s, own: the chains' transitions."""
    n = a0.size
    G = np.zeros((4, n, 2, 2))
    t2 = _apply(c1, own[2], 2, False)
    t1 = _apply(c1, own[1], 1, False)
    skip = [_apply(t2, own[1], 1, False), _apply(t2, own[0], 0, False), _apply(t1, own[0], 0, False)]
    w = _apply(skip[0], own[0], 0, False)  # all three own chains applied
    rows, cols = _ends(own, _ALL_ON, False), _ends(own, _ALL_ON, True)
    col = _outer(cols)
    G[0, :, 1, 1], G[0, :, 1, 0] = _dot(a1, w), c0 * _dot(a1, col)
    G[0, :, 0, 1], G[0, :, 0, 0] = a0 * w[:, 1, 1, 1], a0 * c0 * col[:, 1, 1, 1]
    for c in range(3):
        x = np.moveaxis(skip[c], c + 1, -1).reshape(n, 4, 2)
        a = np.moveaxis(a1, c + 1, -1).reshape(n, 4, 2)
        pair = sum(a[:, r, :, None] * x[:, r, None, :] for r in range(4))
        G[1 + c] = s[:, 1, 1, None, None] * pair
        G[1 + c, :, :, 1] += (s[:, 1, 0] * c0)[:, None] * _through(a1, cols, c)
        G[1 + c, :, 1, :] += (s[:, 0, 1] * a0)[:, None] * _through(c1, rows, c)
        G[1 + c, :, 1, 1] += s[:, 0, 0] * a0 * c0 * np.prod([own[d][:, 1, 1] for d in range(3) if d != c], axis=0)
    p1 = s[:, 1, 1, None, None, None] * w + (s[:, 1, 0] * c0)[:, None, None, None] * col
    return G, p1, s[:, 0, 1] * w[:, 1, 1, 1] + s[:, 0, 0] * c0 * col[:, 1, 1, 1]


def _into_shown(a1, a0, c0, s, own, e) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """As :func:`_between_all_on` for gaps from all on to a check-in showing own code ``e``
    (nothing settled at the end)."""
    n = a0.size
    G = np.zeros((4, n, 2, 2))
    cols = _ends(own, e, True)
    col = _outer(cols)
    G[0, :, 1, 0], G[0, :, 0, 0] = c0 * _dot(a1, col), a0 * c0 * col[:, 1, 1, 1]
    idx = np.arange(n)
    for c in range(3):
        ec = _bits(e, c)
        G[1 + c, idx, :, ec] += (s[:, 1, 0] * c0)[:, None] * _through(a1, cols, c)
        rest = np.prod([own[d][idx, 1, _bits(e, d)] for d in range(3) if d != c], axis=0)
        G[1 + c, idx, 1, ec] += s[:, 0, 0] * a0 * c0 * rest
    return G, (s[:, 1, 0] * c0)[:, None, None, None] * col, s[:, 0, 0] * c0 * col[:, 1, 1, 1]


def _out_of_shown(a0, c1, c0, s, own, f) -> np.ndarray:
    """d log L / d T over gaps from a check-in showing own code ``f`` (nothing settled at the
    start) to all on."""
    n = a0.size
    G = np.zeros((4, n, 2, 2))
    rows = _ends(own, f, False)
    row = _outer(rows)
    G[0, :, 0, 1], G[0, :, 0, 0] = a0 * _dot(row, c1), a0 * c0 * row[:, 1, 1, 1]
    idx = np.arange(n)
    for c in range(3):
        fc = _bits(f, c)
        G[1 + c, idx, fc, :] += (s[:, 0, 1] * a0)[:, None] * _through(c1, rows, c)
        rest = np.prod([own[d][idx, _bits(f, d), 1] for d in range(3) if d != c], axis=0)
        G[1 + c, idx, fc, 1] += s[:, 0, 0] * a0 * c0 * rest
    return G


def _through(u: np.ndarray, vectors: list[np.ndarray], c: int) -> np.ndarray:
    """[n, 2]: u [n, 2, 2, 2] summed over every own chain but ``c``, each weighted by its vector."""
    first, second = (d for d in range(3) if d != c)
    v = np.moveaxis(u, c + 1, 1)  # [n, 2 (chain c), 2 (first), 2 (second)]
    w2 = vectors[second]
    r = v[..., 0] * w2[:, None, None, 0] + v[..., 1] * w2[:, None, None, 1]
    w1 = vectors[first]
    return r[..., 0] * w1[:, None, 0] + r[..., 1] * w1[:, None, 1]


def _prior_gradient(layout: dict, states: list, b1: np.ndarray, b0: np.ndarray) -> np.ndarray:
    """d log L / d logit p of each chain at the first check-in of the segments that start from
    the chains' law: the chain's posterior on-probability there less its law's given all on."""
    prior = layout["prior"]
    out = np.zeros((4, prior.size))
    if prior.size:
        a1, a0 = states[0][0][prior], states[0][1][prior]
        post1, post0 = a1 * b1[prior], a0 * b0[prior]
        out[0] = post1.reshape(-1, 8).sum(axis=1) - a1.reshape(-1, 8).sum(axis=1)
        for c in range(3):
            axes = tuple(1 + d for d in range(3) if d != c)
            # not settled: every own chain on
            out[1 + c] = (post1.sum(axis=axes)[:, 1] + post0) - (a1.sum(axis=axes)[:, 1] + a0)
    return out
