"""Goodness of fit of a fleet model against device telemetry: eligible share by local hour,
eligible-session lengths, on-spell durations by time rescaling, the state at the next check-in,
with Holm's method over the checks (docs/goodness.md says what each tests and why). Pure: no files.
"""

from __future__ import annotations

import math
from collections.abc import Collection
from dataclasses import dataclass
from datetime import datetime, timedelta, timezone
from typing import Any

import numpy as np
import pandas as pd
from matplotlib.figure import Figure
from scipy import stats

from ..config import SIGNALS, Config
from ..errors import ConfigError
from ..signals import SETTLED, STEP_S, SignalTables, build_signal_tables, local_calendar
from .verdicts import CAUTION, Check, GoodnessReport, holm

__all__ = ["CAUTION", "Check", "GoodnessReport", "goodness_of_fit"]

_GAPS = (1800.0, 7200.0, 28800.0)  # gap bins between check-ins: up to 30 min, 2 h, 8 h, longer
_PBINS = (0.05, 0.2, 0.5, 0.8, 0.95)  # bins of the model's probability in the transition check
_MIN_VAR = 2.0  # predicted variance a transition cell (or an hour) needs to be counted
_EPS = 1e-6


@dataclass
class _Fleet:
    """The model as the checks need it: tables over the logs' span, local hour per (group, step)."""

    tables: SignalTables
    hours: np.ndarray  # [G, K] local hour at each step in the region's zone
    types: tuple[str, ...]
    regions: tuple[str, ...]
    req: list[int]  # the workload's required signals (indices into SIGNALS)
    K: int  # model replicas per device

    def marginal(self, g: np.ndarray, c: Any, t: np.ndarray) -> np.ndarray:
        """On-probability of chain ``c`` at ``t``, started from its own law at the tables' origin."""
        return self.tables.on_probability(g, c, np.full(t.size, self.tables.origin_s), self.tables.p[g, c, 0], t)

    def p_eligible(self, g: np.ndarray, t: np.ndarray) -> np.ndarray:
        """Probability that every required signal is on at ``t`` (the chains are independent)."""
        q_set, alone, held = self.marginal(g, SETTLED, t), np.ones(t.size), np.ones(t.size)
        for s in self.req:
            q = self.marginal(g, 1 + s, t)
            alone, held = alone * q, held * np.where(self.tables.covers[g, s], 1.0, q)
        return q_set * held + (1.0 - q_set) * alone


def _expm(a: np.ndarray) -> np.ndarray:
    """Exponentials of a batch of small matrices: Taylor series after scaling, then squaring."""
    s = max(0, math.ceil(math.log2(float(np.abs(a).sum(-1).max()))) + 1) if a.size and np.abs(a).max() > 0 else 0
    a, out = a / 2.0**s, np.broadcast_to(np.eye(a.shape[-1]), a.shape).copy()
    term = out
    for i in range(1, 12):
        term = term @ a / i
        out = out + term
    for _ in range(s):
        out = out @ out
    return out


def _sweep(need: int, unit: np.ndarray, start: np.ndarray, end: np.ndarray):
    """Maximal intervals (unit, from, to) where at least ``need`` of the given ones overlap (touching ones merge)."""
    t, u, d = np.r_[start, end], np.r_[unit, unit], np.r_[np.ones(start.size, np.int64), -np.ones(end.size, np.int64)]
    o = np.lexsort((-d, t, u))
    t, u, level = t[o], u[o], np.cumsum(d[o])
    up, down = (level >= need) & (level - d[o] < need), (level < need) & (level - d[o] >= need)
    keep = t[down] > t[up]
    return u[up][keep], t[up][keep], t[down][keep]


