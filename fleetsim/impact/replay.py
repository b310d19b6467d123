"""Replay a run's committed rounds on the invented task: what participation costs the model.

:func:`model_impact` trains the synthetic model of :mod:`fleetsim.impact.train` on the data
of :mod:`fleetsim.impact.data`, round by round, with exactly the devices whose reports each
committed round used and the FedAvg weights the run gave them, and measures the global model
on held-out data of every device type, region and data quartile. Data and model are
stand-ins: the figures show how the run's participation would weigh on a model of this kind.
"""

from __future__ import annotations

import zlib
from collections.abc import Callable
from dataclasses import dataclass
from typing import Any

import numpy as np
import pandas as pd

from ..config import Config, ImpactSettings
from ..errors import FleetsimError
from ..fleet import Fleet
from .data import QUARTILES, DeviceData, Task, build_task, data_quartile, held_out
from .train import Model, cross_entropy, fedavg, local_work, private_aggregate, train_clients

__all__ = ["ImpactResult", "model_impact", "IMPACT_CAUTION", "GROUPINGS"]

IMPACT_CAUTION = (
    "These figures come from an invented task and model trained on a simulated fleet's rounds, "
    "not from your model or your users' data: read the gaps between groups, not the accuracies. "
    "Replace them with your own, fit the fleet from real "
    "telemetry and follow your organisation's review before a change touches a live fleet."
)

MAX_TEST_BYTES = 1e9
"""Most memory the held-out examples may take (pairs x test_examples x (features + 1) floats)."""

GROUPINGS = ("overall", "device_type", "region", "data_quartile")
"""The groupings of the curves and the final figures, in their order."""


@dataclass(frozen=True)
class ImpactResult:
    """The replay's outcome (docs/impact.md): ``curves`` (one row per evaluation and group),
    ``final`` (one row per group after the last round), ``summary`` (JSON-ready) and
    ``model`` (the final global parameters, a flat float64 vector)."""

    curves: pd.DataFrame
    final: pd.DataFrame
    summary: dict[str, Any]
    model: np.ndarray


@dataclass(frozen=True)
class Plan:
    """The committed rounds in the order they committed, and the used reports of each:
    round ``i``'s rows are ``bounds[i]:bounds[i + 1]`` of ``device``, ``samples``, ``weight``."""

    round: np.ndarray
    time_s: np.ndarray
    bounds: np.ndarray
    device: np.ndarray
    samples: np.ndarray
    weight: np.ndarray


def replay_plan(participations: pd.DataFrame, rounds: pd.DataFrame, fleet: Fleet) -> Plan:
    """The rounds to replay: status ``committed``, ordered by close (then round number);
    within each, the rows with ``used`` true, by device."""
    if "workload" in participations.columns or "workload" in rounds.columns:
        raise FleetsimError("model impact: the run has several workloads; replay one at a time "
                            "(Result.workloads[name] holds each workload's config and rows)")
    status = rounds["status"].astype(str).to_numpy()
    done = rounds[status == "committed"].sort_values(["closed_s", "round"], kind="stable")
    numbers = done["round"].to_numpy(dtype=np.int64)
    rows = participations[participations["used"].to_numpy(dtype=bool)]
    position = pd.Series(np.arange(numbers.size), index=numbers)
    at = position.reindex(rows["round"].to_numpy()).to_numpy()
    keep = ~np.isnan(at)
    rows, at = rows[keep], at[keep].astype(np.int64)
    device = rows["device"].to_numpy(dtype=np.int64)
    if device.size and (device.min() < 0 or device.max() >= fleet.size):
        bad = int(device[(device < 0) | (device >= fleet.size)][0])
        raise FleetsimError(f"model impact: participations name device {bad} but the fleet has "
                            f"{fleet.size} devices (0 to {fleet.size - 1})")
    order = np.lexsort((device, at))
    samples = rows["samples"].to_numpy(dtype=np.int64) if "samples" in rows else fleet.samples[device]
    return Plan(
        round=numbers, time_s=done["closed_s"].to_numpy(dtype=np.float64),
        bounds=np.searchsorted(at[order], np.arange(numbers.size + 1)),
        device=device[order], samples=np.asarray(samples)[order],
        weight=rows["weight"].to_numpy(dtype=np.float64)[order],
    )


