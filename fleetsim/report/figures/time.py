"""Figures over the horizon and of round phases: 100% share bars, rounds and eligible devices
per hour, round-duration histograms and server load."""

from __future__ import annotations

from collections.abc import Sequence
from datetime import datetime
from typing import Any

import numpy as np
from matplotlib.lines import Line2D
from matplotlib.patches import Patch
from matplotlib.ticker import MaxNLocator

from ..style import COLOURS, HATCHES, INK, MUTED, figure, fill, short, svg_of
from .common import bars_h, edge, mark_off_scale, pct_label, scale, text_on, time_axis

__all__ = ["share_rows", "rounds_over_time", "durations", "load"]


# ------------------------------------------------------------------------------ shares


def _segment(key: str) -> dict[str, Any]:
    """A share bar's fill: hatched keys as :func:`fleetsim.report.style.fill` draws them, others
    with their edge (the pale weight colour gets a dark one)."""
    if key in HATCHES:
        return fill(key)
    return {"facecolor": COLOURS[key], "edgecolor": edge(key), "linewidth": 0.6}


def share_rows(rows: Sequence[tuple[str, Sequence[tuple[str, float]]]], legend: dict[str, str], prefix: str) -> str:
    """Horizontal 100% bars: one per row, segments (colour key, share) left to right; ``legend`` names each key."""
    with figure(0.55 * len(rows) + 0.9) as fig:
        ax = fig.add_subplot()
        labels = [label for label, _ in rows]
        y = bars_h(ax, labels)
        seen: list[str] = []
        for yi, (_, segments) in zip(y, rows, strict=True):
            left = 0.0
            for key, share in segments:
                if not np.isfinite(share) or share <= 0:
                    continue
                ax.barh(yi, share, left=left, height=0.62, **_segment(key))
                if share >= 0.07:
                    ax.text(left + share / 2, yi, pct_label(share), ha="center", va="center", fontsize=8.5,
                            color=text_on(COLOURS[key]))
                if key not in seen:
                    seen.append(key)
                left += share
        ax.set_xlim(0, 1)
        ax.set_xticks(np.linspace(0, 1, 6), [f"{v:.0%}" for v in np.linspace(0, 1, 6)])
        ax.grid(axis="x", visible=False)
        ax.spines["left"].set_visible(False)
        ax.tick_params(axis="y", length=0)
        handles = [Patch(**_segment(k), label=legend[k]) for k in legend if k in seen]
        fig.legend(handles=handles, loc="outside upper left", ncols=min(len(handles), 3))
        return svg_of(fig, prefix)


