"""The methods a comparison used, named for its outputs: tests, adjustments, design, rules.

:func:`methods` is the ``methods`` block of ``comparison.json``; :func:`design_record` its
``design`` block; :func:`method_lines` the lines the printed text opens with. Each names its
source, so that a reader can check the method without reading the code.
"""

from __future__ import annotations

from typing import Any

from .compare import ComparisonResult
from .compare_sequential import METHOD, REPEATED_P
from .verdicts import ALPHA

__all__ = ["methods", "design_record", "method_lines", "PRIMARY_METHOD", "SECONDARY_METHOD", "EQUIVALENCE_METHOD"]

PRIMARY_METHOD = "Holm's step-down method (Holm 1979): family-wise error rate at most alpha"
SECONDARY_METHOD = "Benjamini-Hochberg (1995): false discovery rate at most alpha"
EQUIVALENCE_METHOD = "two one-sided tests, TOST (Schuirmann 1987), on the paired differences"
TEST_METHOD = "paired Student t test across seeds, two-sided"
RATE_RULE = ("counts and totals are judged as rates: per simulated hour, per attempted round or per accepted "
             "participation (column judged_as)")
CONSTANT_RULE = ("not tested: a figure with one value on every seed in both arms (not-tested-constant), or pinned "
                 "by a setting (set-by-arms)")


def methods(result: ComparisonResult) -> dict[str, Any]:
    """The ``methods`` block: which test, adjustment and design each verdict rests on."""
    return {
        "test": TEST_METHOD,
        "equivalence": EQUIVALENCE_METHOD,
        "primary": PRIMARY_METHOD,
        "secondary": SECONDARY_METHOD,
        "design": METHOD if result.sequential is not None else "fixed number of seeds",
        "p_values": REPEATED_P if result.sequential is not None else "ordinary p-values",
        "families": "each condition is its own family; changes and equivalences are adjusted separately",
        "counts": RATE_RULE,
        "constants": CONSTANT_RULE,
        "alpha": ALPHA,
    }


def design_record(result: ComparisonResult) -> dict[str, Any]:
    """The ``design`` block: fixed seeds, or the sequential schedule and where it stopped."""
    schedule = result.sequential
    return {
        "kind": "fixed" if schedule is None else "sequential",
        "seed_budget": None if schedule is None else schedule.looks[-1],
        "planned_looks": None if schedule is None else list(schedule.looks),
        "looks_taken": list(result.looks_taken),
        "seeds_used": len(result.seeds),
        "stopped": result.stopped,
    }


def method_lines(result: ComparisonResult) -> list[str]:
    """The lines under the printed header that name the methods and the primary metrics."""
    margins = ", ".join(f"{m.metric} +-{m.text}" for m in result.margins) or "none (--margin METRIC=2%)"
    lines = [
        f"  primary metrics: {', '.join(result.primary)} ({PRIMARY_METHOD})",
        f"  secondary metrics: every other tested metric ({SECONDARY_METHOD})",
        f"  margins of no change that matters: {margins}; {EQUIVALENCE_METHOD}",
        f"  {RATE_RULE}; {CONSTANT_RULE}",
    ]
    schedule = result.sequential
    if schedule is not None:
        why = {"decided": "every primary metric decided", "budget": "the seed budget spent"}[result.stopped]
        lines.append(f"  sequential: looks at {', '.join(map(str, schedule.looks))} seeds; stopped after "
                     f"{len(result.seeds)} ({why}); {METHOD}; p-values are {REPEATED_P}")
    return lines
