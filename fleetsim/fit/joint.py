"""Fitting one group's joint model (settled chain and own chains) to its check-ins by EM.

The E-step is the forward-backward pass of :mod:`fleetsim.fit.hidden`: each chain's expected
counts of its four (start, end) pairs over every gap, the hard ones exact. The M-step is, for
each chain alone, the gap likelihood of the fit of one chain (:func:`fleetsim.fit.gapclasses.class_loglik`)
with those counts as the classes' weights, maximised by L-BFGS-B from the chain's current
values (EM: Dempster, Laird and Rubin 1977; for a hidden Markov chain, Baum-Welch). It leaves
out the law of a device's first check-in when all three signals are on there (one check-in per
device), which ties the chains together: the Newton step that ends the fit
(:mod:`fleetsim.fit.information`) is on the exact likelihood. EM is slow here: the own chains'
states are hidden whenever the device is settled, so a large share of their information is
missing (measured on the example's largest group: 25 EM steps to come within 1 of the
maximum). Steps are therefore extrapolated by SQUAREM (Varadhan and Roland 2008, scheme S3:
from theta, two EM steps give r = F(theta) - theta and v = F(F(theta)) - 2 F(theta) + theta,
alpha = -|r| / |v| (at most -1), and theta - 2 alpha r + alpha^2 v is followed by one more EM
step), kept only when it does not lower the likelihood; there, 4 cycles (12 EM steps) come
within 1.
"""

from __future__ import annotations

import numpy as np
from scipy import optimize, special

from .fleetfile import settled_probability
from .gapclasses import (
    cell_values,
    class_loglik,
    class_map_gradient,
    class_maps,
    free_gradient,
    pair_loglik,
    pair_weights,
)
from .hidden import hidden_layout, segment_pass

__all__ = ["joint_model", "joint_loglik", "row_gradients", "start_values", "em_fit", "LOGIT_BOUND", "LOG_D_BOUNDS"]

LOGIT_BOUND = 12.0
"""Bound on a logit p (p from 6e-6 to 1 - 6e-6)."""
LOG_D_BOUNDS = (np.log(60.0), np.log(30 * 86400.0))
"""Bounds on a log mean on-duration (1 minute to 30 days)."""
_M_FTOL = 1e-7  # relative reduction at which an M-step stops (its chain's gap likelihood per gap)
_EM_GAIN = 20.0  # a SQUAREM cycle that gains less log-likelihood than this ends EM (Newton steps follow)
_EM_CYCLES = 2
_CELLS = 48


def joint_model(first: np.ndarray, cell0: np.ndarray, y: np.ndarray, classes: dict, ties: list[np.ndarray],
                settled: bool = True) -> dict:
    """The joint model of one group: its gap classes, each chain's cell -> free parameter map
    (settled first, then idle, charging, unmetered; without ``settled`` only the three own
    chains, which are then the signals), the hard pair counts and the segments."""
    layout = hidden_layout(first, classes["inverse"], cell0, y, settled)
    hard = layout["hard"]
    rows = range(4) if settled else range(1, 4)
    weights = np.stack([pair_weights(classes, hard["x0"][c], hard["x1"][c], hard["gap"]) for c in rows])
    return {"ties": ties, "classes": classes, "layout": layout, "hard": weights, "gaps": max(first.size, 1)}


def bounds(ties: list[np.ndarray]) -> list[tuple[float, float]]:
    """L-BFGS-B bounds of theta: logit p within +-12, d from 1 minute to 30 days."""
    out: list[tuple[float, float]] = []
    for tie in ties:
        n = int(tie.max()) + 1
        out += [(-LOGIT_BOUND, LOGIT_BOUND)] * n + [LOG_D_BOUNDS] * n
    return out


def pack(p: np.ndarray, d: np.ndarray, tie: np.ndarray, weight: np.ndarray | None = None) -> np.ndarray:
    """theta of one chain from per-cell p and d: the mean over the cells tied to each free
    parameter, weighted by ``weight`` (default equal; a parameter whose cells all weigh 0 takes
    their plain mean)."""
    n = int(tie.max()) + 1
    w = np.ones(tie.size) if weight is None else np.asarray(weight, float)
    w = np.where((np.bincount(tie, w, n) > 0)[tie], w, 1.0)
    size = np.bincount(tie, w, n)
    logit = special.logit(np.clip(np.bincount(tie, w * p, n) / size, 1e-5, 1 - 1e-5))
    return np.concatenate([np.clip(logit, -LOGIT_BOUND, LOGIT_BOUND),
                           np.clip(np.log(np.bincount(tie, w * d, n) / size), *LOG_D_BOUNDS)])


