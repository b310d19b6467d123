"""Where a study's runs execute: this process, local worker processes, or a Dask cluster.

Each run is the public ``simulate(config, seed)`` called by :func:`run_one` in a worker,
which returns the run's JSON-ready summary. Results depend only on the configuration and
the seed, so every executor gives the same records, whatever the order they finish in.

- :class:`InProcess`: one run after another here (``--workers 1``); plug-in policies need
  only be importable by this process.
- :class:`LocalProcesses`: a ``concurrent.futures.ProcessPoolExecutor`` with ``workers``
  processes started with the ``spawn`` method (no inherited threads or state; each worker
  imports fleetsim and the plug-ins afresh, with this process's ``sys.path``). A worker
  ends itself when this process dies, however it dies (even SIGKILL): on Linux the kernel
  sends it SIGKILL (``prctl(PR_SET_PDEATHSIG)``), and everywhere a watch thread ends it
  within about half a second of its parent process id changing.
- :class:`DaskCluster`: a Dask ``distributed`` scheduler at ``address`` (``--cluster``);
  its workers need fleetsim, and any plug-in policy, installed.

:func:`fleetsim.study.runs.gather` runs a list of :class:`Job` on any of them, saving each
result as it completes; on Ctrl-C the local executors end their own workers.
"""

from __future__ import annotations

import ctypes
import multiprocessing
import os
import signal
import sys
import threading
import time
from collections.abc import Callable, Sequence
from concurrent.futures import FIRST_COMPLETED, ProcessPoolExecutor, wait
from concurrent.futures.process import BrokenProcessPool
from dataclasses import dataclass
from typing import TYPE_CHECKING, Any, Protocol

from ..config import Config
from ..errors import ConfigError, FleetsimError

if TYPE_CHECKING:
    from ..result import Result

__all__ = [
    "Job",
    "Executor",
    "InProcess",
    "LocalProcesses",
    "DaskCluster",
    "make_executor",
    "run_one",
    "RunFailed",
]


@dataclass(frozen=True)
class Job:
    """One run: a key (see :func:`fleetsim.study.store.run_key`), a configuration and a seed."""

    key: str
    config: Config
    seed: int
    label: str


class RunFailed(FleetsimError):
    """A run raised FleetsimError inside ``simulate``; the message names the run."""


def run_one(config: Config, seed: int) -> dict[str, Any]:
    """Simulate ``config`` under ``seed`` and return ``{"summary": ..., "elapsed_s": ...}``.

    A FleetsimError is returned as ``{"problems": [...]}`` (exceptions with their own
    constructor arguments do not always survive the trip back from a worker); any other
    exception propagates, and the executors re-raise it as a RuntimeError naming the run.
    """
    from ..engine import simulate

    started = time.perf_counter()
    try:
        summary = with_impact(simulate(config, seed=seed))
    except FleetsimError as exc:
        lines = exc.problems if isinstance(exc, ConfigError) else str(exc).splitlines()
        return {"problems": lines or [type(exc).__name__]}
    return {"summary": summary, "elapsed_s": time.perf_counter() - started}


def with_impact(result: Result) -> dict[str, Any]:
    """The run's summary; when its settings have an ``impact`` section, with the model its
    committed rounds train (:func:`fleetsim.impact.model_impact`) under ``impact`` (each
    workload's under ``workloads.NAME.impact``), so that a study can rank and bound on it.
    The final parameters and the caution text are left out of the study's copy."""
    summary = result.summary
    if result.config.impact is None:
        return summary
    from ..impact import model_impact

    def figures(part: Result) -> dict[str, Any]:
        done = model_impact(part.config, part.participations, part.rounds, part.fleet, part.seed).summary
        return {key: value for key, value in done.items() if key not in ("model", "caution")}

    if "workloads" not in summary:
        return {**summary, "impact": figures(result)}
    parts = result.workloads
    workloads = {name: {**figures_of, "impact": figures(parts[name])}
                 for name, figures_of in summary["workloads"].items()}
    return {**summary, "workloads": workloads}


Done = Callable[[Job, dict[str, Any]], None]


class Executor(Protocol):
    """Runs jobs and calls ``done(job, payload)`` in this process as each finishes."""

    description: str

    def run(self, jobs: Sequence[Job], done: Done) -> None: ...


def _crashed(job: Job, exc: BaseException) -> RuntimeError:
    """An unexpected exception from ``simulate`` (a bug, not bad input), naming the run."""
    return RuntimeError(f"run {job.label}, seed {job.seed} failed inside simulate: {type(exc).__name__}: {exc}")


def _payload_or_raise(job: Job, payload: dict[str, Any]) -> dict[str, Any]:
    if "problems" in payload:
        raise RunFailed("\n".join(f"run {job.label}, seed {job.seed}: {line}" for line in payload["problems"]))
    return payload


class InProcess:
    """Run every job here, one after another."""

    description = "this process"

    def run(self, jobs: Sequence[Job], done: Done) -> None:
        for job in jobs:
            try:
                payload = run_one(job.config, job.seed)
            except Exception as exc:
                raise _crashed(job, exc) from exc
            done(job, _payload_or_raise(job, payload))


