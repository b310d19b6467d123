"""Every public name is in the doc that owns it, in backticks: a name cannot change without its doc.

The names are collected from the code and from a small real run, never from a list kept
here: the commands and options (the typer app), the fleet file's keys and fixed values (the
pydantic models), the event log's words and columns (fleetsim.events and the run), the keys
of summary.json and the tables' names and columns (the run), and the built-in policies with
the plug-in interface. Group names (device types, regions) are the user's own data, not
names, and are left out. The reverse check: a name in backticks in docs/metrics.md's lists of
table and event-log columns must still exist in a run.
"""

from __future__ import annotations

import dataclasses
import inspect
import re
import typing
from functools import cache
from pathlib import Path
from typing import Any, NamedTuple

import pytest
import typer
from pydantic import BaseModel

import fleetsim
from fleetsim.cli.app import app
from fleetsim.config import Config, example_path, load_config
from fleetsim.events import (
    CAUSES,
    OUTCOMES,
    PARTICIPATION_COLUMNS,
    PHASES,
    ROUND_COLUMNS,
    ROUND_STATUS,
    WASTE_CAUSES,
    json_key,
)
from fleetsim.output import event_frame
from fleetsim.policies import BUILTIN_POLICIES, Candidates, RoundView, SelectionPolicy

DOCS = Path(__file__).resolve().parents[1] / "docs"

COMMAND_DOCS = {
    "run": "fleet-file.md",
    "check": "fleet-file.md",
    "schema": "fleet-file.md",
    "policies": "fleet-file.md",
    "report": "report.md",
    "sweep": "studies.md",
    "compare": "studies.md",
    "telemetry": "telemetry.md",
    "fit": "fit.md",
    "impact": "impact.md",
}
"""The doc that owns each command and its options (a new command must be given one here)."""

NOT_PUBLIC = {"self", "fleet_arrays"}
"""Constructor parameters of Candidates the engine fills in; a policy never sees them."""

VALUE_COLUMNS = ("scope", "grouping", "data_quartile")
"""Table columns whose values are names of ours (not the user's groups nor numbers)."""


class Name(NamedTuple):
    name: str
    doc: str  # file under docs/
    what: str  # where the name comes from, for the failure message


# ---------------------------------------------------------------------------- reading docs

_SPAN = re.compile(r"`([^`\n]+)`")
_PARTS = re.compile(r"[\s,;()\[\]{}=/'\"]+")
_PIECES = re.compile(r"[.:]+")


def tokens(text: str) -> set[str]:
    """What a doc writes in backticks: each span whole, its words, and their dotted pieces
    (`rounds.ended_by.selection_timeout` gives the path, `rounds`, `ended_by`, ...)."""
    found: set[str] = set()
    for span in _SPAN.findall(text):
        found.add(span.strip())
        for part in filter(None, _PARTS.split(span)):
            found.add(part)
            found.update(piece for piece in _PIECES.split(part) if piece)
    return found


@cache
def doc_text(doc: str) -> str:
    return (DOCS / doc).read_text(encoding="utf-8")


def missing(names: list[Name], texts: dict[str, str] | None = None) -> list[str]:
    """One line per name not in backticks in its doc (``texts``: doc -> text, else read)."""
    seen: dict[str, set[str]] = {}
    lines = []
    for n in names:
        if n.doc not in seen:
            seen[n.doc] = tokens(texts[n.doc] if texts is not None else doc_text(n.doc))
        if n.name not in seen[n.doc]:
            lines.append(f"`{n.name}` ({n.what}) is not in backticks in docs/{n.doc}")
    return sorted(set(lines))


# ---------------------------------------------------------------------------- the names


@pytest.fixture(scope="module")
def run() -> fleetsim.Result:
    config = load_config(example_path(), ["fleet.devices=2000", "horizon.duration=6h"])
    return fleetsim.simulate(config, seed=1)


def _group_names(result: fleetsim.Result) -> set[str]:
    return set(result.fleet.type_names) | set(result.fleet.region_names)


def cli_names() -> list[Name]:
    group = typer.main.get_command(app)
    commands: dict[str, Any] = group.commands  # type: ignore[attr-defined]
    names = []
    for command_name, command in commands.items():
        doc = COMMAND_DOCS.get(command_name, "(no doc: add the command to COMMAND_DOCS)")
        names.append(Name(command_name, doc, "command"))
        for param in command.params:
            if param.param_type_name == "option":
                names += [Name(opt, doc, f"option of fleetsim {command_name}")
                          for opt in (*param.opts, *param.secondary_opts)]
    return names


