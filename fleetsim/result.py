"""The public outcome of :func:`fleetsim.simulate`: the run record plus figures on demand.

:class:`Result` holds the engine's :class:`fleetsim.record.RunRecord` and computes the
summary and derived tables (:func:`fleetsim.metrics.compute_metrics`) the first time they
are asked for, then keeps them.
"""

from __future__ import annotations

from typing import TYPE_CHECKING, Any, Generic, TypeVar

from .brief import summary_html
from .config import Config
from .metrics import Metrics, compute_metrics
from .record import RunRecord

if TYPE_CHECKING:  # annotations only
    import pandas as pd

    from .fleet import Fleet

__all__ = ["Result"]

_T = TypeVar("_T")


class _Field(Generic[_T]):
    """A field of the run record, read and set through the Result that holds it."""

    def __set_name__(self, owner: type, name: str) -> None:
        self.name = name

    def __get__(self, result: Result, owner: type | None = None) -> _T:
        value: _T = getattr(result.record, self.name)
        return value

    def __set__(self, result: Result, value: _T) -> None:
        setattr(result.record, self.name, value)


class Result:
    """One simulation's outcome: the event log, the fleet and the derived tables.

    ``participations``: one row per accepted device (see docs/metrics.md for columns; device
    type, region, outcome, cause, phase and waste cause are labels, pandas Categorical);
    ``rounds``: one row per round (``status`` a label); ``census``: eligible devices estimated
    every 15 minutes by device type and region, with standard errors; ``fleet``: the sampled
    devices; ``record``: all of these as the engine produced them. ``summary`` and ``tables``
    come from :mod:`fleetsim.metrics` on first use and are kept: a field changed after that
    first use (e.g. ``source``, the fleet file the summary names) is not reflected in them.
    """

    def __init__(self, record: RunRecord, metrics: Metrics | None = None):
        self.record = record
        self._metrics = metrics

    # The record's fields, read and written through (one copy of each table).
    config: _Field[Config] = _Field()
    seed: _Field[int] = _Field()
    fleet: _Field[Fleet] = _Field()
    participations: _Field[pd.DataFrame] = _Field()
    rounds: _Field[pd.DataFrame] = _Field()
    census: _Field[pd.DataFrame] = _Field()
    policy: _Field[str] = _Field()
    source: _Field[str | None] = _Field()  # the fleet file, when the config came from one (set by the caller)

    @property
    def config_hash(self) -> str:
        return self.record.config_hash

    @property
    def horizon_s(self) -> float:
        return self.record.horizon_s

    def _computed(self) -> Metrics:
        if self._metrics is None:
            self._metrics = compute_metrics(self.record)
        return self._metrics

    @property
    def summary(self) -> dict[str, Any]:
        """The run's headline figures as plain JSON-ready values (see docs/metrics.md)."""
        return self._computed().summary

    @property
    def tables(self) -> dict[str, pd.DataFrame]:
        """Derived tables by name (rounds, waste, bias, hourly, participation counts)."""
        return self._computed().tables

    @property
    def workloads(self) -> dict[str, Result]:
        """Each workload's own Result by name: with several workloads, its rows of the record
        and its figures; a run of one workload holds only itself (under its name)."""
        metrics = self._computed()
        if not metrics.workloads:
            return {self.config.jobs[0].name: self}
        return {name: Result(self.record.for_workload(name), part) for name, part in metrics.workloads.items()}

    def _repr_html_(self) -> str:
        return summary_html(self.summary)

    def __repr__(self) -> str:
        s = self.summary
        parts = s["workloads"] if "workloads" in s else {"": s}
        committed = ", ".join(f"{name + ' ' if name else ''}{p['rounds']['committed']}/{p['rounds']['attempted']}"
                              for name, p in parts.items())
        return (
            f"<Result seed={self.seed} devices={s['devices']} hours={s['simulated_hours']:g} "
            f"rounds committed={committed}>"
        )
