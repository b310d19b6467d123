"""The figures of the privacy and model-impact sections: each group's per-device epsilon against
the uniform-sampling claim, and held-out accuracy over the rounds trained.

Both use only ink and grey, as their lines and marks are figures no colour of the report's key
stands for; the tables beside them hold the same numbers.
"""

from __future__ import annotations

from collections.abc import Sequence
from typing import Any

import numpy as np
from matplotlib.lines import Line2D

from ..style import COLOURS, INK, MUTED, figure, short, svg_of
from .common import bars_h

__all__ = ["epsilon_ranges", "accuracy_over_rounds", "EpsilonRow", "AccuracyCurve"]

EpsilonRow = tuple[str, float, float, float, float]
"""(group, median, p90, p99, worst) epsilon of a group's devices (NaN where none reported)."""

AccuracyCurve = tuple[str, np.ndarray, np.ndarray, str]
"""(label, rounds, accuracy, role): role ``overall``, ``worst``, ``best`` or ``other``."""

_MARKS = (("median", "o", True), ("p90", "s", False), ("p99", "^", False), ("worst", "X", True))
"""(quantile, marker, filled) in the order of an :data:`EpsilonRow`."""


def _ranges(ax, rows: Sequence[EpsilonRow], claim: float, title: str) -> None:
    y = bars_h(ax, [r[0] for r in rows])
    for yi, (_, *values) in zip(y, rows, strict=True):
        finite = [v for v in values if np.isfinite(v)]
        if len(finite) > 1:
            ax.plot([min(finite), max(finite)], [yi, yi], color=COLOURS["fleet"], linewidth=2.2, zorder=1)
        for (_, marker, filled), v in zip(_MARKS, values, strict=True):
            if np.isfinite(v):
                ax.plot([v], [yi], marker=marker, markersize=6, color=INK, markerfacecolor=INK if filled else "white",
                        linestyle="none", zorder=2)
    ax.axvline(claim, color=INK, linestyle="--", linewidth=1.1)
    ax.set_title(title)


def epsilon_ranges(panels: Sequence[tuple[str, Sequence[EpsilonRow]]], claim: float, delta_text: str,
                   prefix: str) -> str:
    """One panel per grouping (title, rows): each group's median, p90, p99 and worst per-device
    epsilon on a grey range, beside a dashed line at the uniform-sampling claim."""
    heights = [max(len(rows), 1) for _, rows in panels]
    with figure(0.34 * sum(heights) + 0.75 * len(panels) + 1.0) as fig:
        axes = np.atleast_1d(fig.subplots(len(panels), 1, sharex=True, gridspec_kw={"height_ratios": heights}))
        for ax, (title, rows) in zip(axes, panels, strict=True):
            _ranges(ax, rows, claim, title)
        axes[0].annotate(f"claim {claim:.3g}", (claim, 1.0), xycoords=("data", "axes fraction"), xytext=(4, -2),
                         textcoords="offset points", ha="left", va="top", fontsize=8.5, color=INK)
        axes[-1].set_xlabel(f"epsilon at delta {delta_text}")
        axes[-1].set_xlim(left=0)
        handles = [Line2D([], [], marker=m, color=INK, markerfacecolor=INK if f else "white", linestyle="none",
                          label=f"{name} of its devices that reported" if name != "worst" else "worst device")
                   for name, m, f in _MARKS]
        handles.append(Line2D([], [], color=INK, linestyle="--", label="uniform-sampling claim"))
        fig.legend(handles=handles, loc="outside upper left", ncols=3)
        return svg_of(fig, prefix)


_STYLE: dict[str, tuple[Any, float, str]] = {"overall": ("-", 2.0, INK), "worst": ("--", 1.5, INK),
                                              "best": (":", 1.7, INK), "other": ("-", 0.8, COLOURS["fleet"])}


def accuracy_over_rounds(curves: Sequence[AccuracyCurve], x_label: str, prefix: str) -> str:
    """Held-out accuracy at each evaluation: every group in thin grey behind the whole fleet (ink),
    the worst served group (dashed) and the best served (dotted), each through exactly its points."""
    with figure(3.2, 7.0) as fig:
        ax = fig.add_subplot()
        order = {"other": 0, "best": 1, "worst": 2, "overall": 3}
        handles: dict[str, Line2D] = {}
        for label, x, y, role in sorted(curves, key=lambda c: order[c[3]]):
            style, width, colour = _STYLE[role]
            ax.plot(x, y, linestyle=style, linewidth=width, color=colour, marker="." if x.size < 30 else None,
                    markersize=4, alpha=0.8 if role == "other" else 1.0)
            handles[role] = Line2D([], [], linestyle=style, linewidth=width, color=colour,
                                   label="other groups" if role == "other" else short(label, 44))
        ax.set_xlabel(x_label)
        ax.set_ylabel("held-out accuracy")
        ax.yaxis.set_major_formatter(lambda v, _: f"{v:.0%}")
        if not curves:
            ax.text(0.5, 0.5, "no evaluations", transform=ax.transAxes, ha="center", color=MUTED)
        shown = [handles[role] for role in ("overall", "worst", "best", "other") if role in handles]
        fig.legend(handles=shown, loc="outside upper left", ncols=2)
        return svg_of(fig, prefix)
