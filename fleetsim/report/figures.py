"""The report's figures, drawn with matplotlib and returned as inline SVG text.

Each function draws exactly the numbers it is given; :mod:`fleetsim.report.sections` builds
those numbers once and shows the same ones in the figure's data table.
"""

from __future__ import annotations

from collections.abc import Sequence
from datetime import datetime, timedelta
from typing import Any

import numpy as np
from matplotlib.axes import Axes
from matplotlib.colors import to_rgb
from matplotlib.lines import Line2D
from matplotlib.patches import Patch
from matplotlib.ticker import MaxNLocator

from .style import COLOURS, INK, MUTED, WEIGHT_EDGE, figure, short, svg_of
from .survival import Survival

__all__ = [
    "share_rows", "rounds_over_time", "durations", "waste_by_cause", "waste_by_type", "bias",
    "participation", "never_reported", "survival", "cost", "load",
]


def _text_on(colour: str) -> str:
    """White or ink text, whichever reads better on ``colour`` (relative luminance, WCAG 2)."""
    def channel(c: float) -> float:
        return c / 12.92 if c <= 0.03928 else ((c + 0.055) / 1.055) ** 2.4

    r, g, b = (channel(c) for c in to_rgb(colour))
    luminance = 0.2126 * r + 0.7152 * g + 0.0722 * b
    return "white" if luminance < 0.25 else INK


def _edge(key: str) -> str:
    return WEIGHT_EDGE if key == "weight" else "none"


def _pct(x: float) -> str:
    if x >= 0.095:
        return f"{100 * x:.0f}%"
    return f"{100 * x:.1f}%" if x >= 0.0005 or x == 0 else "<0.1%"


def _scale(series: Sequence[np.ndarray], warm_hours: int) -> tuple[float, float]:
    """(axis top, highest value on the scale): leaves out the first ``warm_hours`` when they tower over the rest.

    Until a first rest period has passed no device is resting, so more devices are eligible
    than later on; letting those hours set the scale would flatten the daily cycle.
    """
    peak = max((float(np.max(v)) for v in series if len(v)), default=0.0)
    later = max((float(np.max(v[warm_hours:])) for v in series if len(v) > warm_hours), default=0.0)
    if 0 < warm_hours and later > 0 and peak > 1.3 * later:
        return later * 1.1, later
    return max(peak * 1.08, 1e-9), peak


def _mark_off_scale(ax: Axes, values: np.ndarray, top: float) -> None:
    """Label the highest value that runs off the top of the axis."""
    if len(values) and float(np.max(values)) > top:
        i = int(np.argmax(values))
        v = float(values[i])
        text = f"{v:,.0f}" if v >= 100 else f"{v:.3g}"
        ax.text(0.995, 0.95, f"off scale at hour {i}: {text}", transform=ax.transAxes, ha="right", va="top",
                fontsize=7.5, color=MUTED, bbox={"facecolor": "white", "edgecolor": "none", "alpha": 0.8, "pad": 1.0})


def _bars_h(ax: Axes, names: Sequence[str]) -> np.ndarray:
    y = np.arange(len(names))
    ax.set_yticks(y, [short(n) for n in names])
    ax.set_ylim(len(names) - 0.4, -0.6)
    ax.grid(axis="y", visible=False)
    return y


# ------------------------------------------------------------------------------ shares


