"""Multi-seed runs and reports: between-seed intervals against scipy.stats.t and their coverage,
pooled Wilson intervals against statsmodels, the folder layout and its overwrite guard, one-line
errors, and the report over several run folders against the report of the multi-seed folder."""

from __future__ import annotations

import json
import math
import re
import shutil
from html.parser import HTMLParser
from pathlib import Path

import numpy as np
import pytest
from scipy import stats
from statsmodels.stats.proportion import proportion_confint
from typer.testing import CliRunner

from fleetsim.cli import app
from fleetsim.output import MARKER, read_marker
from fleetsim.output.seeds import combine, numeric_figures, seed_interval
from fleetsim.report import render_report
from fleetsim.report.rundir import read_run_folder
from fleetsim.report.seeds import chosen_interval

runner = CliRunner()
SMALL = ["--devices", "300", "--days", "1", "--set", "rounds.target_reports=10", "--set", "rounds.min_reports=8",
         "--set", "rounds.rest=1h"]
TINY = ["--devices", "200", "--days", "0.25", "--set", "rounds.target_reports=10", "--set", "rounds.min_reports=8",
        "--set", "rounds.rest=1h"]


def lines(result) -> list[str]:
    return [line for line in result.output.splitlines() if line.strip()]


def one_error(result) -> str:
    assert result.exit_code == 2, result.output
    out = lines(result)
    assert len(out) == 1 and out[0].startswith("error: ") and "Traceback" not in result.output, out
    return out[0]


@pytest.fixture(scope="module")
def seeds_dir(tmp_path_factory: pytest.TempPathFactory) -> Path:
    """Three seeds (5, 6, 7) of a small fleet through the command line, with the report."""
    out = tmp_path_factory.mktemp("seeds") / "multi"
    result = runner.invoke(app, ["run", "--out", str(out), "--seed", "5", "--seeds", "3", "--report", *SMALL])
    assert result.exit_code == 0, result.output
    return out


def summary(folder: Path) -> dict:
    return json.loads((folder / "summary.json").read_text(encoding="utf-8"))


def leaves(value, path=()) -> dict:
    """Every number (or null) of a summary by key path, walked here independently of the code."""
    out = {}
    if isinstance(value, dict):
        for key, inner in value.items():
            out.update(leaves(inner, (*path, key)))
    elif value is None or (isinstance(value, (int, float)) and not isinstance(value, bool)):
        out[path] = value
    return out


# ------------------------------------------------------------------------------ intervals


def test_interval_matches_scipy_t_and_the_textbook_value() -> None:
    # Student t table (e.g. Montgomery and Runger, Applied Statistics and Probability for
    # Engineers, table V): t_{0.025, 2} = 4.303, so [1, 2, 3] (mean 2, sd 1) gives 2 -/+ 4.303 / sqrt(3).
    three = seed_interval([1, 2, 3])
    assert three["mean"] == 2.0 and three["sd"] == pytest.approx(1.0)
    assert three["high"] - 2.0 == pytest.approx(4.303 / math.sqrt(3), abs=5e-4)
    rng = np.random.default_rng(11)
    for n in (2, 3, 5, 12):
        values = rng.normal(3.0, 2.0, n)
        got = seed_interval(list(values))
        low, high = stats.t.interval(0.95, n - 1, loc=values.mean(), scale=stats.sem(values))
        assert got["seeds"] == n
        assert got["low"] == pytest.approx(low, rel=1e-12) and got["high"] == pytest.approx(high, rel=1e-12)
    # Missing and non-finite values are left out; one seed has a mean and no interval.
    assert seed_interval([None, 4.0, float("nan"), float("inf")]) == {"seeds": 1, "mean": 4.0, "sd": None,
                                                                       "low": None, "high": None}
    assert seed_interval([None, None])["mean"] is None


