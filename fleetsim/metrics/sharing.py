"""Several workloads on one fleet: how they shared the server's desk and the devices.

Each workload's own figures are those of a run of that workload alone (its rows of the run
record, :meth:`fleetsim.record.RunRecord.for_workload`); what is added here is what only the
run as a whole can tell: the part of the horizon each workload's selections held the desk,
and, per device type and per region, which workload took the group's participations and
reports (where the workloads compete for the same devices).
"""

from __future__ import annotations

from typing import TYPE_CHECKING, Any

import numpy as np
import pandas as pd

from .summary import clean

if TYPE_CHECKING:
    from ..record import RunRecord

__all__ = ["HEADER_KEYS", "competition_table", "sharing_part"]

HEADER_KEYS = ("scenario", "fleet_file", "seed", "config_hash", "policy", "devices", "horizon_start",
               "simulated_hours", "replay")
"""Keys of summary.json that describe the run rather than one workload (kept once at the top)."""

GROUPINGS = ("device_type", "region")


def competition_table(record: RunRecord, grouping: str) -> pd.DataFrame:
    """One row per group of ``grouping`` and workload: ``devices`` (the group's), ``fleet_share``,
    ``accepted`` and ``reports`` (the workload's, from the group), ``accepted_share`` and
    ``report_share_of_group`` (the workload's part of the group's accepted devices and used
    reports, over every workload) and ``report_share`` (the group's part of the workload's
    used reports: compare it with ``fleet_share``)."""
    fleet, parts = record.fleet, record.participations
    names = [job.name for job in record.config.jobs]
    labels = list(fleet.type_names if grouping == "device_type" else fleet.region_names)
    codes = fleet.device_type if grouping == "device_type" else fleet.region
    devices = np.bincount(codes, minlength=len(labels))
    group = parts[grouping].cat.codes.to_numpy()
    work = parts["workload"].cat.codes.to_numpy()
    used = parts["used"].to_numpy(dtype=bool)
    shape = (len(labels), len(names))
    accepted = np.zeros(shape)
    reports = np.zeros(shape)
    np.add.at(accepted, (group, work), 1.0)
    np.add.at(reports, (group[used], work[used]), 1.0)
    with np.errstate(invalid="ignore", divide="ignore"):
        accepted_share = accepted / accepted.sum(axis=1, keepdims=True)
        of_group = reports / reports.sum(axis=1, keepdims=True)
        of_workload = reports / reports.sum(axis=0, keepdims=True)
    rows = []
    for g, label in enumerate(labels):
        for w, name in enumerate(names):
            rows.append({
                grouping: label, "workload": name, "devices": int(devices[g]),
                "fleet_share": devices[g] / max(fleet.size, 1),
                "accepted": int(accepted[g, w]), "reports": int(reports[g, w]),
                "accepted_share": accepted_share[g, w], "report_share_of_group": of_group[g, w],
                "report_share": of_workload[g, w],
            })
    return pd.DataFrame(rows)


def sharing_part(record: RunRecord, tables: dict[str, pd.DataFrame]) -> dict[str, Any]:
    """``sharing`` of summary.json: the rule, each workload's share (under ``shares``) and its
    part of the horizon at the desk, devices that reported for more than one workload, and
    by device type and region each workload's part of the group's accepted devices."""
    config, rounds, parts = record.config, record.rounds, record.participations
    jobs = config.jobs
    rule = config.sharing.rule if config.sharing is not None else "priority"
    horizon_s = float(config.horizon.duration)
    selection = (rounds["selected_s"] - rounds["opened_s"]).to_numpy(dtype=float)
    desk = {job.name: float(selection[(rounds["workload"] == job.name).to_numpy()].sum()) / horizon_s
            for job in jobs}
    total_share = sum(job.share for job in jobs)
    used = parts[parts["used"].to_numpy(dtype=bool)]
    per_device = used.groupby("device", observed=True)["workload"].nunique()
    by = {}
    for grouping in GROUPINGS:
        table = tables[f"competition_by_{grouping}"]
        by[f"by_{grouping}"] = {
            label: dict(zip(group["workload"], group["accepted_share"], strict=True))
            for label, group in table.groupby(grouping, sort=False)
        }
    return clean({
        "rule": rule,
        "workloads": [job.name for job in jobs],
        "shares": {job.name: job.share / total_share for job in jobs} if rule == "shares" else None,
        "desk_share": desk,
        "reporting_devices": int(per_device.size),
        "reported_for_several": float((per_device > 1).mean()) if per_device.size else float("nan"),
        **by,
    })
