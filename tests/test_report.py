"""The participation report: self-contained page, numbers from the run folder, survival
curve against a reference library, names shown as text, errors, and a real browser."""

from __future__ import annotations

import json
import math
import os
import re
import shutil
import socket
import subprocess
from html.parser import HTMLParser
from pathlib import Path

import numpy as np
import pandas as pd
import pytest
import yaml
from scipy import stats
from typer.testing import CliRunner

import fleetsim
from fleetsim.analysis import chi_square, correlation, daily_table, gini, lorenz, top_share
from fleetsim.cli import app
from fleetsim.output import write_run
from fleetsim.report import render_report, write_report
from fleetsim.report.markdown import md_escape
from fleetsim.survival import kaplan_meier

SMALL = ["fleet.devices=20000", "horizon.duration=1d", "rounds.rest=4h"]
HOSTILE_TYPE = "<script>alert(1)</script>"
HOSTILE_REGION = '$x_1$ & "co" <b>bold</b>'
HOSTILE_SCENARIO = "<img src=x onerror=alert(2)> scenario"


# ------------------------------------------------------------------------------ fixtures


@pytest.fixture(scope="module")
def run_dir(tmp_path_factory: pytest.TempPathFactory) -> Path:
    """A small run of the example fleet, its report written through the CLI."""
    config = fleetsim.load_config(fleetsim.example_path(), SMALL)
    folder = write_run(fleetsim.simulate(config, seed=1), tmp_path_factory.mktemp("run") / "run")
    result = CliRunner().invoke(app, ["report", str(folder)])
    assert result.exit_code == 0, result.output
    assert "report.html" in result.output and "report.md" in result.output
    return folder


def hostile_config() -> fleetsim.Config:
    raw = yaml.safe_load(fleetsim.example_path().read_text(encoding="utf-8"))
    types = raw["fleet"]["device_types"]
    types[HOSTILE_TYPE] = types.pop("budget-phone")
    regions = raw["fleet"]["regions"]
    for region in regions.values():  # a region's own type mix names types too
        if "budget-phone" in region.get("type_mix", {}):
            region["type_mix"][HOSTILE_TYPE] = region["type_mix"].pop("budget-phone")
    regions[HOSTILE_REGION] = regions.pop("east-asia")
    raw["scenario"] = HOSTILE_SCENARIO
    return fleetsim.build_config(raw, "hostile.yaml", ["fleet.devices=20000", "horizon.duration=12h", "rounds.rest=4h"])


@pytest.fixture(scope="module")
def hostile(tmp_path_factory: pytest.TempPathFactory) -> tuple[fleetsim.Result, Path]:
    result = fleetsim.simulate(hostile_config(), seed=2)
    folder = write_run(result, tmp_path_factory.mktemp("hostile") / "run")
    write_report(folder)
    return result, folder


def page(folder: Path) -> str:
    return (folder / "report.html").read_text(encoding="utf-8")


class PageParser(HTMLParser):
    """Collects start tags, text nodes, answers and the data tables (raw values) of the page."""

    def __init__(self) -> None:
        super().__init__(convert_charrefs=True)
        self.tags: list[tuple[str, dict[str, str | None]]] = []
        self.text: list[str] = []
        self.tables: dict[str, dict] = {}
        self.answers: list[str] = []
        self._table: dict | None = None
        self._row: list | None = None
        self._answer: list[str] | None = None

    def handle_starttag(self, tag: str, attrs: list[tuple[str, str | None]]) -> None:
        a = dict(attrs)
        self.tags.append((tag, a))
        if tag == "table" and a.get("data-table"):
            self._table = {"columns": [], "rows": []}
            self.tables[a["data-table"]] = self._table
        elif self._table is not None and tag == "th" and "data-key" in a:
            self._table["columns"].append((a.get("data-group") or "", a["data-key"]))
        elif self._table is not None and tag == "tr":
            self._row = []
        elif self._row is not None and tag == "td":
            self._row.append(a.get("data-value"))
        elif tag == "p" and a.get("class") == "answer":
            self._answer = []

    def handle_endtag(self, tag: str) -> None:
        if tag == "tr" and self._table is not None and self._row:
            self._table["rows"].append(self._row)
            self._row = None
        elif tag == "table":
            self._table = None
        elif tag == "p" and self._answer is not None:
            self.answers.append("".join(self._answer))
            self._answer = None

    def handle_data(self, data: str) -> None:
        self.text.append(data)
        if self._answer is not None:
            self._answer.append(data)


