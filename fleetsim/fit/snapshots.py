"""Maximum-likelihood rates from check-in snapshots alone.

A snapshot says whether each signal was on at one instant. Between a device's consecutive
check-ins, a two-state chain with rates piecewise constant on the 15-minute UTC grid moves its
on-probability through one affine map per grid piece, the map the engine uses
(:meth:`fleetsim.signals.SignalTables.on_probability`): q' = p + (q - p) exp(-h / ((1 - p) d)).
The gaps are grouped into classes of equal likelihood (:mod:`fleetsim.fit.gapclasses`), and
each chain's hourly p and d (weekday and weekend hours together: a gap may cross midnight)
are fitted on logit p and log d. Per (device type, region):

1. each signal as a two-state chain of its own (L-BFGS-B, exact gradient): the model
   without a settled state;
2. the joint model of the fleet file (a settled chain holding all three signals on and an
   own chain per signal, :mod:`fleetsim.fit.hidden`) by EM from there
   (:func:`fleetsim.fit.joint.em_fit`);
3. per device type, the likelihood ratio of the two summed over its regions decides whether
   the type has a settled state (:func:`fleetsim.fit.information.settled_test`);
4. for a type with one, the joint model's cells pooled by the changes the E-step expects, one
   more EM cycle, Newton steps on the exact likelihood and Wald intervals from its observed
   information (:mod:`fleetsim.fit.information`); for a type without, each signal's fit to
   its final tolerance and Wald intervals from its Hessian.

A cell (hour and day kind) with fewer than :data:`MIN_CHANGES` changes cannot pin down d: it
shares one (p, d) with the other sparse hours of its day kind, or, if those together still
have too few, with the sparse hours of both day kinds. A cell whose own estimate the
check-ins do not pin down (:func:`_weak`: on a bound of the fit, or an interval wider than a
factor of 10 either way) shares the values of the nearest earlier hour of its day kind and
the fit runs again (:data:`_POOL_PASSES` times at most); what is still on a bound is named
in a warning. Gaps longer than :data:`MAX_GAP_S` (a device unheard for a day) start afresh.
"""

from __future__ import annotations

from collections.abc import Callable, Mapping

import numpy as np
import pandas as pd
from scipy import optimize, special

from ..config import SIGNALS
from .gapclasses import (
    class_hessian,
    class_loglik,
    gap_classes,
    gap_geometry,
    one_blas_thread,
    pair_weights,
    seen_codes,
)
from .information import at_bounds, finish, settled_test, wald_intervals
from .joint import LOG_D_BOUNDS, bounds, chain_cells, em_fit, joint_loglik, joint_model, pack, start_values
from .rates import ESTIMATE_COLUMNS, LEVEL, hour_ranges
from .stats import DAY_KINDS, DEFAULT_WEEKEND, region_zones, step_calendar

__all__ = ["MAX_GAP_S", "MIN_CHANGES", "fit_snapshots"]

MAX_GAP_S = 86400.0
"""Longest gap between two check-ins that is followed; a longer one starts afresh."""
MIN_CHANGES = 10
"""Fewest gaps showing a change of state that a cell needs for its own (p, d)."""
_CELLS = 48
_FTOL = 1e-12  # relative reduction at which the fit of a signal that is written stops
_POOL_PASSES = 2  # rounds of pooling the cells the check-ins do not pin down alone, and fitting again
WEAK_SE = float(np.log(10.0) / 1.959964)
"""Standard error (logit p, log d) above which a cell's own estimate is pooled (:func:`_weak`)."""
_P_EDGE = 1e-5  # a p within this of 0 or 1 is on the fit's bound (logit +-12: 6e-6)