def _hour_sums(fl: _Fleet, g_of, unit, n: int, a, b, weight: Any = None) -> np.ndarray:
    """Seconds of intervals (times ``weight(group, midpoint)``) per (unit, local hour), cut at the grid steps."""
    tb, k0 = fl.tables, fl.tables.step_of(a)
    m = tb.step_of(b) - k0 + 1
    rep = np.repeat(np.arange(a.size), m)
    k = k0[rep] + np.arange(rep.size) - np.repeat(np.cumsum(m) - m, m)
    lo = np.maximum(a[rep], tb.origin_s + k * tb.step_s)
    hi, g = np.maximum(np.minimum(b[rep], tb.origin_s + (k + 1) * tb.step_s), lo), g_of[unit[rep]]
    w = (hi - lo) * (weight(g, (lo + hi) / 2) if weight is not None else 1.0)
    return np.bincount(unit[rep] * 24 + fl.hours[g, k], w, n * 24).reshape(n, 24)


def _paths(tb: SignalTables, g, chain, t, end, on, rng):
    """On-intervals (instance, from, to) of chains followed exactly (SignalTables.next_flip) from ``t`` to ``end``."""
    idx, out = np.arange(g.size), [(np.zeros(0, np.int64), np.zeros(0), np.zeros(0))]
    while idx.size:
        nxt = tb.next_flip(g[idx], chain[idx], t, on.astype(np.int64), rng.exponential(size=idx.size))
        out.append((idx[on], t[on], np.minimum(nxt, end[idx])[on]))
        go = nxt < end[idx]
        idx, t, on = idx[go], nxt[go], ~on[go]
    return [np.concatenate(x) for x in zip(*out, strict=True)]


def _interval_units(fl: _Fleet, sig, dev, a, b, g_dev, rng):
    """Windows (device, from, to), and eligible spells of every unit: unit i(K+1) is device i's
    logs, the next K its model replicas, each chain simulated over the span of its windows."""
    K1, w, tb = fl.K + 1, sig == "observed", fl.tables
    win = _sweep(1, dev[w], a[w], b[w])
    span = pd.DataFrame({"a": win[1], "b": win[2]}).groupby(win[0]).agg({"a": "min", "b": "max"})
    first, last = (span[c].reindex(range(g_dev.size)).to_numpy() for c in "ab")  # NaN: a device without windows
    ci, ii, kk = (x.reshape(-1) for x in np.indices((4, g_dev.size, fl.K)))  # chain, device, replica
    ci, ii, kk = (x[np.isfinite(first[ii])] for x in (ci, ii, kk))
    on = rng.random(ii.size) < fl.marginal(g_dev[ii], ci, first[ii])
    inst, pa, pb = _paths(tb, g_dev[ii], ci, first[ii], last[ii], on, rng)
    unit = ii[inst] * K1 + kk[inst] + 1
    parts = [((win[0][None, :] * K1 + np.arange(K1)[:, None]).ravel(), np.tile(win[1], K1), np.tile(win[2], K1))]
    for s in fl.req:  # each required signal of every unit: its own chain, or the settled chain where it covers it
        mine, o = (ci[inst] == 1 + s) | ((ci[inst] == SETTLED) & tb.covers[g_dev[ii[inst]], s]), sig == SIGNALS[s]
        parts.append(_sweep(1, np.r_[dev[o] * K1, unit[mine]], np.r_[a[o], pa[mine]], np.r_[b[o], pb[mine]]))
    return win, _sweep(len(fl.req) + 1, *(np.concatenate(x) for x in zip(*parts, strict=True)))


