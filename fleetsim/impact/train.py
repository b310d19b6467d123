"""Local training of a round's clients at once, Federated Averaging and its private form.

The model is an invented stand-in (multinomial logistic regression or a one-hidden-layer
tanh network on the synthetic task of :mod:`fleetsim.impact.data`); its parameters are one
flat float64 vector, so that a cohort's models are the rows of one matrix and every local
SGD step is a handful of batched array operations over all the clients still training.

Local work follows the engine's meaning (:meth:`fleetsim.config.Workload.local_work`): a
device holding ``n`` examples trains on ``n' = min(n, max_examples)`` of them, ``epochs``
passes in a fresh random order each, in batches of ``batch_size`` (the last batch of an
epoch holds the remainder), ``min(epochs x ceil(n' / batch_size), max_steps)`` steps in
all. Each step descends the mean cross-entropy of its batch plus
``weight_decay / 2 x ||theta||^2``.

Aggregation (the server's step is ``server_learning_rate`` times the aggregate):

- Federated Averaging (McMahan, Moore, Ramage, Hampson and Aguera y Arcas, AISTATS 2017):
  ``Delta = sum_k w_k Delta_k / sum_k w_k`` with ``Delta_k`` the client's model minus the
  global model and ``w_k`` its report's FedAvg weight (the examples it trained on).
- With ``workload.privacy`` (DP-FedAvg in the form of McMahan, Ramage, Talwar and Zhang,
  ICLR 2018, with each device's weight fixed at 1): every ``Delta_k`` is clipped to L2 norm
  ``S = clipping_norm``, ``Delta_k x min(1, S / ||Delta_k||)``, and
  ``Delta = (sum_k clip(Delta_k) + N(0, (z S)^2 I)) / m`` with ``z = noise_multiplier`` and
  the fixed denominator ``m = rounds.target_reports`` (the reports a round expects), so
  that one device moves the noised sum by at most ``S``, whatever the others did and
  however many reported: the sensitivity the privacy accounting assumes.
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np

__all__ = ["Model", "with_ones", "cross_entropy", "LocalWork", "local_work", "train_clients", "fedavg", "clip",
           "private_aggregate"]


class Model:
    """The invented model, its parameters one flat vector per client.

    ``logistic``: ``logits = x W + b``. ``mlp``: ``logits = tanh(x W1 + b1) W2 + b2`` with
    ``hidden`` tanh units. A layer is stored output unit by output unit, each unit's input
    weights and then its bias: the matrix ``[W; b]`` transposed, so that
    ``[W; b]^T [x, 1]^T`` are the unit's values (the inputs carry a constant 1 as their
    last feature, :func:`with_ones`). Class-major logits (K, C, B) keep the reductions over
    the classes on a middle axis, which numpy does fast.
    """

    def __init__(self, kind: str, features: int, classes: int, hidden: int = 32):
        if kind not in ("logistic", "mlp"):
            raise ValueError(f"unknown model {kind!r}; expected logistic or mlp")
        self.kind, self.features, self.classes, self.hidden = kind, features, classes, hidden
        F, C, H = features, classes, hidden
        self.shapes = {"layer": (C, F + 1)} if kind == "logistic" else {"hidden": (H, F + 1), "output": (C, H + 1)}
        self.size = sum(math.prod(shape) for shape in self.shapes.values())
        self._classes = np.arange(C)[None, :, None]

    def views(self, flat: np.ndarray) -> dict[str, np.ndarray]:
        """Each layer of every row of ``flat`` (K, size), as views (K, outputs, inputs + 1)."""
        out, at = {}, 0
        for name, shape in self.shapes.items():
            width = math.prod(shape)
            out[name] = flat[:, at:at + width].reshape(flat.shape[0], *shape)
            at += width
        return out

    def init(self, rng: np.random.Generator) -> np.ndarray:
        """The starting global model: zeros for ``logistic``; for ``mlp`` zero biases and random
        weights of variance 1 / features (first layer) and 1 / hidden (second)."""
        theta = np.zeros(self.size)
        if self.kind == "mlp":
            v = self.views(theta[None, :])
            v["hidden"][0, :, :-1] = rng.standard_normal((self.hidden, self.features)) / math.sqrt(self.features)
            v["output"][0, :, :-1] = rng.standard_normal((self.classes, self.hidden)) / math.sqrt(self.hidden)
        return theta

    def _forward(self, v: dict[str, np.ndarray], xa: np.ndarray) -> tuple[np.ndarray, np.ndarray | None]:
        """Class-major logits (K, C, B) of inputs ``xa`` (K, B, F + 1), and the hidden units."""
        xt = xa.transpose(0, 2, 1)
        if self.kind == "logistic":
            return np.matmul(v["layer"], xt), None
        hidden = np.tanh(np.matmul(v["hidden"], xt))  # (K, H, B)
        out = v["output"]
        return np.matmul(out[:, :, :-1], hidden) + out[:, :, -1:], hidden

    def logits(self, flat: np.ndarray, x: np.ndarray) -> np.ndarray:
        """Logits (K, B, C) of each client's inputs ``x`` (K, B, F) under its row of ``flat``."""
        return self._forward(self.views(flat), with_ones(x))[0].transpose(0, 2, 1)

    def gradient(self, flat: np.ndarray, xa: np.ndarray, y: np.ndarray, w: np.ndarray) -> np.ndarray:
        """Gradient (K, size) of each client's loss ``sum_b w[k, b] CE(x[k, b], y[k, b])``.

        ``xa`` (K, B, F + 1): the inputs with their constant 1 (:func:`with_ones`); ``y``
        (K, B): the labels; ``w`` (K, B) weighs the examples of a batch (1 / its size; 0
        for padding)."""
        v = self.views(flat)
        out = np.empty((flat.shape[0], self.size))
        grads = self.views(out)
        z, hidden = self._forward(v, xa)
        g = np.exp(z - z.max(axis=1, keepdims=True))
        g /= g.sum(axis=1, keepdims=True)
        g -= y[:, None, :] == self._classes
        g *= w[:, None, :]  # d loss / d logits, (K, C, B)
        if hidden is None:
            np.matmul(g, xa, out=grads["layer"])
            return out
        weights = v["output"][:, :, :-1]
        grads["output"][:, :, :-1] = np.matmul(g, hidden.transpose(0, 2, 1))
        grads["output"][:, :, -1] = g.sum(axis=2)
        back = np.matmul(weights.transpose(0, 2, 1), g)  # (K, H, B)
        back *= 1.0 - hidden * hidden
        grads["hidden"][...] = np.matmul(back, xa)
        return out


