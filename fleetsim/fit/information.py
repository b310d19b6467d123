"""The observed information of the joint model, the Newton step that ends its fit, the Wald
intervals, and the likelihood-ratio test for a settled state.

Observed information: minus the Hessian of the observed-data log-likelihood (the exact one, by
the forward-backward pass of :mod:`fleetsim.fit.hidden`), symmetrised. It has two parts. The
gap likelihood of each chain (its hard pair counts, and the segments' first derivatives in its
maps held fixed) gives a block per chain, by central differences of its exact gradient, one
free parameter at a time over the classes its cells reach. The segments give J' H J, J the
derivatives of their inputs (each chain's q0, q1 at every segment gap, and the logit of each
chain's p where a segment starts from the chains' law) in theta, H the Hessian of their
log-likelihood in those inputs, one column per input by a forward difference of the pass's
gradient: an input of a gap moves that gap's segment only, so its column is one copy of that
segment, and every input of every segment is one copy in merged passes: a segment is copied
about 8 times per gap it holds, where shifting each parameter in turn copies every segment its
cells reach some 20 times per gap (measured on the example's largest group at 300,000 rows:
half the copied gaps and half the time, the information the same to 1e-6 of its largest entry).
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
    """The segments' part of the Hessian, J' H J: H the Hessian of the segments' log-likelihood
    in their inputs (each chain's q0, q1 at every segment gap; the logit of each chain's p at a
    segment's start from the chains' law), J those inputs' derivatives in theta. A column of H
    is the forward difference of the pass's gradient when one input of one gap moves: it
    reaches that gap's segment only, so it runs on one copy of that segment, and every input
    of every segment is one copy in merged passes (an input whose gradient is 0 there, one the
    segment does not use, has a column of 0 and is skipped)."""
    layout, ties, size = model["layout"], model["ties"], model["classes"]["count"].size
    chains, total = len(ties), theta.size
    p, _, cut = chain_cells(theta, ties)
    n_q, n_prior = chains * size * 2, layout["prior"].size
    rows, cols, vals = [], [], []  # J: (chain, class, q0/q1), then (chain, prior segment) x parameter
    for col, (c, near, delta, _, _) in enumerate(columns):
        rows.append((((c * size + near) * 2)[None, :] + np.array([[0], [1]])).ravel())
        cols.append(np.full(2 * near.size, col))
        vals.append((delta / step).ravel())
    for c, tie in enumerate(ties):  # a prior's logit p is its free parameter's
        rows.append(n_q + c * n_prior + np.arange(n_prior))
        cols.append(cut[c] + tie[layout["prior_cell"]])
        vals.append(np.ones(n_prior))
    J = sparse.csr_matrix((np.concatenate(vals), (np.concatenate(rows), np.concatenate(cols))),
                          shape=(n_q + chains * n_prior, total))
    q = np.stack([base["q0"][:, layout["cls"]], base["q1"][:, layout["cls"]]], axis=1)  # [chains, 2, gaps]
    used = np.stack([base["g0"], base["g1"]], axis=1) != 0
    chain, which, slot = np.nonzero(used)
    chain_p, prior = np.nonzero(np.ones((chains, n_prior), bool))
    qv = q[chain, which, slot]
    h = np.where(qv < 0.5, 1.0, -1.0) * step * np.maximum(np.minimum(qv, 1.0 - qv), 1e-9)
    inputs = {"rank": np.r_[layout["segment_of"][slot], layout["prior"][prior]],
              "slot": np.r_[slot, np.full(prior.size, -1)], "chain": np.r_[chain, chain_p],
              "which": np.r_[which, np.full(prior.size, 2)], "h": np.r_[h, np.full(prior.size, step)],
              "row": np.r_[(chain * size + layout["cls"][slot]) * 2 + which, n_q + chain_p * n_prior + prior]}
    order = np.argsort(inputs["rank"], kind="stable")
    inputs = {k: v[order] for k, v in inputs.items()}
    length = np.bincount(layout["segment_of"], minlength=layout["segments"])[inputs["rank"]]
    ends = np.searchsorted(np.cumsum(length), np.arange(1, int(length.sum()) // 400_000 + 1) * 400_000)
    out = np.zeros((total, total))
    for part in np.split(np.arange(inputs["rank"].size), ends[ends < inputs["rank"].size - 1] + 1):
        if part.size:  # inputs in chunks of about 400,000 copied gaps
            _chunk(model, base, p, q, {k: v[part] for k, v in inputs.items()}, J, n_q, out)
    return out


def _chunk(model, base, p, q, inputs, J, n_q, out) -> None:
    """One merged forward-backward pass on a copy of its segment per input of ``inputs``, that
    input moved by its step; adds the inputs' part of J' H J to ``out``."""
    layout, size = model["layout"], model["classes"]["count"].size
    chains = q.shape[0]
    merged = select_segments(layout, inputs["rank"])
    own, old, cls = merged["segment_of"], merged["slot"], merged["cls"]
    q0, q1 = q[:, 0, old], q[:, 1, old]
    moved = np.flatnonzero(inputs["slot"][own] == old)
    for k, qk in enumerate((q0, q1)):
        hit = moved[inputs["which"][own[moved]] == k]
        qk[inputs["chain"][own[hit]], hit] += inputs["h"][own[hit]]
    p_start = p[:, merged["prior_cell"]].copy()
    hit = np.flatnonzero(inputs["which"][merged["prior"]] == 2)
    c_hit = inputs["chain"][merged["prior"][hit]]
    p_start[c_hit, hit] = special.expit(special.logit(p_start[c_hit, hit]) + inputs["h"][merged["prior"][hit]])
    _, g0, g1, gp = segment_pass(merged, q0, q1, p_start)
    where = np.searchsorted(layout["prior"], inputs["rank"][merged["prior"]])
    n_prior = layout["prior"].size
    h_gap, h_prior = inputs["h"][own], inputs["h"][merged["prior"]]
    line = (np.arange(chains)[:, None] * size + cls[None, :]) * 2
    d0, d1 = (g0 - base["g0"][:, old]) / h_gap, (g1 - base["g1"][:, old]) / h_gap
    dG = sparse.csr_matrix((np.r_[d0.ravel(), d1.ravel(), ((gp - base["gp"][:, where]) / h_prior).ravel()],
                            (np.r_[line.ravel(), line.ravel() + 1,
                                   (n_q + np.arange(chains)[:, None] * n_prior + where[None, :]).ravel()],
                             np.r_[np.tile(own, 2 * chains), np.tile(merged["prior"], chains)])),
                           shape=(J.shape[0], inputs["rank"].size))
    out += ((J.T @ dG) @ J[inputs["row"]]).toarray()


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
        grad = vectors.T @ _gradient(theta, model)[free]
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


def _gradient(theta: np.ndarray, model: dict) -> np.ndarray:
    """The gradient of the joint log-likelihood at ``theta``, kept with the model for the
    next call at the same theta (the Newton steps and the gain left ask for it in turn)."""
    key = (theta.tobytes(),) + tuple(tie.tobytes() for tie in model["ties"])
    if model.get("_gradient", (None,))[0] != key:
        model["_gradient"] = (key, joint_loglik(theta, model)[1])
    return model["_gradient"][1]


def remaining_gain(theta: np.ndarray, model: dict, info: np.ndarray) -> float:
    """The log-likelihood a Newton step from ``theta`` would still gain, g' info^-1 g / 2 over
    the free parameters (infinite where the information is not positive definite): how far the
    fit is from its maximum."""
    free = _free(theta, model["ties"])
    grad = _gradient(theta, model)[free]
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