def parse(html_text: str) -> PageParser:
    parser = PageParser()
    parser.feed(html_text)
    return parser


def frame(parsed: PageParser, table_id: str) -> pd.DataFrame:
    """A page table as a DataFrame of raw strings; columns are data-key (group|key when grouped)."""
    t = parsed.tables[table_id]
    names = [f"{g}|{k}" if g else k for g, k in t["columns"]]
    return pd.DataFrame(t["rows"], columns=names)


def numbers(values: pd.Series) -> np.ndarray:
    return pd.to_numeric(values.replace("", np.nan)).to_numpy(dtype=float)


def close(a: np.ndarray | float, b: np.ndarray | float) -> bool:
    return bool(np.allclose(np.asarray(a, float), np.asarray(b, float), rtol=1e-12, atol=1e-12, equal_nan=True))


def read_table(folder: Path, name: str) -> pd.DataFrame:
    text = {"device_type", "region", "data_quartile", "cause", "dropout_cause", "dropout_phase", "status",
            "hour_utc"}
    header = pd.read_csv(folder / "tables" / f"{name}.csv", nrows=0).columns
    return pd.read_csv(folder / "tables" / f"{name}.csv", dtype={c: str for c in header if c in text},
                       keep_default_na=False, na_values={c: [""] for c in header if c not in text},
                       float_precision="round_trip")  # exact floats: step functions are read at their steps


# ------------------------------------------------------------------------------ self-contained page


def test_page_is_self_contained_and_scriptless(run_dir: Path) -> None:
    text = page(run_dir)
    parsed = parse(text)
    tags = {t for t, _ in parsed.tags}
    assert tags.isdisjoint({"script", "iframe", "object", "embed", "img", "base", "form"})
    assert re.search(r"<script", text, re.I) is None
    # Every reference stays inside the file: fragments or data: URLs only.
    for tag, attrs in parsed.tags:
        for key in ("src", "href", "xlink:href", "action", "poster", "srcset"):
            value = attrs.get(key)
            if value is not None:
                assert value.startswith("#") or value.startswith("data:"), (tag, key, value)
        assert not any(key.startswith("on") for key in attrs), (tag, attrs)
    for url in re.findall(r"url\(\s*['\"]?([^)'\"]*)", text):
        assert url.startswith("#"), url
    assert "@import" not in text
    assert re.search(r"""(?:src|href)\s*=\s*["']?\s*(?:https?:)?//""", text, re.I) is None
    policy = [a["content"] for t, a in parsed.tags if t == "meta" and a.get("http-equiv") == "Content-Security-Policy"]
    assert policy and policy[0].startswith("default-src 'none';") and "script-src" not in policy[0]
    # Eleven questions, each with a one-line answer, and every figure inline.
    assert len(parsed.answers) == 11 and all(a.strip() for a in parsed.answers)
    assert text.count("<svg") == text.count("<figure") == 13


def test_markdown_carries_the_same_answers(run_dir: Path) -> None:
    parsed = parse(page(run_dir))
    md = (run_dir / "report.md").read_text(encoding="utf-8")
    for answer in parsed.answers:
        assert f"**{md_escape(answer)}**" in md
    assert "<script" not in md.lower()


def test_figures_are_reproducible(run_dir: Path) -> None:
    from fleetsim.report import figures

    rows = [("Rounds", [("committed", 0.25), ("report_deadline", 0.75)])]
    legend = {"committed": "committed", "report_deadline": "ended by the report deadline"}
    assert figures.share_rows(rows, legend, "x") == figures.share_rows(rows, legend, "x")


# ------------------------------------------------------------------------------ one source of truth