def _ties(changes: np.ndarray, min_changes: int, forced: np.ndarray | None = None) -> tuple[np.ndarray, list[str]]:
    """Cell -> free parameter map and the label of each cell's pooling ('' for its own). The
    cells ``forced`` (bool: their estimate alone was on a bound) share the values of the
    nearest earlier hour of their day kind that is not forced (the values change smoothly
    with the hour; pooling them with the sparse hours would not help, for they need not be
    sparse)."""
    labels = [""] * _CELLS
    forced = np.zeros(_CELLS, bool) if forced is None else np.asarray(forced, bool)
    sparse = (changes < min_changes) & ~forced
    groups: list[list[int]] = [[c] for c in range(_CELLS) if not sparse[c] and not forced[c]]
    wide = []
    for day in range(2):
        cells = [c for c in range(day * 24, day * 24 + 24) if sparse[c]]
        if cells and changes[cells].sum() >= min_changes:
            groups.append(cells)
            for c in cells:
                labels[c] = "the sparse hours of its day kind"
        else:
            wide += cells
    if wide:
        groups.append(wide)
        enough = changes[wide].sum() >= min_changes
        for c in wide:
            labels[c] = "the sparse hours of both day kinds" + ("" if enough else " (still too few changes)")
    cell_param = np.full(_CELLS, -1, dtype=np.int64)
    for i, cells in enumerate(groups):
        cell_param[cells] = i
    for c in np.flatnonzero(forced):
        day, hour = divmod(int(c), 24)
        for back in range(1, 25):
            other = day * 24 + (hour - back) % 24
            if not forced[other] or back == 24:
                break
        if forced[other]:  # every hour of the day kind forced: the other day kind's same hour
            other = (1 - day) * 24 + hour
        if cell_param[other] < 0:  # forced as well: a parameter of its own after all
            cell_param[other] = cell_param.max() + 1
        cell_param[c] = cell_param[other]
        labels[c] = f"hour {other % 24} of {'the other' if other // 24 != day else 'its'} day kind"
    return np.unique(cell_param, return_inverse=True)[1].reshape(-1), labels


def _fit_signal(geometry: dict, classes: dict, x: np.ndarray, min_changes: int, ftol: float = 1e-9,
                forced: np.ndarray | None = None) -> dict:
    """One signal of one group as a two-state chain of its own: its ties, pooling labels,
    theta, log-likelihood, pair counts and the gaps showing a change by cell (the cells
    ``forced`` pooled whatever their changes)."""
    first, cell0 = geometry["first"], geometry["cell0"]
    x0, x1 = x[first], x[first + 1]
    up = np.bincount(cell0, (~x0 & x1), minlength=_CELLS)
    down = np.bincount(cell0, (x0 & ~x1), minlength=_CELLS)
    cell_param, labels = _ties(up + down, min_changes, forced)
    n_free = int(cell_param.max()) + 1
    gaps = np.bincount(cell0, minlength=_CELLS).astype(float)
    on = np.bincount(cell0, x0, minlength=_CELLS).astype(float)
    free_gaps = np.maximum(np.bincount(cell_param, gaps, n_free), 1)
    p0 = np.clip(np.bincount(cell_param, on, n_free) / free_gaps, 0.02, 0.98)
    # Start d where a short gap h shows a change with probability 2 p h / d (stationary chain).
    changed = np.bincount(cell_param, (up + down).astype(float), n_free) / free_gaps
    d0 = np.clip(2 * p0 * geometry["span_s"] / np.maximum(changed, 1e-6), 120.0, 10 * 86400.0)
    weights = pair_weights(classes, x0, x1)
    scale = max(first.size, 1)

    def objective(theta: np.ndarray) -> tuple[float, np.ndarray]:
        ll, grad = class_loglik(theta, classes, cell_param, weights)
        return -float(ll[0]) / scale, -grad[0] / scale

    result = _maximise(objective, np.concatenate([special.logit(p0), np.log(d0)]), cell_param, ftol)
    return {"tie": cell_param, "labels": labels, "theta": result.x, "ll": -result.fun * scale, "weights": weights,
            "forced": np.zeros(_CELLS, bool) if forced is None else forced,
            "up": up.astype(float), "down": down.astype(float), "objective": objective,
            "warnings": [] if result.success else [f"optimiser: {result.message}"]}