def rounds_over_time(
    n_hours: int,
    start: datetime,
    statuses: dict[str, np.ndarray],
    eligible: dict[str, np.ndarray],
    warm_hours: int,
    prefix: str,
) -> str:
    """Rounds closed per hour by status (stacked bars) above eligible devices per hour, one panel per region."""
    n_regions = len(eligible)
    heights = [2.2] + [0.62] * n_regions
    with figure(sum(heights) + 1.1) as fig:
        axes = fig.subplots(1 + n_regions, 1, sharex=True, gridspec_kw={"height_ratios": heights, "hspace": 0.08})
        axes = np.atleast_1d(axes)
        top = axes[0]
        edges = np.arange(n_hours + 1)
        bottom = np.zeros(n_hours)
        handles = []
        for status, counts in statuses.items():
            # One filled step patch per status (hundreds of bars would make a heavy SVG).
            top.stairs(bottom + counts, edges, baseline=bottom, fill=True, **fill(status))
            bottom = bottom + counts
            handles.append(Patch(**fill(status), label=f"{status.replace('_', ' ')} rounds"))
        top.set_ylabel("rounds closed\nper hour")
        top.legend(handles=handles, loc="upper left", ncols=len(handles), bbox_to_anchor=(0, 1.18))
        time_axis(top, n_hours, start, labels=False)
        top_e, shown_e = scale(list(eligible.values()), warm_hours)
        for ax, (region, counts) in zip(axes[1:], eligible.items(), strict=True):
            ax.fill_between(np.arange(n_hours + 1), np.append(counts, counts[-1:]), step="post",
                            color=COLOURS["eligible"], alpha=0.35, linewidth=0)
            ax.step(np.arange(n_hours + 1), np.append(counts, counts[-1:]), where="post",
                    color=COLOURS["eligible"], linewidth=1.1)
            ax.set_ylim(0, max(top_e, 1.0))
            ax.set_yticks([0, shown_e], ["0", f"{shown_e:,.0f}"])
            mark_off_scale(ax, counts, top_e)
            ax.text(0.005, 0.93, short(region), transform=ax.transAxes, ha="left", va="top", fontsize=8.5,
                    color=INK, bbox={"facecolor": "white", "edgecolor": "none", "alpha": 0.75, "pad": 1.0})
            ax.grid(axis="y", visible=False)
            time_axis(ax, n_hours, start, labels=ax is axes[-1])
        if n_regions:
            axes[1 + (n_regions - 1) // 2].set_ylabel("eligible devices\n(mean per hour)")
        axes[-1].set_xlabel("simulated time (UTC)")
        return svg_of(fig, prefix)


# ------------------------------------------------------------------------------ durations


def durations(
    panels: Sequence[tuple[str, str, np.ndarray, dict[str, float | None], float, str]],
    prefix: str,
) -> str:
    """Histograms side by side: (title, colour key, values s, percentiles, limit s, limit name)."""
    styles: tuple[tuple[str, Any], ...] = (("p50", "--"), ("p90", "-."), ("p99", ":"))
    with figure(3.3) as fig:
        axes = np.atleast_1d(fig.subplots(1, len(panels)))
        for ax, (title, key, values, pct, limit, limit_name) in zip(axes, panels, strict=True):
            upper = max(float(limit), float(np.max(values)) if values.size else 0.0, 1.0)
            bins = np.linspace(0, upper, 41)
            ax.hist(values, bins=bins, color=COLOURS[key], linewidth=0)
            marks = " \u00b7 ".join(f"{name} {pct[name]:.0f} s" for name, _ in styles if pct.get(name) is not None)
            ax.set_title(f"{title}\n{marks or 'no rounds'}; {limit_name} {limit:.0f} s", loc="left",
                         fontweight="normal", fontsize=9)
            ax.set_xlabel("seconds")
            ax.set_ylabel("rounds")
            ax.set_xlim(0, upper * 1.02)
            ax.yaxis.set_major_locator(MaxNLocator(integer=True))
            ax.axvline(limit, color=MUTED, linewidth=2.4, alpha=0.55)
            for name, style in styles:
                v = pct.get(name)
                if v is not None:
                    ax.axvline(v, color=INK, linewidth=1.1, linestyle=style)
            if not values.size:
                ax.set_ylim(0, 1)
                ax.text(0.5, 0.5, "no rounds", transform=ax.transAxes, ha="center", color=MUTED)
        handles = [Line2D([], [], color=MUTED, linewidth=2.4, alpha=0.55, label="timeout or deadline")]
        handles += [Line2D([], [], color=INK, linewidth=1.1, linestyle=style, label=name) for name, style in styles]
        fig.legend(handles=handles, loc="outside upper left", ncols=4)
        return svg_of(fig, prefix)


# ------------------------------------------------------------------------------ load


def _extra_panel(ax: Any, edges: np.ndarray, title: str, label: str, values: np.ndarray, kind: str) -> None:
    """One more hourly panel under the load figure: a share (``pct``) as a step line, or an amount as bars."""
    finite = np.where(np.isfinite(values), values, 0.0)
    if kind == "pct":  # an hour with nothing answered has no share: a gap in the line
        ax.step(edges, np.append(values, values[-1:]), where="post", color=COLOURS["eligible"], linewidth=1.2)
        # An estimated share can fall below 0 (more accepted than estimated): shown, not cut off.
        low = min(0.0, float(np.nanmin(values)) * 1.1) if np.isfinite(values).any() else 0.0
        ax.set_ylim(low, 1)
        ticks = ([low] if low < -0.05 else []) + [0.0, 0.5, 1.0]
        ax.set_yticks(ticks, [f"{t:.0%}" for t in ticks])
        ax.axhline(0.0, color=MUTED, linewidth=0.8)
    else:
        ax.stairs(finite, edges, fill=True, color=COLOURS["accepted"], linewidth=0)
        ax.set_ylim(0, max(float(finite.max()) * 1.15 if finite.size else 0.0, 1.0))
    ax.set_ylabel(label)
    ax.set_title(title)


def load(
    n_hours: int,
    start: datetime,
    checkins_per_s: np.ndarray,
    checkins_title: str,
    peak_working: np.ndarray,
    mean_working: float | None,
    extra: Sequence[tuple[str, str, np.ndarray, str]],
    warm_hours: int,
    prefix: str,
) -> str:
    """Check-ins per second by hour (``checkins_title`` says how they were obtained) above the
    peak number of devices working in each hour, then one panel per ``extra`` (title, axis
    label, hourly values, ``pct`` or ``num``)."""
    heights = [1.0, 1.0] + [0.7] * len(extra)
    with figure(4.0 + 1.35 * len(extra)) as fig:
        axes = np.atleast_1d(fig.subplots(2 + len(extra), 1, sharex=True, gridspec_kw={"height_ratios": heights}))
        top, bottom = axes[0], axes[1]
        edges = np.arange(n_hours + 1)
        top.fill_between(edges, np.append(checkins_per_s, checkins_per_s[-1:]), step="post",
                         color=COLOURS["eligible"], alpha=0.35, linewidth=0)
        top.step(edges, np.append(checkins_per_s, checkins_per_s[-1:]), where="post", color=COLOURS["eligible"],
                 linewidth=1.2)
        top.set_ylabel("check-ins per second")
        top_c, _ = scale([checkins_per_s], warm_hours)
        top.set_ylim(0, top_c)
        mark_off_scale(top, checkins_per_s, top_c)
        top.set_title(checkins_title)
        time_axis(top, n_hours, start, labels=False)
        bottom.stairs(peak_working, edges, fill=True, color=COLOURS["accepted"], linewidth=0,
                      label="peak devices working in the hour")
        if mean_working is not None:
            bottom.axhline(mean_working, color=INK, linestyle="--", linewidth=1.0,
                           label=f"mean over the run ({mean_working:.1f})")
        bottom.set_ylabel("devices")
        bottom.set_title("Devices working at once")
        bottom.legend(loc="upper right", ncols=2)
        top_w, _ = scale([peak_working], warm_hours)
        bottom.set_ylim(0, top_w * 1.2)
        mark_off_scale(bottom, peak_working, top_w * 1.2)
        for ax, (title, label, values, kind) in zip(axes[2:], extra, strict=True):
            _extra_panel(ax, edges, title, label, values, kind)
        for ax in axes:
            time_axis(ax, n_hours, start, labels=ax is axes[-1])
        axes[-1].set_xlabel("simulated time (UTC)")
        return svg_of(fig, prefix)
