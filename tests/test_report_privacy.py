"""The report's privacy and model-impact sections, and the terminal brief's privacy lines.

Each section's numbers are checked against the run folder it reads (summary.json, the privacy
tables, a hand-written impact.json and curves table in the format of docs/impact.md) and the
privacy counts against the event log itself; a broken impact.json is a one-line error, and a
run without either has neither section.
"""

from __future__ import annotations

import json
import shutil
from pathlib import Path

import numpy as np
import pandas as pd
import pytest
from typer.testing import CliRunner

import fleetsim
from fleetsim.brief import render_summary
from fleetsim.cli import app
from fleetsim.metrics.privacy import PRIVACY_CAUTION
from fleetsim.output import write_run
from fleetsim.report import render_report
from tests.test_report import frame, numbers, parse

FLEET = Path(__file__).resolve().parents[1] / "fleets" / "inkwren.yaml"
SMALL = ["fleet.devices=600", "horizon.duration=1d", "rounds.target_reports=5", "rounds.min_reports=4",
         "rounds.rest=2h", "rounds.selection_timeout=10m"]
PRIVACY = ["workload.privacy.clipping_norm=1.0", "workload.privacy.noise_multiplier=1.1"]
PLAIN_SECTIONS = ["s-run", "s-headline", "s-over-time", "s-durations", "s-waste", "s-bias", "s-participation",
                  "s-survival", "s-cost", "s-load", "s-caution"]
"""The sections of a report without secure aggregation, privacy or impact.json (docs/report.md)."""


def _run(tmp_path_factory: pytest.TempPathFactory, name: str, overrides: list[str]) -> Path:
    config = fleetsim.load_config(FLEET, overrides)
    return write_run(fleetsim.simulate(config, seed=3), tmp_path_factory.mktemp(name) / "run")


@pytest.fixture(scope="module")
def private_run(tmp_path_factory: pytest.TempPathFactory) -> Path:
    """A one-day run of a few hundred devices with ``workload.privacy`` set."""
    return _run(tmp_path_factory, "private", [*SMALL, *PRIVACY])


@pytest.fixture(scope="module")
def plain_run(tmp_path_factory: pytest.TempPathFactory) -> Path:
    """The same run without ``workload.privacy``."""
    return _run(tmp_path_factory, "plain", SMALL)


def sections(html_text: str) -> list[str]:
    return [a["id"] for tag, a in parse(html_text).tags if tag == "section" and a.get("id")]


def summary_of(folder: Path) -> dict:
    return json.loads((folder / "summary.json").read_text(encoding="utf-8"))


def figure_values(html_text: str, table: str) -> dict[str, str]:
    shown = frame(parse(html_text), table)
    return dict(zip(shown["figure"], shown["value"], strict=True))


# ------------------------------------------------------------------------------ privacy


def test_privacy_section_shows_the_summary_figures(private_run: Path) -> None:
    html_text, markdown = render_report(private_run)
    p = summary_of(private_run)["privacy"]
    ids = sections(html_text)
    assert ids == [*PLAIN_SECTIONS[:7], "s-privacy", *PLAIN_SECTIONS[7:]]
    values = figure_values(html_text, "privacy")
    for key in ("median", "p90", "p99", "worst"):
        label = f"Per-device epsilon: {key}" + (" (over all devices)" if key == "worst" else " (devices that reported)")
        assert float(values[label]) == p["epsilon"][key]
    assert float(values["Uniform-sampling claim (epsilon)"]) == p["epsilon_uniform_sampling"]
    assert float(values["Share of devices whose own epsilon exceeds the claim"]) == p["devices_over_uniform_claim"]
    assert int(values["Worst device: index in the fleet"]) == p["worst_device"]["device"]
    parsed = parse(html_text)
    for key, name in (("device_type", "privacy_by_device_type"), ("region", "privacy_by_region")):
        shown, table = frame(parsed, f"privacy-{key}"), pd.read_csv(private_run / "tables" / f"{name}.csv")
        assert list(shown[key]) == list(table[key])
        for col in ("devices", "reporting_devices", "epsilon_median", "epsilon_p99", "epsilon_worst",
                    "devices_over_uniform_claim"):
            assert np.array_equal(numbers(shown[col]), table[col].to_numpy(dtype=float), equal_nan=True), col
    answer = next(a for a in parsed.answers if a.startswith("Each device's own epsilon"))
    claim = p["epsilon_uniform_sampling"]
    for figure in (p["epsilon"]["median"], p["epsilon"]["p90"], p["epsilon"]["worst"], claim):
        assert f"{figure:.3g}" in answer
    assert f"device {p['worst_device']['device']}," in answer and f"claim {claim:.3g}" in html_text  # the figure's line
    assert "Privacy: what does taking part cost each device?" in markdown and PRIVACY_CAUTION in markdown
    assert "Why the two figures differ" in markdown