def test_every_figure_number_equals_the_run_folder(run_dir: Path) -> None:
    parsed = parse(page(run_dir))
    summary = json.loads((run_dir / "summary.json").read_text())
    r, w, b, load = summary["rounds"], summary["waste"], summary["bias"], summary["load"]

    headline = frame(parsed, "headline").set_index("figure")["value"]
    attempted = r["attempted"]
    assert close(float(headline["Committed rounds per hour"]), r["committed_per_hour"])
    by_status = {"committed": r["committed"], **r["ended_by"]}
    for status, words in (("committed", "committed"), ("report_deadline", "ended by the report deadline"),
                          ("selection_timeout", "ended by the selection timeout"),
                          ("server_outage", "cut by a server outage")):
        assert int(headline[f"Rounds {words}"]) == by_status[status]
        assert close(float(headline[f"Share of rounds {words}"]), by_status[status] / attempted)
    assert close(float(headline["Straggler waste: share of compute"]), w["compute_fraction"])
    assert close(float(headline["Straggler waste: share of data (bytes)"]), w["bytes_fraction"])
    assert close(float(headline["Straggler waste: share of energy"]), w["energy_fraction"])
    assert close(float(headline["Coverage: devices with at least one committed report"]), b["coverage"])

    hourly = read_table(run_dir, "hourly")
    shown = frame(parsed, "over-time")
    assert list(shown["hour_utc"]) == list(hourly["hour_utc"])
    by_region = read_table(run_dir, "hourly_eligible_by_region")
    for column in shown.columns[1:]:
        if column in hourly.columns:
            expected = hourly[column].to_numpy(float)
        else:  # eligible_<region>, from the long table
            region = by_region[by_region["region"] == column.removeprefix("eligible_")].sort_values("hour")
            assert list(region["hour_utc"]) == list(hourly["hour_utc"])
            expected = region["eligible"].to_numpy(float)
        assert close(numbers(shown[column]), expected), column
    assert set(by_region["region"]) == set(read_table(run_dir, "bias_by_region")["region"])
    days = frame(parsed, "over-time-days")
    assert close(numbers(days["committed"]).sum(), r["committed"])
    daily = read_table(run_dir, "daily")
    assert list(days["day"]) == list(daily["day_utc"])
    for column in days.columns[1:]:
        assert close(numbers(days[column]), daily[column].to_numpy(float)), column
    # The day figures are sums and extremes of the hourly table (24 hours from the horizon start).
    day_of_hour = np.arange(len(hourly)) // 24
    assert close(daily["committed"], hourly.groupby(day_of_hour)["committed"].sum().to_numpy())
    assert close(daily["eligible_max"], hourly.groupby(day_of_hour)["eligible"].max().to_numpy())

    rounds = read_table(run_dir, "rounds")
    durations = frame(parsed, "durations")
    for i, (key, mask) in enumerate((("selection_s", rounds["status"] != "selection-timeout"),
                                     ("report_s", rounds["status"] == "committed"))):
        values = rounds.loc[mask, key].to_numpy(float)
        assert int(durations["rounds"][i]) == values.size
        for q, name in ((0.5, "p50"), (0.9, "p90"), (0.99, "p99")):
            assert close(float(durations[name][i]), r[key][name])
            assert math.isclose(r[key][name], float(np.quantile(values, q)), rel_tol=1e-12)

    cause = read_table(run_dir, "waste_by_cause")
    shown = frame(parsed, "waste-cause")
    assert list(shown["cause"]) == list(cause["cause"])
    assert close(numbers(shown["compute_h"]), cause["compute_s"] / 3600)
    assert close(numbers(shown["data_gb"]), cause["bytes"] / 1e9)
    assert close(numbers(shown["energy_wh"]), cause["energy_wh"])
    assert close(numbers(shown["compute_share"]), cause["compute_share"])
    assert close(numbers(shown["participations"]), cause["participations"])
    by_type = read_table(run_dir, "waste_by_device_type")
    shown = frame(parsed, "waste-type")
    assert close(numbers(shown["compute_h"]), by_type["compute_s"] / 3600)
    assert close(numbers(shown["wasted_data_gb"]), by_type["wasted_bytes"] / 1e9)
    assert close(numbers(shown["energy_fraction"]), by_type["energy_fraction"])

    for key, name in (("device_type", "bias_by_device_type"), ("region", "bias_by_region"),
                      ("data_quartile", "bias_by_data_quartile")):
        table = read_table(run_dir, name)
        shown = frame(parsed, f"bias-{key}")
        assert list(shown[key]) == list(table[key])
        for column in shown.columns[1:]:
            assert close(numbers(shown[column]), table[column].to_numpy(float)), (name, column)
        never = frame(parsed, "never")
        assert close(numbers(never.loc[never["group"].isin(table[key]), "never_share"]), table["never_share"])

    chi = frame(parsed, "chi-square")
    assert close(float(chi["chi_square"][0]), b["chi_square_device_type"])
    assert close(float(chi["p"][0]), b["chi_square_device_type_p"])
    for i, name in ((1, "bias_by_region"), (2, "bias_by_data_quartile")):
        table = read_table(run_dir, name)
        reports = table["reports"].to_numpy(float)
        expected = stats.chisquare(reports, table["fleet_share"].to_numpy() * reports.sum())
        assert math.isclose(float(chi["chi_square"][i]), float(expected.statistic), rel_tol=1e-9)
    tests = read_table(run_dir, "chi_square")
    assert list(tests["grouping"]) == ["device_type", "region", "data_quartile"]
    assert close(numbers(chi["chi_square"]), tests["statistic"]) and close(numbers(chi["p"]), tests["p"])
    assert close(numbers(chi["dof"]), tests["groups"] - 1)
    assert close(tests["statistic"][1], b["chi_square_region"])
    assert close(tests["p"][2], b["chi_square_data_quartile_p"])

    counts = read_table(run_dir, "participation_counts")
    shown = frame(parsed, "participation-counts")
    assert close(numbers(shown["reports"]), counts["reports"]) and close(numbers(shown["devices"]), counts["devices"])
    gini = frame(parsed, "gini")["value"]
    assert close(float(gini[0]), b["gini"])
    assert close(float(gini[1]), b["top_tenth_share"])
    curve = read_table(run_dir, "lorenz")
    # The drawn Lorenz curve gives the same Gini: G = 1 - 2 * (area under the curve), the
    # curve linear between its points (trapezoid rule; the standard definition).
    area = float(np.sum(np.diff(curve["device_share"]) * (curve["report_share"][1:].to_numpy()
                                                           + curve["report_share"][:-1].to_numpy()) / 2))
    assert math.isclose(1 - 2 * area, b["gini"], rel_tol=1e-9)
    shown = frame(parsed, "lorenz")
    assert close(numbers(shown["device_share"]), curve["device_share"])
    assert close(numbers(shown["report_share"]), curve["report_share"])
    # The busiest tenth, from the curve by hand: 1 - L(0.9), L linear between its points.
    assert math.isclose(b["top_tenth_share"], 1 - np.interp(0.9, curve["device_share"], curve["report_share"]),
                        rel_tol=1e-12)

    cost = read_table(run_dir, "device_cost")
    shown = frame(parsed, "cost")
    for column in shown.columns[1:]:
        # The page shows data in MB (SI: 10**6 bytes, IEC 80000-13); the table holds bytes.
        expected = (cost[column.replace("megabytes", "bytes")] / 1e6 if column.startswith("megabytes")
                    else cost[column]).to_numpy(float)
        assert close(numbers(shown[column]), expected), column

    shown = frame(parsed, "load").set_index("figure")["value"]
    assert close(float(shown.iloc[0]), load["checkins_per_s_peak_hour"])
    assert int(shown.iloc[1]) == load["peak_working"] and close(float(shown.iloc[2]), load["mean_working"])
    shown = frame(parsed, "load-hourly")
    assert close(numbers(shown["checkins_per_s"]), hourly["checkins_per_s"])
    assert close(numbers(shown["peak_working"]), hourly["peak_working"])
    assert close(numbers(shown["checkins_per_s"]).max(), load["checkins_per_s_peak_hour"])