def test_between_seed_intervals_cover_the_true_mean_at_the_nominal_rate() -> None:
    # Draws with a known mean, through the combining code as seeds' summaries. 4,000 trials
    # of 5 seeds: coverage ~ Binomial(4000, 0.95) / 4000, sd sqrt(0.95 x 0.05 / 4000) = 0.0034;
    # 4.5 sd gives [0.9345, 0.9655]. A normal-quantile interval (1.96 instead of t_{0.025,4} =
    # 2.776) covers about 88% here and fails the bound; so does an interval on the wrong n.
    rng = np.random.default_rng(2026)
    mean, trials, hits, hits_fewer = 7.5, 4000, 0, 0
    for _ in range(trials):
        draws = rng.gamma(9.0, mean / 9.0, 6)  # skewed a little, mean 7.5 exactly
        seeds = [{"seed": i, "x": float(v), "y": (None if i == 5 else float(v))} for i, v in enumerate(draws[:5])]
        seeds.append({"seed": 5, "x": None, "y": None})  # one seed could not measure either figure
        fig = {tuple(f["path"]): f for f in combine(seeds)["figures"]}
        assert fig[("x",)]["seeds"] == 5 and fig[("y",)]["seeds"] == 5
        hits += fig[("x",)]["low"] <= mean <= fig[("x",)]["high"]
        hits_fewer += fig[("y",)]["low"] <= mean <= fig[("y",)]["high"]
    assert 0.9345 <= hits / trials <= 0.9655, hits / trials
    assert hits_fewer == hits


def test_numeric_figures_skip_text_flags_and_the_seed() -> None:
    seeds = [{"seed": 1, "a": {"b": 2, "c": "text", "d": True, "e": None}},
             {"seed": 2, "a": {"b": 4, "e": 1.5}}]
    assert numeric_figures(seeds) == [(("a", "b"), [2, 4]), (("a", "e"), [None, 1.5])]


def test_interval_rule() -> None:
    base = {"pooled": 1.0, "wilson_low": 0.9, "wilson_high": 1.1, "mean": 1.0}
    # Wider between seeds: it replaces the Wilson interval.
    assert chosen_interval({**base, "low": 0.8, "high": 1.2}) == (0.8, 1.2, "between seeds")
    # Narrower and holding the pooled estimate: Wilson stays.
    assert chosen_interval({**base, "low": 0.95, "high": 1.05}) == (0.9, 1.1, "Wilson")
    # Narrower but not holding the pooled estimate: between seeds.
    assert chosen_interval({**base, "low": 1.01, "high": 1.08}) == (1.01, 1.08, "between seeds")
    # One of the two missing: the other one; neither: none.
    assert chosen_interval({**base, "low": None, "high": None}) == (0.9, 1.1, "Wilson")
    assert chosen_interval({**base, "wilson_low": None, "wilson_high": None, "low": 0.95, "high": 1.05}) == \
        (0.95, 1.05, "between seeds")
    assert chosen_interval({**base, "wilson_low": None, "wilson_high": None, "low": None, "high": None})[2] == "none"


# ------------------------------------------------------------------------------ the folder


def test_layout_each_seed_an_ordinary_run_folder(seeds_dir: Path) -> None:
    assert read_marker(seeds_dir)["kind"] == "seeds"
    assert sorted(p.name for p in seeds_dir.iterdir()) == sorted([MARKER, "report.html", "report.md", "seeds",
                                                                  "summary.json"])
    assert sorted(p.name for p in (seeds_dir / "seeds").iterdir()) == ["5", "6", "7"]
    for seed in (5, 6, 7):
        sub = seeds_dir / "seeds" / str(seed)
        assert read_marker(sub)["kind"] == "run"
        folder = read_run_folder(sub)  # the report's reader of any run folder
        assert folder.summary["seed"] == seed
    # A seed's folder takes its own report like any run folder (seed 6's is checked byte for byte below).
    assert runner.invoke(app, ["report", str(seeds_dir / "seeds" / "5")]).exit_code == 0
    assert (seeds_dir / "seeds" / "5" / "report.html").is_file()
    top = summary(seeds_dir)
    assert top["seeds"] == [5, 6, 7] and top["folders"] == ["seeds/5", "seeds/6", "seeds/7"]
    assert top["between_seeds"] == {"method": "student-t", "level": 0.95}
    assert top["config_hash"] == summary(seeds_dir / "seeds" / "5")["config_hash"]


def test_a_seed_folder_is_the_run_of_that_seed(seeds_dir: Path, tmp_path: Path) -> None:
    # Seed 6 run alone, into a folder also named 6: the same summary and, byte for byte, the same report.
    alone = tmp_path / "6"
    assert runner.invoke(app, ["run", "--out", str(alone), "--seed", "6", *SMALL]).exit_code == 0
    inner = seeds_dir / "seeds" / "6"
    assert summary(alone) == summary(inner)
    assert render_report(alone) == render_report(inner)


