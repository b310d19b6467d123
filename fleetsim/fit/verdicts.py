"""The report of a goodness-of-fit run: one :class:`Check` per test, Holm's method over them,
the verdict and figures (:class:`GoodnessReport`), and the standing caution. Kept apart from the
checks themselves (:mod:`fleetsim.fit.goodness`) so that the report's form has one home.
"""

from __future__ import annotations

from dataclasses import asdict, dataclass, field, replace
from typing import Any

import numpy as np
from matplotlib.figure import Figure

__all__ = ["CAUTION", "Check", "GoodnessReport", "holm"]

CAUTION = ("passing these checks is not proof: the fleet file stays a model; fit it from real telemetry and follow "
           "your organisation's review before its figures change a live fleet")


@dataclass(frozen=True)
class Check:
    """One test: statistic, dof or n, p-value, Holm's verdict, where the logs depart most, law, Holm's p."""

    name: str
    statistic: float
    dof_or_n: int
    p_value: float
    verdict: str
    where: str
    law: str = ""
    holm_p: float = 1.0


@dataclass
class GoodnessReport:
    """The checks, the one-line verdict, the figures (name -> matplotlib Figure) and notes."""

    checks: list[Check]
    verdict: str
    figures: dict[str, Figure]
    alpha: float = 0.05
    notes: list[str] = field(default_factory=list)

    def lines(self) -> list[str]:
        """For the terminal: the verdict, a line per check, the notes, the caution."""
        return [self.verdict] + [
            f"  {c.verdict} {c.name}: {c.statistic:.4g} ({c.law}; {c.dof_or_n}), p={c.p_value:.3g}, Holm-adjusted "
            f"{c.holm_p:.3g}" + (f"; {c.where}" if c.where else "") for c in self.checks
        ] + [f"  note: {n}" for n in self.notes] + [f"caution: {CAUTION}"]

    def to_dict(self) -> dict[str, Any]:
        """For a JSON side file (figures by name only)."""
        return {"verdict": self.verdict, "alpha": self.alpha, "method": "holm", "notes": list(self.notes),
                "checks": [asdict(c) for c in self.checks], "figures": sorted(self.figures), "caution": CAUTION}


def holm(checks: list[Check], alpha: float) -> list[Check]:
    """Holm's step-down method: the i-th smallest of m p-values is rejected if it and all below are <= alpha/(m-i+1)."""
    out, run, go, m = list(checks), 0.0, True, len(checks)
    for i, j in enumerate(np.argsort([c.p_value for c in checks], kind="stable")):
        run, go = max(run, min(1.0, (m - i) * checks[j].p_value)), go and checks[j].p_value <= alpha / (m - i)
        out[j] = replace(checks[j], verdict="rejected" if go else "accepted", holm_p=run)
    return out
