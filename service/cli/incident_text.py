"""The incidents of a diagnosis document as plain text: what the report leads with."""

from __future__ import annotations

import textwrap
from typing import Any

_WIDTH = 92
SHAPE_TITLES = {"inflow": "Inflow", "shortfall": "Shortfall", "persistent": "Persistent offset",
                "allocation_step": "Allocation step"}


def _fill(text: str, indent: str) -> str:
    return textwrap.fill(text, _WIDTH, initial_indent=indent, subsequent_indent=indent,
                         break_on_hyphens=False) + "\n"


def _days(incident: dict[str, Any]) -> str:
    """``"START to END (N days"``: the caller closes the parenthesis, after "ongoing" if so."""
    start, end = incident["start"], incident["end"]
    count = len(incident.get("daily", []))
    span = start if start == end else f"{start} to {end}"
    return f"{span} ({count:,} day{'s' if count != 1 else ''}"


def format_incidents(doc: dict[str, Any]) -> tuple[str, set[str]]:
    """The incidents section and the advice texts it printed (so the report's own advice list
    can leave them out)."""
    incidents = doc.get("incidents") or []
    printed: set[str] = set()
    lines: list[str] = []
    out = lines.append
    out("\nIncidents\n")
    if not incidents:
        unseen = doc.get("unseen")
        out(_fill("none" if not unseen else f"none found. {unseen['text']}", "  "))
        return "".join(lines), printed
    for number, incident in enumerate(incidents, start=1):
        title = SHAPE_TITLES.get(incident["shape"], incident["shape"])
        status = incident.get("status")
        level = incident["severity"].upper() + ("" if incident.get("material", True)
                                                else ", not material")
        ongoing = ", ongoing" if incident.get("ongoing") else ""
        head = (f"  {number}. {title} — {incident['arm']} — {_days(incident)}{ongoing}) — "
                f"{level}" + (f" — {status}" if status else "") + "\n")
        out(head)
        out(_fill(incident["summary"], "     "))
        printed.add(incident["summary"])
        out(_fill(f"Units: {incident['units']:+,.0f}. {incident['units_meaning']}", "     "))
        if len(incident.get("daily", [])) > 1:
            per_day = ", ".join(f"{d['date'][5:]} {d['units']:+,.0f}" for d in incident["daily"])
            out(_fill(f"Per day: {per_day}", "     "))
        if incident.get("sources"):
            sources = ", ".join(f"{s['source']} {100 * s['share']:.0f}%"
                                for s in incident["sources"][:4])
            out(_fill(f"Sources: {sources}", "     "))
        if incident.get("campaigns"):
            out(_fill("Registered campaigns: " + ", ".join(incident["campaigns"]), "     "))
        out(_fill(f"Deciding p = {incident['p_value']:.2g} (alert below "
                  f"{incident.get('alert_level', 0):g}; valid however often the diagnosis is "
                  f"re-read); found by {', '.join(incident.get('detected_by', []))}", "     "))
        for metric, impact in (incident.get("impact") or {}).items():
            worst, in_se = impact.get("worst_case"), impact.get("in_se")
            if worst is None:
                continue
            bias = impact.get("estimated_bias")
            out(_fill(f"Impact on {metric}: could move the effect by at most {worst:,.3g}"
                      + (f" ({in_se:.1f} SE)" if in_se is not None else "")
                      + (f"; estimated bias {bias:+,.3g}" if bias is not None else ""), "     "))
        for note in incident.get("context", []):
            out(_fill(f"Context: {note}", "     "))
        for advice in incident.get("advice", []):
            if advice in printed:
                continue
            printed.add(advice)
            out(textwrap.fill(advice, _WIDTH, initial_indent="     - ",
                              subsequent_indent="       ", break_on_hyphens=False) + "\n")
    return "".join(lines), printed