def test_combined_summary_against_scipy_t(seeds_dir: Path) -> None:
    top = summary(seeds_dir)
    per_seed = [leaves(summary(seeds_dir / "seeds" / str(s))) for s in (5, 6, 7)]
    figures = {tuple(f["path"]): f for f in top["figures"]}
    paths = {p for leaf in per_seed for p, v in leaf.items() if v is not None and math.isfinite(v)} - {("seed",)}
    assert set(figures) == paths
    checked = 0
    for path, fig in figures.items():
        values = np.array([leaf.get(path) for leaf in per_seed], dtype=float)
        kept = values[np.isfinite(values)]
        assert fig["seeds"] == kept.size
        assert fig["mean"] == pytest.approx(kept.mean(), rel=1e-12, abs=1e-12)
        if kept.size >= 2 and kept.std() > 0:
            low, high = stats.t.interval(0.95, kept.size - 1, loc=kept.mean(), scale=stats.sem(kept))
            assert fig["low"] == pytest.approx(low, rel=1e-9, abs=1e-12)
            assert fig["high"] == pytest.approx(high, rel=1e-9, abs=1e-12)
            checked += 1
    assert checked > 100


def test_pooled_wilson_against_statsmodels(seeds_dir: Path) -> None:
    top = summary(seeds_dir)
    tables = [read_run_folder(seeds_dir / "seeds" / str(s)).tables["bias_by_region"] for s in (5, 6, 7)]
    rows = [r for r in top["representation"] if r["grouping"] == "region"]
    assert [r["group"] for r in rows] == list(tables[0]["region"])
    all_reports = sum(int(t["reports"].sum()) for t in tables)
    all_devices = sum(int(t["devices"].sum()) for t in tables)
    for row in rows:
        reports = sum(int(t.loc[t["region"] == row["group"], "reports"].sum()) for t in tables)
        devices = sum(int(t.loc[t["region"] == row["group"], "devices"].sum()) for t in tables)
        fleet = devices / all_devices
        low, high = proportion_confint(reports, all_reports, alpha=0.05, method="wilson")
        assert row["pooled"] == pytest.approx(reports / all_reports / fleet, rel=1e-12)
        assert row["wilson_low"] == pytest.approx(low / fleet, rel=1e-6)
        assert row["wilson_high"] == pytest.approx(high / fleet, rel=1e-6)
        between = next(f for f in top["figures"] if f["path"] == ["bias", "by_region", row["group"],
                                                                   "representation_ratio"])
        assert (row["mean"], row["low"], row["high"], row["seeds"]) == \
            (between["mean"], between["low"], between["high"], between["seeds"])


# ------------------------------------------------------------------------------ the report


class Tables(HTMLParser):
    """The page's data tables (data-table id -> rows of data-value strings) and its answers."""

    def __init__(self) -> None:
        super().__init__(convert_charrefs=True)
        self.tables: dict[str, list[list[str]]] = {}
        self.answers: list[str] = []
        self._table: str | None = None
        self._answer = False

    def handle_starttag(self, tag, attrs) -> None:
        a = dict(attrs)
        if tag == "table":
            self._table = a.get("data-table")
            self.tables[self._table] = []
        elif tag == "tr" and self._table is not None:
            self.tables[self._table].append([])
        elif tag == "td" and self._table is not None:
            self.tables[self._table][-1].append(a.get("data-value") or "")
        elif tag == "p" and a.get("class") == "answer":
            self._answer = True
            self.answers.append("")

    def handle_endtag(self, tag) -> None:
        if tag == "table" and self._table is not None:
            self.tables[self._table] = [row for row in self.tables[self._table] if row]  # the header has no td
            self._table = None
        elif tag == "p":
            self._answer = False

    def handle_data(self, data) -> None:
        if self._answer:
            self.answers[-1] += data


def parsed(html_text: str) -> Tables:
    parser = Tables()
    parser.feed(html_text)
    return parser