def start_values(signal_p: np.ndarray, signal_d: np.ndarray, all_on: np.ndarray, ties: list[np.ndarray]) -> np.ndarray:
    """EM's start from the fit of each signal alone (``signal_p``, ``signal_d`` [3, 48]) and the
    share of check-ins with all three on by cell (``all_on``): the settled p for which the
    engine's all-on probability matches that share (:func:`fleetsim.fit.fleetfile.settled_probability`),
    kept from 0.02 to 0.9 of the least signal's p, with d the least signal's; each own chain
    with p = 1 - (1 - p_signal) / (1 - p_settled) and the signal's d."""
    x = settled_probability(all_on, list(signal_p))
    x = np.minimum(np.maximum(np.nan_to_num(x), 0.02), 0.9 * signal_p.min(axis=0))
    own = np.clip(1.0 - (1.0 - signal_p) / (1.0 - x), 0.01, 0.99)
    parts = [pack(x, signal_d.min(axis=0), ties[0])] + [pack(own[s], signal_d[s], ties[1 + s]) for s in range(3)]
    return np.concatenate(parts)


def _m_step(theta: np.ndarray, model: dict, expected: np.ndarray) -> np.ndarray:
    """Each chain's gap likelihood with the expected pair counts as weights, maximised alone."""
    ties, classes, scale = model["ties"], model["classes"], model["gaps"]
    _, _, cut = chain_cells(theta, ties)
    out = theta.copy()
    for c, tie in enumerate(ties):

        def objective(t: np.ndarray, c: int = c, tie: np.ndarray = tie) -> tuple[float, np.ndarray]:
            ll, grad = class_loglik(t, classes, tie, expected[c])
            return -float(ll[0]) / scale, -grad[0] / scale

        result = optimize.minimize(objective, theta[cut[c]:cut[c + 1]], jac=True, method="L-BFGS-B",
                                   bounds=bounds([tie]), options={"maxiter": 500, "ftol": _M_FTOL, "gtol": 1e-9})
        out[cut[c]:cut[c + 1]] = result.x
    return out


def _em(theta: np.ndarray, model: dict) -> tuple[float, np.ndarray]:
    """One EM step: the log-likelihood at theta and the next theta."""
    ll, expected = joint_loglik(theta, model, pairs=True)
    return ll, _m_step(theta, model, expected)


def em_fit(theta: np.ndarray, model: dict, cycles: int = _EM_CYCLES,
           gain: float = _EM_GAIN) -> tuple[np.ndarray, float, int]:
    """EM from ``theta`` accelerated by SQUAREM (see the module doc) until a cycle gains less
    than ``gain`` or after ``cycles`` cycles: theta, its log-likelihood and the EM steps taken."""
    lo, hi = (np.array(b) for b in zip(*bounds(model["ties"]), strict=True))
    steps = 0
    for _ in range(cycles):
        ll0, t1 = _em(theta, model)
        ll1, t2 = _em(t1, model)
        steps += 2
        r, v = t1 - theta, t2 - 2 * t1 + theta
        alpha = min(-np.sqrt((r @ r) / max(v @ v, 1e-300)), -1.0)
        jump = np.clip(theta - 2 * alpha * r + alpha * alpha * v, lo, hi)
        ll_jump, t3 = _em(jump, model)
        steps += 1
        if ll_jump >= ll1:
            theta, ll_new = t3, ll_jump  # at least ll_jump: EM does not lower it (but for the first check-in's law)
        else:
            theta, ll_new = t2, ll1
        if ll_new - ll0 < gain:
            break
    return theta, float(joint_loglik(theta, model, gradient=False)[0]), steps


