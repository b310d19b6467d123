"""Secure aggregation: how the unmasking held against its threshold (docs/metrics.md).

A round reaches the unmasking when it has enough reports on time and no outage cuts it: its
status is then ``committed`` or ``unmasking-failed``. Each such round needed t answers
(``unmask_needed``: ceil(threshold x the round's accepted count)) and got ``unmask_responses``;
its margin is answers - t (negative: the unmasking failed).
"""

from __future__ import annotations

from typing import TYPE_CHECKING, Any

import numpy as np
import pandas as pd

from ..analysis import quantiles
from ..config.protocol import SecureAggregation

if TYPE_CHECKING:
    from ..config.models import Workload

__all__ = ["REACHED", "unmasking_by_accepted", "secure_part", "masked_upload_bytes"]

REACHED = ("committed", "unmasking-failed")
"""Round statuses of the rounds that reached the unmasking."""

UNMASKING_COLUMNS = ("accepted", "needed", "rounds", "failed", "failed_share", "reports_mean", "responses_mean",
                     "responses_p10", "margin_mean", "margin_min")


def _reached(rounds: pd.DataFrame) -> pd.DataFrame:
    """The rounds that reached the unmasking, with ``margin`` (answers - t) and ``lost``
    (on-time reporters that did not answer)."""
    reached = rounds[rounds["status"].isin(REACHED).to_numpy()]
    return reached.assign(margin=reached["unmask_responses"] - reached["unmask_needed"],
                          lost=reached["reports"] - reached["unmask_responses"],
                          failed=(reached["status"] == "unmasking-failed").to_numpy())


def _p10(values: pd.Series) -> float:
    return float(np.quantile(values.to_numpy(dtype=float), 0.1)) if len(values) else float("nan")


def unmasking_by_accepted(rounds: pd.DataFrame, secure: SecureAggregation | None) -> pd.DataFrame:
    """``unmasking_by_accepted``: the rounds that reached the unmasking, by the devices they
    accepted (ascending): t, rounds, failures and their share, mean reports, answers (mean and
    p10) and margin (mean and least); no rows when secure aggregation (``secure``) was off.
    ``rounds`` is :func:`fleetsim.metrics.rounds.round_frame`'s."""
    reached = _reached(rounds)
    if secure is None or not len(reached):
        return pd.DataFrame({c: pd.Series(dtype=float) for c in UNMASKING_COLUMNS})
    table = (
        reached.groupby("accepted")
        .agg(needed=("unmask_needed", "first"), rounds=("round", "size"), failed=("failed", "sum"),
             reports_mean=("reports", "mean"), responses_mean=("unmask_responses", "mean"),
             responses_p10=("unmask_responses", _p10), margin_mean=("margin", "mean"),
             margin_min=("margin", "min"))
        .reset_index()
    )
    table["failed"] = table["failed"].astype(np.int64)
    table.insert(4, "failed_share", table["failed"] / table["rounds"])
    return table[list(UNMASKING_COLUMNS)]


def _mean(values: pd.Series) -> float:
    return float(values.mean()) if len(values) else float("nan")


def masked_upload_bytes(workload: Workload, accepted: int) -> float:
    """Bytes of one masked update in a round of ``accepted`` devices: every weight (the masked
    update is dense) at the encoding's bits plus ceil(log2 accepted), so that the sum cannot wrap."""
    bits = workload.update_encoding.bits_per_weight
    return workload.update_encoding.weights(workload.model_size) * SecureAggregation.masked_bits(bits, accepted) / 8.0


def secure_part(rounds: pd.DataFrame, secure: SecureAggregation | None, accept_count: int,
                workload: Workload | None = None) -> dict[str, Any] | None:
    """``secure_aggregation`` of summary.json (None when it was off); ``accept_count``: the
    devices a full round accepts, for t and the masked upload of a full round (``workload``:
    the run's, for that upload; without it the figure is NaN)."""
    if secure is None:
        return None
    reached = _reached(rounds)
    failed = int(reached["failed"].sum())
    return {
        "threshold": secure.threshold,
        "needed": secure.needed(accept_count),
        "masked_upload_bytes": masked_upload_bytes(workload, accept_count) if workload is not None else float("nan"),
        "reached_unmasking": int(len(reached)),
        "failed": failed,
        "failed_share": failed / len(reached) if len(reached) else float("nan"),
        "responses_mean": _mean(reached["unmask_responses"]),
        "responses_p10": _p10(reached["unmask_responses"]),
        "margin_mean": _mean(reached["margin"]),
        "margin_p10": _p10(reached["margin"]),
        "reporters_lost_mean": _mean(reached["lost"]),
        "unmasking_s": quantiles(reached["unmasking_s"]),
    }
