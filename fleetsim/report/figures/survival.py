"""The task-survival figure: one small panel per device type."""

from __future__ import annotations

from collections.abc import Sequence

import numpy as np
from matplotlib.patches import Patch

from ..style import COLOURS, figure, short, svg_of

__all__ = ["survival", "Curve"]

Curve = tuple[str, np.ndarray, np.ndarray, np.ndarray, np.ndarray]
"""(device type, times s, survival, band low, band high): a curve's points, from 0 to its end."""


def survival(curves: Sequence[Curve], prefix: str) -> str:
    """Small multiples: each device type's survival curve and band, the others in grey behind it.

    Each curve is drawn as a step function through exactly its points (tables/task_survival.csv).
    """
    n = len(curves)
    cols = 2 if n > 1 else 1
    rows = int(np.ceil(n / cols))
    floor = min((float(np.min(low)) for _, _, _, low, _ in curves if low.size), default=0.0)
    floor = max(0.0, np.floor(floor * 20) / 20 - 0.05)
    x_end = max((float(t[-1]) for _, t, _, _, _ in curves if t.size), default=60.0) / 60.0
    with figure(2.2 * rows + 0.9) as fig:
        axes = np.atleast_1d(fig.subplots(rows, cols, sharex=True, sharey=True)).ravel()
        for i, (ax, (name, t, sv, low, high)) in enumerate(zip(axes, curves, strict=False)):
            for j, (_, t2, s2, _, _) in enumerate(curves):
                if j != i:
                    ax.step(t2 / 60, s2, where="post", color=COLOURS["fleet"], linewidth=0.9, alpha=0.8)
            ax.fill_between(t / 60, low, high, step="post", color=COLOURS["accepted"], alpha=0.22, linewidth=0)
            ax.step(t / 60, sv, where="post", color=COLOURS["accepted"], linewidth=1.8)
            ax.set_title(short(name, 40))
            ax.set_ylim(floor, 1.005)
            ax.set_xlim(0, x_end)
            ax.yaxis.set_major_formatter(lambda v, _: f"{v:.0%}")
        for ax in axes[n:]:
            ax.set_visible(False)
        for ax in axes[(rows - 1) * cols:]:
            ax.set_xlabel("minutes since the device was accepted")
        for ax in axes[::cols]:
            ax.set_ylabel("tasks not dropped out")
        fig.legend(handles=[Patch(color=COLOURS["accepted"], label="this device type (band: 95% interval)"),
                            Patch(color=COLOURS["fleet"], label="other device types")],
                   loc="outside upper left", ncols=2)
        return svg_of(fig, prefix)
