"""Gathering a study's runs: reuse the saved ones, execute the rest, save each as it ends."""

from __future__ import annotations

from collections.abc import Callable, Sequence
from typing import Any

from ..config import config_hash
from .executors import Executor, Job
from .store import RunStore, engine_fingerprint

__all__ = ["gather", "Progress"]

Progress = Callable[[int, int], None]
"""Called with (runs finished, runs in the study) at the start and after each run."""


def gather(
    jobs: Sequence[Job],
    executor: Executor,
    store: RunStore | None = None,
    progress: Progress | None = None,
    check: Callable[[dict[str, Any]], None] | None = None,
) -> tuple[dict[str, dict[str, Any]], int]:
    """Every job's summary by job key, and how many were reused from the store.

    Only the jobs the store does not hold are run.

    Jobs with the same key run once. ``check`` is called with the first summary available
    (saved or new) and may raise to stop the study early (e.g. an objective naming no metric);
    runs finished by then stay saved. Raises whatever the executor or ``check`` raises.
    """
    unique: dict[str, Job] = {}
    for job in jobs:
        unique.setdefault(job.key, job)
    total = len(unique)
    summaries: dict[str, dict[str, Any]] = {}
    pending: list[Job] = []
    for key, job in unique.items():
        record = store.load(key) if store is not None else None
        if record is not None:
            summaries[key] = record["summary"]
        else:
            pending.append(job)
    checked = False
    if check is not None and summaries:
        check(next(iter(summaries.values())))
        checked = True
    if progress is not None:
        progress(len(summaries), total)

    def done(job: Job, payload: dict[str, Any]) -> None:
        nonlocal checked
        summary = payload["summary"]
        if store is not None:
            store.save(job.key, {
                "label": job.label,
                "seed": job.seed,
                "config_hash": config_hash(job.config),
                "engine": engine_fingerprint(),
                "elapsed_s": payload.get("elapsed_s"),
                "summary": summary,
            })
        summaries[job.key] = summary
        if check is not None and not checked:
            checked = True
            check(summary)
        if progress is not None:
            progress(len(summaries), total)

    reused = total - len(pending)
    executor.run(pending, done)
    return summaries, reused