class LocalProcesses:
    """Run jobs on ``workers`` local processes (spawned). Raises ValueError for workers < 1."""

    def __init__(self, workers: int = 2):
        if workers < 1:
            raise ValueError(f"workers(={workers}) must be >= 1")
        self.workers = workers
        self.description = f"{workers} local processes"

    def run(self, jobs: Sequence[Job], done: Done) -> None:
        if not jobs:
            return
        context = multiprocessing.get_context("spawn")
        pool = ProcessPoolExecutor(
            max_workers=min(self.workers, len(jobs)), mp_context=context, initializer=_start_worker,
            initargs=(os.getpid(),),
        )
        finished = False
        try:
            pending = {pool.submit(run_one, job.config, job.seed): job for job in jobs}
            while pending:
                ready, _ = wait(pending, return_when=FIRST_COMPLETED)
                for future in ready:
                    job = pending.pop(future)
                    try:
                        payload = future.result()
                    except BrokenProcessPool:
                        raise FleetsimError(
                            f"a worker process died while running {job.label}, seed {job.seed} "
                            "(out of memory or killed?); rerun to resume"
                        ) from None
                    except Exception as exc:
                        raise _crashed(job, exc) from exc
                    done(job, _payload_or_raise(job, payload))
            finished = True
        finally:
            if not finished:
                _stop_pool(pool)
            pool.shutdown(wait=finished, cancel_futures=True)


def _ignore_interrupts() -> None:
    """In a worker: leave Ctrl-C to the study process, which ends its workers itself."""
    signal.signal(signal.SIGINT, signal.SIG_IGN)


def _start_worker(parent: int) -> None:
    """Initializer of a worker started by the process ``parent``: ignore Ctrl-C, die with the parent."""
    _ignore_interrupts()
    die_with_parent(parent)


PARENT_POLL_S = 0.5
"""How often (seconds) a worker's watch thread checks that its parent process still lives."""


def die_with_parent(parent: int, use_prctl: bool = True) -> None:
    """End this process as soon as the process ``parent`` (its parent when called) is gone.

    On Linux (``use_prctl``) the kernel is asked to send SIGKILL when the parent dies
    (``prctl(PR_SET_PDEATHSIG)``, through ctypes); in addition, and on every system, a daemon
    thread checks every :data:`PARENT_POLL_S` seconds whether ``os.getppid()`` is still
    ``parent`` (an orphan is handed to another process) and calls ``os._exit(1)`` if not.
    The kernel ties the signal to the parent *thread* that started the worker: LocalProcesses
    starts its workers from the thread running the study, which outlives the pool.
    """
    if use_prctl and sys.platform.startswith("linux"):
        try:
            pr_set_pdeathsig = 1  # from <linux/prctl.h>
            ctypes.CDLL(None, use_errno=True).prctl(
                ctypes.c_int(pr_set_pdeathsig), ctypes.c_ulong(signal.SIGKILL),
                ctypes.c_ulong(0), ctypes.c_ulong(0), ctypes.c_ulong(0),
            )
        except (OSError, AttributeError):
            pass  # the watch thread below still ends the worker
    if os.getppid() != parent:  # the parent died before the request took effect
        os._exit(1)
    threading.Thread(target=_watch_parent, args=(parent,), name="fleetsim-parent-watch", daemon=True).start()


def _watch_parent(parent: int) -> None:
    while True:
        time.sleep(PARENT_POLL_S)
        if os.getppid() != parent:
            os._exit(1)  # no cleanup: the parent saves finished runs itself, runs in flight are lost anyway


def _stop_pool(pool: ProcessPoolExecutor) -> None:
    """End this pool's own worker processes (runs in flight are lost; finished ones are saved)."""
    for process in list(getattr(pool, "_processes", {}).values()):
        if process.is_alive():
            process.terminate()


class DaskCluster:
    """Run jobs on a Dask distributed cluster at ``address`` (e.g. ``tcp://10.0.0.5:8786``).

    Raises FleetsimError when dask.distributed is not installed or the scheduler cannot be
    reached within ``timeout_s``.
    """

    def __init__(self, address: str, timeout_s: float = 20.0):
        self.address = address
        self.timeout_s = timeout_s
        self.description = f"the Dask cluster at {address}"

    def _client(self) -> Any:
        try:
            from distributed import Client
        except ImportError:
            raise FleetsimError(
                "--cluster needs dask.distributed; install it with pip install 'fleetsim[cluster]'"
            ) from None
        try:
            return Client(self.address, timeout=f"{self.timeout_s}s", set_as_default=False)
        except (OSError, TimeoutError, ValueError) as exc:
            raise FleetsimError(
                f"--cluster {self.address}: cannot reach the Dask scheduler ({type(exc).__name__}: {exc})"
            ) from None

    def run(self, jobs: Sequence[Job], done: Done) -> None:
        if not jobs:
            return
        from distributed import as_completed

        client = self._client()
        futures: list[Any] = []
        try:
            with client.as_current():
                futures = [
                    client.submit(run_one, job.config, job.seed, key=f"fleetsim-run-{job.key}", pure=False)
                    for job in jobs
                ]
                by_key = {f.key: job for f, job in zip(futures, jobs, strict=True)}
                for future in as_completed(futures):
                    job = by_key[future.key]
                    try:
                        payload = future.result()
                    except Exception as exc:
                        raise _crashed(job, exc) from exc
                    future.release()
                    done(job, _payload_or_raise(job, payload))
        finally:
            try:
                unfinished = [f for f in futures if not f.done()]
                if unfinished:
                    client.cancel(unfinished)
            finally:
                client.close()


def make_executor(workers: int = 2, cluster: str | None = None) -> Executor:
    """The executor for ``--workers`` / ``--cluster``: Dask if an address is given, else local.

    Raises ConfigError for workers < 1.
    """
    if cluster:
        return DaskCluster(cluster)
    if workers < 1:
        raise ConfigError([f"--workers {workers}: expected at least 1"])
    return InProcess() if workers == 1 else LocalProcesses(workers)