def test_report_over_several_folders_equals_the_multi_seed_report(seeds_dir: Path, tmp_path: Path) -> None:
    subs = [seeds_dir / "seeds" / s for s in ("7", "5", "6")]  # any order: the report sorts by seed
    out = tmp_path / "across"
    result = runner.invoke(app, ["report", *map(str, subs), "--out", str(out)])
    assert result.exit_code == 0, result.output
    assert read_marker(out)["kind"] == "seeds"
    assert sorted(p.name for p in out.iterdir()) == [MARKER, "report.html", "report.md", "summary.json"]
    mine, theirs = summary(out), summary(seeds_dir)
    assert [Path(f) for f in mine["folders"]] == [(seeds_dir / "seeds" / s).resolve() for s in ("5", "6", "7")]
    assert {k: v for k, v in mine.items() if k != "folders"} == {k: v for k, v in theirs.items() if k != "folders"}
    a = parsed((out / "report.html").read_text(encoding="utf-8"))
    b = parsed((seeds_dir / "report.html").read_text(encoding="utf-8"))
    assert a.answers == b.answers
    assert set(a.tables) == set(b.tables)
    for name in a.tables:
        strip = (lambda rows: [r[:1] + r[2:] for r in rows]) if name == "seeds" else (lambda rows: rows)
        assert strip(a.tables[name]) == strip(b.tables[name]), name
    # The Markdown is the same text but for the folder names.
    md_a = (out / "report.md").read_text(encoding="utf-8").replace(str(seeds_dir.resolve()) + "/", "")
    md_b = (seeds_dir / "report.md").read_text(encoding="utf-8")
    md_a = md_a.replace("run folder across.", "run folder multi.")
    escaped = re.sub(r"([\\`*_{}\[\]<>#+!|~&$])", r"\\\1", str(seeds_dir.resolve()) + "/")
    assert md_a.replace(escaped, "") == md_b
    # The report of the --out folder can be written again from its own summary.
    assert runner.invoke(app, ["report", str(out)]).exit_code == 0


def test_report_shows_every_figure_its_seeds_and_the_rule(seeds_dir: Path) -> None:
    page = parsed((seeds_dir / "report.html").read_text(encoding="utf-8"))
    top = summary(seeds_dir)
    rows = page.tables["figures"]
    assert [r[0] for r in rows] == [".".join(f["path"]) for f in top["figures"]]
    assert [int(r[5]) for r in rows] == [f["seeds"] for f in top["figures"]]
    for grouping in ("device_type", "region", "data_quartile"):
        shown = page.tables[f"bias-{grouping}"]
        records = [r for r in top["representation"] if r["grouping"] == grouping]
        assert len(shown) == len(records)
        for row, record in zip(shown, records, strict=True):
            low, high, which = chosen_interval(record)
            assert row[-1] == which and float(row[-3]) == low and float(row[-2]) == high
    assert "replaces the Wilson interval of the pooled counts when it is wider" in \
        (seeds_dir / "report.md").read_text(encoding="utf-8")
    markdown = (seeds_dir / "report.md").read_text(encoding="utf-8")
    assert "organisation's review" in markdown  # the standing caution


# ------------------------------------------------------------------------------ guard and errors


def test_overwrite_guard(tmp_path: Path) -> None:
    out = tmp_path / "multi"
    assert runner.invoke(app, ["run", "--out", str(out), "--seeds", "2", *TINY]).exit_code == 0
    before = summary(out)
    again = one_error(runner.invoke(app, ["run", "--out", str(out), "--seeds", "2", *TINY]))
    assert "holds an earlier fleetsim multi-seed run; pass --force" in again
    single = one_error(runner.invoke(app, ["run", "--out", str(out), *TINY]))
    assert "multi-seed run; pass --force" in single
    # A file fleetsim did not write, inside a seed's folder: refused even with --force.
    (out / "seeds" / "0" / "notes.txt").write_text("mine")
    foreign = one_error(runner.invoke(app, ["run", "--out", str(out), "--seeds", "2", "--force", *TINY]))
    assert "holds files fleetsim did not write (seeds/0/notes.txt)" in foreign
    (out / "seeds" / "0" / "notes.txt").unlink()
    assert runner.invoke(app, ["run", "--out", str(out), "--seeds", "2", "--seed", "3", "--force",
                               *TINY]).exit_code == 0
    assert summary(out)["seeds"] == [3, 4] and before["seeds"] == [0, 1]
    assert sorted(p.name for p in (out / "seeds").iterdir()) == ["3", "4"]
    # Someone else's folder is never replaced.
    theirs = tmp_path / "theirs"
    theirs.mkdir()
    (theirs / "data.csv").write_text("a\n1\n")
    refused = one_error(runner.invoke(app, ["run", "--out", str(theirs), "--seeds", "2", "--force", *TINY]))
    assert "is not a fleetsim output folder" in refused
    assert sorted(p.name for p in theirs.iterdir()) == ["data.csv"]


