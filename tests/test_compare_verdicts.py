"""Comparison verdicts: multiplicity control, equivalence margins, what is not tested, the
overall line and the group-sequential design.

The adjustments and tests are checked against statsmodels (``multipletests``,
``ttost_paired``; a test-only reference) and scipy; the sequential boundaries against
published values and scipy's multivariate normal integral; the error rates by simulating
synthetic paired data with fixed seeds, within stated binomial bounds; the simulator checks
use tiny fleets (3,000 devices for 12 hours).
"""

from __future__ import annotations

import json
import math
from pathlib import Path

import numpy as np
import pandas as pd
import pytest
from scipy import stats
from statsmodels.stats.multitest import multipletests
from statsmodels.stats.weightstats import ttost_paired
from typer.testing import CliRunner

import fleetsim
from fleetsim.cli import app
from fleetsim.errors import ConfigError
from fleetsim.study import Arm, FleetFile, InProcess, run_compare
from fleetsim.study.compare_overall import OVERALL, overall
from fleetsim.study.compare_rules import Margin, count_rates, parse_design, parse_margin, pinned
from fleetsim.study.compare_sequential import boundaries, crosses, repeated_p, schedule, spent, step_down
from fleetsim.study.compare_tests import Design, decide, examine_metric
from fleetsim.study.multiple import benjamini_hochberg, holm
from fleetsim.study.stats import paired_t, tost
from fleetsim.study.verdicts import DIFFERENCE_COLUMNS, ROLES, VERDICTS, Condition, differences

TINY = ["fleet.devices=3000", "horizon.duration=12h", "rounds.target_reports=20", "rounds.min_reports=15"]
CLI_TINY = [arg for item in TINY for arg in ("--set", item)]
PRIMARY = ["rounds_committed_per_hour", "waste_compute_fraction", "study_worst_representation"]
DOCS = (Path(__file__).resolve().parents[1] / "docs" / "studies.md").read_text()
ALPHA = 0.05


def binomial_bound(reps: int, p: float = ALPHA, sds: float = 3.5) -> float:
    """Half-width of a band of ``sds`` binomial standard deviations around ``p`` for ``reps``."""
    return sds * math.sqrt(p * (1 - p) / reps)


# ------------------------------------------------------------------------------ adjustments and tests


def test_holm_and_benjamini_hochberg_match_statsmodels():
    """statsmodels.stats.multitest.multipletests (methods holm, fdr_bh) is the reference, to
    floating-point tolerance, on p-values with ties, zeros, ones and untested (NaN) entries."""
    rng = np.random.default_rng(11)
    cases = [rng.uniform(size=n) for n in (1, 2, 7, 50, 300)]
    cases += [np.array([0.01, 0.01, 0.04, 0.04, 0.2, 1.0, 0.0]), rng.beta(0.3, 4, size=80)]
    for p in cases:
        for ours, method in ((holm, "holm"), (benjamini_hochberg, "fdr_bh")):
            reject, corrected, _, _ = multipletests(p, alpha=ALPHA, method=method)
            np.testing.assert_allclose(ours(p), corrected, rtol=1e-12, atol=1e-15)
            assert np.array_equal(ours(p) <= ALPHA, reject)
    with_nan = np.array([0.03, np.nan, 0.01, 0.2])
    _, corrected, _, _ = multipletests(with_nan[~np.isnan(with_nan)], method="holm")
    assert np.isnan(holm(with_nan)[1]) and np.allclose(holm(with_nan)[[0, 2, 3]], corrected)
    with pytest.raises(ValueError):
        holm([0.5, 1.5])


