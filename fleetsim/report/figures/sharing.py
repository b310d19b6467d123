"""The figure of a run of several workloads: which groups of devices each workload's reports came from."""

from __future__ import annotations

import math
from collections.abc import Sequence

import numpy as np
from matplotlib.patches import Patch

from ..style import COLOURS, figure, short, svg_of
from .common import bars_h

__all__ = ["competition"]

_PER_ROW = 3
"""Workload panels side by side before the figure starts another row."""


def competition(title: str, names: Sequence[str], fleet: np.ndarray, reports: Sequence[tuple[str, np.ndarray]],
                prefix: str) -> str:
    """One panel per workload (name, each group's share of its reports) beside each group's fleet share."""
    n = len(reports)
    per_row = min(n, _PER_ROW)
    rows = math.ceil(n / per_row)
    top = max([float(np.nanmax(fleet)) if len(fleet) else 0.0]
              + [float(np.nanmax(s)) if np.isfinite(s).any() else 0.0 for _, s in reports])
    with figure(rows * (0.42 * len(names) + 0.8) + 0.5) as fig:
        axes = fig.subplots(rows, per_row, sharey=True, squeeze=False).ravel()
        for i, (ax, (workload, share)) in enumerate(zip(axes, reports, strict=False)):
            y = bars_h(ax, names)
            ax.barh(y - 0.2, fleet, height=0.38, color=COLOURS["fleet"], linewidth=0)
            ax.barh(y + 0.2, np.nan_to_num(share), height=0.38, color=COLOURS["committed"], linewidth=0)
            ax.set_title(short(workload, 28))
            ax.set_xlim(0, max(top * 1.1, 1e-9))
            ax.xaxis.set_major_formatter(lambda v, _: f"{v:.0%}")
            if i % per_row:
                ax.tick_params(axis="y", length=0, labelleft=False)
        for ax in axes[n:]:
            ax.set_visible(False)
        fig.legend(handles=[Patch(color=COLOURS["fleet"], label=f"share of the fleet (by {title})"),
                            Patch(color=COLOURS["committed"], label="share of the workload's reports")],
                   loc="outside upper left", ncols=2)
        return svg_of(fig, prefix)
