"""The HTML page: one self-contained file, no script, nothing fetched from anywhere.

Every piece of text is escaped on the way in (:func:`esc`); only the :class:`Markup` this
module builds itself, and the figures' SVG (whose text matplotlib escapes and whose comments
:func:`fleetsim.report.style.svg_of` drops), go onto the page as markup. A Content Security
Policy forbids scripts and every network fetch, so even a browser that met hostile markup
would neither run it nor send a request.
"""

from __future__ import annotations

import html
from collections.abc import Iterable, Sequence

from .model import Chart, Part, Section, Table, format_value, raw_value
from .style import COLOURS, MEANINGS, swatch_css

__all__ = ["render_html", "render_html_several", "Markup", "esc"]

CSP = "default-src 'none'; style-src 'unsafe-inline'; img-src data:; base-uri 'none'; form-action 'none'"


class Markup(str):
    """Text that is already HTML (built here from escaped parts)."""


def esc(value: object) -> Markup:
    """Escape text for HTML content or a quoted attribute; Markup passes through."""
    if isinstance(value, Markup):
        return value
    return Markup(html.escape(str(value), quote=True))


def tag(name: str, *children: object, **attrs: object) -> Markup:
    """``<name attrs>children</name>`` with every attribute value and plain child escaped.

    Attribute names use ``_`` for ``-`` (``data_key`` -> ``data-key``); ``class_`` -> ``class``.
    """
    parts = [name]
    for key, value in attrs.items():
        if value is None or value is False:
            continue
        attr = key.rstrip("_").replace("_", "-")
        parts.append(attr if value is True else f'{attr}="{esc(value)}"')
    return Markup(f"<{' '.join(parts)}>" + "".join(esc(c) for c in children) + f"</{name}>")


def join(items: Iterable[object]) -> Markup:
    return Markup("".join(esc(i) for i in items))


CSS = """
:root { --ink: #1f2933; --muted: #616e7c; --rule: #dfe3e8; --panel: #f4f6f8; --link: #1f2933; }
* { box-sizing: border-box; }
html { -webkit-text-size-adjust: 100%; }
body { margin: 0; color: var(--ink); background: #fff;
  font: 15px/1.5 system-ui, -apple-system, "Segoe UI", Roboto, "Noto Sans", "Liberation Sans", "DejaVu Sans",
  sans-serif; }
.masthead { border-bottom: 1px solid var(--rule); background: var(--panel); }
.wrap { max-width: 1240px; margin: 0 auto; padding: 22px 36px 18px; }
.kicker { margin: 0; font-size: 12px; letter-spacing: .08em; text-transform: uppercase; color: var(--muted); }
h1 { margin: 4px 0 8px; font-size: 25px; line-height: 1.25; overflow-wrap: anywhere; }
.facts { margin: 0; display: flex; flex-wrap: wrap; gap: 4px 22px; font-size: 13.5px; color: var(--muted); }
.facts b { color: var(--ink); font-weight: 600; overflow-wrap: anywhere; }
.model-note { margin: 10px 0 0; font-size: 13.5px; }
.layout { max-width: 1240px; margin: 0 auto; padding: 8px 36px 40px; display: grid;
  grid-template-columns: 230px minmax(0, 1fr); gap: 36px; }
nav.toc { position: sticky; top: 0; align-self: start; padding-top: 22px; font-size: 13.5px;
  max-height: 100vh; overflow-y: auto; }
.toc-title { margin: 0 0 6px; font-size: 12px; letter-spacing: .08em; text-transform: uppercase; color: var(--muted); }
nav.toc ol { list-style: none; margin: 0 0 22px; padding: 0; }
nav.toc li a { display: block; padding: 3px 0 3px 10px; border-left: 2px solid var(--rule); color: var(--link);
  text-decoration: none; }
nav.toc li a:hover { border-left-color: var(--ink); }
.key ul { list-style: none; margin: 0; padding: 0; font-size: 12.5px; color: var(--muted); }
.key li { display: grid; grid-template-columns: 16px 1fr; gap: 8px; align-items: start; margin: 0 0 6px; }
.swatch { display: inline-block; width: 14px; height: 14px; margin-top: 2px; border-radius: 2px;
  border: 1px solid rgba(0,0,0,.25); }
main { min-width: 0; }
section { padding: 22px 0 10px; border-bottom: 1px solid var(--rule); }
section:last-child { border-bottom: none; }
h2 { margin: 0 0 6px; font-size: 19px; line-height: 1.3; }
h2 .qn { display: inline-block; min-width: 1.6em; color: var(--muted); font-weight: 500; }
.answer { margin: 0 0 16px; font-size: 15.5px; font-weight: 600; max-width: 78ch; overflow-wrap: anywhere; }
.tiles { display: grid; grid-template-columns: repeat(auto-fit, minmax(180px, 1fr)); gap: 12px; margin: 0 0 16px; }
.tile { background: var(--panel); border-radius: 6px; padding: 10px 14px; }
.tile .v { display: block; font-size: 22px; font-weight: 650; font-variant-numeric: tabular-nums; }
.tile .l { font-size: 12.5px; color: var(--muted); }
figure { margin: 0 0 16px; }
figure svg { display: block; width: 100%; height: auto; max-width: 900px; }
figcaption { max-width: 900px; margin-top: 4px; font-size: 12.5px; color: var(--muted); }
.note { max-width: 78ch; font-size: 13.5px; color: var(--muted); }
.scroll { overflow-x: auto; margin: 0 0 14px; }
table.numbers { border-collapse: collapse; font-size: 12.5px; font-variant-numeric: tabular-nums; }
table.numbers caption { caption-side: top; text-align: left; padding: 0 0 4px; font-size: 13px; color: var(--muted); }
table.numbers th, table.numbers td { padding: 3px 10px; border-bottom: 1px solid var(--rule); text-align: right;
  vertical-align: top; }
table.numbers th { font-weight: 600; background: var(--panel); }
table.numbers .t { text-align: left; overflow-wrap: break-word; max-width: 46ch; }
table.numbers td.t:first-child { white-space: nowrap; }
table.numbers th.group { text-align: center; border-bottom: 1px solid #c5ccd3; }
details { margin: 0 0 14px; }
details summary { cursor: pointer; font-size: 13px; color: var(--muted); margin-bottom: 6px; }
.caution { border-left: 4px solid var(--ink); background: var(--panel); padding: 12px 16px; }
footer { max-width: 1240px; margin: 0 auto; padding: 0 36px 32px; font-size: 12.5px; color: var(--muted); }
@media (max-width: 920px) {
  .layout { grid-template-columns: 1fr; gap: 0; }
  nav.toc { position: static; max-height: none; }
}
@media print {
  nav.toc { display: none; }
  .layout { display: block; }
  section { break-inside: avoid-page; }
}
"""


