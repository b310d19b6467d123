"""The observed information of the joint model, the Newton step that ends its fit, the Wald
intervals, and the likelihood-ratio test for a settled state.

Observed information: minus the Hessian of the observed-data log-likelihood (the exact one, by
the forward-backward pass of :mod:`fleetsim.fit.hidden`), by central differences of its exact
gradient, one free parameter at a time. A parameter of a chain changes that chain's transition
over the gaps that cover one of its cells only; so the pair of shifted gradients for it runs
over those gaps' classes (the chain's hard pair counts) and over the segments that hold such a
gap, or start at one of its cells from the chains' law, and nowhere else: the other terms'
gradients do not depend on it, so their differences are 0. The four shifted vectors (p and d,
up and down) of a parameter are one evaluation, on four copies of those segments.
"""

from __future__ import annotations

import numpy as np
from scipy import sparse, special, stats

from .gapclasses import _subset, cell_values, class_hessian, class_maps, reach
from .hidden import segment_pass, select_segments
from .joint import LOG_D_BOUNDS, LOGIT_BOUND, chain_cells, joint_loglik

__all__ = ["at_bounds", "observed_information", "newton_step", "remaining_gain", "finish", "wald_intervals",
           "settled_test",
           "SETTLED_LEVEL"]

SETTLED_LEVEL = 0.001
"""Level of the likelihood-ratio test that gives a device type a settled state."""
_STEP = 1e-6


def _shifted_maps(theta: np.ndarray, model: dict, base: dict, step: float) -> list[tuple]:
    """Per column (each free p and d of each chain, in theta's order): its chain, the classes its
    cells reach, and the change of that chain's q0, q1 there when it moves by ``step``."""
    ties, classes = model["ties"], model["classes"]
    _, _, cut = chain_cells(theta, ties)
    columns = []
    for c, tie in enumerate(ties):
        n = int(tie.max()) + 1
        shifted = [None] * (2 * n)
        for f in range(n):
            near = np.flatnonzero(reach(classes, np.flatnonzero(tie == f)))
            if not near.size:
                shifted[f] = shifted[n + f] = (c, near, np.zeros((2, 0)), f, False)
                continue
            rows = np.tile(theta[cut[c]:cut[c + 1]], (2, 1))
            rows[0, f] += step
            rows[1, n + f] += step
            maps = class_maps(*cell_values(rows, tie), _subset(classes, near))
            for r, col in ((0, f), (1, n + f)):
                delta = np.stack([maps["q0"][r] - base["q0"][c, near], maps["q1"][r] - base["q1"][c, near]])
                shifted[col] = (c, near, delta, f, r == 0)
        columns += shifted
    return columns


def _coupling(theta: np.ndarray, model: dict, base: dict, columns: list[tuple], step: float) -> np.ndarray:
    """sum over segment gaps of d(d log L / dq)/d theta_col x dq / d theta: the segments' part
    of the Hessian through the forward-backward pass, by forward differences of d log L / dq,
    every column's reached segments (copies, with its chain's q moved) in merged passes."""
    layout, ties, size = model["layout"], model["ties"], model["classes"]["count"].size
    chains, total = len(ties), theta.size
    p, _, _ = chain_cells(theta, ties)
    rows, cols, vals = [], [], []  # J: (chain, class, q0/q1) x parameter
    pairs = []
    for col, (c, near, delta, f, is_p) in enumerate(columns):
        rows.append(((c * size + near) * 2)[None, :] + np.array([[0], [1]]))
        cols.append(np.full((2, near.size), col))
        vals.append(delta / step)
        hit = np.isin(layout["cls"], near)
        seg = layout["segment_of"][hit]
        if is_p:
            seg = np.r_[seg, layout["prior"][np.isin(layout["prior_cell"], np.flatnonzero(ties[c] == f))]]
        pairs.append(np.unique(seg))
    J = sparse.csr_matrix((np.concatenate([v.ravel() for v in vals]),
                           (np.concatenate([r.ravel() for r in rows]), np.concatenate([c.ravel() for c in cols]))),
                          shape=(chains * size * 2, total))
    shift_key = np.concatenate([col * size + columns[col][1] for col in range(total)])
    shift_val = np.concatenate([columns[col][2] for col in range(total)], axis=1)
    out = np.zeros((total, total))
    order = np.argsort(shift_key)
    shift_key, shift_val = shift_key[order], shift_val[:, order]
    start = 0
    while start < total:  # columns in chunks of about 400,000 copied gaps
        stop, gaps = start, 0
        while stop < total and (gaps < 400_000 or stop == start):
            gaps += int(np.isin(layout["segment_of"], pairs[stop]).sum())
            stop += 1
        _chunk(model, base, p, columns, pairs, range(start, stop), shift_key, shift_val, J, out, step)
        start = stop
    return out