def _models_in(annotation: Any) -> list[type[BaseModel]]:
    if isinstance(annotation, type) and issubclass(annotation, BaseModel):
        return [annotation]
    return [m for arg in typing.get_args(annotation) for m in _models_in(arg)]


def _literals_in(annotation: Any) -> list[str]:
    if typing.get_origin(annotation) is typing.Literal:
        return [v for v in typing.get_args(annotation) if isinstance(v, str)]
    return [v for arg in typing.get_args(annotation) for v in _literals_in(arg)]


SECTION_DOCS = {"impact.": "impact.md"}
"""Fleet file sections whose keys a doc of their own documents (fleet-file.md names the section)."""


def config_names(model: type[BaseModel] = Config, path: str = "") -> list[Name]:
    """Every key of the fleet file, nested, and every fixed word a key takes (Literal values)."""
    names = []
    doc = next((d for prefix, d in SECTION_DOCS.items() if path.startswith(prefix)), "fleet-file.md")
    for field_name, field in model.model_fields.items():
        key = field.alias or field_name
        names.append(Name(key, doc, f"fleet file key {path}{key}"))
        names += [Name(word, doc, f"a value of {path}{key}") for word in _literals_in(field.annotation)]
        for sub in _models_in(field.annotation):
            names += config_names(sub, f"{path}{key}.")
    return names


def vocabulary_names() -> list[Name]:
    """The words of the event log and tables, and their summary.json key forms."""
    words = {"round status": ROUND_STATUS, "outcome": OUTCOMES, "dropout cause": CAUSES,
             "dropout phase": PHASES, "waste cause": WASTE_CAUSES}
    names = [Name(w, "metrics.md", kind) for kind, group in words.items() for w in group]
    keyed = (*ROUND_STATUS, *OUTCOMES, *CAUSES[1:], *WASTE_CAUSES[1:])
    return names + [Name(json_key(w), "metrics.md", f"summary.json key form of {w}") for w in keyed]


def event_log_names(result: fleetsim.Result) -> list[Name]:
    columns = {
        "event log column (PARTICIPATION_COLUMNS)": PARTICIPATION_COLUMNS,
        "round column (ROUND_COLUMNS)": ROUND_COLUMNS,
        "events.parquet column": event_frame(result).columns,
        "census.parquet column": result.census.columns,
    }
    return [Name(str(c), "metrics.md", kind) for kind, group in columns.items() for c in group]


def summary_names(result: fleetsim.Result) -> list[Name]:
    data = _group_names(result)
    names = []

    def walk(mapping: dict[str, Any], path: str) -> None:
        for key, value in mapping.items():
            here = f"{path}.{'<group>' if key in data else key}".lstrip(".")
            if key not in data:
                names.append(Name(key, "metrics.md", f"summary.json key {here}"))
            if isinstance(value, dict):
                walk(value, here)

    walk(result.summary, "")
    return names


def table_names(result: fleetsim.Result) -> list[Name]:
    data = _group_names(result)
    names = []
    for table, frame in result.tables.items():
        names.append(Name(f"{table}.csv", "metrics.md", "table"))
        names += [Name(str(c), "metrics.md", f"column of {table}.csv") for c in frame.columns if c not in data]
        for column in VALUE_COLUMNS:
            if column in frame.columns:
                names += [Name(str(v), "metrics.md", f"value of {table}.csv's {column}")
                          for v in frame[column].dropna().unique() if str(v)]
    return names


def policy_names() -> list[Name]:
    names = []
    for policy, cls in BUILTIN_POLICIES.items():
        names.append(Name(policy, "policies.md", "built-in policy"))
        names += [Name(p, "policies.md", f"parameter of {policy}")
                  for p in inspect.signature(cls.__init__).parameters if p not in NOT_PUBLIC]
    public = [n for n in (*vars(SelectionPolicy), *SelectionPolicy.__annotations__) if not n.startswith("_")]
    names += [Name(n, "policies.md", "SelectionPolicy attribute") for n in public]
    names += [Name(f.name, "policies.md", "RoundView field") for f in dataclasses.fields(RoundView)]
    candidates = {*inspect.signature(Candidates.__init__).parameters, *Candidates.__annotations__,
                  *(n for n in vars(Candidates) if not n.startswith("_"))} - NOT_PUBLIC
    names += [Name(n, "policies.md", "Candidates attribute") for n in sorted(candidates)]
    return names


# ---------------------------------------------------------------------------- reverse check