def test_paired_t_and_tost_match_scipy_and_statsmodels():
    """A worked example: ten paired figures, margin 0.6. The paired t test against
    scipy.stats.ttest_rel, and the TOST (Schuirmann 1987) against
    statsmodels.stats.weightstats.ttost_paired(candidate, baseline, -margin, margin), whose
    p-value and one-sided statistics are the reference."""
    baseline = np.array([6.1, 5.8, 6.4, 6.0, 5.9, 6.3, 6.2, 5.7, 6.0, 6.1])
    candidate = np.array([6.2, 5.9, 6.3, 6.2, 6.0, 6.2, 6.4, 5.8, 6.1, 6.0])
    ours = paired_t(baseline, candidate)
    reference = stats.ttest_rel(candidate, baseline)
    assert ours.t == pytest.approx(reference.statistic, rel=1e-12) and ours.p == pytest.approx(reference.pvalue)
    for margin in (0.6, 0.1, 0.05):
        p, low, high = ttost_paired(candidate, baseline, -margin, margin)
        found = tost(candidate - baseline, margin)
        assert found.p == pytest.approx(p, rel=1e-10)
        assert (found.t_low, found.p_low) == pytest.approx((low[0], low[1]), rel=1e-10)
        assert (found.t_high, found.p_high) == pytest.approx((high[0], high[1]), rel=1e-10)
    assert tost(candidate - baseline, 0.6).p < ALPHA < tost(candidate - baseline, 0.05).p
    # The limits when every difference is the same: no spread to test against.
    assert paired_t([1.0, 2.0, 3.0], [1.0, 2.0, 3.0]).p == 1.0 and tost([0.0, 0.0, 0.0], 0.1).p == 0.0
    assert paired_t([1.0, 2.0, 3.0], [2.0, 3.0, 4.0]).p == 0.0 and tost([1.0, 1.0, 1.0], 0.1).p == 1.0


# ------------------------------------------------------------------------------ group-sequential boundaries


def test_boundaries_match_published_values_and_the_normal_integral():
    """O'Brien-Fleming-type Lan-DeMets spending, two-sided 5%, equally spaced looks: 2 looks
    2.963, 1.969; 3 looks 3.710, 2.511, 1.993; 5 looks 4.877, 3.357, 2.680, 2.290, 2.031
    (the published tables, e.g. Jennison and Turnbull 2000, and gsDesign's sfLDOF; from
    memory). For unequal looks the crossing probabilities are checked against scipy's
    multivariate normal integral (corr(Z_j, Z_k) = sqrt(t_j / t_k)): the chance of crossing
    by look k must be the error spent a(t_k)."""
    published = {2: (2.963, 1.969), 3: (3.710, 2.511, 1.993), 5: (4.877, 3.357, 2.680, 2.290, 2.031)}
    for looks, values in published.items():
        fractions = tuple((i + 1) / looks for i in range(looks))
        assert boundaries(fractions, ALPHA, True) == pytest.approx(values, abs=1.5e-3)
    fractions = (0.3, 0.55, 1.0)
    cov = np.array([[min(a, b) / math.sqrt(a * b) for b in fractions] for a in fractions])
    for two_sided in (True, False):
        c = np.array(boundaries(fractions, ALPHA, two_sided))
        for k in range(1, 4):
            lower = -c[:k] if two_sided else np.full(k, -np.inf)
            inside = stats.multivariate_normal(np.zeros(k), cov[:k, :k]).cdf(c[:k], lower_limit=lower)
            assert 1 - inside == pytest.approx(float(spent(fractions[k - 1], ALPHA, two_sided)), abs=2e-5)
    # The first boundary in closed form: one-sided, a(t) spent by a normal tail.
    assert boundaries((0.25, 1.0), 0.025, False)[0] == pytest.approx(
        stats.norm.isf(float(spent(0.25, 0.025, False))), rel=1e-12)


def test_repeated_p_is_the_smallest_level_that_crosses():
    """The repeated p-value (Jennison and Turnbull 2000, ch. 9) is the level at which the
    design just crosses; with one look it is the ordinary paired t p-value (scipy)."""
    fractions = (0.25, 0.5, 0.75, 1.0)
    for z in (np.array([1.0, 2.0, 2.4]), np.array([3.9, 1.0]), np.array([0.5, 1.2, 1.9, 2.3])):
        for two_sided in (True, False):
            p = repeated_p(z, fractions, two_sided, exact=True)
            assert crosses(z, fractions, p * (1 + 1e-6), two_sided)
            assert not crosses(z, fractions, p * (1 - 1e-6), two_sided)
            assert repeated_p(z, fractions, two_sided) == pytest.approx(p, rel=0.02)  # the table
    rng = np.random.default_rng(3)
    d = rng.normal(0.4, 1.0, 9)
    found = examine_metric(d, d, np.full(9, 5.0), Design((9,)), None)
    z_one = repeated_p(found.z, (1.0,))
    assert found.p == pytest.approx(stats.ttest_1samp(d, 0.0).pvalue, rel=1e-10)
    assert z_one == pytest.approx(found.p, rel=1e-8)


