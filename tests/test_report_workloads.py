"""The report of a run of several workloads: how they shared the fleet, checked against the
event log and the rounds table; each workload's own report inside it; unique ids; the
caution once; a single-workload report as before; one-line errors for broken folders."""

from __future__ import annotations

import json
import re
import shutil
from html.parser import HTMLParser
from pathlib import Path

import numpy as np
import pandas as pd
import pytest
import yaml
from typer.testing import CliRunner

import fleetsim
from fleetsim.cli import app
from fleetsim.config import build_config, example_path
from fleetsim.output import write_run
from fleetsim.report import render_report, write_report
from fleetsim.report.page import CSS, SEVERAL_CSS

SMALL = ["fleet.devices=4000", "horizon.duration=12h", "rounds.rest=4h", "rounds.target_reports=40",
         "rounds.min_reports=30"]
TYPING = {"workload": {"model_size": "8MB", "requires": ["idle", "charging"]},
          "rounds": {"target_reports": 20, "min_reports": 16}}
ODD = "typing <b>fast</b>"
SINGLE_SECTIONS = ["run", "headline", "over-time", "durations", "waste", "bias", "participation", "survival",
                   "cost", "load", "caution"]


def several(workloads: dict, rule: str, overrides: list[str]) -> fleetsim.Config:
    raw = yaml.safe_load(example_path().read_text(encoding="utf-8"))
    raw["workloads"] = workloads
    raw["sharing"] = {"rule": rule}
    return build_config(raw, source="several.yaml", overrides=overrides)


@pytest.fixture(scope="module")
def priority(tmp_path_factory: pytest.TempPathFactory) -> Path:
    """Two workloads by priority, their report written through the CLI."""
    config = several({"ranking": {}, "typing": TYPING}, "priority", SMALL)
    folder = write_run(fleetsim.simulate(config, seed=1), tmp_path_factory.mktemp("several") / "run")
    result = CliRunner().invoke(app, ["report", str(folder)])
    assert result.exit_code == 0, result.output
    return folder


@pytest.fixture(scope="module")
def shares(tmp_path_factory: pytest.TempPathFactory) -> Path:
    """Two workloads by shares (3:1), one with a name that is no file name."""
    config = several({"ranking": {"share": 3}, ODD: {**TYPING, "share": 1}}, "shares",
                     ["fleet.devices=3000", "horizon.duration=6h", *SMALL[2:]])
    folder = write_run(fleetsim.simulate(config, seed=2), tmp_path_factory.mktemp("shares") / "run")
    write_report(folder)
    return folder


class Page(HTMLParser):
    """Start tags, headings, answers and data tables of a page, each with the workload part it is in."""

    def __init__(self) -> None:
        super().__init__(convert_charrefs=True)
        self.tags: list[tuple[str, dict]] = []
        self.headings: list[tuple[str, str, str | None]] = []  # (tag, text, part)
        self.answers: list[tuple[str | None, str]] = []
        self.tables: dict[str, dict] = {}
        self.text: list[str] = []
        self._parts: list[str | None] = []
        self._capture: tuple[str, list[str]] | None = None
        self._table: dict | None = None
        self._row: list | None = None

    @property
    def part(self) -> str | None:
        return next((p for p in reversed(self._parts) if p is not None), None)

    def handle_starttag(self, tag: str, attrs: list[tuple[str, str | None]]) -> None:
        a = dict(attrs)
        self.tags.append((tag, a))
        if tag == "section":
            self._parts.append(a.get("data-workload"))
        elif tag in ("h2", "h3", "h4") or (tag == "p" and a.get("class") == "answer"):
            self._capture = (tag, [])
        elif tag == "table" and a.get("data-table"):
            self._table = {"columns": [], "rows": [], "part": self.part}
            self.tables[a["data-table"]] = self._table
        elif self._table is not None and tag == "th" and "data-key" in a:
            self._table["columns"].append(f"{a.get('data-group') or ''}|{a['data-key']}".lstrip("|"))
        elif self._table is not None and tag == "tr":
            self._row = []
        elif self._row is not None and tag == "td":
            self._row.append(a.get("data-value"))

    def handle_endtag(self, tag: str) -> None:
        if tag == "section":
            self._parts.pop()
        elif self._capture is not None and tag == self._capture[0]:
            text = "".join(self._capture[1])
            if tag == "p":
                self.answers.append((self.part, text))
            else:
                self.headings.append((tag, text, self.part))
            self._capture = None
        elif tag == "tr" and self._table is not None and self._row:
            self._table["rows"].append(self._row)
            self._row = None
        elif tag == "table":
            self._table = None

    def handle_data(self, data: str) -> None:
        self.text.append(data)
        if self._capture is not None:
            self._capture[1].append(data)

    def frame(self, table_id: str) -> pd.DataFrame:
        t = self.tables[table_id]
        return pd.DataFrame(t["rows"], columns=t["columns"])