def _chunk(model, base, p, columns, pairs, chunk, shift_key, shift_val, J, out, step) -> None:
    """One merged forward-backward pass for the columns ``chunk``; adds their part to ``out``."""
    layout, ties, size = model["layout"], model["ties"], model["classes"]["count"].size
    chains = len(ties)
    col_of = np.concatenate([np.full(pairs[col].size, col) for col in chunk])
    ranks = np.concatenate([pairs[col] for col in chunk])
    order = np.argsort(ranks, kind="stable")
    ranks, col_of = ranks[order], col_of[order]
    merged = select_segments(layout, ranks)
    col_slot = col_of[merged["segment_of"]]
    cls, old = merged["cls"], merged["slot"]
    q = [base["q0"][:, layout["cls"]][:, old].copy(), base["q1"][:, layout["cls"]][:, old].copy()]
    key = col_slot * size + cls
    at = np.minimum(np.searchsorted(shift_key, key), shift_key.size - 1)
    moved = shift_key[at] == key
    chain_of = np.array([columns[col][0] for col in range(len(columns))])
    for k in range(2):
        q[k][chain_of[col_slot[moved]], np.flatnonzero(moved)] += shift_val[k, at[moved]]
    prior_col = col_of[merged["prior"]]
    p_start = p[:, merged["prior_cell"]].copy()
    for i, col in enumerate(prior_col):
        c, _, _, f, is_p = columns[col]
        if is_p and ties[c][merged["prior_cell"][i]] == f:
            p_start[c, i] = special.expit(special.logit(p_start[c, i]) + step)
    _, g0, g1, gp = segment_pass(merged, np.clip(q[0], 1e-12, 1 - 1e-12), np.clip(q[1], 1e-12, 1 - 1e-12), p_start)
    d0, d1 = (g0 - base["g0"][:, old]) / step, (g1 - base["g1"][:, old]) / step
    line = ((np.arange(chains)[:, None] * size + cls[None, :]) * 2)
    dG = sparse.csr_matrix((np.r_[d0.ravel(), d1.ravel()],
                            (np.r_[line.ravel(), line.ravel() + 1], np.tile(np.tile(col_slot, chains), 2))),
                           shape=(J.shape[0], J.shape[1]))
    out += (J.T @ dG).toarray()
    where = np.searchsorted(layout["prior"], ranks[merged["prior"]])
    _, _, cut = chain_cells(np.zeros(J.shape[1]), ties)
    for c, tie in enumerate(ties):
        delta = (gp[c] - base["gp"][c, where]) / step
        np.add.at(out, (cut[c] + tie[merged["prior_cell"]], prior_col), delta)


