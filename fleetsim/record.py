"""The engine's raw outcome of one run, before any table is derived from it.

:class:`RunRecord` is what :func:`fleetsim.engine.simulate` builds and what
:func:`fleetsim.metrics.compute_metrics` reads; :class:`fleetsim.result.Result` wraps it.
It sits low in the layers so that metrics and the engine can both name it without
importing each other.
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import TYPE_CHECKING, Any

from .config import Config, config_hash

if TYPE_CHECKING:  # annotations only: keeps this module free of the dataframe import at run time
    import pandas as pd

__all__ = ["RunRecord"]


@dataclass
class RunRecord:
    """One run's config, seed, sampled fleet and event tables.

    ``participations``: one row per accepted device (see docs/metrics.md for columns; device
    type, region, outcome, cause, phase and waste cause are labels, pandas Categorical);
    ``rounds``: one row per round (``status`` a label); ``census``: eligible devices estimated
    every 15 minutes by device type and region, with standard errors; ``fleet``: the sampled
    devices; ``policy``: the selection policy's name; ``source``: the fleet file the config
    came from, if any (the caller that read the file sets it; the engine does no file I/O).
    """

    config: Config
    seed: int
    fleet: Any  # a fleetsim.fleet.Fleet; not imported, as the fleet module sits above this one
    participations: pd.DataFrame
    rounds: pd.DataFrame
    census: pd.DataFrame
    policy: str
    source: str | None = None
    policies: dict[str, str] | None = None  # each workload's policy, by workload name
    replay: dict[str, Any] | None = None  # with replayed logs: their devices and span (summary.json `replay`)

    def for_workload(self, name: str) -> RunRecord:
        """The record of one workload of several: its Config (:attr:`fleetsim.config.Config.jobs`)
        and its rows of each table, without the ``workload`` column. A run of one workload
        is its own record."""
        jobs = {job.name: job for job in self.config.jobs}
        if name not in jobs:
            raise KeyError(f"no workload {name!r}; the run has {', '.join(jobs)}")
        if "workload" not in self.rounds.columns:
            return self

        def rows(frame: pd.DataFrame) -> pd.DataFrame:
            mine = frame[frame["workload"].to_numpy() == name]
            return mine.drop(columns="workload").reset_index(drop=True)

        return RunRecord(
            config=jobs[name].config, seed=self.seed, fleet=self.fleet,
            participations=rows(self.participations), rounds=rows(self.rounds), census=rows(self.census),
            policy=(self.policies or {}).get(name, self.policy), source=self.source, replay=self.replay,
        )

    @property
    def config_hash(self) -> str:
        """The config's content hash (see :func:`fleetsim.config.config_hash`)."""
        return config_hash(self.config)

    @property
    def horizon_s(self) -> float:
        """The reported horizon, s."""
        return float(self.config.horizon.duration)
