"""Figures by group: wasted work, participation bias, how often devices take part, device cost."""

from __future__ import annotations

from collections.abc import Sequence

import numpy as np
from matplotlib.patches import Patch

from ..style import COLOURS, INK, MUTED, figure, svg_of
from .common import bars_h, edge, pct_label

__all__ = ["waste_by_cause", "waste_by_type", "BIAS_SERIES", "bias", "participation", "never_reported", "cost"]


# ------------------------------------------------------------------------------ waste


def waste_by_cause(causes: Sequence[str], columns: Sequence[tuple[str, np.ndarray]], prefix: str) -> str:
    """Wasted work by cause: one panel per resource (title, values)."""
    with figure(0.3 * len(causes) + 1.3) as fig:
        axes = np.atleast_1d(fig.subplots(1, len(columns), sharey=True))
        for i, (ax, (title, values)) in enumerate(zip(axes, columns, strict=True)):
            y = bars_h(ax, causes)
            ax.barh(y, values, height=0.65, color=COLOURS["wasted"], linewidth=0)
            ax.set_title(title)
            total = float(np.nansum(values))
            for yi, v in zip(y, values, strict=True):
                if total > 0 and v > 0:
                    ax.text(v, yi, f" {pct_label(v / total)}", va="center", ha="left", fontsize=7.5, color=MUTED)
            ax.set_xlim(0, max(float(np.nanmax(values)) if len(values) else 0.0, 1e-9) * 1.3)
            if i:
                ax.tick_params(axis="y", length=0)
        return svg_of(fig, prefix)


def waste_by_type(types: Sequence[str], columns: Sequence[tuple[str, np.ndarray, np.ndarray]], prefix: str) -> str:
    """Used and wasted work by device type: one panel per resource (title, used, wasted)."""
    with figure(0.42 * len(types) + 1.5) as fig:
        axes = np.atleast_1d(fig.subplots(1, len(columns), sharey=True))
        for i, (ax, (title, used, wasted)) in enumerate(zip(axes, columns, strict=True)):
            y = bars_h(ax, types)
            ax.barh(y, used, height=0.62, color=COLOURS["committed"], linewidth=0)
            ax.barh(y, wasted, left=used, height=0.62, color=COLOURS["wasted"], linewidth=0)
            total = used + wasted
            for yi, w, t in zip(y, wasted, total, strict=True):
                if t > 0:
                    ax.text(t, yi, f" {pct_label(w / t)}", va="center", ha="left", fontsize=7.5, color=MUTED)
            ax.set_xlim(0, max(float(np.max(total)) if len(total) else 0.0, 1e-9) * 1.3)
            ax.set_title(title)
            if i:
                ax.tick_params(axis="y", length=0)
        fig.legend(handles=[Patch(color=COLOURS["committed"], label="used by committed rounds"),
                            Patch(color=COLOURS["wasted"], label="wasted (label: wasted share)")],
                   loc="outside upper left", ncols=2)
        return svg_of(fig, prefix)


# ------------------------------------------------------------------------------ bias

BIAS_SERIES = (
    ("fleet_share", "fleet", "fleet share"),
    ("eligible_share", "eligible", "eligible share"),
    ("accepted_share", "accepted", "accepted share"),
    ("report_share", "committed", "report share"),
    ("weight_share", "weight", "weight share"),
)


def _ratio_panel(ax, y: np.ndarray, ratio: np.ndarray, low: np.ndarray, high: np.ndarray, key: str,
                 title: str) -> None:
    """A ratio per group (a dot labelled with its value) with its 95% interval and the line at 1."""
    ax.axvline(1.0, color=COLOURS["fleet"], linewidth=1.2)
    finite = np.isfinite(ratio)
    err = np.vstack([ratio - low, high - ratio])
    edges = {"markeredgecolor": edge(key)} if key == "weight" else {}  # the pale yellow dot needs its edge
    ax.errorbar(ratio[finite], y[finite], xerr=err[:, finite], fmt="o", color=COLOURS[key],
                ecolor=INK, elinewidth=1.1, capsize=3, markersize=5, **edges)
    for yi, r in zip(y, ratio, strict=True):
        if np.isfinite(r):
            ax.text(r, yi - 0.3, f"{r:.2f}", ha="center", va="bottom", fontsize=7.5, color=INK)
    ax.set_title(title)
    top = np.nanmax(high[np.isfinite(high)]) if np.isfinite(high).any() else 1.0
    ax.set_xlim(0, max(1.5, float(top) * 1.12))
    ax.tick_params(axis="y", length=0)


def bias(
    title: str,
    names: Sequence[str],
    shares: dict[str, np.ndarray],
    ratio: np.ndarray,
    low: np.ndarray,
    high: np.ndarray,
    prefix: str,
    weight: tuple[np.ndarray, np.ndarray, np.ndarray] | None = None,
) -> str:
    """Five shares per group side by side, and the representation ratio (report share / fleet
    share) with its 95% interval; with ``weight`` (ratio, low, high) a third panel of the weight
    ratio (weight share / example share) and its interval."""
    n = len(names)
    with figure(0.62 * n + 1.5) as fig:
        panels = fig.subplots(1, 3 if weight is not None else 2, sharey=True,
                              width_ratios=[2.2, 1, 1] if weight is not None else [2.2, 1])
        left, right = panels[0], panels[1]
        y = bars_h(left, names)
        height = 0.8 / len(BIAS_SERIES)
        for j, (column, key, label) in enumerate(BIAS_SERIES):
            offset = (j - (len(BIAS_SERIES) - 1) / 2) * height
            left.barh(y + offset, np.nan_to_num(shares[column]), height=height * 0.92, color=COLOURS[key],
                      edgecolor=edge(key), linewidth=0.5, label=label)
        left.set_title(f"Shares by {title}")
        left.xaxis.set_major_formatter(lambda v, _: f"{v:.0%}")
        left.set_xlim(0, None)
        split = "\n" if weight is not None else " "  # three panels: the titles take two lines
        _ratio_panel(right, y, ratio, low, high, "committed", f"Report share /{split}fleet share")
        if weight is not None:
            _ratio_panel(panels[2], y, *weight, "weight", "Weight share /\nexample share")
        fig.legend(loc="outside upper left", ncols=5, handles=[
            Patch(facecolor=COLOURS[k], edgecolor=edge(k), label=lab) for _, k, lab in BIAS_SERIES])
        return svg_of(fig, prefix)