def test_step_down_is_holm_on_the_repeated_p_values():
    """Holm's method applied to exact repeated p-values rejects exactly what the step-down
    on boundaries rejects (Holm 1979; the repeated p-values are valid at any stop)."""
    rng = np.random.default_rng(5)
    fractions = schedule(12, 4).fractions
    for _ in range(12):
        z = [rng.normal(1.5, 1.2, size=3) for _ in range(3)]
        p = np.array([repeated_p(h, fractions, exact=True) for h in z])
        assert np.array_equal(step_down([[h] for h in z], fractions, ALPHA), holm(p) <= ALPHA)


# ------------------------------------------------------------------------------ sequential error rates


def _sequential(data: np.ndarray, looks: tuple[int, ...], fractions: tuple[float, ...] | None,
                margin: Margin | None = None) -> tuple[np.ndarray, np.ndarray, int]:
    """Run one synthetic comparison: ``data`` (seeds x metrics) are the per-seed differences
    (baseline 10 on every seed). Stops when every metric is decided, as run_compare does.
    ``fractions`` None looks naively: a fixed-sample test at every look."""
    for k, n in enumerate(looks):
        design = Design(looks[: k + 1], fractions) if fractions else Design((n,))
        tested = [examine_metric(data[:n, j], data[:n, j], np.full(n, 10.0), design, margin) for j in
                  range(data.shape[1])]
        found = decide(tested, True, design, ALPHA)
        if (found.changed | found.equivalent).all():
            break
    return found.changed, found.equivalent, n


def test_sequential_null_rate_stays_within_a_binomial_bound_of_alpha():
    """1,500 synthetic A/A comparisons (three primary metrics, normal differences with mean 0,
    looks at 4, 8, ..., 20 seeds): the share with any false better/worse is Binomial(1500, q)
    with q the design's family-wise error rate, 5% (Holm over O'Brien-Fleming-type spending;
    about 5.3% at batches this small from the t statistics, docs/studies.md). It must lie
    within 3.5 binomial sds of 5%. Looking naively (the fixed test at every look, one metric,
    stopping at the first claim) must exceed that bound: the check can fail."""
    rng = np.random.default_rng(20260315)
    plan = schedule(20, 4)
    reps = 1500
    false = sum(_sequential(rng.normal(0, 1, (20, 3)), plan.looks, plan.fractions)[0].any() for _ in range(reps))
    assert abs(false / reps - ALPHA) <= binomial_bound(reps)
    naive = sum(_sequential(rng.normal(0, 1, (20, 1)), plan.looks, None)[0].any() for _ in range(500))
    assert naive / 500 > ALPHA + binomial_bound(500)


def test_sequential_finds_an_injected_difference_and_stops_early():
    """A true change of one sd on one primary metric (the others unchanged), budget 20 seeds:
    the fixed-sample power of Holm's first step (level 5%/3) is 0.958 (scipy's noncentral t),
    and O'Brien-Fleming-type spending loses little of it, so of 200 comparisons at least 178
    (3.5 binomial sds below 0.95 x 200) must find it better. Alone, it is decided before the
    budget on average. Unchanged metrics are claimed no more often than the null bound allows."""
    rng = np.random.default_rng(8)
    plan = schedule(20, 4)
    found = used = false = 0
    for _ in range(200):
        data = rng.normal(0, 1, (20, 3))
        data[:, 0] += 1.0
        changed, _, _ = _sequential(data, plan.looks, plan.fractions)
        found += changed[0]
        false += changed[1:].any()
        alone, _, n = _sequential(data[:, :1], plan.looks, plan.fractions)
        used += n
    critical = stats.t.isf(ALPHA / 6, 19)
    assert stats.nct.sf(critical, 19, math.sqrt(20)) > 0.95
    assert found >= 178 and used / 200 < 16 and false / 200 <= ALPHA + binomial_bound(200)


def test_sequential_equivalence_keeps_its_error_and_finds_no_change():
    """TOST in the sequential design, margin 1 (differences with sd 1): at a true difference
    on the margin, a false "no change that matters" must stay within the binomial bound of
    5% over 1,000 comparisons; at a true difference 0 it is found in at least 90% of 200
    (fixed-sample TOST power at 20 seeds is about 0.99)."""
    rng = np.random.default_rng(13)
    plan = schedule(20, 4)
    margin = Margin("m", 1.0, relative=False)
    wrong = sum(_sequential(rng.normal(1.0, 1, (20, 1)), plan.looks, plan.fractions, margin)[1][0]
                for _ in range(1000))
    assert wrong / 1000 <= ALPHA + binomial_bound(1000)
    right = sum(_sequential(rng.normal(0.0, 1, (20, 1)), plan.looks, plan.fractions, margin)[1][0]
                for _ in range(200))
    assert right >= 180


