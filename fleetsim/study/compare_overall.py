"""The one line a comparison ends with, per condition: better, worse, mixed, no change that
matters, or no decision, with the primary metrics that decided it.

The rule (on the primary metrics' verdicts, which Holm's method already adjusted):

- ``mixed``: at least one primary metric is better and at least one is worse;
- ``better``: at least one is better and none is worse;
- ``worse``: at least one is worse and none is better;
- ``no-change-that-matters``: every primary metric is inside its margin by the TOST (or has one
  value on every seed in both arms);
- ``no-decision``: anything else (these seeds show neither a change nor equivalence).

A false ``better`` or ``worse`` needs a false claim of change on some primary metric, which
Holm's method keeps below alpha; a false ``no-change-that-matters`` needs a false claim of
equivalence, kept below alpha the same way.
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field
from typing import Any

import pandas as pd

__all__ = ["OVERALL", "Overall", "overall"]

OVERALL: dict[str, str] = {
    "better": "at least one primary metric is better and none is worse",
    "worse": "at least one primary metric is worse and none is better",
    "mixed": "some primary metrics are better and some are worse",
    "no-change-that-matters": "every primary metric is inside its margin (TOST), or constant in both arms",
    "no-decision": "these seeds show neither a change nor, for every primary metric, equivalence",
}
"""Overall codes and what each means (docs/studies.md has the same table)."""

_SAME = ("no-change-that-matters", "not-tested-constant")


@dataclass(frozen=True)
class Overall:
    """One condition's overall line: its code, the reason in words, and each primary
    metric's verdict with its adjusted p-values."""

    verdict: str
    reason: str
    primary: list[dict[str, Any]] = field(default_factory=list)

    @property
    def text(self) -> str:
        return f"{self.verdict.replace('-', ' ')}: {self.reason}"


def _p(x: Any) -> str:
    if x is None or (isinstance(x, float) and not math.isfinite(x)):
        return "n/a"
    return f"{x:.2g}" if x < 0.001 else f"{x:.3f}"


def _said(row: Any) -> str:
    """One primary metric in words: its verdict and the figure that decided it."""
    verdict = row.verdict
    if verdict in ("better", "worse"):
        return f"{row.metric} {verdict} (Holm-adjusted p {_p(row.p_adjusted)})"
    if verdict == "no-change-that-matters":
        unit = f"+-{row.margin_value:.4g}; " if str(row.margin).endswith("%") else ""
        return f"{row.metric} within +-{row.margin} ({unit}TOST Holm-adjusted p {_p(row.tost_p_adjusted)})"
    if verdict == "no-detectable-change":
        tost = "" if row.margin is None or not isinstance(row.margin, str) else \
            f", TOST Holm-adjusted p {_p(row.tost_p_adjusted)} for +-{row.margin}"
        return f"{row.metric} undecided (Holm-adjusted p {_p(row.p_adjusted)}{tost})"
    return f"{row.metric} {verdict.replace('-', ' ')}"


def overall(part: pd.DataFrame, primary: list[str]) -> Overall:
    """The overall line of one condition's rows of ``differences`` (see the module doc)."""
    rows = part.set_index("metric", drop=False)
    found = [rows.loc[m] for m in primary if m in rows.index]
    verdicts = [row.verdict for row in found]
    better = [row for row in found if row.verdict == "better"]
    worse = [row for row in found if row.verdict == "worse"]
    if better and worse:
        code = "mixed"
    elif better or worse:
        code = "better" if better else "worse"
    elif found and all(v in _SAME for v in verdicts):
        code = "no-change-that-matters"
    else:
        code = "no-decision"
    deciding = better + worse if code in ("better", "worse", "mixed") else found
    others = [row for row in found if not any(row is d for d in deciding)]
    reason = "; ".join(_said(row) for row in deciding)
    if others:
        reason += "; also " + "; ".join(_said(row) for row in others)
    if code == "no-decision":
        missing = [row.metric for row in found if row.verdict == "no-detectable-change" and not isinstance(
            row.margin, str)]
        if missing:
            reason += f" (no margin for {', '.join(missing)}: give --margin METRIC=2% to test for no change that " \
                      "matters)"
    record = [{"metric": row.metric, "verdict": row.verdict, "p_value": _num(row.p_value),
               "p_adjusted": _num(row.p_adjusted), "margin": row.margin, "margin_value": _num(row.margin_value),
               "tost_p": _num(row.tost_p), "tost_p_adjusted": _num(row.tost_p_adjusted)} for row in found]
    return Overall(code, reason or "no primary metric", record)


def _num(x: Any) -> float | None:
    return float(x) if isinstance(x, (int, float)) and math.isfinite(x) else None