def _maximise(objective: Callable, theta: np.ndarray, tie: np.ndarray, ftol: float) -> optimize.OptimizeResult:
    return optimize.minimize(objective, theta, jac=True, method="L-BFGS-B", bounds=bounds([tie]),
                             options={"maxiter": 2000, "ftol": ftol, "gtol": 1e-9})


def _fit_group(part: pd.DataFrame, calendar: Callable[[int, int], np.ndarray], min_changes: int) -> dict | None:
    """The fits of one group: each signal alone, and the joint model with a settled state by
    EM from there; the likelihood ratio of the two."""
    device = pd.factorize(part["device_id"])[0]
    geometry = gap_geometry(part["time_s"].to_numpy(float), device, calendar, MAX_GAP_S)
    if not geometry["first"].size:
        return None
    y = part[list(SIGNALS)].to_numpy(bool)
    classes = gap_classes(geometry, seen=seen_codes(y, geometry["first"]))
    signals = [_fit_signal(geometry, classes, y[:, s], min_changes) for s in range(3)]
    first, cell0 = geometry["first"], geometry["cell0"]
    all_on = y.all(axis=1)
    tie_settled, labels = _ties(np.bincount(cell0, all_on[first] != all_on[first + 1], _CELLS), min_changes)
    ties = [tie_settled] + [s["tie"] for s in signals]
    model = joint_model(first, cell0, y, classes, ties)
    p = np.array([special.expit(s["theta"][: s["tie"].max() + 1])[s["tie"]] for s in signals])
    d = np.array([np.exp(s["theta"][s["tie"].max() + 1:])[s["tie"]] for s in signals])
    share = np.bincount(cell0, all_on[first], _CELLS) / np.maximum(np.bincount(cell0, minlength=_CELLS), 1)
    theta, ll, steps = em_fit(start_values(p, d, share, ties), model)
    return {"geometry": geometry, "classes": classes, "signals": signals, "model": model, "theta": theta, "ll": ll,
            "y": y, "labels": labels, "ratio": 2.0 * (ll - sum(s["ll"] for s in signals)),
            "settled_params": int(tie_settled.max()) + 1, "em_steps": steps}


def _cells(theta: np.ndarray, low: np.ndarray, high: np.ndarray, tie: np.ndarray) -> dict[str, np.ndarray]:
    """Per cell p, d and their interval bounds from one chain's theta and its bounds."""
    n = int(tie.max()) + 1
    out = {}
    for key, vec in (("", theta), ("_low", low), ("_high", high)):
        out["p" + key] = special.expit(vec[:n])[tie]
        out["d" + key] = np.exp(vec[n:])[tie]
    return out


def _signal_rows(fit: dict, level: float, min_changes: int) -> tuple[dict[str, dict], list[str]]:
    """Each signal's cells from its fit alone (no settled state), with Wald intervals from the
    observed information of its chain; cells the check-ins do not pin down alone
    (:func:`_weak`) are pooled and the signal fitted again."""
    out, warnings = {}, []
    for s, name in enumerate(SIGNALS):
        sig = fit["signals"][s]
        for attempt in range(_POOL_PASSES + 1):
            result = _maximise(sig["objective"], sig["theta"], sig["tie"], _FTOL)  # the fit's own tolerance
            info = -class_hessian(result.x, fit["classes"], sig["tie"], sig["weights"])
            se, lo, hi, problems, _ = wald_intervals(result.x, info, [sig["tie"]], level)
            weak = _weak(result.x, se, [sig["tie"]], [sig["labels"]])[0]
            if attempt == _POOL_PASSES or not weak.any():
                break
            sig = _fit_signal(fit["geometry"], fit["classes"], fit["y"][:, s], min_changes, _FTOL,
                              forced=sig["forced"] | weak)
        sig["theta"], sig["warnings"] = result.x, [] if result.success else [f"optimiser: {result.message}"]
        out[name] = dict(_cells(sig["theta"], lo, hi, sig["tie"]), up=sig["up"], down=sig["down"],
                         pooled=sig["labels"], forced=sig["forced"])
        warnings += [f"{name}: {line}" for line in sig["warnings"] + problems]
    return out, warnings


