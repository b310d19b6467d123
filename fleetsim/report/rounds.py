"""Sections 3 and 4: when rounds commit and who is eligible then, and how long a round takes."""

from __future__ import annotations

import math

import numpy as np

from . import figures
from .model import Chart, Column, Section, Table, format_value
from .rundir import RunFolder
from .text import OPTIONAL_STATUSES, STATUS_WORDS, STATUSES, column, instant, num, pct, seconds

__all__ = ["over_time_section", "durations_section", "warm_hours", "warm_note", "overlap_words"]


def warm_hours(r: RunFolder) -> int:
    """Whole hours of the first rest period: until it has passed, no device is resting yet."""
    rest = float(r.config.rounds.rest)
    return int(math.ceil(rest / 3600.0)) if rest > 0 else 0


def warm_note(r: RunFolder, warm: int) -> str:
    """The caption sentence on the start-up scale ('' when the first rest period does not matter)."""
    if not 0 < warm < len(r.tables["hourly"]):
        return ""
    return (f" Until the first rest period ({seconds(r.config.rounds.rest)}) has passed no device is resting, "
            "so more devices are eligible than later; the hours after it set the scale and higher values are "
            "marked off scale.")


def _present(r: RunFolder) -> list[str]:
    """Round statuses shown: server outages and failed unmaskings only when a round ended so."""
    hourly = r.tables["hourly"]
    return [k for k in STATUSES if k in hourly.columns and (k not in OPTIONAL_STATUSES or hourly[k].sum() > 0)]


def _eligible_by_region(r: RunFolder) -> dict[str, np.ndarray]:
    """Mean eligible devices per hour, by region (tables/hourly_eligible_by_region.csv), in hour order."""
    long = r.tables["hourly_eligible_by_region"]
    n_hours = len(r.tables["hourly"])
    out = {}
    for name in r.region_names:
        rows = long[long["region"] == name].sort_values("hour")
        values = np.zeros(n_hours)
        values[rows["hour"].to_numpy(dtype=np.int64)] = rows["eligible"].to_numpy(dtype=float)
        out[name] = values
    return out


def _tables(r: RunFolder, present: list[str], eligible: dict[str, np.ndarray]) -> tuple[Table, Table]:
    hourly, daily = r.tables["hourly"], r.tables["daily"]
    columns = [Column("hour_utc", "Hour (UTC)", "text")] + [Column(k, STATUS_WORDS[k], "int") for k in present]
    columns += [Column(f"eligible_{name}", f"eligible: {name}", "num") for name in r.region_names]
    columns.append(Column("eligible", "eligible: all", "num"))
    rows = [[record["hour_utc"], *[int(record[k]) for k in present],
             *[float(eligible[n][h]) for n in r.region_names], float(record["eligible"])]
            for h, record in enumerate(hourly.to_dict("records"))]
    hourly_table = Table("over-time", "Rounds closed and mean eligible devices, per hour", columns, rows,
                         detail=True, source="tables/hourly.csv, tables/hourly_eligible_by_region.csv")
    day_rows = [[record["day_utc"], *[int(record[k]) for k in present], float(record["eligible_min"]),
                 float(record["eligible_mean"]), float(record["eligible_max"])] for record in daily.to_dict("records")]
    day_table = Table("over-time-days", "Per day (24 hours from the horizon start): rounds closed and eligible "
                      "devices (tables/daily.csv)",
                      [Column("day", "Day from", "text"), *[Column(k, STATUS_WORDS[k], "int") for k in present],
                       Column("eligible_min", "eligible: lowest hour", "num"),
                       Column("eligible_mean", "eligible: mean", "num"),
                       Column("eligible_max", "eligible: highest hour", "num")], day_rows)
    return day_table, hourly_table


def _over_time_answer(r: RunFolder, committed: np.ndarray, total: np.ndarray, eligible: dict[str, np.ndarray],
                      warm: int) -> str:
    n_hours = committed.size
    corr = r.summary["rounds"]["eligible_correlation"]
    if corr is not None:
        link = f"and move with eligible devices (hourly correlation {corr:.2f})"
    else:
        link = "and do not vary from hour to hour"
    steady = slice(warm if warm < n_hours else 0, None)
    lo_e, hi_e = (float(total[steady].min()), float(total[steady].max())) if n_hours else (0.0, 0.0)
    peaks = [float(v[steady].max()) if v[steady].size else 0.0 for v in eligible.values()]
    busiest = r.region_names[int(np.argmax(peaks))] if r.region_names else "no region"
    after = f"after the first {warm} h, " if 0 < warm < n_hours else ""
    eligible_words = (f"{after}eligible devices swung between {lo_e:,.0f} and {hi_e:,.0f} an hour, with the "
                      f"highest peak in {busiest}.")
    if n_hours and committed.max() > 0:
        return (f"Committed rounds per hour ranged from {int(committed.min())} to {int(committed.max())} {link}; "
                + eligible_words)
    return "No round committed in any hour; " + eligible_words