def _table(table: Table) -> Markup:
    grouped = any(c.group for c in table.columns)
    head_rows = []
    if grouped:
        cells, i = [], 0
        while i < len(table.columns):
            group = table.columns[i].group
            span = 1
            while i + span < len(table.columns) and table.columns[i + span].group == group:
                span += 1
            cells.append(tag("th", group, colspan=span if span > 1 else None, class_="group" if group else None,
                             scope="colgroup" if group else None))
            i += span
        head_rows.append(tag("tr", join(cells)))
    head_rows.append(tag("tr", join(
        tag("th", c.label, scope="col", data_key=c.key, data_group=c.group or None, data_kind=c.kind,
            class_="t" if c.kind == "text" else None) for c in table.columns)))
    body = join(
        tag("tr", join(
            tag("td", format_value(v, c.kind), data_value=raw_value(v), class_="t" if c.kind == "text" else None)
            for c, v in zip(table.columns, row, strict=True)))
        for row in table.rows
    )
    element = tag("table", tag("caption", table.caption), tag("thead", join(head_rows)), tag("tbody", body),
                  class_="numbers", data_table=table.id)
    return tag("div", element, class_="scroll")


def _chart(chart: Chart, label: str) -> Markup:
    # The SVG comes from matplotlib via style.svg_of; it holds no script and no external reference.
    svg = chart.svg.replace("<svg ", f'<svg role="img" aria-label="{esc(chart.alt)}" ', 1)
    return tag("figure", Markup(svg), tag("figcaption", chart.caption) if chart.caption else "",
               data_figure=label)


def _section(number: int | str, section: Section, level: int = 2) -> Markup:
    parts: list[object] = [
        tag(f"h{level}", tag("span", f"{number}", class_="qn"), section.question, id=f"h-{section.id}"),
        tag("p", section.answer, class_="answer"),
    ]
    if section.tiles:
        parts.append(tag("div", join(tag("div", tag("span", t.value, class_="v"), tag("span", t.label, class_="l"),
                                         class_="tile") for t in section.tiles), class_="tiles"))
    for i, chart in enumerate(section.charts):
        parts.append(_chart(chart, f"{section.id}-{i}"))
    for note in section.notes:
        parts.append(tag("p", note, class_="note"))
    shown = [t for t in section.tables if not t.detail]
    folded = [t for t in section.tables if t.detail]
    for t in shown:
        parts.append(_table(t))
    for t in folded:
        summary = f"Numbers behind the figure: {t.caption}" + (f" ({len(t.rows)} rows; also in {t.source})"
                                                                if t.source else f" ({len(t.rows)} rows)")
        parts.append(tag("details", tag("summary", summary), _table(t)))
    return tag("section", join(parts), id=f"s-{section.id}", aria_labelledby=f"h-{section.id}",
               class_="caution" if section.id == "caution" else None)