_NAME_LIKE = re.compile(r"[A-Za-z_][A-Za-z0-9_\-:<>]*")
"""A span that reads as a column name (dotted paths such as `scipy.stats.chisquare` are not)."""


def _section(text: str, heading: str) -> str:
    start = text.index(heading)
    end = text.find("\n## ", start + len(heading))
    return text[start:] if end < 0 else text[start:end]


def stale_names(text: str, result: fleetsim.Result) -> list[str]:
    """Names in backticks in metrics.md's column lists that a run no longer has.

    In the table of tables, a `x.csv` must be a table, and any other name in a row must be a
    column or a value of some table, a summary.json key or a fleet file key (rows refer to one
    another and to settings); in the event log's table, every column named must be a column of
    events.parquet.
    """
    tables = result.tables
    known = {str(c) for frame in tables.values() for c in frame.columns}
    for frame in tables.values():
        for column in frame.columns:
            if frame[column].dtype == object or str(frame[column].dtype) == "category":
                known.update(str(v) for v in frame[column].dropna().unique())
    known |= {n.name for n in summary_names(result)} | {n.name for n in config_names()}
    known |= {str(c) for c in event_frame(result).columns}
    problems = []
    for row in _section(text, "## tables/").splitlines():
        if not row.startswith("| `"):
            continue
        cells = row.split("|")
        files = _SPAN.findall(cells[1])
        for span in _SPAN.findall(row):
            if span.endswith(".csv"):
                if span[: -len(".csv")] not in tables:
                    problems.append(f"docs/metrics.md names table `{span}`, which a run does not write")
            elif _NAME_LIKE.fullmatch(span) and span not in known:
                problems.append(f"docs/metrics.md, row of {', '.join(files)}: `{span}` is in no run's tables")
    events = set(event_frame(result).columns)
    for row in _section(text, "## The event log").splitlines():
        if row.startswith("| `"):
            for span in _SPAN.findall(row.split("|")[1]):
                if span not in events:
                    problems.append(f"docs/metrics.md, event log: `{span}` is not a column of events.parquet")
    return problems


# ---------------------------------------------------------------------------- the tests


def test_every_command_has_an_owning_doc():
    commands = typer.main.get_command(app).commands  # type: ignore[attr-defined]
    assert set(commands) <= set(COMMAND_DOCS), sorted(set(commands) - set(COMMAND_DOCS))


def test_commands_and_options_are_documented():
    problems = missing(cli_names())
    assert not problems, "\n".join(problems)


def test_fleet_file_keys_and_words_are_documented():
    problems = missing(config_names())
    assert not problems, "\n".join(problems)


def test_event_log_words_and_columns_are_documented(run):
    problems = missing(vocabulary_names() + event_log_names(run))
    assert not problems, "\n".join(problems)


def test_summary_keys_and_table_columns_are_documented(run):
    problems = missing(summary_names(run) + table_names(run))
    assert not problems, "\n".join(problems)


def test_policies_and_the_plugin_interface_are_documented():
    problems = missing(policy_names())
    assert not problems, "\n".join(problems)


def test_metrics_doc_names_no_column_a_run_lacks(run):
    problems = stale_names(doc_text("metrics.md"), run)
    assert not problems, "\n".join(problems)


def test_the_checks_can_fail(run):
    # A word renamed in the code but not in its doc is reported with the doc it belongs in.
    renamed = [n._replace(name="report-deadline-renamed") if n.name == "report-deadline" else n
               for n in vocabulary_names()]
    assert missing(renamed) == [
        "`report-deadline-renamed` (round status) is not in backticks in docs/metrics.md",
        "`report-deadline-renamed` (waste cause) is not in backticks in docs/metrics.md",
    ]
    # A doc that lost a name is caught too (the name dropped from a copy of the text).
    text = doc_text("metrics.md").replace("`bytes_p90`", "bytes_p90")
    assert any("`bytes_p90` (column of device_cost.csv)" in line
               for line in missing(table_names(run), {"metrics.md": text}))
    # A column the tables no longer have, still listed in the doc, is reported by row.
    stale = text.replace("`bytes_p50`", "`megabytes_p50`").replace(
        "| `hourly.csv` | hour of the horizon | ", "| `hourly.csv` | hour of the horizon | `eligible:<region>`, ")
    problems = stale_names(stale, run)
    assert "docs/metrics.md, row of device_cost.csv: `megabytes_p50` is in no run's tables" in problems
    assert "docs/metrics.md, row of hourly.csv: `eligible:<region>` is in no run's tables" in problems
    assert not stale_names(doc_text("metrics.md"), run)