def over_time_section(r: RunFolder) -> Section:
    """When do rounds commit, and who is eligible then? (tables/hourly.csv, tables/daily.csv)"""
    hourly = r.tables["hourly"]
    present = _present(r)
    statuses = {k: column(hourly, k) for k in present}
    eligible = _eligible_by_region(r)
    total = column(hourly, "eligible")
    warm = warm_hours(r)
    chart = Chart(figures.rounds_over_time(len(hourly), instant(r.summary["horizon_start"]), statuses, eligible,
                                           warm, "f-time"),
                  "Stacked bars of rounds closed per hour by outcome, above one panel of eligible devices per region.",
                  "Top: rounds by the hour they closed. Below: eligible devices (mean of the 15-minute counts in "
                  "each hour), one panel per region on a shared scale." + warm_note(r, warm) + overlap_words(r))
    answer = _over_time_answer(r, statuses["committed"], total, eligible, warm)
    day_table, hourly_table = _tables(r, present, eligible)
    return Section("over-time", "When do rounds commit, and who is eligible then?", answer, charts=[chart],
                   tables=[day_table, hourly_table])


def overlap_words(r: RunFolder) -> str:
    """A sentence on overlapping rounds ('' when at most one round was open at a time)."""
    s = r.summary["rounds"]
    if int(s["open_peak"]) <= 1:
        return ""
    return (f" Rounds overlapped (rounds.in_flight {int(s['in_flight'])}): up to {int(s['open_peak'])} were open at "
            f"once, {format_value(s['open_mean'], 'num')} on average, so a round's duration is not the time between "
            "rounds, and rounds that closed in an hour may have opened in earlier ones.")


def _durations_answer(r: RunFolder, selection: np.ndarray, report: np.ndarray) -> str:
    s, settings = r.summary["rounds"], r.config.rounds
    timeout, deadline = float(settings.selection_timeout), float(settings.report_deadline)
    sel, rep = s["selection_s"], s["report_s"]
    if not selection.size:
        return (f"Every round was ended by the selection timeout ({seconds(timeout)}) before enough devices "
                "were accepted, so no round reached its report phase.")
    timed_out = int(s["ended_by"]["selection_timeout"])
    answer = (
        f"Selection takes {seconds(sel['p50'])} at the median and {seconds(sel['p90'])} at p90 "
        f"(timeout {seconds(timeout)}, reached by {pct(num(s['selection_at_timeout']))} of rounds that went ahead"
        + (f", and by every one of the {timed_out:,} rounds it ended); " if timed_out else "); ")
    )
    if report.size:
        return answer + (f"committed rounds gather their reports in {seconds(rep['p50'])} at the median, "
                         f"{seconds(rep['p90'])} at p90 (deadline {seconds(deadline)}).") + overlap_words(r)
    return answer + f"no round committed, so none has a report time (deadline {seconds(deadline)})." + overlap_words(r)


def durations_section(r: RunFolder) -> Section:
    """How long does a round take? Selection and report times (tables/rounds.csv, summary.json)."""
    rounds = r.tables["rounds"]
    s = r.summary["rounds"]
    status = rounds["status"]
    selection = rounds.loc[status != "selection-timeout", "selection_s"].to_numpy(dtype=float)
    report = rounds.loc[status == "committed", "report_s"].to_numpy(dtype=float)
    timeout, deadline = float(r.config.rounds.selection_timeout), float(r.config.rounds.report_deadline)
    measures = (("Selection time (rounds not ended by the timeout)", selection, s["selection_s"]),
                ("Report time (committed rounds)", report, s["report_s"]))
    rows = [[label, int(values.size), pcts["p50"], pcts["p90"], pcts["p99"]] for label, values, pcts in measures]
    table = Table("durations", "Round duration percentiles, seconds (summary.json; distributions: tables/rounds.csv)",
                  [Column("measure", "Measure", "text"), Column("rounds", "Rounds", "int"),
                   Column("p50", "p50 (s)"), Column("p90", "p90 (s)"), Column("p99", "p99 (s)")], rows)
    chart = Chart(
        figures.durations([
            ("Selection time: open to selection closed", "accepted", selection, s["selection_s"], timeout, "timeout"),
            ("Report time: selection closed to round closed", "committed", report, s["report_s"], deadline,
             "deadline"),
        ], "f-durations"),
        "Histograms of selection time and report time with p50, p90 and p99 marked.",
        "Thick grey line: the setting that caps the time. Abandoned rounds are left out of selection time (they all "
        "end at the timeout); report time counts committed rounds."
        + (" Selection time counts from the round's opening, after any time the pacing server held it (section "
           "on the server's load)." if s["pacing"] else "")
        + overlap_words(r),
    )
    return Section("durations", "How long does a round take?", _durations_answer(r, selection, report),
                   charts=[chart], tables=[table])