# ------------------------------------------------------------------------------ the statistics behind the tables


def test_chi_square_matches_the_closed_form() -> None:
    # Reports 10 and 30 against equal shares: expected 20 and 20, X^2 = (100 + 100) / 20 = 10
    # with 1 degree of freedom; p from scipy's chi-square distribution (reference library).
    statistic, p = chi_square(np.array([10, 30]), np.array([0.5, 0.5]))
    assert math.isclose(statistic, 10.0, rel_tol=1e-12)
    assert math.isclose(p, float(stats.chi2.sf(10.0, 1)), rel_tol=1e-12)
    # No test without two groups, without reports, or with a group of no devices.
    assert all(math.isnan(x) for x in chi_square(np.array([5]), np.array([1.0])))
    assert all(math.isnan(x) for x in chi_square(np.array([0, 0]), np.array([0.5, 0.5])))
    assert all(math.isnan(x) for x in chi_square(np.array([3, 4]), np.array([1.0, 0.0])))


def test_lorenz_gini_and_busiest_tenth_by_hand() -> None:
    # 10 devices: 5 with no report, 3 with 1, 2 with 4; 11 reports. The busiest device (10%)
    # holds half of the top group's 8 reports: 4 / 11 (the curve is straight within a group).
    reports, devices = np.array([4, 0, 1]), np.array([2, 5, 3])
    x, y, g = lorenz(reports, devices)
    assert np.allclose(x, [0, 0.5, 0.8, 1.0]) and np.allclose(y, [0, 0, 3 / 11, 1.0])
    assert math.isclose(top_share(reports, devices, 0.1), 4 / 11, rel_tol=1e-12)
    # Gini from the mean absolute difference, G = sum_ij |x_i - x_j| / (2 n^2 mean) (the
    # standard definition), over the ten devices one by one.
    each = np.repeat(reports, devices).astype(float)
    mad = np.abs(each[:, None] - each[None, :]).sum() / (2 * each.size**2 * each.mean())
    assert math.isclose(g, mad, rel_tol=1e-12) and math.isclose(gini(each), mad, rel_tol=1e-12)
    assert math.isnan(top_share(np.array([0]), np.array([7])))