# ------------------------------------------------------------------------------ rules and the overall line


def _synthetic_runs() -> pd.DataFrame:
    """Four seeds per arm with known figures: a count and its denominator, constants, an echo."""
    rng = np.random.default_rng(2)
    rows = []
    for arm, shift in (("baseline", 0.0), ("candidate", 0.5)):
        for seed in range(4):
            accepted = 100 + 10 * seed
            rows.append({
                "condition": "as-configured", "stress_file": None, "arm": arm, "seed": seed,
                "simulated_hours": 12.0, "devices": 3000, "rounds_in_flight": 1 if arm == "baseline" else 4,
                "rounds_attempted": 20 + seed, "rounds_committed": 10 + seed + 2 * shift,
                "rounds_committed_per_hour": (10 + seed + 2 * shift) / 12.0,
                "participations_accepted": accepted, "participations_dropouts_by_cause_crash": 5 + seed,
                "waste_compute_fraction": 0.2 + 0.01 * rng.normal() - 0.1 * shift,
                "study_worst_representation": 0.8 + 0.01 * rng.normal(),
                "bias_gini": 0.5 if arm == "baseline" else 0.6,
            })
    return pd.DataFrame(rows)


def test_counts_are_judged_as_rates_and_constants_are_not_tested():
    """The rule of docs/studies.md: counts are divided by their denominators (closed form
    here), figures constant on every seed in both arms and settings are not tested, and the
    primary p-values are Holm-adjusted among the tested primaries only (statsmodels)."""
    from fleetsim.study.compare_rules import add_rates

    runs, rate_of = add_rates(_synthetic_runs(), [])
    crash = "participations_dropouts_by_cause_crash"
    assert rate_of[crash] == f"{crash}_per_participation"
    assert rate_of["rounds_committed"] == "rounds_committed_per_hour" and "rounds_committed_per_hour" not in rate_of
    np.testing.assert_allclose(runs["participations_dropouts_by_cause_crash_per_participation"],
                               runs["participations_dropouts_by_cause_crash"] / runs["participations_accepted"])
    np.testing.assert_allclose(runs["rounds_attempted_per_hour"], runs["rounds_attempted"] / 12.0)
    metrics = [c for c in runs.columns if c not in ("condition", "stress_file", "arm", "seed")]
    d = differences(runs, [Condition("as-configured")], metrics, "baseline", "candidate", 0.8, primary=PRIMARY,
                    rate_of=rate_of)
    assert list(d.columns) == DIFFERENCE_COLUMNS
    d = d.set_index("metric")
    assert d.at["devices", "verdict"] == d.at["simulated_hours", "verdict"] == "not-tested-constant"
    assert d.at["rounds_in_flight", "verdict"] == "set-by-arms" and d.at["bias_gini", "verdict"] == "set-by-arms"
    assert d.at["participations_dropouts_by_cause_crash", "verdict"] == "judged-as-rate"
    assert d.at["participations_dropouts_by_cause_crash_per_participation", "direction"] == "lower"
    assert d.loc[d["verdict"].isin(["judged-as-rate", "set-by-arms", "not-tested-constant"]), "p_value"].isna().all()
    primary = d.loc[PRIMARY]
    assert (primary["role"] == "primary").all() and (primary["adjustment"] == "holm").all()
    np.testing.assert_allclose(primary["p_adjusted"], multipletests(primary["p_value"], method="holm")[1])
    secondary = d[(d["role"] == "secondary") & d["p_value"].notna()]
    np.testing.assert_allclose(secondary["p_adjusted"], multipletests(secondary["p_value"], method="fdr_bh")[1])
    # The same rule one arm at a time: present in one arm only, constant there.
    assert pinned("x", np.array([1.0, 1.0]), np.array([np.nan, np.nan]), []) == "set-by-arms"
    assert pinned("x", np.array([1.0, 2.0]), np.array([1.0, 1.0]), []) is None
    assert count_rates(["rounds_ended_by_report_deadline", "rounds_attempted"], [])[
        "rounds_ended_by_report_deadline"] == ("rounds_ended_by_report_deadline_per_round", "rounds_attempted")


