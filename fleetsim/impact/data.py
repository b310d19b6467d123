"""The invented classification task: non-IID synthetic data per device and per group.

This is a stand-in for a team's own data, not a model of any real one. Every device's
examples follow the distribution of its (device type, region) pair:

    x ~ N(m, I),  m = f_t u_t + f_r u_r
    P(y = c | x) = softmax(x A + a)_c,  A = A0 + k_t R_t + k_r R_r,  a = l_t v_t + l_r v_r

``A0`` (features x classes) is the shared labelling rule, its entries N(0, signal^2 /
features) so that each true logit has standard deviation ``signal`` at the origin. A device
type ``t`` and a region ``r`` each have their own unit direction ``u``, rule ``R`` (drawn
like ``A0``) and class offsets ``v`` (standard normal), from a stream of the seed and their
name, and their amounts ``f`` (feature shift), ``l`` (label skew) and ``k`` (concept shift)
from :class:`fleetsim.config.ImpactSettings`. The concept shift changes what the label of
an input is, so a group the model never trains on is served worse however long it trains.

Device ``i`` draws its examples from ``numpy.random.SeedSequence((seed, key, i))``, one
row of ``features + 1`` standard normals per example (the last one turned into the uniform
that draws the label), so its first ``n`` examples are the same whatever cap applies. The
held-out test set of each pair comes from a stream of its own.
"""

from __future__ import annotations

import zlib
from collections import OrderedDict
from dataclasses import dataclass

import numpy as np
from scipy.special import ndtr

from ..config import ImpactSettings
from ..fleet import Fleet

__all__ = ["Task", "build_task", "device_rng", "DeviceData", "held_out", "data_quartile", "QUARTILES"]

QUARTILES = ("Q1", "Q2", "Q3", "Q4")
"""Data quartile names: Q1 the quarter of the fleet's devices with the fewest local samples."""


def _key(name: str) -> int:
    return zlib.crc32(name.encode())


def _rng(seed: int, *parts: int) -> np.random.Generator:
    return np.random.default_rng(np.random.SeedSequence(entropy=(int(seed), *parts)))


def device_rng(seed: int, device: int) -> np.random.Generator:
    """Device ``device``'s own stream of synthetic examples."""
    return _rng(seed, _key("impact"), int(device))


