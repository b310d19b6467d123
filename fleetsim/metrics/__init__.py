"""Rounds, straggler waste, participation bias, the unmasking of secure aggregation and, for a
workload with ``privacy``, each device's privacy loss, computed from a run's record only.

Definitions are in docs/metrics.md; every figure in summary.json and the report comes from
the tables built here (one source of truth). The statistics themselves are pure functions
in :mod:`fleetsim.analysis` and :mod:`fleetsim.survival`.
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field
from typing import TYPE_CHECKING, Any

import numpy as np
import pandas as pd

from ..analysis import (
    chi_square_table,
    correlation,
    daily_table,
    gini,
    lorenz_table,
    mean_working,
    share_at_limit,
    top_share,
    wilson_interval,
)
from ..events import json_key
from ..survival import task_durations, task_survival_tables
from ..units import format_instant
from .bias import BIAS_TABLES, PAIR_KEY, PAIR_TABLE, bias_tables, pair_bias_table, participation_counts
from .load import hourly_table, rounds_open, server_load_part
from .outcomes import outcomes_by_hour, outcomes_by_region, outcomes_part, participation_status
from .privacy import PRIVACY_CAUTION, privacy_account
from .rounds import closed_per_hour, round_frame
from .secure import secure_part, unmasking_by_accepted
from .sharing import GROUPINGS, HEADER_KEYS, competition_table, sharing_part
from .summary import bias_map, clean, pair_map, participations_part, rounds_part, waste_part
from .waste import device_cost, dropout_table, labelled_frame, waste_by_cause, waste_by_device_type, waste_sums

if TYPE_CHECKING:
    from ..record import RunRecord

__all__ = ["Metrics", "compute_metrics", "gini", "wilson_interval", "CAUTION", "BIAS_TABLES"]

CAUTION = (
    "These figures come from a model of a fleet, not from real devices. Fit the fleet from "
    "real telemetry and follow your organisation's review before a change touches real "
    "users' devices, batteries or data plans."
)


@dataclass(frozen=True)
class Metrics:
    """``summary``: JSON-ready figures (summary.json); ``tables``: frames by name (tables/*.csv);
    ``workloads``: with several workloads, each one's own Metrics by name (else empty)."""

    summary: dict[str, Any]
    tables: dict[str, pd.DataFrame]
    workloads: dict[str, Metrics] = field(default_factory=dict)


def _bias_part(bias: dict[str, pd.DataFrame], chi: pd.DataFrame, counts: pd.DataFrame,
               reports_per_device: np.ndarray, pairs: pd.DataFrame) -> dict[str, Any]:
    """``bias`` of summary.json: shares by group, coverage, concentration and chi-square tests."""
    tests = chi.set_index("grouping")
    reports, devices = counts["reports"].to_numpy(), counts["devices"].to_numpy()
    n = reports_per_device.size
    return {
        **{f"by_{key}": bias_map(table, key) for key, table in bias.items()},
        f"by_{PAIR_KEY}": pair_map(pairs),
        "coverage": float((reports_per_device > 0).mean()) if n else float("nan"),
        "gini": gini(reports_per_device),
        "chi_square_device_type": tests.at["device_type", "statistic"],
        "chi_square_device_type_p": tests.at["device_type", "p"],
        "chi_square_region": tests.at["region", "statistic"],
        "chi_square_region_p": tests.at["region", "p"],
        "chi_square_data_quartile": tests.at["data_quartile", "statistic"],
        "chi_square_data_quartile_p": tests.at["data_quartile", "p"],
        "top_tenth_share": top_share(reports, devices, 0.1),
    }


def compute_metrics(record: RunRecord) -> Metrics:
    """Every table and the summary of one run, from its record (no I/O).

    With several workloads each has the figures of a run of its own (its rows of the record),
    under ``workloads`` of the summary and in :attr:`Metrics.workloads`; the run's own tables
    and its ``sharing`` block say how they shared the desk and the devices (:mod:`.sharing`)."""
    jobs = record.config.jobs
    if len(jobs) == 1:
        return _one_workload(record)
    each = {job.name: _one_workload(record.for_workload(job.name)) for job in jobs}
    tables = {f"competition_by_{grouping}": competition_table(record, grouping) for grouping in GROUPINGS}
    first = next(iter(each.values())).summary
    summary = {
        **{key: first[key] for key in HEADER_KEYS},
        "config_hash": record.config_hash,
        "policy": record.policy,
        "sharing": sharing_part(record, tables),
        "workloads": {name: {key: value for key, value in m.summary.items() if key not in (*HEADER_KEYS, "caution")}
                      for name, m in each.items()},
        "caution": _caution(any("privacy" in m.summary for m in each.values())),
    }
    return Metrics(summary=clean(summary), tables=tables, workloads=each)


def _caution(privacy: bool) -> str:
    """The standing caution, with the privacy figures' own when a workload accounts privacy."""
    return f"{CAUTION} {PRIVACY_CAUTION}" if privacy else CAUTION


def _round_extra(config: Any, rounds: pd.DataFrame, closed: pd.DataFrame, hourly: pd.DataFrame,
                 horizon_s: float) -> dict[str, Any]:
    """The ``rounds`` figures besides counts and durations: the protocol that ran, how far
    rounds overlapped, selections at the timeout, and how closely commits follow supply."""
    selection = rounds.loc[rounds["status"] != "selection-timeout", "selection_s"].to_numpy(dtype=float)
    open_peak, open_mean = rounds_open(rounds, horizon_s)
    return {
        "configure": config.rounds.configure,
        "secure_aggregation": config.rounds.secure_aggregation is not None,
        "pacing": config.rounds.pacing is not None,
        "in_flight": config.rounds.in_flight,
        "open_peak": open_peak,
        "open_mean": open_mean,
        "selection_at_timeout": share_at_limit(selection, float(config.rounds.selection_timeout)),
        "eligible_correlation": correlation(closed["committed"], hourly["eligible"].to_numpy()),
    }


def _one_workload(record: RunRecord) -> Metrics:
    """Every table and the summary of a run of one workload."""
    config, fleet, parts, census = record.config, record.fleet, record.participations, record.census
    start, horizon_s = config.horizon.start, float(config.horizon.duration)
    hours = horizon_s / 3600.0
    n_hours = int(math.ceil(hours))
    type_names, region_names = list(fleet.type_names), list(fleet.region_names)
    secure = config.rounds.secure_aggregation
    rounds = round_frame(record.rounds, start, secure)

    labelled = labelled_frame(parts)
    wasted = labelled[~labelled["used"]]
    by_cause = waste_by_cause(wasted)
    by_type = waste_by_device_type(labelled, wasted, type_names)

    used = parts["used"].to_numpy()
    reports_per_device = np.bincount(parts["device"].to_numpy()[used], minlength=fleet.size)
    bias = bias_tables(fleet, parts, census, reports_per_device)
    pairs = pair_bias_table(fleet, parts, census, reports_per_device)
    status = participation_status(parts, rounds)
    zones = {name: region.timezone for name, region in config.fleet.regions.items()}
    by_region_outcomes = outcomes_by_region(labelled, status, region_names)
    by_hour_outcomes = outcomes_by_hour(labelled, status, rounds, start, zones)
    counts = participation_counts(reports_per_device)
    chi = chi_square_table(bias)

    closed = closed_per_hour(rounds, n_hours)
    hourly, by_region, peak = hourly_table(start, horizon_s, closed, record, rounds, region_names)
    survival, survival_minutes = task_survival_tables(parts, type_names)
    privacy = privacy_account(config, parts, record.rounds, fleet)
    privacy_tables = privacy.tables() if privacy is not None else {}

    tables = {
        "rounds": rounds,
        "waste_by_cause": by_cause,
        "waste_by_device_type": by_type,
        **{BIAS_TABLES[key]: table for key, table in bias.items()},
        PAIR_TABLE: pairs,
        "outcomes_by_region": by_region_outcomes,
        "outcomes_by_hour": by_hour_outcomes,
        "participation_counts": counts,
        "dropouts": dropout_table(labelled[labelled["outcome"] == "dropout"]),
        "device_cost": device_cost(labelled),
        "hourly": hourly,
        "hourly_eligible_by_region": by_region,
        "daily": daily_table(hourly, [json_key(status) for status in closed]),
        "chi_square": chi,
        "lorenz": lorenz_table(counts),
        "task_survival": survival,
        "task_survival_by_minute": survival_minutes,
        "unmasking_by_accepted": unmasking_by_accepted(rounds, secure),
        **privacy_tables,
    }
    round_extra = _round_extra(config, rounds, closed, hourly, horizon_s)
    summary = {
        "scenario": config.scenario,
        "fleet_file": record.source,
        "seed": record.seed,
        "config_hash": record.config_hash,
        "policy": record.policy,
        "devices": fleet.size,
        "horizon_start": format_instant(start),
        "simulated_hours": hours,
        "replay": record.replay,
        "rounds": rounds_part(rounds, hours, round_extra),
        "participations": participations_part(labelled, used, task_durations(parts)[0]),
        "waste": waste_part(waste_sums(labelled), waste_sums(wasted), by_cause, by_type),
        "outcomes": outcomes_part(by_region_outcomes, by_hour_outcomes),
        "bias": _bias_part(bias, chi, counts, reports_per_device, pairs),
        "secure_aggregation": secure_part(rounds, secure, config.rounds.accept_count, config.workload),
        "load": {
            "peak_working": int(peak),
            "mean_working": mean_working(parts["started_s"].to_numpy(), parts["ended_s"].to_numpy(), horizon_s),
            "checkins_per_s_peak_hour": float(hourly["checkins_per_s"].max()) if n_hours else None,
        },
        "server_load": server_load_part(record, hourly, rounds, horizon_s),
        **({"privacy": privacy.summary(privacy_tables)} if privacy is not None else {}),
        "caution": _caution(privacy is not None),
    }
    return Metrics(summary=clean(summary), tables=tables)