def test_correlation_and_days_match_references() -> None:
    rng = np.random.default_rng(3)
    a, b = rng.normal(size=50), rng.normal(size=50)
    assert math.isclose(correlation(a, b), float(stats.pearsonr(a, b).statistic), rel_tol=1e-12)
    assert math.isnan(correlation(np.ones(5), b[:5]))
    hours = 30  # one whole day and six hours
    hourly = pd.DataFrame({"hour_utc": [f"2026-03-{2 + h // 24:02d}T{h % 24:02d}:00:00Z" for h in range(hours)],
                           "committed": np.arange(hours), "eligible": np.arange(hours) * 2.0})
    days = daily_table(hourly, ["committed"])
    assert list(days["day_utc"]) == ["2026-03-02", "2026-03-03"]
    assert list(days["committed"]) == [sum(range(24)), sum(range(24, 30))]
    assert list(days["eligible_min"]) == [0.0, 48.0] and list(days["eligible_max"]) == [46.0, 58.0]
    assert math.isclose(days["eligible_mean"][1], 2 * 26.5)


# ------------------------------------------------------------------------------ survival


def test_kaplan_meier_by_hand() -> None:
    # Durations 2, 3, 3+, 5, 8+: S = 4/5, then 4/5 * 3/4, then * 1/2 (Kaplan and Meier 1958).
    s = kaplan_meier(np.array([2, 3, 3, 5, 8.0]), np.array([1, 1, 0, 1, 0], bool))
    assert np.allclose(s.at([0, 2, 3, 4, 5, 9]), [1, 0.8, 0.6, 0.6, 0.3, 0.3])
    assert list(s.at_risk) == [5, 4, 2, 1] and list(s.events) == [1, 1, 1, 0]
    # Greenwood at t = 3: sum d / (n (n - d)) = 1/20 + 1/12.
    sigma = math.sqrt(1 / 20 + 1 / 12) / abs(math.log(0.6))
    low, high = s.band_at(3.0)
    assert math.isclose(float(low), 0.6 ** math.exp(1.959963984540054 * sigma), rel_tol=1e-12)
    assert math.isclose(float(high), 0.6 ** math.exp(-1.959963984540054 * sigma), rel_tol=1e-12)