@dataclass(frozen=True)
class Task:
    """Each (type, region) pair's data distribution, pair index ``type x regions + region``.

    ``mean`` (pairs, F) the feature mean, ``rule`` (pairs, F, C) the true logit weights,
    ``offset`` (pairs, C) the class log-odds offsets."""

    features: int
    classes: int
    mean: np.ndarray
    rule: np.ndarray
    offset: np.ndarray

    def draw(self, rng: np.random.Generator, pair: int, n: int) -> tuple[np.ndarray, np.ndarray]:
        """``n`` examples of pair ``pair`` from ``rng``: inputs (n, F) and labels (n,)."""
        return self.examples(rng.standard_normal((n, self.features + 1)), np.full(n, pair))

    def examples(self, z: np.ndarray, pair: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
        """Examples made of rows of standard normals ``z`` (N, F + 1), row i of pair ``pair[i]``.

        The inputs are the first F normals plus the pair's mean; the last, through the normal
        distribution function, is the uniform that draws the label from the pair's class
        probabilities (inverse transform)."""
        x = z[:, : self.features] + self.mean[pair]
        logits = self.offset[pair]
        by_pair = np.argsort(pair, kind="stable")
        cuts = np.flatnonzero(np.diff(pair[by_pair])) + 1
        for rows in np.split(by_pair, cuts) if pair.size else ():
            logits[rows] += x[rows] @ self.rule[pair[rows[0]]]
        cum = np.cumsum(np.exp(logits - logits.max(axis=1, keepdims=True)), axis=1)
        u = ndtr(z[:, self.features]) * cum[:, -1]
        y = (cum < u[:, None]).sum(axis=1)
        return x, np.minimum(y, self.classes - 1).astype(np.int64)


def build_task(settings: ImpactSettings, type_names: tuple[str, ...], region_names: tuple[str, ...],
               seed: int) -> Task:
    """The pairs' distributions for a fleet's type and region names (module docstring)."""
    F, C = settings.features, settings.classes
    scale = settings.signal / np.sqrt(F)
    shared = _rng(seed, _key("impact-task")).standard_normal((F, C)) * scale

    def parts(kind: str, name: str) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
        rng = _rng(seed, _key(f"impact-{kind}"), _key(name))
        direction = rng.standard_normal(F)
        direction /= max(float(np.linalg.norm(direction)), 1e-12)
        return direction, rng.standard_normal((F, C)) * scale, rng.standard_normal(C)

    pairs = len(type_names) * len(region_names)
    mean, rule, offset = np.zeros((pairs, F)), np.repeat(shared[None], pairs, axis=0), np.zeros((pairs, C))
    for t, tname in enumerate(type_names):
        ts, (tu, tR, tv) = settings.type_shift(tname), parts("type", tname)
        for r, rname in enumerate(region_names):
            rs, (ru, rR, rv) = settings.region_shift(rname), parts("region", rname)
            g = t * len(region_names) + r
            mean[g] = ts.feature_shift * tu + rs.feature_shift * ru
            rule[g] += ts.concept_shift * tR + rs.concept_shift * rR
            offset[g] = ts.label_skew * tv + rs.label_skew * rv
    return Task(features=F, classes=C, mean=mean, rule=rule, offset=offset)


class DeviceData:
    """The devices' training examples, drawn on first use and kept within a byte budget.

    A device's examples depend only on the seed, its index and its pair (the first ``n``
    of its stream are the same for any ``n``), so a device evicted and drawn again gets the
    same examples. The budget may be passed while one cohort's examples are in hand."""

    def __init__(self, task: Task, fleet: Fleet, seed: int, budget_bytes: float = 128e6):
        self.task, self.seed, self.budget = task, seed, budget_bytes
        self.pair = fleet.group
        self._kept: OrderedDict[int, tuple[np.ndarray, np.ndarray]] = OrderedDict()
        self._bytes = 0

    def cohort(self, devices: np.ndarray, n: np.ndarray) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
        """A cohort's examples end to end: inputs (sum n, F), labels, and offsets (K + 1);
        device ``devices[k]`` gives its first ``n[k]`` examples."""
        kept = self._kept
        missing = [k for k, d in enumerate(devices) if d not in kept or kept[d][1].size < n[k]]
        if missing:
            self._draw(devices[missing], n[missing])
        parts = []
        for d, count in zip(devices.tolist(), n.tolist(), strict=True):
            kept.move_to_end(d)
            x, y = kept[d]
            parts.append((x[:count], y[:count]))
        self._evict()
        offsets = np.concatenate([[0], np.cumsum(n)]).astype(np.int64)
        if not parts:
            return np.empty((0, self.task.features)), np.empty(0, dtype=np.int64), offsets
        return np.concatenate([p[0] for p in parts]), np.concatenate([p[1] for p in parts]), offsets

    def _draw(self, devices: np.ndarray, n: np.ndarray) -> None:
        """Draw and keep the first ``n[k]`` examples of each device ``devices[k]``."""
        F = self.task.features
        z = np.concatenate([device_rng(self.seed, d).standard_normal((k, F + 1))
                            for d, k in zip(devices.tolist(), n.tolist(), strict=True)])
        x, y = self.task.examples(z, np.repeat(self.pair[devices], n))
        cuts = np.cumsum(n)[:-1]
        for d, xs, ys in zip(devices.tolist(), np.split(x, cuts), np.split(y, cuts), strict=True):
            if d in self._kept:
                self._drop(d)
            self._kept[d] = (xs.copy(), ys.copy())
            self._bytes += xs.nbytes + ys.nbytes

    def _evict(self) -> None:
        """Forget the least recently used devices while over the budget (the cohort stays)."""
        while self._bytes > self.budget and len(self._kept) > 1:
            self._drop(next(iter(self._kept)))

    def _drop(self, device: int) -> None:
        x, y = self._kept.pop(device)
        self._bytes -= x.nbytes + y.nbytes


def held_out(task: Task, seed: int, pairs: np.ndarray, size: int) -> tuple[np.ndarray, np.ndarray]:
    """Held-out examples of each pair in ``pairs``: inputs (P, size, F), labels (P, size)."""
    x = np.empty((len(pairs), size, task.features))
    y = np.empty((len(pairs), size), dtype=np.int64)
    for i, g in enumerate(pairs):
        x[i], y[i] = task.draw(_rng(seed, _key("impact-test"), int(g)), int(g), size)
    return x, y


def data_quartile(samples: np.ndarray) -> np.ndarray:
    """Each device's data quartile (0 to 3) by rank of its local sample count over the fleet
    (ties in device order), so that the quartiles hold equal numbers of devices."""
    n = samples.size
    rank = np.empty(n, dtype=np.int64)
    rank[np.argsort(samples, kind="stable")] = np.arange(n)
    return (rank * 4) // max(n, 1)