def _weak(theta: np.ndarray, se: np.ndarray, ties: list[np.ndarray], labels: list[list[str]]) -> list[np.ndarray]:
    """Per chain, the cells with parameters of their own (not pooled yet) that the check-ins do
    not pin down alone: p or d on a bound of the fit (:func:`fleetsim.fit.information.at_bounds`,
    a likelihood still rising towards the bound), or a standard error on the logit / log scale
    above :data:`WEAK_SE` (a 95% interval wider than a factor of 10 either way in d, or in
    the odds of p), or none (the information not positive definite there)."""
    _, _, cut = chain_cells(theta, ties)
    out = []
    for c, (bound, tie, lab) in enumerate(zip(at_bounds(theta, ties), ties, labels, strict=True)):
        n = int(tie.max()) + 1
        part = se[cut[c]:cut[c + 1]]
        loose = ~(part[:n] <= WEAK_SE) | ~(part[n:] <= WEAK_SE)  # NaN counts as loose
        out.append((bound | loose)[tie] & (np.array(lab) == ""))
    return out


def _retie(model: dict, theta: np.ndarray, min_changes: int,
           forced: list[np.ndarray] | None = None) -> tuple[dict, np.ndarray, list[list[str]]]:
    """The joint model with each chain's cells pooled by the changes the E-step expects of it
    at ``theta`` (a chain's changes are hidden while the device is settled: a cell can show the
    signals changing and hold few changes of the own chain), the cells ``forced`` pooled too,
    and theta carried over to those ties."""
    _, expected = joint_loglik(theta, model, pairs=True)
    p, d, _ = chain_cells(theta, model["ties"])
    cell0 = model["classes"]["cell0"]
    ties, labels = [], []
    for c in range(len(model["ties"])):
        changes = np.bincount(cell0, expected[c, :, 1] + expected[c, :, 2], _CELLS)
        tie, lab = _ties(changes, min_changes, None if forced is None else forced[c])
        ties.append(tie)
        labels.append(lab)
    # a pooled cell starts from the values of the cells it joins, not from its own loose ones
    weights = [None if forced is None else ~forced[c] for c in range(len(ties))]
    return dict(model, ties=ties), np.concatenate([pack(p[c], d[c], t, weights[c]) for c, t in enumerate(ties)]), labels


