"""Short run summaries from a run's ``summary`` mapping: plain text for the terminal and
compact HTML for notebooks.

Both read only the JSON-ready summary (docs/metrics.md), so they work the same on a fresh
:class:`fleetsim.Result` and on a ``summary.json`` read back from a run folder.
"""

from __future__ import annotations

import html
from typing import Any

__all__ = ["render_summary", "summary_html"]


def _pct(x: Any) -> str:
    """A fraction as a percentage with one decimal; ``n/a`` for None."""
    return "n/a" if x is None else f"{100 * x:.1f}%"


def _ended_by(ended_by: dict[str, int]) -> str:
    """The rounds that did not commit, by what ended them (server outages only when there were some)."""
    return (f"{ended_by['selection_timeout']} ended by the selection timeout, "
            f"{ended_by['report_deadline']} by the report deadline"
            + (f", {ended_by['server_outage']} by a server outage" if ended_by["server_outage"] else ""))


def _overlap(rounds: dict[str, Any]) -> str:
    """A note that rounds overlapped (pipelined rounds: a duration is not the time between rounds)."""
    if (rounds.get("open_peak") or 1) <= 1:
        return ""
    mean = "" if rounds.get("open_mean") is None else f", {rounds['open_mean']:.2f} on average"
    return f"; rounds overlap (up to {rounds['open_peak']} open at once{mean})"


def _load_line(load: dict[str, Any] | None) -> str:
    """Check-ins per second (mean, peak hour) and the share turned away, with their basis."""
    if not load or load.get("checkins_per_s_peak") is None:
        return ""
    basis = "estimated from the census"
    held = (f"; {load['rounds_held']} rounds held, {_pct(load['held_share'])} of the horizon"
            if load.get("rounds_held") else "")
    return (f"server load ({basis}): {load['checkins_per_s_mean']:.3g} check-ins/s on average, peak "
            f"{load['checkins_per_s_peak']:.3g}/s in the hour from {load['peak_hour_utc']}; "
            f"{_pct(load['turned_away_share'])} turned away" + held)


def _header(summary: dict[str, Any]) -> list[str]:
    replay = summary.get("replay")
    return [
        f"{summary['scenario']}",
        f"  seed {summary['seed']}, config {summary['config_hash']}, {summary['devices']:,} devices, "
        f"{summary['simulated_hours']:g} simulated hours from {summary['horizon_start']}, policy {summary['policy']}",
    ] + ([f"  signals replayed from logs of {replay['devices']:,} devices, {replay['logs_start']} to "
          f"{replay['logs_end']} (traits, batteries, workload and rounds from the fleet file)"] if replay else [])


def _sharing_lines(summary: dict[str, Any]) -> list[str]:
    """How several workloads shared the desk and the devices."""
    sharing = summary["sharing"]
    names = sharing["workloads"]
    if sharing["rule"] == "shares":
        rule = "shares " + ", ".join(f"{name} {_pct(sharing['shares'][name])}" for name in names)
    else:
        rule = "priority " + " > ".join(names)
    desk = ", ".join(f"{name} {_pct(sharing['desk_share'][name])}" for name in names)
    return [
        f"workloads: {len(names)} sharing check-ins by {rule}; the server (one selection at a time) was "
        f"selecting for {desk} of the time",
        f"  {_pct(sharing['reported_for_several'])} of the {sharing['reporting_devices']:,} reporting devices "
        "reported for more than one workload",
    ]


def render_summary(summary: dict[str, Any]) -> str:
    """The short plain-text summary ``fleetsim run`` prints (one block per workload when there
    are several, after how they shared the fleet)."""
    lines = _header(summary)
    if "workloads" not in summary:
        return "\n".join(lines + _workload_lines(summary) + [f"caution: {summary['caution']}"])
    lines += _sharing_lines(summary)
    for name, part in summary["workloads"].items():
        lines.append(f"workload {name}:")
        lines += ["  " + line for line in _workload_lines(part)]
    lines.append(f"caution: {summary['caution']}")
    return "\n".join(lines)


def _eps(x: Any) -> str:
    """An epsilon with three significant figures; ``n/a`` for None."""
    return "n/a" if x is None else f"{x:.3g}"


def _privacy_lines(privacy: dict[str, Any] | None) -> list[str]:
    """Each device's own epsilon (median, worst) beside the uniform-sampling claim (none without privacy)."""
    if privacy is None:
        return []
    e, worst = privacy["epsilon"], privacy.get("worst_device")
    claim = (f"a uniform-sampling analysis would claim {_eps(privacy['epsilon_uniform_sampling'])} over "
             f"{privacy['committed_rounds']} committed rounds")
    if not privacy["reporting_devices"]:
        return [f"privacy: no device had a report used by a committed round (epsilon 0 for every device); {claim}"]
    tied = f"; {worst['tied']:,} devices as many" if worst and worst.get("tied", 1) > 1 else ""
    where = (f" ({worst['device_type']} in {worst['region']}, {worst['participations']} reports{tied})"
             if worst else "")
    return [
        f"privacy (per device, epsilon at delta {privacy['delta']:.3g}): median {_eps(e['median'])}, worst "
        f"{_eps(e['worst'])}{where}; {claim}",
        f"  {_pct(privacy['devices_over_uniform_claim'])} of devices spent more than that claim; "
        f"{privacy['never_reported']:,} never reported (epsilon 0)",
    ]


