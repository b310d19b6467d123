"""The Markdown report: the page's sections in words and tables, for pasting into a review.

Names from the fleet file are escaped so a Markdown renderer shows them as text: every
character that can start Markdown or HTML markup is backslash-escaped (CommonMark allows a
backslash before any ASCII punctuation), and line breaks inside a name become spaces.
"""

from __future__ import annotations

from collections.abc import Sequence

from .model import Part, Section, Table, format_value

__all__ = ["render_markdown", "render_markdown_several", "md_escape"]

_SPECIAL = set("\\`*_{}[]<>#+!|~&$")


def md_escape(text: object) -> str:
    """Text that Markdown renders literally (inline, and inside a table cell)."""
    out = []
    for ch in str(text):
        if ch in "\r\n\t\v\f":
            out.append(" ")
        elif ch in _SPECIAL:
            out.append("\\" + ch)
        else:
            out.append(ch)
    return "".join(out)


def _table(table: Table) -> list[str]:
    labels = [f"{c.group} {c.label}" if c.group else c.label for c in table.columns]
    align = [":--" if c.kind == "text" else "--:" for c in table.columns]
    lines = [f"*{md_escape(table.caption)}*", "",
             "| " + " | ".join(md_escape(label) for label in labels) + " |",
             "| " + " | ".join(align) + " |"]
    for row in table.rows:
        cells = (md_escape(format_value(v, c.kind)) for c, v in zip(table.columns, row, strict=True))
        lines.append("| " + " | ".join(cells) + " |")
    return lines + [""]


def _section(number: int | str, section: Section, level: int = 2) -> list[str]:
    lines = [f"{'#' * level} {number}. {md_escape(section.question)}", "", f"**{md_escape(section.answer)}**", ""]
    for tile in section.tiles:
        lines.append(f"- {md_escape(tile.label)}: {md_escape(tile.value)}")
    if section.tiles:
        lines.append("")
    for chart in section.charts:
        text = chart.alt + (f" {chart.caption}" if chart.caption else "")
        lines += [f"Figure (in report.html): {md_escape(text)}", ""]
    for note in section.notes:
        lines += [md_escape(note), ""]
    for table in section.tables:
        if table.detail and table.source:
            lines += [f"{md_escape(table.caption)}: {len(table.rows)} rows in `{table.source}`.", ""]
        else:
            lines += _table(table)
    return lines


def _opening(summary: dict, run_name: str, version: str, more: str = "") -> list[str]:
    return [
        f"# Fleet participation report: {md_escape(summary['scenario'])}",
        "",
        f"Seed {md_escape(summary['seed'])}, configuration {md_escape(summary['config_hash'])}, "
        f"{int(summary['devices']):,} devices, {summary['simulated_hours']:g} h from "
        f"{md_escape(summary['horizon_start'])}, policy {md_escape(summary['policy'])}.{more} "
        f"Written by fleetsim {md_escape(version)} from the run folder {md_escape(run_name)}.",
        "",
        "> Simulated figures from a model of a fleet, not measurements: read the caution (last section) "
        "before acting on them.",
        "",
    ]


def render_markdown(sections: Sequence[Section], summary: dict, run_name: str, version: str) -> str:
    """The whole Markdown document as a string."""
    lines = _opening(summary, run_name, version)
    for i, s in enumerate(sections):
        lines.append(f"{i + 1}. {md_escape(s.question)}")
    lines.append("")
    for i, s in enumerate(sections):
        lines += _section(i + 1, s)
    return "\n".join(lines).rstrip() + "\n"


def render_markdown_several(opening: Sequence[Section], parts: Sequence[Part], closing: Sequence[Section],
                            summary: dict, run_name: str, version: str) -> str:
    """The Markdown of a run of several workloads: the opening sections, each workload's report one heading
    level down under the workload's name, then the closing sections."""
    names = ", ".join(md_escape(p.name) for p in parts)
    lines = _opening(summary, run_name, version, f" {len(parts)} workloads: {names}.")
    contents: list[str] = []
    body: list[str] = []
    number = 0
    for s in opening:
        number += 1
        contents.append(f"{number}. {md_escape(s.question)}")
        body += _section(number, s)
    for part in parts:
        number += 1
        heading = f"Workload: {md_escape(part.name)}"
        indent = " " * len(f"{number}. ")
        contents.append(f"{number}. {heading}")
        contents += [f"{indent}{i + 1}. {md_escape(s.question)}" for i, s in enumerate(part.sections)]
        body += [f"## {number}. {heading}", "", md_escape(part.intro), ""]
        for i, s in enumerate(part.sections):
            body += _section(f"{number}.{i + 1}", s, level=3)
    for s in closing:
        number += 1
        contents.append(f"{number}. {md_escape(s.question)}")
        body += _section(number, s)
    return "\n".join(lines + contents + [""] + body).rstrip() + "\n"