def parse(text: str) -> Page:
    page = Page()
    page.feed(text)
    return page


def html_of(folder: Path) -> Page:
    return parse((folder / "report.html").read_text(encoding="utf-8"))


def floats(values: pd.Series) -> np.ndarray:
    return pd.to_numeric(values.replace("", np.nan)).to_numpy(dtype=float)


def summary(folder: Path) -> dict:
    return json.loads((folder / "summary.json").read_text(encoding="utf-8"))


# ------------------------------------------------------------------------------ how they shared the fleet


def test_the_sharing_table_equals_the_rounds_table(priority: Path) -> None:
    s = summary(priority)
    rounds = pd.read_parquet(priority / "rounds.parquet")
    table = html_of(priority).frame("sharing").set_index("workload")
    assert list(table.index) == ["ranking", "typing"] == s["sharing"]["workloads"]
    horizon_s = s["simulated_hours"] * 3600
    for name in table.index:
        mine = rounds[rounds["workload"] == name]
        committed = int((mine["status"] == "committed").sum())
        assert committed > 0
        # The desk's time is each selection's opening to its end (fleetsim/desk.py: one selection at a time).
        desk = float((mine["selected_s"] - mine["opened_s"]).sum()) / horizon_s
        assert float(table.loc[name, "desk_share"]) == pytest.approx(desk, rel=1e-9)
        assert int(table.loc[name, "committed"]) == committed
        assert float(table.loc[name, "committed_per_hour"]) == pytest.approx(committed / s["simulated_hours"],
                                                                             rel=1e-12)
    assert list(table["priority"]) == ["1", "2"]


def test_devices_that_reported_for_several_workloads_come_from_the_event_log(priority: Path) -> None:
    events = pd.read_parquet(priority / "events.parquet")
    used = events[events["used"]]
    per_device = used.groupby("device", observed=True)["workload"].nunique()
    values = list(html_of(priority).frame("sharing-devices")["value"])
    assert int(values[1]) == per_device.size
    assert float(values[2]) == pytest.approx(float((per_device > 1).mean()), rel=1e-12)
    assert 0 < float(values[2]) < 1


@pytest.mark.parametrize("key", ["device_type", "region"])
def test_the_competition_tables_equal_counts_from_the_event_log(priority: Path, key: str) -> None:
    events = pd.read_parquet(priority / "events.parquet")
    page = html_of(priority)
    table = page.frame(f"competition-{key}").set_index(key)
    csv = pd.read_csv(priority / "tables" / f"competition_by_{key}.csv", dtype={key: str, "workload": str})
    # Counted straight from the event log: one row per participation; `used` marks a report a
    # committed round used (docs/metrics.md).
    accepted = events.groupby([key, "workload"], observed=False).size().unstack()
    reports = events[events["used"]].groupby([key, "workload"], observed=False).size().unstack()
    assert sorted(table.index) == sorted(accepted.index.astype(str))
    assert csv.groupby(key)["devices"].first().sum() == summary(priority)["devices"]
    for name in ("ranking", "typing"):
        groups = list(table.index)
        got_accepted = floats(table[f"{name}|accepted"])
        assert np.array_equal(got_accepted, accepted.loc[groups, name].to_numpy(dtype=float))
        share_of_group = accepted.loc[groups, name] / accepted.loc[groups].sum(axis=1)
        assert np.allclose(floats(table[f"{name}|accepted_share"]), share_of_group, rtol=1e-12)
        share_of_reports = reports.loc[groups, name] / reports[name].sum()
        assert np.allclose(floats(table[f"{name}|report_share"]), share_of_reports, rtol=1e-12)
    fleet = csv.groupby(key)["fleet_share"].first()
    assert np.allclose(floats(table["fleet_share"]), fleet.loc[list(table.index)], rtol=1e-12)
    assert np.allclose(fleet.sum(), 1.0)