def observed_information(theta: np.ndarray, model: dict, step: float = _STEP) -> np.ndarray:
    """Minus the Hessian of the joint log-likelihood at ``theta`` (see the module doc), symmetrised."""
    ties, classes, layout = model["ties"], model["classes"], model["layout"]
    p, d, cut = chain_cells(theta, ties)
    maps = class_maps(p, d, classes)
    base = {"q0": maps["q0"], "q1": maps["q1"]}
    size = classes["count"].size
    linear = np.zeros((len(ties), size, 2))
    if layout["counts"].size:
        _, base["g0"], base["g1"], base["gp"] = segment_pass(layout, maps["q0"][:, layout["cls"]],
                                                             maps["q1"][:, layout["cls"]], p[:, layout["prior_cell"]])
        for c in range(len(ties)):
            linear[c, :, 0] = np.bincount(layout["cls"], base["g0"][c], size)
            linear[c, :, 1] = np.bincount(layout["cls"], base["g1"][c], size)
    out = np.zeros((theta.size, theta.size))
    for c, tie in enumerate(ties):
        block = slice(cut[c], cut[c + 1])
        out[block, block] = class_hessian(theta[block], classes, tie, model["hard"][c], step, linear[c])
    if layout["counts"].size:
        out += _coupling(theta, model, base, _shifted_maps(theta, model, base, step), step)
    return -(out + out.T) / 2


def at_bounds(theta: np.ndarray, ties: list[np.ndarray]) -> list[np.ndarray]:
    """Per chain, whether each free parameter's p or d is on a bound of the fit (bool per free
    parameter, in the order of the chain's tie)."""
    free = _free(theta, ties)
    _, _, cut = chain_cells(theta, ties)
    out = []
    for c, tie in enumerate(ties):
        n = int(tie.max()) + 1
        out.append(~free[cut[c]:cut[c] + n] | ~free[cut[c] + n:cut[c + 1]])
    return out


def _free(theta: np.ndarray, ties: list[np.ndarray]) -> np.ndarray:
    """Parameters off their bounds (a p at its bound, and then its d, is left out of steps and intervals)."""
    _, _, cut = chain_cells(theta, ties)
    free = np.ones(theta.size, bool)
    for c, tie in enumerate(ties):
        n = int(tie.max()) + 1
        logit, logd = theta[cut[c]:cut[c] + n], theta[cut[c] + n:cut[c + 1]]
        stuck = np.abs(logit) >= LOGIT_BOUND - 1e-6
        free[cut[c]:cut[c] + n] = ~stuck
        free[cut[c] + n:cut[c + 1]] = ~stuck & (logd > LOG_D_BOUNDS[0] + 1e-6) & (logd < LOG_D_BOUNDS[1] - 1e-6)
    return free


def newton_step(theta: np.ndarray, model: dict, info: np.ndarray, ll: float,
                steps: int = 6) -> tuple[np.ndarray, float]:
    """Up to ``steps`` Levenberg-Marquardt steps (Levenberg 1944; Marquardt 1963) with the one
    information matrix over the free parameters: (|info| + mu)^-1 gradient, |info| the matrix
    with its eigenvalues made positive (far from the maximum it need not be positive definite),
    mu raised from 0 until the log-likelihood rises; until a step gains less than 0.01.
    theta and its log-likelihood."""
    free = _free(theta, model["ties"])
    values, vectors = np.linalg.eigh(info[np.ix_(free, free)])
    top = max(np.abs(values).max(), 1e-300)
    size = np.maximum(np.abs(values), 1e-8 * top)
    for _ in range(steps):
        grad = vectors.T @ joint_loglik(theta, model)[1][free]
        for mu in (0.0, 1e-4, 1e-3, 1e-2, 1e-1, 1.0, 10.0):
            move = np.zeros(theta.size)
            move[free] = vectors @ (grad / (size + mu * top))
            trial = _clip(theta + move, model["ties"])
            trial_ll = joint_loglik(trial, model, gradient=False)[0]
            if trial_ll > ll:
                break
        else:
            return theta, ll
        theta, gain, ll = trial, trial_ll - ll, trial_ll
        if gain < 0.01:
            break
    return theta, ll


