"""Helpers the figures share: label colours, percentage labels, scales and axes."""

from __future__ import annotations

from collections.abc import Sequence
from datetime import datetime, timedelta

import numpy as np
from matplotlib.axes import Axes
from matplotlib.colors import to_rgb

from ..style import INK, MUTED, WEIGHT_EDGE, short

__all__ = ["text_on", "edge", "pct_label", "scale", "mark_off_scale", "bars_h", "time_axis"]


def text_on(colour: str) -> str:
    """White or ink text, whichever reads better on ``colour`` (relative luminance, WCAG 2)."""
    def channel(c: float) -> float:
        return c / 12.92 if c <= 0.03928 else ((c + 0.055) / 1.055) ** 2.4

    r, g, b = (channel(c) for c in to_rgb(colour))
    luminance = 0.2126 * r + 0.7152 * g + 0.0722 * b
    return "white" if luminance < 0.25 else INK


def edge(key: str) -> str:
    return WEIGHT_EDGE if key == "weight" else "none"


def pct_label(x: float) -> str:
    if x >= 0.095:
        return f"{100 * x:.0f}%"
    return f"{100 * x:.1f}%" if x >= 0.0005 or x == 0 else "<0.1%"


def scale(series: Sequence[np.ndarray], warm_hours: int) -> tuple[float, float]:
    """(axis top, highest value on the scale): leaves out the first ``warm_hours`` when they tower over the rest.

    Until a first rest period has passed no device is resting, so more devices are eligible
    than later on; letting those hours set the scale would flatten the daily cycle.
    """
    peak = max((float(np.max(v)) for v in series if len(v)), default=0.0)
    later = max((float(np.max(v[warm_hours:])) for v in series if len(v) > warm_hours), default=0.0)
    if 0 < warm_hours and later > 0 and peak > 1.3 * later:
        return later * 1.1, later
    return max(peak * 1.08, 1e-9), peak


def mark_off_scale(ax: Axes, values: np.ndarray, top: float) -> None:
    """Label the highest value that runs off the top of the axis."""
    if len(values) and float(np.max(values)) > top:
        i = int(np.argmax(values))
        v = float(values[i])
        text = f"{v:,.0f}" if v >= 100 else f"{v:.3g}"
        ax.text(0.995, 0.95, f"off scale at hour {i}: {text}", transform=ax.transAxes, ha="right", va="top",
                fontsize=7.5, color=MUTED, bbox={"facecolor": "white", "edgecolor": "none", "alpha": 0.8, "pad": 1.0})


def bars_h(ax: Axes, names: Sequence[str]) -> np.ndarray:
    y = np.arange(len(names))
    ax.set_yticks(y, [short(n) for n in names])
    ax.set_ylim(len(names) - 0.4, -0.6)
    ax.grid(axis="y", visible=False)
    return y


def time_axis(ax: Axes, n_hours: int, start: datetime, labels: bool) -> None:
    """Ticks at midnights UTC (every 6 hours on short runs), labelled with the date."""
    every = 6 if n_hours <= 48 else 24
    ticks = [h for h in range(n_hours + 1) if (start + timedelta(hours=h)).hour % every == 0
             and (start + timedelta(hours=h)).minute == 0]
    names = []
    for h in ticks:
        moment = start + timedelta(hours=h)
        names.append(moment.strftime("%a %d %b") if moment.hour == 0 else moment.strftime("%H:%M"))
    ax.set_xticks(ticks, names if labels else [""] * len(ticks))
    if every == 24:
        ax.set_xticks([h for h in range(n_hours + 1) if (start + timedelta(hours=h)).hour % 6 == 0], minor=True)
    ax.set_xlim(0, n_hours)