def test_privacy_counts_follow_the_event_log(private_run: Path) -> None:
    """Reporting devices, the most reports and the worst device, from events.parquet and
    rounds.parquet directly (used reports of committed rounds, docs/impact.md)."""
    events = pd.read_parquet(private_run / "events.parquet")
    rounds = pd.read_parquet(private_run / "rounds.parquet")
    committed = set(rounds.loc[rounds["status"] == "committed", "round"])
    used = events[events["used"].astype(bool) & events["round"].isin(committed)]
    counts = used.groupby("device").size()
    p = summary_of(private_run)["privacy"]
    assert p["reporting_devices"] == counts.size > 100  # enough devices reported for quantiles to mean something
    assert p["participations_max"] == counts.max() == p["worst_device"]["participations"]
    assert counts[p["worst_device"]["device"]] == counts.max()
    values = figure_values(render_report(private_run)[0], "privacy")
    assert int(values["Devices that reported"]) == counts.size
    assert int(values["Devices that never reported (epsilon 0)"]) == 600 - counts.size
    assert int(values["Most reports used from one device"]) == counts.max()


def test_brief_names_privacy_only_when_set(private_run: Path, plain_run: Path) -> None:
    p = summary_of(private_run)["privacy"]
    lines = render_summary(summary_of(private_run)).splitlines()
    first = next(i for i, line in enumerate(lines) if line.startswith("privacy"))
    text = lines[first]
    assert f"delta {p['delta']:.3g}" in text
    assert f"median {p['epsilon']['median']:.3g}, worst {p['epsilon']['worst']:.3g}" in text
    assert f"claim {p['epsilon_uniform_sampling']:.3g} over {p['committed_rounds']} committed rounds" in text
    assert lines[first + 1].startswith(f"  {100 * p['devices_over_uniform_claim']:.1f}% of devices")
    assert lines[-1].startswith("caution:")  # the caution still closes the brief
    assert "privacy" not in render_summary(summary_of(plain_run)).lower()


# ------------------------------------------------------------------------------ model impact


def hand_written_impact(folder: Path, final: bool = False) -> dict:
    """An impact.json and tables/impact_curves.csv in the format of docs/impact.md for the run's groups."""
    bias = summary_of(folder)["bias"]
    groups = {"device_type": list(bias["by_device_type"]), "region": list(bias["by_region"]),
              "data_quartile": ["Q1", "Q2", "Q3", "Q4"]}
    accuracy = {g: {name: round(0.60 + 0.03 * i + 0.01 * j, 4) for i, name in enumerate(names)}
                for j, (g, names) in enumerate(groups.items())}
    parts = [(g, name, a) for g, by in accuracy.items() for name, a in by.items()]
    worst, best = min(parts, key=lambda t: t[2]), max(parts, key=lambda t: t[2])
    summary = {
        "overall": {"accuracy": 0.655, "loss": 0.91},
        "worst_group": {"grouping": worst[0], "group": worst[1], "accuracy": worst[2]},
        "best_group": {"grouping": best[0], "group": best[1], "accuracy": best[2]},
        "gap": best[2] - worst[2],
        "by_device_type": accuracy["device_type"], "by_region": accuracy["region"],
        "by_data_quartile": accuracy["data_quartile"], "rounds_trained": 120, "synthetic": True,
    }
    record = {"impact": summary, "seed": 3, "settings": None, "caution": "invented stand-ins, hand-written here"}
    rows = []
    for step, (round_no, time_s) in enumerate(((-1, 0.0), (59, 20000.0), (119, 41000.0))):
        share = step / 2
        rows.append((round_no, time_s, "overall", "overall", 0.25 + share * (0.655 - 0.25), 1.4))
        rows += [(round_no, time_s, g, name, 0.25 + share * (a - 0.25), 1.4) for g, name, a in parts]
    curves = pd.DataFrame(rows, columns=["round", "time_s", "grouping", "group", "accuracy", "loss"])
    curves.to_csv(folder / "tables" / "impact_curves.csv", index=False)
    if final:
        pd.DataFrame([("overall", "overall", 0.655, 0.91, 600, 500)] + [(g, n, a, 0.9, 7, 11) for g, n, a in parts],
                     columns=["grouping", "group", "accuracy", "loss", "devices", "reports"]).to_csv(
            folder / "tables" / "impact_final.csv", index=False)
    (folder / "impact.json").write_text(json.dumps(record, indent=2), encoding="utf-8")
    return record