def remaining_gain(theta: np.ndarray, model: dict, info: np.ndarray) -> float:
    """The log-likelihood a Newton step from ``theta`` would still gain, g' info^-1 g / 2 over
    the free parameters (infinite where the information is not positive definite): how far the
    fit is from its maximum."""
    free = _free(theta, model["ties"])
    grad = joint_loglik(theta, model)[1][free]
    values, vectors = np.linalg.eigh(info[np.ix_(free, free)])
    if values.size and values.min() <= 0:
        return float("inf")
    return float(((vectors.T @ grad) ** 2 / values).sum() / 2)


def finish(theta: np.ndarray, model: dict, ll: float, rounds: int = 3,
           target: float = 0.1) -> tuple[np.ndarray, float, np.ndarray, float]:
    """Newton steps from ``theta`` with the observed information until a step would gain less
    than ``target``: theta, its log-likelihood, the information and what a step would still
    gain. The information is computed again only when the steps with the one in hand leave
    more than ``target`` to gain (at most ``rounds`` times): it is the costly part of the fit,
    and the information from within one small step of the maximum gives the same intervals to
    first order (the one-step estimator's argument; Lehmann and Casella 1998, section 6.4,
    from memory)."""
    info = observed_information(theta, model)
    left = remaining_gain(theta, model, info)
    for r in range(rounds):
        if left < target:
            break
        theta, ll = newton_step(theta, model, info, ll)
        left = remaining_gain(theta, model, info)
        if left >= target and r < rounds - 1:
            info = observed_information(theta, model)
            left = remaining_gain(theta, model, info)
    return theta, ll, info, left


def _clip(theta: np.ndarray, ties: list[np.ndarray]) -> np.ndarray:
    _, _, cut = chain_cells(theta, ties)
    out = theta.copy()
    for c, tie in enumerate(ties):
        n = int(tie.max()) + 1
        out[cut[c]:cut[c] + n] = np.clip(out[cut[c]:cut[c] + n], -LOGIT_BOUND, LOGIT_BOUND)
        out[cut[c] + n:cut[c + 1]] = np.clip(out[cut[c] + n:cut[c + 1]], *LOG_D_BOUNDS)
    return out


def wald_intervals(theta: np.ndarray, info: np.ndarray, ties: list[np.ndarray],
                   level: float) -> tuple[np.ndarray, np.ndarray, np.ndarray, list[str], np.ndarray]:
    """Standard errors on the logit / log scale and the bounds theta -+ z se (NaN se for a
    parameter at a bound, or where the information is not positive definite), the covariance
    [n, n] (0 off the free block) and warnings."""
    free = _free(theta, ties)
    cov = np.zeros((theta.size, theta.size))
    warnings = []
    try:
        cov[np.ix_(free, free)] = np.linalg.inv(info[np.ix_(free, free)])
    except np.linalg.LinAlgError:
        warnings.append("observed information is singular: intervals not available")
        cov[:] = np.nan
    var = np.diag(cov).copy()
    var[~free] = np.nan
    se = np.sqrt(np.where(var > 0, var, np.nan))
    if np.isnan(se[free]).any() and not warnings:
        warnings.append("observed information is not positive definite: some intervals not available")
    z = float(special.ndtri(0.5 + level / 2))
    return se, np.maximum(theta - z * se, -700.0), np.minimum(theta + z * se, 700.0), warnings, cov


def settled_test(ratio: float, settled_params: int, level: float = SETTLED_LEVEL) -> tuple[float, bool]:
    """p-value of a likelihood-ratio statistic ``ratio`` for a settled state with
    ``settled_params`` free (p, d) pairs against chi-square on 2 x that many degrees of
    freedom, and whether it gives the settled state (p below ``level``)."""
    p_value = float(stats.chi2.sf(max(ratio, 0.0), 2 * settled_params))
    return p_value, p_value < level