# ------------------------------------------------------------------------------ participation


def participation(
    counts: np.ndarray,
    devices: np.ndarray,
    lorenz_devices: np.ndarray,
    lorenz_reports: np.ndarray,
    gini: float | None,
    prefix: str,
) -> str:
    """Devices by number of committed reports, and the Lorenz curve of reports over devices."""
    with figure(3.1) as fig:
        hist, curve = fig.subplots(1, 2, width_ratios=[1.5, 1])
        colours = [COLOURS["fleet"] if c == 0 else COLOURS["committed"] for c in counts]
        hist.bar(counts, devices, width=0.8, color=colours, linewidth=0)
        hist.set_xlabel("committed reports per device")
        hist.set_ylabel("devices")
        hist.set_title("Devices by number of reports")
        if len(counts) <= 25:
            hist.set_xticks(counts)
        fig.legend(handles=[Patch(color=COLOURS["fleet"], label="devices that never reported"),
                            Patch(color=COLOURS["committed"], label="devices that reported")],
                   loc="outside upper left", ncols=2)
        curve.plot([0, 1], [0, 1], color=COLOURS["fleet"], linewidth=1.0, linestyle="--", label="equal shares")
        curve.plot(lorenz_devices, lorenz_reports, color=COLOURS["committed"], linewidth=1.8, label="Lorenz curve")
        curve.fill_between(lorenz_devices, lorenz_reports, lorenz_devices, color=COLOURS["committed"], alpha=0.12,
                           linewidth=0)
        curve.set_xlim(0, 1)
        curve.set_ylim(0, 1)
        curve.set_aspect("equal")
        curve.xaxis.set_major_formatter(lambda v, _: f"{v:.0%}")
        curve.yaxis.set_major_formatter(lambda v, _: f"{v:.0%}")
        curve.set_xlabel("devices, fewest reports first")
        curve.set_ylabel("share of reports")
        curve.set_title("Gini " + ("n/a" if gini is None else f"{gini:.2f}"))
        curve.legend(loc="upper left")
        return svg_of(fig, prefix)


def never_reported(groupings: Sequence[tuple[str, Sequence[str], np.ndarray]], prefix: str) -> str:
    """Per grouping, each group's devices split into reported at least once and never."""
    rows = max(len(names) for _, names, _ in groupings)
    with figure(0.32 * rows + 1.3) as fig:
        axes = np.atleast_1d(fig.subplots(1, len(groupings)))
        for ax, (title, names, never) in zip(axes, groupings, strict=True):
            y = bars_h(ax, names)
            never = np.nan_to_num(never)
            ax.barh(y, 1 - never, height=0.62, color=COLOURS["committed"], linewidth=0)
            ax.barh(y, never, left=1 - never, height=0.62, color=COLOURS["fleet"], linewidth=0)
            for yi, v in zip(y, never, strict=True):
                ax.text(1.0, yi, f" {pct_label(v)}", va="center", ha="left", fontsize=7.5, color=INK)
            ax.set_xlim(0, 1.22)
            ax.set_xticks([0, 0.5, 1], ["0", "50%", "100%"])
            ax.set_title(title)
            ax.grid(axis="x", visible=False)
        fig.legend(handles=[Patch(color=COLOURS["committed"], label="reported at least once"),
                            Patch(color=COLOURS["fleet"], label="never reported (label)")],
                   loc="outside upper left", ncols=2)
        return svg_of(fig, prefix)


# ------------------------------------------------------------------------------ cost


def cost(types: Sequence[str], panels: Sequence[tuple[str, np.ndarray, np.ndarray]], prefix: str) -> str:
    """Per device type, the median (bar) and p90 (line to a tick) of a per-participation cost."""
    with figure(0.42 * len(types) + 1.4) as fig:
        axes = np.atleast_1d(fig.subplots(1, len(panels), sharey=True))
        for i, (ax, (title, p50, p90)) in enumerate(zip(axes, panels, strict=True)):
            y = bars_h(ax, types)
            ax.barh(y, p50, height=0.55, color=COLOURS["accepted"], linewidth=0, label="median")
            ax.hlines(y, p50, p90, color=COLOURS["accepted"], linewidth=1.4)
            ax.plot(p90, y, marker="|", markersize=13, markeredgewidth=2, linestyle="none",
                    color=COLOURS["accepted"], label="p90")
            for yi, a, b in zip(y, p50, p90, strict=True):
                ax.annotate(f"{a:.3g} / {b:.3g}", (b, yi), xytext=(7, 0), textcoords="offset points", va="center",
                            ha="left", fontsize=7.5, color=INK)
            top = np.nanmax(p90) if np.isfinite(p90).any() else 1.0
            ax.set_xlim(0, max(float(top), 1e-9) * 1.45)
            ax.set_title(title)
            if i:
                ax.tick_params(axis="y", length=0)
        axes[0].legend(loc="lower right")
        return svg_of(fig, prefix)
