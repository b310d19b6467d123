"""The section on secure aggregation (only when it was on): does the unmasking hold?

Every number comes from summary.json (``secure_aggregation``) and
tables/unmasking_by_accepted.csv.
"""

from __future__ import annotations

from .model import Cell, Column, Section, Table, format_value
from .rundir import RunFolder
from .text import num, opt, pct, records

__all__ = ["secure_section"]

_BY_ACCEPTED = [Column("accepted", "Devices accepted", "int"), Column("needed", "Answers needed (t)", "int"),
                Column("rounds", "Rounds that reached the unmasking", "int"),
                Column("failed", "Failed the unmasking", "int"), Column("failed_share", "Share failed", "pct"),
                Column("reports_mean", "Reports (mean)"), Column("responses_mean", "Answers (mean)"),
                Column("responses_p10", "Answers (p10)"), Column("margin_mean", "Answers - t (mean)"),
                Column("margin_min", "Answers - t (least)")]


def _answer(s: dict, accept: int) -> str:
    reached = int(s["reached_unmasking"])
    if not reached:
        return ("No round had enough reports on time to reach the unmasking, so secure aggregation's threshold "
                "was never tested.")
    return (
        f"{int(s['failed']):,} of the {reached:,} rounds that reached the unmasking failed it "
        f"({pct(s['failed_share'])}); a full round of {accept} accepted devices needs t = {int(s['needed'])} answers, "
        f"and rounds got {format_value(s['responses_mean'], 'num')} on average "
        f"({format_value(s['responses_p10'], 'num')} at p10), a margin over their own t of "
        f"{format_value(s['margin_mean'], 'num')} on average (p10 {format_value(s['margin_p10'], 'num')}), "
        f"after losing {format_value(s['reporters_lost_mean'], 'num')} on-time reporters during the unmasking."
    )


def secure_section(r: RunFolder) -> Section | None:
    """Does the unmasking hold? Threshold failures, answers against t, and failures by the
    devices a round accepted (None when secure aggregation was off)."""
    s = r.summary["secure_aggregation"]
    if s is None:
        return None
    accept = r.config.rounds.accept_count
    wait = s["unmasking_s"]
    rows = [
        ["Threshold (share of accepted devices that must answer)", Cell(opt(num(s["threshold"])), "pct")],
        [f"Answers needed from a full round of {accept} (t)", Cell(s["needed"], "int")],
        ["Rounds that reached the unmasking (enough reports on time)", Cell(s["reached_unmasking"], "int")],
        ["Rounds that failed the unmasking", Cell(s["failed"], "int")],
        ["Share of rounds reaching the unmasking that failed it", Cell(opt(num(s["failed_share"])), "pct")],
        ["Answers per round: mean", Cell(opt(num(s["responses_mean"])), "num")],
        ["Answers per round: p10", Cell(opt(num(s["responses_p10"])), "num")],
        ["Answers - t per round: mean", Cell(opt(num(s["margin_mean"])), "num")],
        ["Answers - t per round: p10", Cell(opt(num(s["margin_p10"])), "num")],
        ["On-time reporters lost during the unmasking: mean per round",
         Cell(opt(num(s["reporters_lost_mean"])), "num")],
        ["Unmasking time: p50 (s)", Cell(wait["p50"], "num")],
        ["Unmasking time: p90 (s)", Cell(wait["p90"], "num")],
    ]
    figures = Table("unmasking", "Secure aggregation's unmasking (summary.json)",
                    [Column("figure", "Figure", "text"), Column("value", "Value", "num")], rows)
    by_accepted = Table("unmasking-accepted", "Rounds that reached the unmasking, by the devices they accepted "
                        "(tables/unmasking_by_accepted.csv)", _BY_ACCEPTED,
                        records(r.tables["unmasking_by_accepted"], _BY_ACCEPTED))
    notes = ["Only devices whose report arrived on time answer the unmasking, so a round needs t of its accepted "
             "devices to report and then stay until they have answered; t = ceil(threshold x the devices the round "
             "accepted). Over-selection raises both the reports a round gets and its t; the table shows where the "
             "margin runs out. The unmasking runs from the round's close until its last answer."]
    return Section("secure-aggregation", "Does secure aggregation's unmasking hold?", _answer(s, accept),
                   tables=[figures, by_accepted], notes=notes)