def test_overall_line_follows_its_rule():
    """docs/studies.md, The overall line: mixed, better, worse, no change that matters, no decision."""
    def line(*verdicts):
        part = pd.DataFrame({"metric": ["a", "b", "c"][: len(verdicts)], "verdict": list(verdicts),
                             "p_value": 0.01, "p_adjusted": 0.02, "margin": "2%", "margin_value": 0.1,
                             "tost_p": 0.01, "tost_p_adjusted": 0.03})
        return overall(part, list(part["metric"]))

    assert line("better", "worse").verdict == "mixed"
    assert line("better", "no-detectable-change").verdict == "better"
    assert line("worse", "no-change-that-matters").verdict == "worse"
    assert line("no-change-that-matters", "not-tested-constant").verdict == "no-change-that-matters"
    assert line("no-change-that-matters", "no-detectable-change").verdict == "no-decision"
    text = line("worse", "no-detectable-change").text
    assert text.startswith("worse: a worse (Holm-adjusted p 0.020)") and "b undecided" in text


def test_options_are_read_or_refused_in_one_line():
    assert parse_margin("committed_per_hour=2%") == Margin("committed_per_hour", 0.02, True)
    assert parse_margin("waste_compute_fraction=0.05") == Margin("waste_compute_fraction", 0.05, False)
    for text, expected in (("x=abc", "not a number"), ("x=0", "positive"), ("x=-1%", "positive"), ("x", "expected")):
        with pytest.raises(ConfigError) as info:
            parse_margin(text)
        assert len(info.value.problems) == 1 and expected in info.value.problems[0]
    seeds, plan = parse_design(None, True, 12, 5, 3)
    assert list(seeds) == list(range(3, 15)) and plan.looks == (5, 10, 12)
    for args, expected in (((3, True, 10, None), "--seeds 3: not with --sequential"),
                           ((None, True, None, None), "--sequential: give --seed-budget"),
                           ((None, True, 10, 1), "--batch 1"), ((None, False, 10, None), "--seed-budget: only"),
                           ((None, True, 2000, 2), "at most 50")):
        with pytest.raises(ConfigError) as info:
            parse_design(*args)
        assert len(info.value.problems) == 1 and expected in info.value.problems[0]


def test_bad_primary_and_margin_metrics_are_refused_in_one_line_each(tmp_path):
    args = ["compare", *CLI_TINY, "--seeds", "1", "--workers", "1", "--primary", "bias_gini",
            "--primary", "rounds_committed", "--primary", "bias_coverage", "--margin", "rounds_attempted=2%",
            "--margin", "no_such_metric_here=1", "--out", str(tmp_path / "out")]
    result = CliRunner().invoke(app, args)
    assert result.exit_code == 2
    lines = result.stderr.strip().splitlines()
    assert len(lines) == 3 and all(line.startswith("error: ") for line in lines), result.stderr
    assert "--primary rounds_committed: a count is judged as a rate; name rounds_committed_per_hour" in lines[0]
    assert "--margin rounds_attempted=2%: a count is judged as a rate" in lines[1]
    assert lines[2].startswith("error: --margin no_such_metric_here: no such metric")
    assert not (tmp_path / "out" / "comparison.json").exists()


def test_the_new_tables_and_names_are_documented():
    def codes(heading: str) -> list[str]:
        table = DOCS.split(heading, 1)[1].split("\n\n", 2)[1]
        return [line.split("|")[1].strip().strip("`") for line in table.splitlines()[2:]]

    assert codes("### Verdict codes") == list(VERDICTS)
    assert codes("### Overall codes") == list(OVERALL)
    assert codes("### Role codes") == list(ROLES)
    compare_part = DOCS.split("## Compare", 1)[1].split("## Studies of several workloads", 1)[0]
    for name in [*DIFFERENCE_COLUMNS, "--primary", "--margin", "--sequential", "--seed-budget", "--batch",
                 "primary", "margins", "count_rates", "methods", "design", "overall", "overall_codes",
                 "role_codes", "looks_taken", "planned_looks", "stopped"]:
        assert f"`{name}`" in compare_part, name


# ------------------------------------------------------------------------------ with the simulator


def tiny_base() -> FleetFile:
    return FleetFile.read(fleetsim.example_path(), TINY)


@pytest.fixture(scope="module")
def shorter_deadline(tmp_path_factory):
    """The command: a report deadline of 1 minute against the file's, 6 seeds, written to a
    folder whose saved runs the other simulator checks reuse."""
    out = tmp_path_factory.mktemp("deadline")
    args = ["compare", *CLI_TINY, "--seeds", "6", "--workers", "1", "--candidate", "rounds.report_deadline=1m",
            "--margin", "committed_per_hour=10%", "--out", str(out)]
    result = CliRunner().invoke(app, args)
    assert result.exit_code == 0, result.output
    return out, result.stdout