def _share_check(fl: _Fleet, name: str, seen, T, E, g_dev, lab):
    """Eligible share by (group, local hour): sum over cells of (O - E)^2 / V, O the logs'
    eligible time or count (``seen[:, 0]``), E the model's, V the summed variance over each
    device's K + 1 copies; its law by randomisation over which copy is called the logs."""
    R, groups = len(fl.regions), np.unique(g_dev)
    A = (g_dev[None, :] == groups[:, None]).astype(float)
    V, Ec, Tc, Oc = A @ seen.var(axis=1, ddof=1), A @ E, A @ T, A @ seen[:, 0]
    use, scale = V > 0, np.where(V > 0, V, 1.0)
    # Per labelling, group sums as runs of devices sorted by group (a product per labelling is slow)
    order, stat, rows = np.argsort(g_dev, kind="stable"), [], max(1, 2_000_000 // max(g_dev.size * 24, 1))
    starts = np.flatnonzero(np.r_[True, g_dev[order][1:] != g_dev[order][:-1]])
    for i in range(0, len(lab), rows):  # [labellings, devices, 24] a few labellings at a time
        sums = np.add.reduceat(seen[order[None, :], lab[i:i + rows][:, order]], starts, axis=1)
        stat.append((((sums - Ec) ** 2 / scale) * use).sum(axis=(1, 2)))
    stat = np.concatenate(stat)
    z = np.where(use, (Oc - Ec) / np.sqrt(scale), 0.0)
    top = zip(*np.unravel_index(np.argsort(-np.abs(z), axis=None)[:3], z.shape), strict=True)
    where = "; ".join(f"{fl.types[groups[i] // R]}/{fl.regions[groups[i] % R]} {h:02d}h: logs {Oc[i, h] / Tc[i, h]:.2f}"
                      f", model {Ec[i, h] / Tc[i, h]:.2f}" for i, h in top if abs(z[i, h]) >= 2)
    ax = Figure(figsize=(6.4, 4.4), layout="constrained").add_subplot(
        title=name, xlabel="local hour", ylabel="share eligible (line: model; points: logs, 2 s.e.)", xlim=(-0.5, 23.5))
    for ti, tname in enumerate(fl.types):
        o, e, v, tot = (x[groups // R == ti].sum(0) for x in (Oc, Ec, V, Tc))
        h = np.flatnonzero(tot > 0)
        line = ax.plot(h, e[h] / tot[h], label=f"{tname}: model")[0]
        ax.errorbar(h, o[h] / tot[h], 2 * np.sqrt(v[h]) / tot[h], fmt="o", ms=3, color=line.get_color(), label=tname)
    ax.legend(fontsize=7)
    law = f"randomisation over {fl.K} model replicas per device, {len(lab) - 1} draws"
    return Check(name, float(stat[0]), int(use.sum()), float(np.mean(stat >= stat[0])), "", where, law), ax.figure


def _session_checks(fl: _Fleet, spells, win, g_dev, lab) -> list[Check]:
    """Eligible-session lengths per device type, the logs' against the replicas': randomised two-sample KS."""
    K1, (u, a, b), checks = fl.K + 1, spells, []
    j = np.maximum(np.searchsorted(win[0] * 1e10 + win[1], u // K1 * 1e10 + a, side="right") - 1, 0)  # its window
    whole = (a > win[1][j] + _EPS) & (b < win[2][j] - _EPS)  # spells seen whole: neither end at a window's edge
    u, x = u[whole], (b - a)[whole]
    for ti, tname in enumerate(fl.types):
        m = g_dev[u // K1] // len(fl.regions) == ti
        xm, dm, rm = x[m], u[m] // K1, u[m] % K1
        if (rm == 0).sum() >= 5:  # a labelling that leaves one side empty counts as at least as far apart
            d = np.array([stats.ks_2samp(xm[i], xm[~i], method="asymp").statistic if 0 < i.sum() < i.size else 1.0
                          for i in (rm == c[dm] for c in lab)])
            at = stats.ks_2samp(xm[rm == 0], xm[rm > 0], method="asymp").statistic_location
            checks.append(Check(f"eligible-session lengths: {tname}", float(d[0]), int((rm == 0).sum()),
                                float(np.mean(d >= d[0] - 1e-12)), "", f"sessions up to {at / 60:.0f} min: logs "
                                f"{np.mean(xm[rm == 0] <= at):.0%}, model {np.mean(xm[rm > 0] <= at):.0%}",
                                f"two-sample Kolmogorov-Smirnov, randomisation, {fl.K} replicas, {len(lab) - 1} draws"))
    return checks


def _survival(fl: _Fleet, g, s, t, x):
    """Probability under the model that a signal turned on at ``t`` stays on for ``x``: a chain on
    (own on, settled off), (own off, settled on), both on, started as the on-rates at ``t`` split it."""
    tb, lr = fl.tables, fl.tables.leave_rate
    mo, lo, ms, ls = lr[1, :, 1:], lr[0, :, 1:], lr[1, :, :1], lr[0, :, :1] * tb.covers[:, :, None]
    Q = np.zeros(mo.shape + (3, 3))  # [G, S, K, 3, 3] generators within the spell
    Q[..., 0, 0], Q[..., 0, 2], Q[..., 1, 1], Q[..., 1, 2] = -(mo + ls), ls, -(ms + lo), lo
    Q[..., 2, 0], Q[..., 2, 1], Q[..., 2, 2] = ms, mo, -(mo + ms)
    full, k = _expm(Q * tb.step_s), tb.step_of(t)
    v = np.stack([lo[g, s, k] + _EPS**2, ls[g, s, k], np.zeros(t.size)], 1)
    v, cur, end, live = v / v.sum(1, keepdims=True), t.copy(), t + x, np.arange(t.size)
    while live.size:
        k = tb.step_of(cur[live])
        stop = np.minimum(tb.origin_s + (k + 1) * tb.step_s, end[live])
        h, mats = stop - cur[live], full[g[live], s[live], k]
        part = h < tb.step_s - _EPS
        mats[part] = _expm(Q[g[live][part], s[live][part], k[part]] * h[part, None, None])
        v[live], cur[live] = np.einsum("ni,nij->nj", v[live], mats), stop
        live = live[(stop < end[live]) & (v[live].sum(1) > 1e-12)]
    return np.clip(v.sum(1), 0.0, 1.0)


def _hours_text(hour: np.ndarray, resid: np.ndarray, var: np.ndarray) -> str:
    """The (at most two) local hours whose summed residuals stand out (|z| >= 2)."""
    sums, vs = np.bincount(hour, resid, 24), np.bincount(hour, var, 24)
    z = np.where(vs >= _MIN_VAR, sums / np.sqrt(np.maximum(vs, _EPS)), 0.0)
    worst = [h for h in np.argsort(-np.abs(z))[:2] if abs(z[h]) >= 2]
    return f"; local hours {', '.join(f'{h:02d}h' for h in worst)}" if worst else ""


def _rescaling_checks(fl: _Fleet, sig, dev, a, b, g_dev, win):
    """Per signal, the logs' on-spells seen whole through the model's law: u = F(L) / F(c), c the
    time left in the window (the spell is seen whole only if it ends by then), is uniform under
    the model (time rescaling); Kolmogorov-Smirnov against U(0, 1); -log(1 - u) is Exp(1)."""
    checks, ax = [], Figure(figsize=(6.4, 4.4), layout="constrained").add_subplot(
        title="On-spells, time-rescaled (QQ)", xlabel="Exp(1) quantile", ylabel="rescaled on-spell duration")
    for s, name in enumerate(SIGNALS):
        d, sa, sb = _sweep(1, dev[sig == name], a[sig == name], b[sig == name])
        j = np.maximum(np.searchsorted(win[0] * 1e10 + win[1], d * 1e10 + sa, side="right") - 1, 0)
        ok, wb = (sa > win[1][j] + _EPS) & (sb < win[2][j] - _EPS), win[2][j]
        d, sa, sb, wb, g = d[ok], sa[ok], sb[ok], wb[ok], np.tile(g_dev[d[ok]], 2)
        surv = 1.0 - _survival(fl, g, np.full(g.size, s), np.tile(sa, 2), np.r_[sb - sa, wb - sa])
        keep = surv[d.size:] > 1e-9
        u = np.clip(surv[: d.size][keep] / surv[d.size:][keep], 0.0, 1.0)
        if u.size < 5:
            continue
        res, x = stats.kstest(u, "uniform"), -np.log1p(-np.minimum(u, 1 - 1e-12))
        ax.plot(-np.log1p(-(np.arange(1, x.size + 1) - 0.5) / x.size), np.sort(x), ".", ms=2, label=name)
        at, hour = float(res.statistic_location), fl.hours[g_dev[d[keep]], fl.tables.step_of(sa[keep])]
        where = (f"rescaled durations up to {-math.log1p(-min(at, 1 - 1e-12)):.2f}: logs {np.mean(u <= at):.0%}, model "
                 f"{at:.0%}" + _hours_text(hour, u - 0.5, np.full(u.size, 1 / 12)))
        checks.append(Check(f"on-spell durations: {name}", float(res.statistic), int(u.size), float(res.pvalue), "",
                            where, "Kolmogorov-Smirnov of the time-rescaled spells against U(0, 1)"))
    ax.axline((0, 0), slope=1, color="k", ls="--", lw=0.8, label="model")
    ax.legend(fontsize=7)
    return checks, ax.figure


def _snapshot_pass(fl: _Fleet, t, Y, g, pos, rng):
    """One pass over every device's check-ins in time order: the replicas' eligibility [K, n]
    (chains sampled exactly at the same times), and per signal the model's probability [n, S]
    that it is on given that signal's earlier check-ins (a filter over its (settled, own) pair)."""
    tb, n, K = fl.tables, t.size, fl.K
    X, P, bel, on = np.zeros((K, 4, n), bool), np.zeros((n, 3)), np.zeros((n, 3, 2, 2)), np.zeros((n, 3, 2, 2))
    on[..., 1], on[:, :, 1, 0] = 1.0, tb.covers[g]  # (settled a, own b) -> signal on?
    for j, r in enumerate(np.split(np.argsort(pos, kind="stable"), np.cumsum(np.bincount(pos))[:-1])):
        # r: every device's j-th check-in; the first starts from the chains' law at the tables' origin
        t_from, law = t[r - 1] if j else np.full(r.size, tb.origin_s), tb.p[g[r], :, 0]
        maps = []  # per chain [len(r), from, to]
        for c in range(4):
            p0, p1 = (tb.on_probability(g[r], c, t_from, np.full(r.size, x), t[r]) for x in (0.0, 1.0))
            was = X[:, c, r - 1] if j else rng.random((K, r.size)) < law[:, c]
            X[:, c, r] = rng.random((K, r.size)) < np.where(was, p1, p0)
            maps.append(np.stack([np.stack([1 - p0, p0], 1), np.stack([1 - p1, p1], 1)], 1))
        for s in range(3):
            first = np.einsum("na,nb->nab", *(np.stack([1 - q, q], 1) for q in law[:, [0, 1 + s]].T))  # at the origin
            pred = np.einsum("nab,nax,nby->nxy", bel[r - 1, s] if j else first, maps[SETTLED], maps[1 + s])
            P[r, s] = (pred * on[r, s]).sum((1, 2))
            post = pred * np.where(Y[r, s][:, None, None], on[r, s], 1 - on[r, s]) + 1e-300  # uniform if impossible
            bel[r, s] = post / post.sum((1, 2), keepdims=True)
    held = np.all([X[:, 1 + s] | (tb.covers[g, s] & X[:, SETTLED]) for s in fl.req], axis=0) if fl.req else None
    return held, P


def _transition_checks(fl: _Fleet, P, Y, t, g, pos):
    """Per signal, the state at each check-in given the earlier ones, in cells (last state, gap, model
    probability p): O - E sums martingale differences, so sum (O - E)^2 / sum p(1 - p) is chi-square."""
    r, checks = np.flatnonzero(pos > 0), []
    ax = Figure(figsize=(6.4, 4.4), layout="constrained").add_subplot(
        title="Next check-in state", xlabel="model probability on, given the earlier check-ins",
        ylabel="share found on (bars: 2 s.e.)", xlim=(0, 1), ylim=(0, 1))
    gap, ge, pb = np.digitize(t[r] - t[r - 1], _GAPS), (0, *np.array(_GAPS) / 60, math.inf), (0.0, *_PBINS, 1.0)
    for s, name in enumerate(SIGNALS):
        p, y, last = P[r, s], Y[r, s].astype(float), Y[r - 1, s].astype(np.int64)
        cell = (last * 4 + gap) * 6 + np.digitize(p, _PBINS)
        N, Y1, E, V = (np.bincount(cell, w, 48) for w in (None, y, p, p * (1 - p)))
        alone = V >= _MIN_VAR  # cells the predictions (not the outcomes) say hold too little are left out
        z = (Y1 - E)[alone] / np.sqrt(V[alone])
        if alone.any():
            c = int(np.flatnonzero(alone)[np.argmax(np.abs(z))])
            where = (f"after {'on' if c >= 24 else 'off'}, gap {ge[c // 6 % 4]:.0f}-{ge[c // 6 % 4 + 1]:.0f} min, "
                     f"model {pb[c % 6]:.2f}-{pb[c % 6 + 1]:.2f}: logs on {Y1[c] / N[c]:.2f}, model {E[c] / N[c]:.2f}"
                     + _hours_text(fl.hours[g[r], fl.tables.step_of(t[r])], y - p, p * (1 - p)))
            x2 = float(z @ z)
            checks.append(Check(f"next check-in state: {name}", x2, int(z.size), float(stats.chi2.sf(x2, z.size)), "",
                                where, "chi-square over (last state, gap, model probability) cells"))
        n = np.bincount(k := np.minimum((p * 10).astype(np.int64), 9), minlength=10)  # calibration plot: tenths of p
        mp, my, mv = (np.bincount(k, w, 10)[n > 0] / n[n > 0] for w in (p, y, p * (1 - p)))
        ax.errorbar(mp, my, yerr=2 * np.sqrt(mv / n[n > 0]), fmt="o-", ms=3, label=name)
    ax.axline((0, 0), slope=1, color="k", ls="--", lw=0.8, label="calibrated")
    ax.legend(fontsize=7)
    return checks, ax.figure


def goodness_of_fit(config: Config, telemetry: Any, held_out: Collection[str] | None = None, *, alpha: float = 0.05,
                    seed: int = 0, replicas: int = 4, draws: int = 499) -> GoodnessReport:
    """Judge the fleet model of ``config`` against ``telemetry`` (``.intervals`` and/or
    ``.snapshots`` as fleetsim.telemetry reads them; either may be None) on the devices that
    ``held_out`` names (None: all). ``replicas`` model copies of each device and ``draws``
    randomisation draws calibrate the share and session checks; ``seed`` fixes them."""
    if replicas < 1 or draws < 0:
        raise ValueError(f"goodness_of_fit: replicas must be at least 1 and draws at least 0 (got {replicas}, {draws})")
    frames = {key: f[f["device_id"].isin(set(held_out))] if held_out is not None else f
              for key in ("intervals", "snapshots") if (f := getattr(telemetry, key, None)) is not None}
    if not (frames := {key: f for key, f in frames.items() if len(f)}):
        raise ConfigError([f"telemetry: no interval or snapshot rows{' of the held-out devices' if held_out else ''} "
                           "to judge the fleet model on"])
    # The model over the logs' span: its horizon moved to their first UTC midnight; the file's disruptions belong
    # to its simulated horizon, not to the logs.
    types, regions, fleet = tuple(config.fleet.device_types), tuple(config.fleet.regions), config.fleet
    ids = pd.concat([f[["device_id", "device_type", "region", "timezone"]] for f in frames.values()])
    ids = ids.drop_duplicates("device_id").reset_index(drop=True)
    for col, names, key in (("device_type", types, "fleet.device_types"), ("region", regions, "fleet.regions")):
        if len(bad := ids[~ids[col].isin(names)]):
            raise ConfigError([f"{key}: the telemetry's {col.replace('_', ' ')} {bad[col].iloc[0]!r} (device "
                               f"{bad['device_id'].iloc[0]!r}) is not in the fleet file, which has {', '.join(names)}"])
    times = np.concatenate([f[c].to_numpy(float) for f in frames.values() for c in ("start_s", "end_s", "time_s")
                            if c in f])
    t0 = math.floor(times.min() / 86400.0) * 86400.0
    start = datetime.fromtimestamp(t0, timezone.utc)
    model = config.model_copy(update={"horizon": config.horizon.model_copy(update={"start": start}), "disruptions": []})
    tables = build_signal_tables(model, types, regions, end_s=float(times.max() - t0) + STEP_S)
    grid = start + timedelta(seconds=tables.origin_s)
    hours = np.stack([local_calendar(fleet.regions[r].timezone, grid, tables.steps)[0] for r in regions]).astype(int)
    fl = _Fleet(tables, hours[np.arange(len(types) * len(regions)) % len(regions)], types, regions,
                [SIGNALS.index(s) for s in config.workload.requires], replicas)
    ids["g"] = (ids["device_type"].map(types.index) * len(regions) + ids["region"].map(regions.index)).astype(np.int64)
    other = int((ids["timezone"] != ids["region"].map(lambda r: fleet.regions[r].timezone)).sum())
    notes = [f"{other} devices log a time zone other than their region's; the model uses the region's"] if other else []
    rngs = [np.random.default_rng(s) for s in np.random.SeedSequence(seed).spawn(3)]
    index, g_dev, n, K1 = pd.Series(ids.index, ids["device_id"]), ids["g"].to_numpy(), len(ids), replicas + 1
    lab = np.vstack([np.zeros((1, n), np.int16), rngs[2].integers(0, K1, (draws, n), np.int16)])  # row 0: the logs
    checks, figures = [], {}
    if "intervals" in frames:
        f = frames["intervals"]
        sig, dev, a, b = (f["signal"].astype(str).to_numpy(), f["device_id"].map(index).to_numpy(),
                          f["start_s"].to_numpy(float) - t0, f["end_s"].to_numpy(float) - t0)
        win, spells = _interval_units(fl, sig, dev, a, b, g_dev, rngs[0])
        if fl.req:
            seen = _hour_sums(fl, np.repeat(g_dev, K1), spells[0], n * K1, spells[1], spells[2]).reshape(n, K1, 24)
            T, E = (_hour_sums(fl, g_dev, win[0], n, win[1], win[2], w) for w in (None, fl.p_eligible))
            share, figures["eligible-share-intervals"] = _share_check(
                fl, "eligible share by hour (intervals)", seen, T, E, g_dev, lab)
            checks += [share] + _session_checks(fl, spells, win, g_dev, lab)
        found, figures["rescaled-durations"] = _rescaling_checks(fl, sig, dev, a, b, g_dev, win)
        checks += found
    if "snapshots" in frames:
        f = frames["snapshots"].sort_values(["device_id", "time_s"], kind="stable")
        dev, t, Y = f["device_id"].map(index).to_numpy(), f["time_s"].to_numpy(float) - t0, f[list(SIGNALS)].to_numpy()
        g, rows, Y = g_dev[dev], np.arange(len(f)), Y.astype(bool)
        pos = rows - np.maximum.accumulate(np.where(np.r_[True, dev[1:] != dev[:-1]], rows, 0))  # n-th check-in
        held, P = _snapshot_pass(fl, t, Y, g, pos, rngs[1])
        if fl.req:
            hour, seen = fl.hours[g, fl.tables.step_of(t)], np.zeros((n, K1, 24))
            np.add.at(seen, (dev[:, None], np.arange(K1), hour[:, None]), np.vstack([Y[:, fl.req].all(1), held]).T)
            T, E = (np.bincount(dev * 24 + hour, w, n * 24).reshape(n, 24) for w in (None, fl.p_eligible(g, t)))
            share, figures["eligible-share-snapshots"] = _share_check(
                fl, "eligible share by hour (snapshots)", seen, T, E, g_dev, lab)
            checks.append(share)
        found, figures["transition-calibration"] = _transition_checks(fl, P, Y, t, g, pos)
        checks += found
    checks, how = holm(checks, alpha), f"family-wise level {alpha:g}, Holm's method over {len(checks)} checks"
    bad = sorted((c for c in checks if c.verdict == "rejected"), key=lambda c: c.p_value)
    line = (f"the model is rejected: {bad[0].name} at {bad[0].where or 'every cell'} (p={bad[0].p_value:.3g}, "
            f"Holm-adjusted {bad[0].holm_p:.3g}; {how})" if bad else
            f"the model is not rejected by these logs ({how}); {CAUTION}")
    return GoodnessReport(checks, line, figures, alpha, notes)