def chain_cells(theta: np.ndarray, ties: list[np.ndarray]) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Each chain's p and d by cell [chains, 48] from theta, the chains' (logit p, log d) of
    their free parameters laid end to end (``ties``: each chain's cell -> free parameter map),
    and where each chain's part of theta starts (and the last ends)."""
    cut = np.cumsum([0] + [2 * (int(t.max()) + 1) for t in ties])
    p, d = np.empty((len(ties), _CELLS)), np.empty((len(ties), _CELLS))
    for c, tie in enumerate(ties):
        p[c], d[c] = (v[0] for v in cell_values(theta[cut[c]:cut[c + 1]], tie))
    return p, d, cut


def joint_loglik(theta: np.ndarray, model: dict, gradient: bool = True,
                 pairs: bool = False) -> tuple[float, np.ndarray]:
    """Log-likelihood of one group's check-ins under the joint model and its gradient in theta
    (``model``: :func:`joint_model`). With ``pairs``, instead of the gradient, each chain's
    expected pair counts by class, hard and soft together [chains, classes, 4]: the E-step."""
    if pairs:
        ll, expected, _ = _pass(theta[None], model, "pairs")
        return ll, expected
    ll, grad, _ = _pass(theta[None], model, "gradient" if gradient else "")
    return ll, grad[0] if gradient else np.empty(0)


def row_gradients(thetas: np.ndarray, model: dict) -> np.ndarray:
    """Gradients [rows, n] at each row of ``thetas`` of a model whose layout holds as many
    copies of its segments as there are rows (copy r of each at row r)."""
    return _pass(thetas, model, "gradient")[1]


def _pass(thetas: np.ndarray, model: dict, want: str) -> tuple[float, np.ndarray, None]:
    """Log-likelihood (summed over rows) and, by ``want``, the gradients [rows, n] or the
    expected pair counts; each row of ``thetas`` its own copy of the segments."""
    ties, classes, layout = model["ties"], model["classes"], model["layout"]
    rows, chains, size = thetas.shape[0], len(ties), classes["count"].size
    cells = [chain_cells(t, ties) for t in thetas]
    p = np.concatenate([c[0] for c in cells])  # [rows x chains, 48]
    maps = class_maps(p, np.concatenate([c[1] for c in cells]), classes)
    hard = np.broadcast_to(model["hard"][None], (rows,) + model["hard"].shape).reshape(rows * chains, size, 4)
    ll_hard, g0, g1 = pair_loglik(hard, maps["q0"], maps["q1"])
    ll, g_start = float(ll_hard.sum()), np.zeros((rows * chains, _CELLS))
    expected = model["hard"].copy() if want == "pairs" else None
    if layout["counts"].size:
        cls = layout["cls"]
        copy = layout.get("copy", np.zeros(cls.size, np.int64))
        line = copy[None, :] * chains + np.arange(chains)[:, None]  # [chains, slots]: row of maps
        prior_copy = layout["prior"] % rows if rows > 1 else np.zeros(layout["prior"].size, np.int64)
        p_start = p[prior_copy[None, :] * chains + np.arange(chains)[:, None], layout["prior_cell"][None, :]]
        ll_soft, s0, s1, sp = segment_pass(layout, maps["q0"][line, cls], maps["q1"][line, cls], p_start,
                                           bool(want), want == "pairs")
        ll += ll_soft
        if want == "pairs":
            for c in range(chains):
                for k in range(4):
                    expected[c, :, k] += np.bincount(cls, s0[c, :, k], size)
            return ll, expected, None
        if want:
            flat = (line * size + cls).reshape(-1)
            g0 = g0 + np.bincount(flat, s0.reshape(-1), rows * chains * size).reshape(rows * chains, size)
            g1 = g1 + np.bincount(flat, s1.reshape(-1), rows * chains * size).reshape(rows * chains, size)
            at = (prior_copy[None, :] * chains + np.arange(chains)[:, None]) * _CELLS + layout["prior_cell"][None, :]
            g_start = np.bincount(at.reshape(-1), sp.reshape(-1), rows * chains * _CELLS).reshape(-1, _CELLS)
    if not want:
        return ll, np.empty(0), None
    g_p, g_d = class_map_gradient(maps, g0, g1)
    g_p = g_p + g_start
    grad = np.empty((rows, cells[0][2][-1]))
    cut = cells[0][2]
    for r in range(rows):
        for c, tie in enumerate(ties):
            i = r * chains + c
            grad[r, cut[c]:cut[c + 1]] = free_gradient(g_p[i:i + 1], g_d[i:i + 1], tie, int(tie.max()) + 1)[0]
    return ll, grad, None