def test_survival_tables_match_lifelines(run_dir: Path) -> None:
    # tables/task_survival*.csv against lifelines' Kaplan-Meier fit of the event log, per
    # device type and for the whole fleet; the page's minute table is the CSV as it stands.
    lifelines = pytest.importorskip("lifelines")
    events = pd.read_parquet(run_dir / "events.parquet", columns=["device_type", "outcome", "started_s", "ended_s"])
    steps, minutes = read_table(run_dir, "task_survival"), read_table(run_dir, "task_survival_by_minute")
    steps["device_type"] = steps["device_type"].fillna("")
    minutes["device_type"] = minutes["device_type"].fillna("")
    groups = [(str(n), "device_type", g) for n, g in events.groupby("device_type", observed=True)]
    groups.append(("", "all", events))
    for name, scope, group in groups:
        duration = (group["ended_s"] - group["started_s"]).to_numpy()
        dropped = (group["outcome"] == "dropout").to_numpy()
        reference = lifelines.KaplanMeierFitter().fit(duration, dropped)
        for table in (steps, minutes):
            rows = table[(table["scope"] == scope) & (table["device_type"] == name)]
            shown = rows[rows["survival"].notna()]
            if not len(shown):  # a group whose tasks all end within the first minute: nothing to show
                assert table is minutes and (rows["at_risk"] < 10).all(), (scope, name)
                continue
            t = shown["time_s"].to_numpy(float)
            assert np.allclose(shown["survival"], reference.survival_function_at_times(t).to_numpy(), atol=1e-10)
            ci = reference.confidence_interval_.reindex(np.union1d(reference.timeline, t)).ffill().loc[t].to_numpy()
            assert np.allclose(shown["low"], ci[:, 0], atol=1e-10) and np.allclose(shown["high"], ci[:, 1], atol=1e-10)
            # At risk: tasks lasting at least t; the curve stops while 10 or more remain.
            assert list(rows["at_risk"]) == [int((duration >= x).sum()) for x in rows["time_s"]]
        assert int(rows["at_risk"].iloc[0]) >= 10 or rows["survival"].isna().all()
        curve = steps[(steps["scope"] == scope) & (steps["device_type"] == name)]
        assert curve["time_s"].iloc[0] == 0 and curve["at_risk"].iloc[-1] >= 10
        assert (np.diff(curve["survival"]) <= 0).all()
    bands = frame(parse(page(run_dir)), "survival-bands")
    by_type = minutes[minutes["scope"] == "device_type"]
    assert list(bands["device_type"]) == list(by_type["device_type"])
    assert close(numbers(bands["minutes"]) * 60, by_type["time_s"])
    assert close(numbers(bands["survival"]), by_type["survival"])
    assert close(numbers(bands["at_risk"]), by_type["at_risk"])


def test_kaplan_meier_matches_lifelines(run_dir: Path) -> None:
    lifelines = pytest.importorskip("lifelines")
    events = pd.read_parquet(run_dir / "events.parquet", columns=["device_type", "outcome", "started_s", "ended_s"])
    bands = frame(parse(page(run_dir)), "survival-bands")
    checked = 0
    for name, group in events.groupby("device_type", observed=True):
        duration = (group["ended_s"] - group["started_s"]).to_numpy()
        dropped = (group["outcome"] == "dropout").to_numpy()
        reference = lifelines.KaplanMeierFitter().fit(duration, dropped)
        timeline = reference.survival_function_.index.to_numpy()
        ours = kaplan_meier(duration, dropped)
        assert np.allclose(ours.at(timeline), reference.survival_function_.to_numpy()[:, 0], rtol=0, atol=1e-10)
        ci = reference.confidence_interval_.to_numpy()
        low, high = ours.band_at(timeline)
        assert np.allclose(low, ci[:, 0], rtol=0, atol=1e-10) and np.allclose(high, ci[:, 1], rtol=0, atol=1e-10)
        # The report's table of the curve, minute by minute, equals the reference too.
        rows = bands[bands["device_type"] == name]
        shown = rows[rows["survival"] != ""]
        if not len(shown):  # every task of the type ended within its first minute (under 10 at risk)
            assert (numbers(rows["at_risk"]) < 10).all(), name
            checked += 1
            continue
        t = numbers(shown["minutes"]) * 60
        ref_s = reference.survival_function_at_times(t).to_numpy()
        assert np.allclose(numbers(shown["survival"]), ref_s, rtol=0, atol=1e-10)
        ref_ci = reference.confidence_interval_.reindex(t, method="ffill").to_numpy()
        assert np.allclose(numbers(shown["low"]), ref_ci[:, 0], atol=1e-10)
        assert np.allclose(numbers(shown["high"]), ref_ci[:, 1], atol=1e-10)
        checked += 1
    assert checked == len(pd.read_csv(run_dir / "tables" / "bias_by_device_type.csv"))


# ------------------------------------------------------------------------------ names as text