def share_rows(rows: Sequence[tuple[str, Sequence[tuple[str, float]]]], legend: dict[str, str], prefix: str) -> str:
    """Horizontal 100% bars: one per row, segments (colour key, share) left to right; ``legend`` names each key."""
    with figure(0.55 * len(rows) + 0.9) as fig:
        ax = fig.add_subplot()
        labels = [label for label, _ in rows]
        y = _bars_h(ax, labels)
        seen: list[str] = []
        for yi, (_, segments) in zip(y, rows, strict=True):
            left = 0.0
            for key, share in segments:
                if not np.isfinite(share) or share <= 0:
                    continue
                ax.barh(yi, share, left=left, height=0.62, color=COLOURS[key], edgecolor=_edge(key), linewidth=0.6)
                if share >= 0.07:
                    ax.text(left + share / 2, yi, _pct(share), ha="center", va="center", fontsize=8.5,
                            color=_text_on(COLOURS[key]))
                if key not in seen:
                    seen.append(key)
                left += share
        ax.set_xlim(0, 1)
        ax.set_xticks(np.linspace(0, 1, 6), [f"{v:.0%}" for v in np.linspace(0, 1, 6)])
        ax.grid(axis="x", visible=False)
        ax.spines["left"].set_visible(False)
        ax.tick_params(axis="y", length=0)
        handles = [Patch(facecolor=COLOURS[k], edgecolor=_edge(k), label=legend[k]) for k in legend if k in seen]
        fig.legend(handles=handles, loc="outside upper left", ncols=min(len(handles), 3))
        return svg_of(fig, prefix)


# ------------------------------------------------------------------------------ time axis


def _time_axis(ax: Axes, n_hours: int, start: datetime, labels: bool) -> None:
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
            top.stairs(bottom + counts, edges, baseline=bottom, fill=True, color=COLOURS[status], linewidth=0)
            bottom = bottom + counts
            handles.append(Patch(color=COLOURS[status], label=f"{status} rounds"))
        top.set_ylabel("rounds closed\nper hour")
        top.legend(handles=handles, loc="upper left", ncols=len(handles), bbox_to_anchor=(0, 1.18))
        _time_axis(top, n_hours, start, labels=False)
        top_e, shown_e = _scale(list(eligible.values()), warm_hours)
        for ax, (region, counts) in zip(axes[1:], eligible.items(), strict=True):
            ax.fill_between(np.arange(n_hours + 1), np.append(counts, counts[-1:]), step="post",
                            color=COLOURS["eligible"], alpha=0.35, linewidth=0)
            ax.step(np.arange(n_hours + 1), np.append(counts, counts[-1:]), where="post",
                    color=COLOURS["eligible"], linewidth=1.1)
            ax.set_ylim(0, max(top_e, 1.0))
            ax.set_yticks([0, shown_e], ["0", f"{shown_e:,.0f}"])
            _mark_off_scale(ax, counts, top_e)
            ax.text(0.005, 0.93, short(region), transform=ax.transAxes, ha="left", va="top", fontsize=8.5,
                    color=INK, bbox={"facecolor": "white", "edgecolor": "none", "alpha": 0.75, "pad": 1.0})
            ax.grid(axis="y", visible=False)
            _time_axis(ax, n_hours, start, labels=ax is axes[-1])
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


# ------------------------------------------------------------------------------ waste


def waste_by_cause(causes: Sequence[str], columns: Sequence[tuple[str, np.ndarray]], prefix: str) -> str:
    """Wasted work by cause: one panel per resource (title, values)."""
    with figure(0.3 * len(causes) + 1.3) as fig:
        axes = np.atleast_1d(fig.subplots(1, len(columns), sharey=True))
        for i, (ax, (title, values)) in enumerate(zip(axes, columns, strict=True)):
            y = _bars_h(ax, causes)
            ax.barh(y, values, height=0.65, color=COLOURS["wasted"], linewidth=0)
            ax.set_title(title)
            total = float(np.nansum(values))
            for yi, v in zip(y, values, strict=True):
                if total > 0 and v > 0:
                    ax.text(v, yi, f" {_pct(v / total)}", va="center", ha="left", fontsize=7.5, color=MUTED)
            ax.set_xlim(0, max(float(np.nanmax(values)) if len(values) else 0.0, 1e-9) * 1.3)
            if i:
                ax.tick_params(axis="y", length=0)
        return svg_of(fig, prefix)


