"""The report's colours, each with one meaning in every figure, and the figure style.

The eight hues are the colour-blind-safe set of M. Okabe and K. Ito, "Color Universal
Design" (2008; cited from memory), plus a neutral grey. The page's own chrome (text, rules,
panels) uses only greys, so a hue on the page always means what :data:`MEANINGS` says.
"""

from __future__ import annotations

import io
import re
from collections.abc import Iterator
from contextlib import contextmanager
from typing import Any

import matplotlib
from matplotlib.backends.backend_agg import FigureCanvasAgg
from matplotlib.figure import Figure

__all__ = ["COLOURS", "MEANINGS", "HATCHES", "INK", "MUTED", "figure", "svg_of", "prefix_ids", "short", "swatch_css",
           "fill"]

COLOURS = {
    "committed": "#009E73",  # bluish green
    "report_deadline": "#D55E00",    # vermillion
    "selection_timeout": "#E69F00",  # orange
    "server_outage": "#000000",      # black
    "unmasking_failed": "#D55E00",   # vermillion, hatched white (see HATCHES)
    "eligible": "#56B4E9",   # sky blue
    "accepted": "#0072B2",   # blue
    "wasted": "#CC79A7",     # reddish purple
    "weight": "#F0E442",     # yellow (drawn with a dark edge: it is pale on white)
    "fleet": "#A0A0A0",      # neutral grey
}

MEANINGS = {
    "committed": "reports used by a committed round, and the rounds that committed",
    "report_deadline": "rounds the report deadline ended with too few reports",
    "selection_timeout": "rounds the selection timeout ended with too few devices accepted",
    "server_outage": "rounds cut by a server outage",
    "unmasking_failed": "rounds secure aggregation could not unmask: too few devices answered (hatched)",
    "eligible": "eligible devices (and the check-ins they make)",
    "accepted": "accepted devices and the tasks they run",
    "wasted": "device work no committed round used (straggler waste)",
    "weight": "aggregation weight (FedAvg weights each update by the distinct examples it trained on)",
    "fleet": "the whole fleet, devices that never reported, and other groups for comparison",
}

HATCHES = {"unmasking_failed": "///"}
"""Keys drawn in their colour with white hatching: a related kind of data in a colour's family
(rounds that failed the unmasking beside those the report deadline ended)."""


def fill(key: str) -> dict[str, Any]:
    """matplotlib keyword arguments filling a patch with ``key``'s colour (and hatching)."""
    if key in HATCHES:
        return {"facecolor": COLOURS[key], "edgecolor": "white", "hatch": HATCHES[key], "linewidth": 0}
    return {"color": COLOURS[key], "linewidth": 0}


def swatch_css(key: str) -> str:
    """The CSS background of ``key``'s swatch in the page's colour key."""
    colour = COLOURS[key]
    if key in HATCHES:
        return f"background:repeating-linear-gradient(135deg,{colour} 0 3px,#ffffff 3px 4.5px)"
    return f"background:{colour}"


INK = "#1f2933"
"""Text, axes and reference lines (percentiles, limits)."""

MUTED = "#616e7c"
WEIGHT_EDGE = "#7a6f00"

_RC: Any = {
    "font.family": "sans-serif",
    "font.sans-serif": ["DejaVu Sans"],
    "font.size": 9.5,
    "axes.titlesize": 10,
    "axes.titleweight": "bold",
    "axes.titlelocation": "left",
    "axes.labelsize": 9,
    "axes.labelcolor": INK,
    "axes.edgecolor": "#9aa5b1",
    "axes.linewidth": 0.8,
    "axes.spines.top": False,
    "axes.spines.right": False,
    "axes.grid": True,
    "axes.axisbelow": True,
    "grid.color": "#e4e7eb",
    "grid.linewidth": 0.7,
    "xtick.color": MUTED,
    "ytick.color": MUTED,
    "xtick.labelcolor": INK,
    "ytick.labelcolor": INK,
    "xtick.labelsize": 8.5,
    "ytick.labelsize": 8.5,
    "legend.frameon": False,
    "legend.fontsize": 8.5,
    "text.color": INK,
    # Names come from the fleet file: never read "$...$" in them as mathtext.
    "text.parse_math": False,
    "text.usetex": False,
    # Text stays text: small files, searchable and selectable, read by screen readers. matplotlib
    # escapes it (& < >) on output; a browser without DejaVu Sans falls back to a narrower sans.
    "svg.fonttype": "none",
    "svg.hashsalt": "fleetsim-report",  # stable ids: the same run folder gives the same file
    "svg.image_inline": True,
}

FIGURE_WIDTH_IN = 9.0


@contextmanager
def figure(height_in: float, width_in: float = FIGURE_WIDTH_IN) -> Iterator[Figure]:
    """A matplotlib Figure on an Agg canvas with the report's style (no global pyplot state)."""
    with matplotlib.rc_context(_RC):
        fig = Figure(figsize=(width_in, height_in), layout="constrained")
        FigureCanvasAgg(fig)
        yield fig


_ID = re.compile(r'\bid="([^"]+)"')
_HREF = re.compile(r'(xlink:href|href)="#([^"]+)"')
_URL = re.compile(r"url\(#([^)]+)\)")
_COMMENT = re.compile(r"<!--.*?-->", re.DOTALL)


def svg_of(fig: Figure, prefix: str) -> str:
    """The figure as an ``<svg>`` element ready to inline in HTML.

    The XML prolog, DOCTYPE, metadata and comments are dropped (matplotlib's comments repeat
    label text); every id gets ``prefix`` so several figures on one page never share an id;
    fixed width and height give way to the viewBox so the figure scales with the page.
    """
    with matplotlib.rc_context(_RC):
        buffer = io.StringIO()
        fig.savefig(buffer, format="svg", metadata={"Date": None, "Creator": None, "Format": None, "Type": None})
    text = buffer.getvalue()
    text = text[text.index("<svg"):]
    text = _COMMENT.sub("", text)
    text = _ID.sub(lambda m: f'id="{prefix}-{m.group(1)}"', text)
    text = _HREF.sub(lambda m: f'{m.group(1)}="#{prefix}-{m.group(2)}"', text)
    text = _URL.sub(lambda m: f"url(#{prefix}-{m.group(1)})", text)
    head_end = text.index(">")
    head = re.sub(r'\s(width|height)="[^"]*"', "", text[:head_end])
    return head + text[head_end:]


def prefix_ids(svg: str, prefix: str) -> str:
    """``svg`` (from :func:`svg_of`) with ``prefix-`` before every id and every reference to one.

    A page holding several workloads' reports shows the same figure once per workload; the
    prefix keeps their ids apart.
    """
    text = _ID.sub(lambda m: f'id="{prefix}-{m.group(1)}"', svg)
    text = _HREF.sub(lambda m: f'{m.group(1)}="#{prefix}-{m.group(2)}"', text)
    return _URL.sub(lambda m: f"url(#{prefix}-{m.group(1)})", text)


def short(name: str, limit: int = 34) -> str:
    """A name cut to ``limit`` characters for figure labels (tables show it whole)."""
    name = " ".join(str(name).split())
    return name if len(name) <= limit else name[: limit - 1] + "\u2026"