def test_a_failed_seed_leaves_nothing_half_written(tmp_path: Path, monkeypatch: pytest.MonkeyPatch) -> None:
    import fleetsim.engine

    out = tmp_path / "multi"
    real = fleetsim.engine.simulate

    def failing(config, seed, **kwargs):
        if seed == 1:
            raise OSError(28, "No space left on device")
        return real(config, seed=seed, **kwargs)

    monkeypatch.setattr(fleetsim.engine, "simulate", failing)
    error = one_error(runner.invoke(app, ["run", "--out", str(out), "--seeds", "2", *TINY]))
    assert "nothing was changed" in error
    assert not out.exists() and [p.name for p in tmp_path.iterdir()] == []


@pytest.mark.parametrize("count", ["1", "0", "-3"])
def test_too_few_seeds_is_one_line(tmp_path: Path, count: str) -> None:
    error = one_error(runner.invoke(app, ["run", "--out", str(tmp_path / "x"), "--seeds", count, *TINY]))
    assert error == f"error: --seeds: expected a whole number of seeds from 2 to 10,000 (got {count})"
    assert not (tmp_path / "x").exists()


def test_mismatched_settings_name_both_folders_and_the_key(tmp_path: Path) -> None:
    a, b = tmp_path / "a", tmp_path / "b"
    assert runner.invoke(app, ["run", "--out", str(a), "--seed", "1", *TINY]).exit_code == 0
    assert runner.invoke(app, ["run", "--out", str(b), "--seed", "2", *TINY, "--devices", "210"]).exit_code == 0
    error = one_error(runner.invoke(app, ["report", str(a), str(b), "--out", str(tmp_path / "r")]))
    assert error == (f"error: {b}: not the same settings as {a} (fleet.devices: 200 in {a}, 210 in {b}); a report "
                     "over several runs needs one set of settings under different seeds")
    assert not (tmp_path / "r").exists()
    twice = tmp_path / "twice"
    shutil.copytree(a, twice)
    error = one_error(runner.invoke(app, ["report", str(a), str(twice), "--out", str(tmp_path / "r")]))
    assert error == (f"error: {twice}: holds seed 1, as {a} does; a report over several runs needs each seed once")
    missing = one_error(runner.invoke(app, ["report", str(a), str(twice)]))
    assert missing.startswith("error: --out: missing;")
    # --out may not be a folder that holds one of the runs.
    held = one_error(runner.invoke(app, ["report", str(a), str(b), "--out", str(tmp_path), "--force"]))
    assert "holds the input file" in held


def test_a_multi_seed_folder_is_not_one_of_several_runs(seeds_dir: Path, tmp_path: Path) -> None:
    error = one_error(runner.invoke(app, ["report", str(seeds_dir), str(seeds_dir / "seeds" / "5"),
                                          "--out", str(tmp_path / "r")]))
    assert error == (f"error: {seeds_dir}: is a multi-seed run folder; a report over several runs takes ordinary "
                     "run folders of one workload")


def test_broken_combined_summary_is_one_line(seeds_dir: Path, tmp_path: Path) -> None:
    copy = tmp_path / "copy"
    shutil.copytree(seeds_dir, copy)
    data = summary(copy)
    del data["figures"][0]["high"]
    (copy / "summary.json").write_text(json.dumps(data), encoding="utf-8")
    error = one_error(runner.invoke(app, ["report", str(copy)]))
    assert error == f"error: {copy / 'summary.json'}: 'figures[0]' lacks 'high'"
    shutil.rmtree(copy / "seeds" / "6")
    data = summary(seeds_dir)
    (copy / "summary.json").write_text(json.dumps(data), encoding="utf-8")
    error = one_error(runner.invoke(app, ["report", str(copy)]))
    listed = copy / "summary.json"
    assert error == f"error: {copy / 'seeds' / '6'}: missing; {listed} lists it as the run folder of a seed"
    for key, value, words in (("folders", ["seeds/5"], "'folders' should name one run folder per seed"),
                              ("seeds", [], "'seeds' should list the seeds"),
                              ("devices", "many", "'devices' should be a number")):
        (copy / "summary.json").write_text(json.dumps({**data, key: value}), encoding="utf-8")
        assert one_error(runner.invoke(app, ["report", str(copy)])).startswith(f"error: {listed}: {words}")
    assert not (copy / "report.html").exists() or (copy / "report.html").read_text(encoding="utf-8") == \
        (seeds_dir / "report.html").read_text(encoding="utf-8")  # the old report stays whole