def waste_by_type(types: Sequence[str], columns: Sequence[tuple[str, np.ndarray, np.ndarray]], prefix: str) -> str:
    """Used and wasted work by device type: one panel per resource (title, used, wasted)."""
    with figure(0.42 * len(types) + 1.5) as fig:
        axes = np.atleast_1d(fig.subplots(1, len(columns), sharey=True))
        for i, (ax, (title, used, wasted)) in enumerate(zip(axes, columns, strict=True)):
            y = _bars_h(ax, types)
            ax.barh(y, used, height=0.62, color=COLOURS["committed"], linewidth=0)
            ax.barh(y, wasted, left=used, height=0.62, color=COLOURS["wasted"], linewidth=0)
            total = used + wasted
            for yi, w, t in zip(y, wasted, total, strict=True):
                if t > 0:
                    ax.text(t, yi, f" {_pct(w / t)}", va="center", ha="left", fontsize=7.5, color=MUTED)
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


def bias(
    title: str,
    names: Sequence[str],
    shares: dict[str, np.ndarray],
    ratio: np.ndarray,
    low: np.ndarray,
    high: np.ndarray,
    prefix: str,
) -> str:
    """Five shares per group side by side, and the representation ratio with its 95% interval."""
    n = len(names)
    with figure(0.62 * n + 1.5) as fig:
        left, right = fig.subplots(1, 2, sharey=True, width_ratios=[2.2, 1])
        y = _bars_h(left, names)
        height = 0.8 / len(BIAS_SERIES)
        for j, (column, key, label) in enumerate(BIAS_SERIES):
            offset = (j - (len(BIAS_SERIES) - 1) / 2) * height
            left.barh(y + offset, np.nan_to_num(shares[column]), height=height * 0.92, color=COLOURS[key],
                      edgecolor=_edge(key), linewidth=0.5, label=label)
        left.set_title(f"Shares by {title}")
        left.xaxis.set_major_formatter(lambda v, _: f"{v:.0%}")
        left.set_xlim(0, None)
        right.axvline(1.0, color=COLOURS["fleet"], linewidth=1.2)
        finite = np.isfinite(ratio)
        err = np.vstack([ratio - low, high - ratio])
        right.errorbar(ratio[finite], y[finite], xerr=err[:, finite], fmt="o", color=COLOURS["committed"],
                       ecolor=INK, elinewidth=1.1, capsize=3, markersize=5)
        for yi, r in zip(y, ratio, strict=True):
            if np.isfinite(r):
                right.text(r, yi - 0.3, f"{r:.2f}", ha="center", va="bottom", fontsize=7.5, color=INK)
        right.set_title("Report share / fleet share")
        top = np.nanmax(high[np.isfinite(high)]) if np.isfinite(high).any() else 1.0
        right.set_xlim(0, max(1.5, float(top) * 1.12))
        right.tick_params(axis="y", length=0)
        fig.legend(loc="outside upper left", ncols=5, handles=[
            Patch(facecolor=COLOURS[k], edgecolor=_edge(k), label=lab) for _, k, lab in BIAS_SERIES])
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
            y = _bars_h(ax, names)
            never = np.nan_to_num(never)
            ax.barh(y, 1 - never, height=0.62, color=COLOURS["committed"], linewidth=0)
            ax.barh(y, never, left=1 - never, height=0.62, color=COLOURS["fleet"], linewidth=0)
            for yi, v in zip(y, never, strict=True):
                ax.text(1.0, yi, f" {_pct(v)}", va="center", ha="left", fontsize=7.5, color=INK)
            ax.set_xlim(0, 1.22)
            ax.set_xticks([0, 0.5, 1], ["0", "50%", "100%"])
            ax.set_title(title)
            ax.grid(axis="x", visible=False)
        fig.legend(handles=[Patch(color=COLOURS["committed"], label="reported at least once"),
                            Patch(color=COLOURS["fleet"], label="never reported (label)")],
                   loc="outside upper left", ncols=2)
        return svg_of(fig, prefix)


# ------------------------------------------------------------------------------ survival

MAX_POINTS = 400
"""Curves with more steps are drawn on a grid of this many times (tables stay exact)."""