def test_a_much_shorter_deadline_is_found_on_the_primary_metrics(shorter_deadline):
    """Round protocol (docs/fleet-file.md): a report deadline of 1 minute ends most rounds
    before enough reports arrive, so fewer rounds commit and more work is thrown away. The
    primary metrics must say worse under Holm, and so must the overall line."""
    out, text = shorter_deadline
    d = pd.read_csv(out / "differences.csv").set_index("metric")
    assert d.at["rounds_committed_per_hour", "verdict"] == "worse"
    assert d.at["waste_compute_fraction", "verdict"] == "worse"
    assert d.at["rounds_committed", "judged_as"] == "rounds_committed_per_hour"
    record = json.loads((out / "comparison.json").read_text())
    assert record["overall"]["as-configured"]["verdict"] == "worse"
    assert record["primary"] == PRIMARY and record["design"]["kind"] == "fixed"
    assert record["methods"]["primary"].startswith("Holm") and record["overall_codes"] == OVERALL
    assert record["margins"] == [{"metric": "rounds_committed_per_hour", "margin": "10%", "relative": True,
                                  "value": 0.1}]
    assert "overall: worse: " in text and "primary metrics (Holm" in text and "caution:" in text
    assert "overall: worse: " in (out / "comparison.md").read_text()


def test_identical_arms_show_no_change_that_matters(shorter_deadline):
    """The same settings on the same seeds: every difference is 0, so with margins every
    primary metric is inside its margin, nothing is changed, and constants are not tested."""
    out, _ = shorter_deadline
    margins = [parse_margin(t) for t in ("rounds_committed_per_hour=5%", "waste_compute_fraction=0.02",
                                         "study_worst_representation=0.02")]
    result = run_compare(tiny_base(), Arm("baseline", ()), Arm("candidate", ()), seeds=range(6),
                         executor=InProcess(), folder=out, margins=margins)
    d = result.differences
    assert (d["difference"].fillna(0) == 0).all()
    assert result.overall["as-configured"].verdict == "no-change-that-matters"
    assert not d["verdict"].isin(["better", "worse", "higher", "lower"]).any()
    assert (d.loc[d["metric"] == "devices", "verdict"] == "not-tested-constant").all()


def test_unpaired_aa_comparison_makes_no_false_claims(shorter_deadline):
    """The same settings with the candidate on other seeds (true difference 0): unadjusted,
    about 5% of the ~600 tested metrics fall below p = 0.05 (at least 10 here); after
    Benjamini-Hochberg and Holm none is called changed, and with margins the overall line is
    no change that matters or no decision, never better or worse."""
    out, _ = shorter_deadline
    margins = [parse_margin(t) for t in ("rounds_committed_per_hour=10%", "waste_compute_fraction=0.05",
                                         "study_worst_representation=0.05")]
    result = run_compare(tiny_base(), Arm("baseline", ()), Arm("candidate", ()), seeds=range(6),
                         executor=InProcess(), folder=out, candidate_seed_offset=1000, margins=margins)
    d = result.differences
    tested = d["p_value"].notna()
    assert tested.sum() > 400 and (d["p_value"] < ALPHA).sum() >= 10
    assert not d["verdict"].isin(["better", "worse", "higher", "lower"]).any()
    assert result.overall["as-configured"].verdict in ("no-change-that-matters", "no-decision")


def test_sequential_comparison_stops_once_decided(shorter_deadline):
    """Looks at 3 and 6 seeds of a budget of 6 on the shorter deadline: the runs are the
    saved ones; every primary metric is decided by the last look at the latest, and the
    record says where it stopped."""
    out, _ = shorter_deadline
    result = run_compare(tiny_base(), Arm("baseline", ()), Arm("candidate", ("rounds.report_deadline=1m",)),
                         seeds=range(6), executor=InProcess(), folder=out, sequential=schedule(6, 3))
    assert result.reused == len({*result.runs["run_seed"].astype(str) + result.runs["arm"]})
    d = result.differences.set_index("metric")
    assert d.loc[PRIMARY, "verdict"].isin(["worse", "better"]).all()
    assert result.stopped == "decided" and result.looks_taken[-1] == len(result.seeds)
    assert result.overall["as-configured"].verdict == "worse"