def _workload_lines(summary: dict[str, Any]) -> list[str]:
    """Rounds, load, waste, participation and (with ``privacy``) privacy of one workload."""
    r, w, b = summary["rounds"], summary["waste"], summary["bias"]
    d = r["duration_s"]
    lines = [
        f"rounds: {r['committed']} committed of {r['attempted']} ({r['committed_per_hour']:.2f} per hour); "
        + _ended_by(r["ended_by"]),
    ]
    if d["p50"] is not None:
        lines.append(f"  committed round duration p50 {d['p50']:.0f}s, p90 {d['p90']:.0f}s, p99 {d['p99']:.0f}s"
                     + _overlap(r))
    load = _load_line(summary.get("server_load"))
    if load:
        lines.append(load)
    lines.append(
        f"straggler waste: {_pct(w['compute_fraction'])} of compute, {_pct(w['bytes_fraction'])} of bytes, "
        f"{_pct(w['energy_fraction'])} of energy, {_pct(w['examples_fraction'])} of examples processed"
    )
    causes = sorted(w["by_cause"].items(), key=lambda kv: -kv[1]["compute_s"])[:4]
    if causes:
        total = sum(v["compute_s"] for v in w["by_cause"].values()) or 1.0
        shares = ", ".join(f"{k.replace('_', '-')} {100 * v['compute_s'] / total:.0f}%" for k, v in causes)
        lines.append(f"  largest causes (compute): {shares}")
    gini = "n/a" if b["gini"] is None else f"{b['gini']:.2f}"
    p_value = b["chi_square_device_type_p"]
    chi_p = "n/a" if p_value is None else ("< 1e-300" if p_value == 0 else f"{p_value:.3g}")
    lines.append(f"participation: coverage {_pct(b['coverage'])} of devices, Gini {gini}, "
                 f"chi-square p by device type {chi_p}")
    lines.append(f"  {'device type':<18} {'fleet':>7} {'eligible':>9} {'reports':>8} {'weight':>7} {'ratio':>6}")
    for name, v in b["by_device_type"].items():
        ratio = "n/a" if v["representation_ratio"] is None else f"{v['representation_ratio']:.2f}"
        lines.append(
            f"  {name:<18} {_pct(v['fleet_share']):>7} {_pct(v['eligible_share']):>9} "
            f"{_pct(v['report_share']):>8} {_pct(v['weight_share']):>7} {ratio:>6}"
        )
    return lines + _privacy_lines(summary.get("privacy"))


def summary_html(summary: dict[str, Any]) -> str:
    """A compact HTML summary (notebooks render it); names are escaped, never markup."""
    s = summary
    if "workloads" in s:
        head = (f"<b>{html.escape(s['scenario'])}</b> &middot; seed {s['seed']} &middot; config {s['config_hash']} "
                f"&middot; {s['devices']:,} devices &middot; {s['simulated_hours']:g} h<br>")
        lines = "<br>".join(html.escape(line) for line in _sharing_lines(s))
        parts = "".join(f"<p><b>{html.escape(name)}</b></p>{summary_html({**s, **part, 'caution': ''})}"
                        for name, part in s["workloads"].items())
        return (f"<div class='fleetsim-summary'>{head}{lines}{parts}"
                f"<small>{html.escape(s['caution'])}</small></div>")
    r, w, b = s["rounds"], s["waste"], s["bias"]
    rows = "".join(
        f"<tr><td>{html.escape(name)}</td><td>{_pct(v['fleet_share'])}</td><td>{_pct(v['report_share'])}</td>"
        f"<td>{'n/a' if v['representation_ratio'] is None else format(v['representation_ratio'], '.2f')}</td></tr>"
        for name, v in b["by_device_type"].items()
    )
    return (
        "<div class='fleetsim-summary'>"
        f"<b>{html.escape(s['scenario'])}</b> &middot; seed {s['seed']} &middot; config {s['config_hash']} "
        f"&middot; {s['devices']:,} devices &middot; {s['simulated_hours']:g} h<br>"
        f"rounds committed {r['committed']} of {r['attempted']} ({r['committed_per_hour']:.2f}/h); "
        f"{html.escape(_ended_by(r['ended_by']))}<br>"
        f"straggler waste: compute {_pct(w['compute_fraction'])}, bytes {_pct(w['bytes_fraction'])}, "
        f"energy {_pct(w['energy_fraction'])}, examples {_pct(w['examples_fraction'])}; "
        f"coverage {_pct(b['coverage'])}<br>"
        "<table><tr><th>device type</th><th>fleet share</th><th>report share</th><th>ratio</th></tr>"
        f"{rows}</table><small>{html.escape(s['caution'])}</small></div>"
    )