def _curve(s: Survival, end_s: float) -> tuple[np.ndarray, np.ndarray, np.ndarray, np.ndarray]:
    steps = s.time[s.change_points()]
    steps = steps[steps <= end_s]
    if steps.size > MAX_POINTS:
        steps = np.linspace(0.0, end_s, MAX_POINTS)
    t = np.concatenate([[0.0], steps, [end_s]])
    low, high = s.band_at(t)
    return t, s.at(t), low, high


def survival(curves: Sequence[tuple[str, Survival, float]], prefix: str) -> str:
    """Small multiples: each device type's survival curve and band, the others in grey behind it."""
    n = len(curves)
    cols = 2 if n > 1 else 1
    rows = int(np.ceil(n / cols))
    drawn = [(name, _curve(s, end)) for name, s, end in curves]
    floor = min((float(np.min(c[2])) for _, c in drawn if c[2].size), default=0.0)
    floor = max(0.0, np.floor(floor * 20) / 20 - 0.05)
    x_end = max((end for _, _, end in curves), default=1.0) / 60.0
    with figure(2.2 * rows + 0.9) as fig:
        axes = np.atleast_1d(fig.subplots(rows, cols, sharex=True, sharey=True)).ravel()
        for i, (ax, (name, (t, sv, low, high))) in enumerate(zip(axes, drawn, strict=False)):
            for j, (_, (t2, s2, _, _)) in enumerate(drawn):
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


# ------------------------------------------------------------------------------ cost


def cost(types: Sequence[str], panels: Sequence[tuple[str, np.ndarray, np.ndarray]], prefix: str) -> str:
    """Per device type, the median (bar) and p90 (line to a tick) of a per-participation cost."""
    with figure(0.42 * len(types) + 1.4) as fig:
        axes = np.atleast_1d(fig.subplots(1, len(panels), sharey=True))
        for i, (ax, (title, p50, p90)) in enumerate(zip(axes, panels, strict=True)):
            y = _bars_h(ax, types)
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


# ------------------------------------------------------------------------------ load


def load(
    n_hours: int,
    start: datetime,
    checkins_per_s: np.ndarray,
    peak_working: np.ndarray,
    mean_working: float | None,
    warm_hours: int,
    prefix: str,
) -> str:
    """Check-ins per second by hour above the peak number of devices working in each hour."""
    with figure(4.0) as fig:
        top, bottom = fig.subplots(2, 1, sharex=True)
        edges = np.arange(n_hours + 1)
        top.fill_between(edges, np.append(checkins_per_s, checkins_per_s[-1:]), step="post",
                         color=COLOURS["eligible"], alpha=0.35, linewidth=0)
        top.step(edges, np.append(checkins_per_s, checkins_per_s[-1:]), where="post", color=COLOURS["eligible"],
                 linewidth=1.2)
        top.set_ylabel("check-ins per second")
        top_c, _ = _scale([checkins_per_s], warm_hours)
        top.set_ylim(0, top_c)
        _mark_off_scale(top, checkins_per_s, top_c)
        top.set_title("Check-ins reaching the server (mean per hour)")
        _time_axis(top, n_hours, start, labels=False)
        bottom.stairs(peak_working, edges, fill=True, color=COLOURS["accepted"], linewidth=0,
                      label="peak devices working in the hour")
        if mean_working is not None:
            bottom.axhline(mean_working, color=INK, linestyle="--", linewidth=1.0,
                           label=f"mean over the run ({mean_working:.1f})")
        bottom.set_ylabel("devices")
        bottom.set_title("Devices working at once")
        bottom.legend(loc="upper right", ncols=2)
        top_w, _ = _scale([peak_working], warm_hours)
        bottom.set_ylim(0, top_w * 1.2)
        _mark_off_scale(bottom, peak_working, top_w * 1.2)
        _time_axis(bottom, n_hours, start, labels=True)
        bottom.set_xlabel("simulated time (UTC)")
        return svg_of(fig, prefix)