def _joint_rows(fit: dict, level: float, min_changes: int) -> tuple[dict[str, dict], list[str]]:
    """The settled chain's, each own chain's and each signal's cells from the joint fit: pooled
    by expected changes (:func:`_retie`), one more SQUAREM cycle, then Newton steps with the
    observed information (:func:`fleetsim.fit.information.finish`); the cells that leaves not
    pinned down (:func:`_weak`) pooled with their neighbour hour and the last two steps run
    again. A signal's p is its marginal, 1 - (1 - p_own)(1 - p_settled), its interval by the
    delta method on the logit scale (none where a chain's parameter is on a bound)."""
    model, theta, labels = _retie(fit["model"], fit["theta"], min_changes)
    theta, ll, _ = em_fit(theta, model, cycles=1)
    forced = [np.zeros(_CELLS, bool) for _ in model["ties"]]
    for attempt in range(_POOL_PASSES + 1):
        theta, ll, info, left = finish(theta, model, ll)
        se, lo, hi, warnings, cov = wald_intervals(theta, info, model["ties"], level)
        weak = _weak(theta, se, model["ties"], labels)
        if attempt == _POOL_PASSES or not any(w.any() for w in weak):
            break
        forced = [f | w for f, w in zip(forced, weak, strict=True)]  # pooled too; one more cycle from there
        model, theta, labels = _retie(model, theta, min_changes, forced)
        theta, ll, _ = em_fit(theta, model, cycles=1)
    ties = model["ties"]
    if np.isfinite(left) and left >= 0.5:
        warnings.append(f"the joint fit ends {left:.3g} in log-likelihood below its maximum (by a Newton step); "
                        "its estimates and intervals are approximate")
    _, expected = joint_loglik(theta, model, pairs=True)
    _, _, cut = chain_cells(theta, ties)
    cell0 = fit["classes"]["cell0"]
    out: dict[str, dict] = {}
    for c, name in enumerate(("settled",) + tuple(f"own-{s}" for s in SIGNALS)):
        part = slice(cut[c], cut[c + 1])
        out[name] = dict(_cells(theta[part], lo[part], hi[part], ties[c]), pooled=labels[c], forced=forced[c],
                         up=np.bincount(cell0, expected[c, :, 1], _CELLS),
                         down=np.bincount(cell0, expected[c, :, 2], _CELLS))
    z = float(special.ndtri(0.5 + level / 2))
    var = se**2  # NaN for a parameter on a bound: so is then the interval of the signal's p
    i_s = cut[0] + ties[0]  # each cell's settled logit p
    p_s = out["settled"]["p"]
    for c, name in enumerate(SIGNALS, start=1):
        i_o = cut[c] + ties[c]
        p_o = out[f"own-{name}"]["p"]
        p = 1.0 - (1.0 - p_o) * (1.0 - p_s)
        a, b = (1.0 - p_s) * p_o * (1.0 - p_o), (1.0 - p_o) * p_s * (1.0 - p_s)  # d p / d logit p_own, p_settled
        spread = np.sqrt(np.maximum(a * a * var[i_o] + b * b * var[i_s] + 2 * a * b * cov[i_o, i_s], 0.0))
        half = z * spread / (p * (1.0 - p))
        own, sig = out[f"own-{name}"], fit["signals"][c - 1]
        out[name] = {"p": p, "p_low": special.expit(special.logit(p) - half),
                     "p_high": special.expit(special.logit(p) + half), "d": own["d"], "d_low": own["d_low"],
                     "d_high": own["d_high"], "up": sig["up"], "down": sig["down"], "pooled": own["pooled"],
                     "forced": own["forced"]}
    return out, warnings


def _frame(tname: str, rname: str, chain: str, cells: dict) -> pd.DataFrame:
    frame = pd.DataFrame({k: cells[k] for k in ("p", "p_low", "p_high", "d", "d_low", "d_high", "up", "down", "pooled",
                                                 "forced")})
    for column, value in (("hour", np.tile(np.arange(24), 2)), ("day", np.repeat(DAY_KINDS, 24)), ("chain", chain),
                          ("region", rname), ("device_type", tname)):
        frame.insert(0, column, value)
    return frame


def _cell_warnings(tname: str, rname: str, chain: str, frame: pd.DataFrame, min_changes: int, joint: bool) -> list[str]:
    """One line per (day kind, reason) of the cells of one chain that were pooled, and of those
    whose estimate is still on a bound of the fit after pooling (written as it is, its interval
    open on that side). For a type with a settled state the pooling is of the settled and own
    chains (by the changes the E-step expects of them) and a signal's ``d`` is its own chain's:
    so the signal rows then report their p only."""
    out, signal = [], chain in SIGNALS
    seen = "expected of this chain from the check-ins" if joint else "seen at check-ins"
    if not (joint and signal):
        for (label, day, forced), rows in frame[frame["pooled"] != ""].groupby(["pooled", "day", "forced"], sort=True):
            why = ("the check-ins do not pin it down alone (p or d on a bound, or its interval over a factor of 10 "
                   "either way)" if forced
                   else f"fewer than {min_changes} changes {seen}; d not identified alone")
            out.append(f"{tname} in {rname}, {chain}, {day} hours {hour_ranges(rows['hour'].tolist())}: {why}, "
                       f"pooled over {label}")
    checks = [] if chain.startswith("own-") else [("p", frame["p"] < _P_EDGE, "0"),
                                                  ("p", frame["p"] > 1 - _P_EDGE, "1")]
    if not (joint and signal):
        checks += [("d", frame["d"] <= np.exp(LOG_D_BOUNDS[0]) * 1.001, "1 minute"),
                   ("d", frame["d"] >= np.exp(LOG_D_BOUNDS[1]) * 0.999, "30 days")]
    for key, where, edge in checks:
        for day in DAY_KINDS:
            hours = frame.loc[where & (frame["day"] == day), "hour"].tolist()
            if hours:
                out.append(f"{tname} in {rname}, {chain}, {day} hours {hour_ranges(hours)}: {key} on the fit's bound "
                           f"({edge}) even after pooling; the check-ins do not pin it down, written as it is")
    return out