def test_fleet_names_are_shown_as_text_never_markup(hostile: tuple[fleetsim.Result, Path]) -> None:
    _, folder = hostile
    text = page(folder)
    parsed = parse(text)
    assert re.search(r"<script", text, re.I) is None and re.search(r"<img", text, re.I) is None
    assert {t for t, _ in parsed.tags}.isdisjoint({"script", "img"}) and "<b>bold" not in text
    assert all(not k.startswith("on") for _, attrs in parsed.tags for k in attrs)
    nodes = parsed.text
    assert any(HOSTILE_TYPE in n for n in nodes)          # shown literally as text...
    assert any(HOSTILE_SCENARIO in n for n in nodes)
    assert any(HOSTILE_REGION in n for n in nodes)
    assert "&lt;script&gt;alert(1)&lt;/script&gt;" in text  # ...because it is escaped
    # Inside the figures too: the SVG text elements hold the names literally ("$...$" not read as math).
    svg_text = "".join(re.findall(r"<svg.*?</svg>", text, re.S))
    assert "&lt;script&gt;alert(1)&lt;/script&gt;" in svg_text
    assert '>$x_1$ &amp; "co" &lt;b&gt;bold&lt;/b&gt;</text>' in svg_text
    md = (folder / "report.md").read_text(encoding="utf-8")
    assert re.search(r"(?<!\\)<", md) is None  # every "<" in the Markdown is escaped
    # Rendered by a CommonMark renderer (markdown-it-py, which rich depends on), the names are text.
    markdown_it = pytest.importorskip("markdown_it")
    rendered = markdown_it.MarkdownIt("commonmark").enable("table").render(md)
    shown = parse(rendered)
    assert {t for t, _ in shown.tags}.isdisjoint({"script", "img", "b"})
    text_nodes = "".join(shown.text)
    assert HOSTILE_TYPE in text_nodes and HOSTILE_SCENARIO in text_nodes and HOSTILE_REGION in text_nodes


def test_notebook_view_escapes_names(hostile: tuple[fleetsim.Result, Path]) -> None:
    result, _ = hostile
    view = result._repr_html_()
    assert "<script" not in view.lower() and "<img" not in view.lower()
    assert "&lt;script&gt;alert(1)&lt;/script&gt;" in view
    assert any(HOSTILE_TYPE in n for n in parse(view).text)


def test_markdown_escape() -> None:
    assert md_escape("a|b") == r"a\|b"
    assert md_escape("*x* _y_ [z](u)") == r"\*x\* \_y\_ \[z\](u)"
    assert md_escape("line\nbreak") == "line break"
    assert md_escape("budget-phone") == "budget-phone"


# ------------------------------------------------------------------------------ bad input


def error_lines(result) -> list[str]:
    return [line for line in result.output.splitlines() if line.strip()]


@pytest.mark.parametrize("kind", ["missing", "empty", "file", "broken-table", "broken-json", "no-events"])
def test_bad_run_folder_is_one_line_error_and_no_report(tmp_path: Path, run_dir: Path, kind: str) -> None:
    target = tmp_path / "target"
    if kind == "empty":
        target.mkdir()
    elif kind == "file":
        target.write_text("not a folder")
    elif kind != "missing":
        shutil.copytree(run_dir, target)
        if kind == "broken-table":
            (target / "tables" / "hourly.csv").write_text("hour,committed\n0,1\n")
        elif kind == "broken-json":
            (target / "summary.json").write_text("{not json")
        else:
            (target / "events.parquet").write_bytes(b"PAR1 not parquet")
    before = page(target) if kind not in ("missing", "empty", "file") else None
    result = CliRunner().invoke(app, ["report", str(target)])
    assert result.exit_code == 2, result.output
    lines = error_lines(result)
    assert len(lines) == 1 and lines[0].startswith("error: "), lines
    assert "Traceback" not in result.output
    if target.is_dir():
        left = sorted(p.name for p in target.iterdir() if "partial" in p.name)
        assert left == []
        if before is not None:
            assert page(target) == before  # the old report stays whole
        else:
            assert not (target / "report.html").exists() and not (target / "report.md").exists()