class Evaluator:
    """The global model's accuracy and loss on each group's held-out data.

    Every (type, region) pair with devices has ``test_examples`` examples. A group's figure
    is the mean of its pairs' figures weighted by the group's devices in each pair, i.e. the
    figure of a device of the group drawn at random: ``overall`` over the fleet,
    ``device_type`` and ``region`` by name, ``data_quartile`` Q1 (fewest samples) to Q4."""

    def __init__(self, model: Model, fleet: Fleet, test: tuple[np.ndarray, np.ndarray], pairs: np.ndarray):
        self.model, self.x, self.y = model, test[0], test[1]
        pair = fleet.group
        count = len(fleet.type_names) * len(fleet.region_names)
        quartile = data_quartile(fleet.samples)
        members = [("overall", "overall", np.ones(fleet.size, dtype=bool))]
        members += [("device_type", name, fleet.device_type == i) for i, name in enumerate(fleet.type_names)]
        members += [("region", name, fleet.region == i) for i, name in enumerate(fleet.region_names)]
        members += [("data_quartile", name, quartile == i) for i, name in enumerate(QUARTILES)]
        members = [m for m in members if m[2].any()]
        self.labels = [(grouping, group) for grouping, group, _ in members]
        self.devices = np.array([int(m[2].sum()) for m in members])
        weights = np.array([np.bincount(pair[m[2]], minlength=count)[pairs] for m in members], dtype=np.float64)
        self.weights = weights / weights.sum(axis=1, keepdims=True)
        self.masks = [m[2] for m in members]

    def __call__(self, theta: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
        """Accuracy and mean cross-entropy of ``theta`` in each group (order of ``labels``)."""
        accuracy, loss = np.empty(len(self.x)), np.empty(len(self.x))
        for i, (x, y) in enumerate(zip(self.x, self.y, strict=True)):  # a pair at a time: bounded memory
            logits = self.model.logits(theta[None, :], x[None])[0]
            accuracy[i] = (logits.argmax(axis=-1) == y).mean()
            loss[i] = cross_entropy(logits, y).mean()
        return self.weights @ accuracy, self.weights @ loss

    def reports(self, devices: np.ndarray) -> np.ndarray:
        """Reports trained on from each group's devices, of the used reports ``devices``."""
        return np.array([int(mask[devices].sum()) for mask in self.masks])


def _stream(seed: int, name: str, index: int = 0) -> np.random.Generator:
    return np.random.default_rng(np.random.SeedSequence(entropy=(int(seed), zlib.crc32(name.encode()), index)))


def train_rounds(config: Config, plan: Plan, fleet: Fleet, seed: int, privacy: tuple[float, float] | None,
                 evaluate: Callable[[int, np.ndarray], None],
                 on_progress: Callable[[int, int], None] | None = None, task: Task | None = None) -> np.ndarray:
    """Replay ``plan`` from the starting model; returns the final global parameters.

    ``privacy`` is ``(clipping_norm, noise_multiplier)`` or None (plain FedAvg); a noise
    multiplier of 0 clips without noise. ``evaluate(i, theta)`` is called after round ``i``
    (0-based in commit order) every ``eval_every`` rounds and after the last, and once with
    ``i = -1`` for the starting model. ``task``: the seed's task, when already built."""
    settings = config.impact or ImpactSettings()
    work = config.workload
    model = Model(settings.model, settings.features, settings.classes, settings.hidden)
    if task is None:
        task = build_task(settings, fleet.type_names, fleet.region_names, seed)
    data = DeviceData(task, fleet, seed)
    theta = model.init(_stream(seed, "impact-model"))
    evaluate(-1, theta)
    total = plan.round.size
    for i in range(total):
        rows = slice(plan.bounds[i], plan.bounds[i + 1])
        device, weight = plan.device[rows], plan.weight[rows]
        if device.size:
            local = local_work(plan.samples[rows], work.epochs, work.batch_size, work.max_examples, work.max_steps)
            x, y, offsets = data.cohort(device, local.n)
            with np.errstate(over="ignore", invalid="ignore"):  # a diverging model is refused below
                clients = train_clients(model, theta, x, y, offsets, local, work.batch_size,
                                        settings.learning_rate, settings.weight_decay,
                                        _stream(seed, "impact-train", i))
                deltas = clients - theta
                if privacy is None:
                    step = fedavg(deltas, weight)
                else:
                    step = private_aggregate(deltas, privacy[0], privacy[1], float(config.rounds.target_reports),
                                             _stream(seed, "impact-noise", i))
                theta = theta + settings.server_learning_rate * step
            if not np.isfinite(theta).all():
                raise FleetsimError(
                    f"impact.learning_rate: the model diverged in committed round {int(plan.round[i])}; lower it, "
                    f"impact.server_learning_rate or impact.weight_decay (got {settings.learning_rate:g}, "
                    f"{settings.server_learning_rate:g} and {settings.weight_decay:g})")
        if (i + 1) % settings.eval_every == 0 or i + 1 == total:
            evaluate(i, theta)
        if on_progress is not None:
            on_progress(i + 1, total)
    return theta


def model_impact(config: Config, participations: pd.DataFrame, rounds: pd.DataFrame, fleet: Fleet, seed: int,
                 on_progress: Callable[[int, int], None] | None = None) -> ImpactResult:
    """Train the invented model on the run's committed rounds and measure it by group.

    ``participations``, ``rounds`` and ``fleet`` are a run's (one workload's) tables and
    sampled devices (:class:`fleetsim.Result`), ``seed`` the run's seed, from which the
    task, the devices' data and every draw of the training follow. ``on_progress(done,
    total)`` is called after each committed round."""
    settings = config.impact or ImpactSettings()
    plan = replay_plan(participations, rounds, fleet)
    model = Model(settings.model, settings.features, settings.classes, settings.hidden)
    task = build_task(settings, fleet.type_names, fleet.region_names, seed)
    pairs = np.flatnonzero(np.bincount(fleet.group, minlength=len(fleet.type_names) * len(fleet.region_names)))
    held = pairs.size * settings.test_examples * (settings.features + 1) * 8.0
    if held > MAX_TEST_BYTES:
        raise FleetsimError(f"impact.test_examples: the held-out sets of the fleet's {pairs.size} (type, region) "
                            f"pairs would take {held / 1e9:.1f} GB (at most {MAX_TEST_BYTES / 1e9:g} GB); lower "
                            f"it or impact.features (got {settings.test_examples} and {settings.features})")
    evaluator = Evaluator(model, fleet, held_out(task, seed, pairs, settings.test_examples), pairs)
    points: list[tuple[int, float, int, np.ndarray, np.ndarray]] = []

    def evaluate(i: int, theta: np.ndarray) -> None:
        round_no, time_s = (-1, 0.0) if i < 0 else (int(plan.round[i]), float(plan.time_s[i]))
        points.append((round_no, time_s, i + 1, *evaluator(theta)))

    found = getattr(config.workload, "privacy", None)
    privacy = None if found is None else (float(found.clipping_norm), float(found.noise_multiplier))
    theta = train_rounds(config, plan, fleet, seed, privacy, evaluate, on_progress, task)
    return _result(evaluator, points, plan, theta, settings, privacy is not None)


def _result(evaluator: Evaluator, points: list, plan: Plan, theta: np.ndarray, settings: ImpactSettings,
            private: bool) -> ImpactResult:
    """The curves, final table and summary from the evaluations."""
    groupings = [label[0] for label in evaluator.labels]
    groups = [label[1] for label in evaluator.labels]
    n = len(groups)
    curves = pd.DataFrame({
        "round": np.repeat([p[0] for p in points], n).astype(np.int64),
        "time_s": np.repeat([p[1] for p in points], n),
        "rounds_trained": np.repeat([p[2] for p in points], n).astype(np.int64),
        "grouping": groupings * len(points),
        "group": groups * len(points),
        "accuracy": np.concatenate([p[3] for p in points]),
        "loss": np.concatenate([p[4] for p in points]),
    })
    last = points[-1]
    final = pd.DataFrame({"grouping": groupings, "group": groups, "accuracy": last[3], "loss": last[4],
                          "devices": evaluator.devices, "reports": evaluator.reports(plan.device)})
    return ImpactResult(curves=curves, final=final, summary=_summary(final, plan, settings, private), model=theta)


def _summary(final: pd.DataFrame, plan: Plan, settings: ImpactSettings, private: bool) -> dict[str, Any]:
    """The JSON-ready headline figures of the final table (docs/impact.md)."""
    def by(grouping: str) -> dict[str, float]:
        rows = final[final["grouping"] == grouping]
        return {str(g): float(a) for g, a in zip(rows["group"], rows["accuracy"], strict=True)}

    overall = final[final["grouping"] == "overall"].iloc[0]
    parts = final[final["grouping"] != "overall"]
    worst, best = parts.loc[parts["accuracy"].idxmin()], parts.loc[parts["accuracy"].idxmax()]

    def name(row: pd.Series) -> dict[str, Any]:
        return {"grouping": str(row["grouping"]), "group": str(row["group"]), "accuracy": float(row["accuracy"])}

    return {
        "overall": {"accuracy": float(overall["accuracy"]), "loss": float(overall["loss"])},
        "worst_group": name(worst),
        "best_group": name(best),
        "gap": float(best["accuracy"] - worst["accuracy"]),
        "by_device_type": by("device_type"),
        "by_region": by("region"),
        "by_data_quartile": by("data_quartile"),
        "rounds_trained": int(plan.round.size),
        "reports_trained": int(plan.device.size),
        "model": settings.model,
        "private": private,
        "synthetic": True,
        "caution": IMPACT_CAUTION,
    }