def _settled_types(fits: dict, warnings: list[str]) -> set[str]:
    """Device types whose likelihood ratio for a settled state, summed over their regions,
    passes :func:`fleetsim.fit.information.settled_test`; one line each in the warnings."""
    out = set()
    for tname in sorted({t for t, _ in fits}):
        mine = [f for (t, _), f in fits.items() if t == tname]
        ratio, params = sum(f["ratio"] for f in mine), sum(f["settled_params"] for f in mine)
        p_value, kept = settled_test(ratio, params)
        if kept:
            out.add(tname)
        warnings.append(f"{tname}: {'a' if kept else 'no'} settled state: likelihood ratio {ratio:.4g} against each "
                        f"signal alone, chi-square on {2 * params} degrees of freedom, p = {p_value:.3g}")
    return out


def fit_snapshots(
    snapshots: pd.DataFrame, weekend_days: Mapping[str, frozenset[int]] | None = None,
    min_changes: int = MIN_CHANGES, level: float = LEVEL, on_progress: Callable[[float], None] | None = None,
) -> tuple[pd.DataFrame, list[str]]:
    """Per cell p, d and 95% intervals of each chain of each (device type, region) in
    ``snapshots`` (the reader's columns), in the estimate table of
    :func:`fleetsim.fit.rates.estimate_rates` (``up``/``down``: gaps showing a change; for
    the settled and own chains, the expected changes; ``on_s``/``off_s`` NaN): the signals,
    and for a type with a settled state also ``settled`` and ``own-*``; and warnings."""
    weekend_days = weekend_days or {}
    zones = region_zones(snapshots, "snapshots")
    frame = snapshots.sort_values(["device_id", "time_s"], kind="stable")
    groups = sorted(frame.groupby(["device_type", "region"], sort=True, observed=True).groups)
    fits, warnings = {}, []
    with one_blas_thread():
        for i, (tname, rname) in enumerate(groups):
            zone, weekend = zones[rname], weekend_days.get(rname, DEFAULT_WEEKEND)

            def calendar(k0: int, k1: int, zone: str = zone, weekend: frozenset[int] = weekend) -> np.ndarray:
                hours, is_weekend = step_calendar(zone, weekend, k0, k1)
                return is_weekend * 24 + hours

            fit = _fit_group(frame[(frame["device_type"] == tname) & (frame["region"] == rname)], calendar, min_changes)
            if fit is None:
                warnings.append(f"{tname} in {rname}: no two check-ins of one device within a day; not fitted")
            else:
                fits[(tname, rname)] = fit
            if on_progress is not None:
                on_progress(0.7 * (i + 1) / len(groups))
        settled = _settled_types(fits, warnings)
        rows = []
        for i, ((tname, rname), fit) in enumerate(fits.items()):
            joint = tname in settled
            cells, problems = _joint_rows(fit, level, min_changes) if joint else _signal_rows(fit, level, min_changes)
            warnings += [f"{tname} in {rname}, {line}" for line in problems]
            for chain, values in cells.items():
                rows.append(_frame(tname, rname, chain, values))
                warnings += _cell_warnings(tname, rname, chain, rows[-1], min_changes, joint)
                rows[-1] = rows[-1].drop(columns="forced")
            if on_progress is not None:
                on_progress(0.7 + 0.3 * (i + 1) / len(fits))
    out = pd.concat(rows, ignore_index=True) if rows else pd.DataFrame(columns=ESTIMATE_COLUMNS)
    out["on_s"], out["off_s"] = np.nan, np.nan
    return out[ESTIMATE_COLUMNS], warnings