def with_ones(x: np.ndarray) -> np.ndarray:
    """``x`` (..., F) with a constant 1 appended to each row (..., F + 1): the bias input."""
    return np.concatenate([x, np.ones((*x.shape[:-1], 1))], axis=-1)


def cross_entropy(logits: np.ndarray, y: np.ndarray) -> np.ndarray:
    """Cross-entropy (natural log) of each row of ``logits`` (..., C) at labels ``y`` (...)."""
    top = logits.max(axis=-1, keepdims=True)
    log_norm = np.log(np.exp(logits - top).sum(axis=-1)) + top[..., 0]
    return log_norm - np.take_along_axis(logits, y[..., None], axis=-1)[..., 0]


@dataclass(frozen=True)
class LocalWork:
    """A cohort's local work: examples used ``n`` (min(samples, max_examples)), batches per
    epoch ``per_epoch`` and SGD ``steps``, one entry per client."""

    n: np.ndarray
    per_epoch: np.ndarray
    steps: np.ndarray


def local_work(samples: np.ndarray, epochs: int, batch_size: int, max_examples: int | None,
               max_steps: int | None) -> LocalWork:
    """The engine's local work (:meth:`fleetsim.config.Workload.local_work`) of devices
    holding ``samples`` examples, as whole numbers of examples, batches and steps."""
    n = np.asarray(samples, dtype=np.int64)
    if max_examples is not None:
        n = np.minimum(n, max_examples)
    per_epoch = -(-n // batch_size)
    steps = epochs * per_epoch
    if max_steps is not None:
        steps = np.minimum(steps, max_steps)
    return LocalWork(n=n, per_epoch=per_epoch, steps=steps)


def _schedule(work: LocalWork, offsets: np.ndarray, rng: np.random.Generator) -> tuple[np.ndarray, np.ndarray]:
    """Each client's epochs as random orders of its examples, laid end to end.

    Returns ``order`` (indices into the cohort's examples) and ``start`` (K): client k's
    epoch e, position i is ``order[start[k] + e * n[k] + i]``. Only the epochs a client
    begins are drawn, so the length is about the examples processed."""
    epochs_used = -(-work.steps // work.per_epoch)
    sizes = epochs_used * work.n
    start = np.concatenate([[0], np.cumsum(sizes)[:-1]])
    segment = np.repeat(np.arange(int(epochs_used.sum())), np.repeat(work.n, epochs_used))
    client = np.repeat(np.arange(work.n.size), sizes)
    # Random keys offset by the segment number sort each epoch's examples among themselves.
    order = np.argsort(segment + rng.random(segment.size))
    first = np.concatenate([[0], np.cumsum(np.repeat(work.n, epochs_used))[:-1]])  # each segment's start
    order = order - first[segment] + offsets[client]
    return order, start


def train_clients(model: Model, theta: np.ndarray, x: np.ndarray, y: np.ndarray, offsets: np.ndarray,
                  work: LocalWork, batch_size: int, learning_rate: float, weight_decay: float,
                  rng: np.random.Generator) -> np.ndarray:
    """Every client's model (K, size) after its local steps from the global ``theta``.

    ``x`` (N, F), ``y`` (N,): the cohort's examples end to end, client k's at
    ``offsets[k]:offsets[k + 1]``. The loop runs over steps, not clients: at step t the
    clients with more than t steps take theirs together (they are a prefix once the clients
    are sorted by steps), their batches' example indices worked out for many steps at once."""
    K = work.n.size
    by_steps = np.argsort(-work.steps, kind="stable")
    n, per_epoch, steps = work.n[by_steps], work.per_epoch[by_steps], work.steps[by_steps]
    order, start = _schedule(LocalWork(n, per_epoch, steps), offsets[by_steps], rng)
    x = with_ones(x)
    params = np.repeat(theta[None, :], K, axis=0)
    total = int(steps.max()) if K else 0
    active = np.searchsorted(-steps, -np.arange(total), side="left")  # clients with more than t steps
    chunk = max(1, _SCHEDULE_ENTRIES // max(1, K * min(batch_size, int(n.max()) if K else 1)))
    for first in range(0, total, chunk):
        pick, weight = _batches(np.arange(first, min(total, first + chunk)), n, per_epoch, steps, start, order,
                                batch_size)
        for i, t in enumerate(range(first, first + pick.shape[0])):
            a = active[t]
            live = params[:a]
            grad = model.gradient(live, x[pick[i, :a]], y[pick[i, :a]], weight[i, :a])
            if weight_decay:
                grad += weight_decay * live
            live -= learning_rate * grad
    out = np.empty_like(params)
    out[by_steps] = params
    return out


_SCHEDULE_ENTRIES = 1 << 20
"""Batch entries (steps x clients x batch size) whose example indices are worked out at once."""


def _batches(t: np.ndarray, n: np.ndarray, per_epoch: np.ndarray, steps: np.ndarray, start: np.ndarray,
             order: np.ndarray, batch_size: int) -> tuple[np.ndarray, np.ndarray]:
    """Example indices (T, K, B) of each client's batch at steps ``t``, and each entry's weight
    in the batch mean (1 / the batch's size; 0 for the padding of a short or finished batch).
    B is ``batch_size``, or the most examples a client holds when that is fewer."""
    lane = np.arange(min(batch_size, int(n.max())))  # a batch never holds more than a client's examples
    tt = t[:, None]
    within = ((tt % per_epoch) * batch_size)[..., None] + lane  # position in the epoch's order
    valid = (within < n[:, None]) & (tt < steps)[..., None]
    pos = (start + (tt // per_epoch) * n)[..., None] + within
    pick = order[np.where(valid, pos, 0)]
    weight = valid / np.maximum(valid.sum(axis=-1, keepdims=True), 1)
    return pick, weight


def fedavg(deltas: np.ndarray, weights: np.ndarray) -> np.ndarray:
    """Federated Averaging's aggregate: the ``weights``-weighted mean of the rows of ``deltas``."""
    w = np.asarray(weights, dtype=np.float64)
    return (w @ deltas) / w.sum()


def clip(deltas: np.ndarray, norm: float) -> np.ndarray:
    """Each row of ``deltas`` scaled down to L2 norm at most ``norm`` (direction kept)."""
    length = np.linalg.norm(deltas, axis=1, keepdims=True)
    return deltas * np.minimum(1.0, norm / np.maximum(length, np.finfo(float).tiny))


def private_aggregate(deltas: np.ndarray, clipping_norm: float, noise_multiplier: float, denominator: float,
                      rng: np.random.Generator) -> np.ndarray:
    """DP-FedAvg's aggregate: ``(sum_k clip(Delta_k) + N(0, (z S)^2 I)) / denominator``."""
    total = clip(deltas, clipping_norm).sum(axis=0)
    if noise_multiplier > 0:
        total = total + rng.normal(0.0, noise_multiplier * clipping_norm, size=total.shape)
    return total / denominator