# ------------------------------------------------------------------------------ each workload's own report


def test_each_workload_part_is_that_workloads_own_report(priority: Path) -> None:
    page = html_of(priority)
    rounds = pd.read_parquet(priority / "rounds.parquet")
    markdown = (priority / "report.md").read_text(encoding="utf-8")
    for i, name in enumerate(["ranking", "typing"], start=1):
        alone = parse(render_report(priority / "workloads" / name)[0])
        # Every table of the workload's own report, prefixed and inside its part, with the same numbers.
        for table_id, table in alone.tables.items():
            inside = page.tables[f"w{i}-{table_id}"]
            assert inside["part"] == name
            assert (inside["columns"], inside["rows"]) == (table["columns"], table["rows"]), table_id
        mine = [text for part, text in page.answers if part == name]
        assert mine == [text for _, text in alone.answers][:-1]  # all but the caution
        own = rounds[rounds["workload"] == name]
        committed = int((own["status"] == "committed").sum())
        headline = page.frame(f"w{i}-headline").set_index("figure")
        assert int(headline.loc["Rounds committed", "value"]) == committed
        part_md = markdown.split(f"\n## {i + 1}. Workload: {name}\n")[1].split("\n## ")[0]
        assert f"{committed:,} of {len(own):,} rounds committed" in part_md


def test_ids_are_unique_and_every_reference_resolves(priority: Path) -> None:
    text = (priority / "report.html").read_text(encoding="utf-8")
    ids = re.findall(r'\bid="([^"]+)"', text)
    assert len(ids) == len(set(ids)) and len(ids) > 100
    refs = set(re.findall(r'href="#([^"]+)"', text)) | set(re.findall(r"url\(#([^)]+)\)", text))
    assert refs and refs <= set(ids)
    page = parse(text)
    figures = [a["data-figure"] for t, a in page.tags if t == "figure"]
    assert len(figures) == len(set(figures))
    assert len(page.tables) == sum(1 for t, a in page.tags if t == "table")  # no data-table id twice


def test_headings_nest_and_the_caution_comes_once_at_the_end(priority: Path) -> None:
    page = html_of(priority)
    top = [(text, part) for tag, text, part in page.headings if tag == "h2"]
    assert [re.sub(r"^\d+", "", t) for t, _ in top] == [
        "How did the workloads share the fleet?", "Workload: ranking", "Workload: typing",
        "How far can these figures be trusted?"]
    inner = [(text, part) for tag, text, part in page.headings if tag == "h3"]
    assert [t for t, p in inner if p == "ranking"][0] == "2.1What was run?"
    assert {p for _, p in inner} == {"ranking", "typing"} and len(inner) == 2 * (len(SINGLE_SECTIONS) - 1)
    caution = summary(priority)["caution"]
    html_text = "".join(page.text)
    markdown = (priority / "report.md").read_text(encoding="utf-8")
    assert html_text.count(caution) == 1 and markdown.count(caution) == 1
    assert [a["id"] for t, a in page.tags if t == "section" and "id" in a][-1] == "s-caution"
    markdown_it = pytest.importorskip("markdown_it")
    tokens = markdown_it.MarkdownIt("commonmark").enable("table").parse(markdown)
    levels = [(tok.tag, tokens[i + 1].content) for i, tok in enumerate(tokens) if tok.type == "heading_open"]
    assert [c for t, c in levels if t == "h2"] == ["1. How did the workloads share the fleet?",
                                                  "2. Workload: ranking", "3. Workload: typing",
                                                  "4. How far can these figures be trusted?"]
    assert [c for t, c in levels if t == "h3"][:2] == ["2.1. What was run?", "2.2. Do the round settings deliver?"]