def test_failed_write_leaves_no_half_written_report(tmp_path: Path, run_dir: Path, monkeypatch) -> None:
    target = tmp_path / "run"
    shutil.copytree(run_dir, target)
    before = page(target)
    import fleetsim.report as report

    calls = {"n": 0}
    real_replace = os.replace

    def failing_replace(src, dst):
        calls["n"] += 1
        if calls["n"] == 1:
            raise OSError(28, "No space left on device")
        return real_replace(src, dst)

    monkeypatch.setattr(report.os, "replace", failing_replace)
    monkeypatch.setattr(report, "render_report", lambda _: ("<!DOCTYPE html>new", "new"))
    with pytest.raises(fleetsim.FleetsimError, match="cannot write the report"):
        write_report(target)
    assert page(target) == before
    assert [p.name for p in target.iterdir() if "partial" in p.name] == []


def test_run_with_report_flag(tmp_path: Path) -> None:
    out = tmp_path / "out"
    result = CliRunner().invoke(app, ["run", "--out", str(out), "--devices", "800", "--days", "0.25", "--report"])
    assert result.exit_code == 0, result.output
    html_text, md_text = render_report(out)
    assert page(out) == html_text  # the same run folder gives the same file, byte for byte
    assert (out / "report.md").read_text(encoding="utf-8") == md_text


# ------------------------------------------------------------------------------ a real browser


def closed_port() -> int:
    with socket.socket() as s:
        s.bind(("127.0.0.1", 0))
        return s.getsockname()[1]


def chromium(url: str, tmp_path: Path, size: str) -> tuple[Path, str, set[str]]:
    """Render ``url`` headless; return the screenshot, stderr and the URLs the page itself requested.

    Every request goes to a proxy on a closed port, so nothing is fetched; the net log still
    records each attempt. Chromium's own background requests (update and time checks) carry
    no page origin ("initiator": "not an origin") and are left out.
    """
    browser = shutil.which("chromium") or shutil.which("chromium-browser")
    if browser is None:
        pytest.skip("chromium is not installed (Debian: apt-get install chromium; .ci/run installs it)")
    shot, netlog = tmp_path / "shot.png", tmp_path / "net.json"
    command = [
        browser, "--headless", "--no-sandbox", "--disable-gpu", "--disable-background-networking",
        "--disable-component-update", "--disable-sync", "--no-first-run", "--disable-extensions",
        f"--user-data-dir={tmp_path / 'profile'}", f"--proxy-server=http://127.0.0.1:{closed_port()}",
        "--proxy-bypass-list=<-loopback>", f"--log-net-log={netlog}", "--enable-logging=stderr", "--v=0",
        f"--screenshot={shot}", f"--window-size={size}", url,
    ]
    done = subprocess.run(command, capture_output=True, text=True, timeout=120)
    assert shot.exists(), done.stderr[-2000:]
    log = json.loads(netlog.read_text(errors="replace"))
    start_job = log["constants"]["logEventTypes"]["URL_REQUEST_START_JOB"]
    requested = set()
    for event in log["events"]:
        params = event.get("params") or {}
        url_seen = params.get("url", "")
        if event["type"] == start_job and re.match(r"(https?|wss?|ftp)://", url_seen):
            if params.get("initiator") != "not an origin":
                requested.add(url_seen)
    return shot, done.stderr, requested


def test_chromium_check_catches_a_page_request(tmp_path: Path) -> None:
    # The control: a page that does fetch something is caught by the same check.
    probe = tmp_path / "probe.html"
    port = closed_port()
    probe.write_text(f'<!DOCTYPE html><p>probe</p><img src="http://127.0.0.1:{port}/x.png">', encoding="utf-8")
    _, _, requested = chromium(probe.as_uri(), tmp_path, "400,300")
    assert requested == {f"http://127.0.0.1:{port}/x.png"}


def test_chromium_renders_the_page_without_errors_or_requests(run_dir: Path, tmp_path: Path) -> None:
    from PIL import Image

    shot, stderr, requested = chromium((run_dir / "report.html").resolve().as_uri(), tmp_path, "1200,3000")
    pixels = np.asarray(Image.open(shot).convert("L"), dtype=float)
    assert pixels.shape == (3000, 1200)
    assert pixels.std() > 20 and (pixels < 200).mean() > 0.03  # text and figures, not a blank page
    # The page has no script: any console line would be an error or a blocked load.
    console = [line for line in stderr.splitlines() if "CONSOLE" in line or "Uncaught" in line]
    assert console == [], console
    assert requested == set(), requested