@pytest.mark.parametrize("final", [False, True])
def test_impact_section_shows_impact_json(tmp_path: Path, plain_run: Path, final: bool) -> None:
    folder = tmp_path / "run"
    shutil.copytree(plain_run, folder)
    record = hand_written_impact(folder, final)
    s = record["impact"]
    html_text, markdown = render_report(folder)
    assert sections(html_text) == [*PLAIN_SECTIONS[:7], "s-impact", *PLAIN_SECTIONS[7:]]
    parsed = parse(html_text)
    shown = frame(parsed, "impact-final")
    expected = [("overall", s["overall"]["accuracy"])] + [
        (name, a) for key in ("by_device_type", "by_region", "by_data_quartile") for name, a in s[key].items()]
    assert list(shown["group"]) == [name for name, _ in expected]
    assert np.array_equal(numbers(shown["accuracy"]), [a for _, a in expected])
    reports = np.array([float(v) if v else np.nan for v in shown["reports"]])  # every cell empty without the table
    assert (np.array_equal(reports, [500] + [11] * (len(expected) - 1)) if final else np.isnan(reports).all())
    curves = frame(parsed, "impact-curves")
    written = pd.read_csv(folder / "tables" / "impact_curves.csv")
    assert len(curves) == len(written) and np.array_equal(numbers(curves["accuracy"]), written["accuracy"])
    assert 'data-figure="impact-0"' in html_text
    answer = next(a for a in parsed.answers if a.startswith("Trained on 120 committed rounds"))
    worst, best = s["worst_group"], s["best_group"]
    assert f"{worst['group']} worst at {100 * worst['accuracy']:.1f}%" in answer
    assert f"{best['group']} best at {100 * best['accuracy']:.1f}%" in answer
    assert f"a gap of {100 * s['gap']:.1f} percentage points" in answer
    assert "invented stand-ins" in markdown and record["caution"] in markdown
    assert "Model impact: whom does the model trained on these rounds serve worse?" in markdown


def test_without_privacy_or_impact_the_report_has_neither(tmp_path: Path, plain_run: Path) -> None:
    folder = tmp_path / "run"
    shutil.copytree(plain_run, folder)
    before = render_report(folder)
    assert sections(before[0]) == PLAIN_SECTIONS
    assert "Privacy" not in before[1] and "Model impact" not in before[1]
    hand_written_impact(folder)
    assert render_report(folder) != before
    (folder / "impact.json").unlink()  # the curves table alone is not read
    assert render_report(folder) == before


@pytest.mark.parametrize("kind", ["not-json", "not-an-object", "gap-text", "lacks-key", "no-curves", "text-accuracy"])
def test_broken_impact_json_is_a_one_line_error(tmp_path: Path, plain_run: Path, kind: str) -> None:
    folder = tmp_path / "run"
    shutil.copytree(plain_run, folder)
    record = hand_written_impact(folder)
    target = folder / "impact.json"
    if kind == "not-json":
        target.write_text('{"impact": {', encoding="utf-8")
    elif kind == "not-an-object":
        target.write_text("[1, 2]", encoding="utf-8")
    elif kind == "gap-text":
        record["impact"]["gap"] = "wide"
        target.write_text(json.dumps(record), encoding="utf-8")
    elif kind == "lacks-key":
        del record["impact"]["worst_group"]
        target.write_text(json.dumps(record), encoding="utf-8")
    elif kind == "no-curves":
        (folder / "tables" / "impact_curves.csv").unlink()
    else:
        curves = pd.read_csv(folder / "tables" / "impact_curves.csv")
        curves["accuracy"] = curves["accuracy"].astype(object)
        curves.loc[0, "accuracy"] = "high"
        curves.to_csv(folder / "tables" / "impact_curves.csv", index=False)
    result = CliRunner().invoke(app, ["report", str(folder)])
    assert result.exit_code == 2, result.output
    lines = [line for line in result.output.splitlines() if line.strip()]
    assert len(lines) == 1 and lines[0].startswith("error: "), lines
    named = "impact_curves.csv" if kind in ("no-curves", "text-accuracy") else "impact.json"
    assert named in lines[0] and "Traceback" not in result.output
    assert not (folder / "report.html").exists() and not (folder / "report.md").exists()