def test_shares_and_a_name_that_is_no_file_name(shares: Path) -> None:
    s = summary(shares)
    assert s["sharing"]["workloads"] == ["ranking", ODD]
    page = html_of(shares)
    table = page.frame("sharing").set_index("workload")
    # Shares are relative: 3 and 1 are 75% and 25%.
    assert np.allclose(floats(table["share"]), [0.75, 0.25], rtol=1e-12)
    raw = (shares / "report.html").read_text(encoding="utf-8")
    assert "<b>fast" not in raw and "typing &lt;b&gt;fast&lt;/b&gt;" in raw  # the name is text, not markup
    parts = [a["data-workload"] for t, a in page.tags if t == "section" and a.get("class") == "part"]
    assert parts == ["ranking", ODD]
    folder = next(p for p in (shares / "workloads").iterdir() if p.name != "ranking")
    assert folder.name != ODD
    own = summary(folder)["rounds"]["committed"]
    assert int(page.frame("w2-headline").set_index("figure").loc["Rounds committed", "value"]) == own
    assert f"3Workload: {ODD}" in [text for _, text, _ in page.headings]
    assert "## 3. Workload: typing \\<b\\>fast\\</b\\>" in (shares / "report.md").read_text(encoding="utf-8")


# ------------------------------------------------------------------------------ one workload as before


def test_a_single_workload_report_is_as_before(tmp_path: Path) -> None:
    config = fleetsim.load_config(fleetsim.example_path(), ["fleet.devices=3000", "horizon.duration=6h",
                                                            "rounds.rest=4h"])
    folder = write_run(fleetsim.simulate(config, seed=3), tmp_path / "run")
    page_text, markdown = render_report(folder)
    page = parse(page_text)
    assert [a["id"] for t, a in page.tags if t == "section"] == [f"s-{s}" for s in SINGLE_SECTIONS]
    assert [t for t, _, _ in page.headings] == ["h2"] * len(SINGLE_SECTIONS)
    assert f"<style>{CSS}</style>" in page_text and SEVERAL_CSS not in page_text
    assert "data-workload" not in page_text and "Workload:" not in page_text
    assert "w1-" not in "".join(a.get("id", "") for _, a in page.tags)
    assert re.findall(r"^## (\d+)\. ", markdown, flags=re.M) == [str(i) for i in range(1, 12)]
    assert "###" not in markdown
    write_report(folder)
    assert (folder / "report.html").read_text(encoding="utf-8") == page_text


# ------------------------------------------------------------------------------ bad folders


def _break(target: Path, kind: str) -> str:
    """Break a copied run folder of several workloads; return the path the error must name."""
    if kind == "no-part":
        shutil.rmtree(target / "workloads" / "typing")
        return f"{target / 'workloads' / 'typing'}: missing"
    if kind == "broken-part-summary":
        (target / "workloads" / "typing" / "summary.json").write_text('{"scenario": ', encoding="utf-8")
        return f"{target / 'workloads' / 'typing' / 'summary.json'}: not valid JSON"
    if kind == "part-without-table":
        (target / "workloads" / "ranking" / "tables" / "hourly.csv").unlink()
        return f"{target / 'workloads' / 'ranking' / 'tables' / 'hourly.csv'}: missing"
    if kind == "no-competition":
        (target / "tables" / "competition_by_region.csv").unlink()
        return f"{target / 'tables' / 'competition_by_region.csv'}: missing"
    data = summary(target)
    data["sharing"]["workloads"].append("spelling")
    (target / "summary.json").write_text(json.dumps(data), encoding="utf-8")
    return f"{target / 'summary.json'}: lacks 'workloads.spelling'"


@pytest.mark.parametrize("kind", ["no-part", "broken-part-summary", "part-without-table", "no-competition",
                                  "unknown-name"])
def test_a_broken_folder_of_several_workloads_is_one_line_and_no_report(
        priority: Path, tmp_path: Path, kind: str) -> None:
    target = tmp_path / "run"
    shutil.copytree(priority, target, ignore=shutil.ignore_patterns("report.*"))
    named = _break(target, kind)
    result = CliRunner().invoke(app, ["report", str(target)])
    assert result.exit_code == 2, result.output
    lines = [line for line in result.output.splitlines() if line.strip()]
    assert len(lines) == 1 and lines[0].startswith(f"error: {named}"), lines
    assert not list(target.glob("report.*")) and not list(target.glob(".report*"))