def _masthead(summary: dict, more: Sequence[tuple[str, str]] = ()) -> Markup:
    facts = [
        ("seed", str(summary["seed"])),
        ("configuration", str(summary["config_hash"])),
        ("devices", f"{int(summary['devices']):,}"),
        ("horizon", f"{summary['simulated_hours']:g} h from {summary['horizon_start']}"),
        ("policy", str(summary["policy"])),
        *more,
    ]
    return tag("header", tag("div",
        tag("p", "fleetsim \u00b7 fleet participation report", class_="kicker"),
        tag("h1", summary["scenario"]),
        tag("p", join(tag("span", f"{k} ", tag("b", v)) for k, v in facts), class_="facts"),
        tag("p", "Simulated figures from a model of a fleet, not measurements: read ",
            tag("a", "the caution", href="#s-caution"), " before acting on them.", class_="model-note"),
        class_="wrap"), class_="masthead")


def _document(summary: dict, masthead: Markup, questions: Markup, main: Markup, footer: str, version: str,
              css: str = CSS) -> str:
    """The page around its masthead, list of questions (``<li>`` items), main part and footer text."""
    toc = tag("nav",
        tag("p", "Questions", class_="toc-title"),
        tag("ol", questions),
        tag("div", tag("p", "Colours", class_="toc-title"),
            tag("ul", join(tag("li", tag("span", "", class_="swatch", style=swatch_css(k)), MEANINGS[k])
                           for k in COLOURS)), class_="key"),
        class_="toc", aria_label="Questions")
    head = join([
        Markup('<meta charset="utf-8">'),
        Markup(f'<meta http-equiv="Content-Security-Policy" content="{esc(CSP)}">'),
        Markup('<meta name="viewport" content="width=device-width, initial-scale=1">'),
        Markup('<meta name="color-scheme" content="light">'),
        Markup(f'<meta name="generator" content="fleetsim {esc(version)}">'),
        tag("title", f"Fleet participation report \u00b7 {summary['scenario']}"),
        Markup('<link rel="icon" href="data:,">'),
        tag("style", Markup(css)),
    ])
    body = join([masthead, tag("div", toc, tag("main", main), class_="layout"), tag("footer", footer)])
    return "<!DOCTYPE html>\n" + tag("html", tag("head", head), tag("body", body), lang="en") + "\n"


def _question(section: Section) -> Markup:
    return tag("li", tag("a", section.question, href=f"#s-{section.id}"))


def render_html(sections: Sequence[Section], summary: dict, run_name: str, version: str,
                footer: str | None = None) -> str:
    """The whole page as a string; ``footer`` replaces the footer's sentence on where the numbers come from."""
    main = join(_section(i + 1, s) for i, s in enumerate(sections))
    footer = f"Written by fleetsim {version} from the run folder {run_name}. " + (footer or (
        "Every figure is drawn from the numbers in the tables beside it, which come from summary.json, "
        "tables/ and events.parquet in that folder."))
    return _document(summary, _masthead(summary), join(_question(s) for s in sections), main, footer, version)


SEVERAL_CSS = """
section.part { padding: 30px 0 0; }
section.part > h2 { font-size: 22px; padding-bottom: 6px; border-bottom: 2px solid var(--ink); }
section.part > .note { margin: 8px 0 0; }
h3 { margin: 0 0 6px; font-size: 18px; line-height: 1.3; }
h3 .qn { display: inline-block; min-width: 2.6em; color: var(--muted); font-weight: 500; }
nav.toc ol ol { margin: 2px 0 8px 12px; }
nav.toc li.part > a { font-weight: 600; }
"""
"""Style added to the page of a run of several workloads (one workload's sections nest under its heading)."""


def _part(number: int, part: Part) -> Markup:
    """One workload's whole report: its heading, where it comes from, then its sections one level down."""
    inner = join(_section(f"{number}.{i + 1}", s, level=3) for i, s in enumerate(part.sections))
    return tag("section", tag("h2", tag("span", f"{number}", class_="qn"), f"Workload: {part.name}",
                              id=f"h-{part.id}"),
               tag("p", part.intro, class_="note"), inner,
               id=f"s-{part.id}", aria_labelledby=f"h-{part.id}", class_="part", data_workload=part.name)


def render_html_several(opening: Sequence[Section], parts: Sequence[Part], closing: Sequence[Section],
                        summary: dict, run_name: str, version: str) -> str:
    """The page of a run of several workloads: the opening sections, each workload's report, the closing ones."""
    main, questions = [], []
    number = 0
    for s in opening:
        number += 1
        main.append(_section(number, s))
        questions.append(_question(s))
    for part in parts:
        number += 1
        main.append(_part(number, part))
        questions.append(tag("li", tag("a", f"Workload: {part.name}", href=f"#s-{part.id}"),
                             tag("ol", join(_question(s) for s in part.sections)), class_="part"))
    for s in closing:
        number += 1
        main.append(_section(number, s))
        questions.append(_question(s))
    names = [p.name for p in parts]
    footer = (f"Written by fleetsim {version} from the run folder {run_name}. "
              "Every figure is drawn from the numbers in the tables beside it, which come from summary.json and "
              "tables/ in that folder and, for each workload, from summary.json, tables/ and events.parquet in its "
              "folder under workloads/.")
    masthead = _masthead(summary, [("workloads", f"{len(names)}: {', '.join(names)}")])
    return _document(summary, masthead, join(questions), join(main), footer, version, CSS + SEVERAL_CSS)
