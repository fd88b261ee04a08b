"""Plain-text reports of a diagnosis and a re-weighting, for the terminal.

The wording helpers (:func:`count`, :func:`signed`, :func:`p_value`, :func:`table`,
:func:`paragraph`, :func:`bullets`, :func:`unique_advice`) are small and stand alone so that
every section of a report is written the same way: thousands separators on every count, the
p-value that decides with what it is compared to, aligned columns, lines wrapped to the
terminal (at most :data:`MAX_WIDTH` columns). Standard library only.
"""

from __future__ import annotations

import shutil
import textwrap
from collections.abc import Iterable, Mapping, Sequence
from typing import Any

MAX_WIDTH = 88
MIN_WIDTH = 60


def wrap_width() -> int:
    """The terminal's width, between :data:`MIN_WIDTH` and :data:`MAX_WIDTH` (88 when the
    output is not a terminal and ``COLUMNS`` is unset)."""
    columns = shutil.get_terminal_size((MAX_WIDTH, 24)).columns
    return max(MIN_WIDTH, min(MAX_WIDTH, columns))


def count(value: float | None) -> str:
    """A number of units with thousands separators: ``30,736``."""
    return "n/a" if value is None else f"{value:,.0f}"


def signed(value: float | None) -> str:
    """A signed number of units: ``+1,791``, ``-697``."""
    return "n/a" if value is None else f"{value:+,.0f}"


def p_value(value: float | None) -> str:
    """Two significant digits; ``n/a`` when the test could not be run."""
    return "n/a" if value is None else f"{value:.2g}"


def p_verdict(value: float | None, level: float) -> str:
    """``p = 0.00098, below the alert level 0.0005``-style wording of a deciding p-value."""
    if value is None:
        return "p = n/a (too few units to test)"
    side = "below" if value < level else "above"
    return f"p = {p_value(value)}, {side} the alert level {level:g}"


def table(rows: Sequence[Sequence[str]], *, right: Iterable[int] = (), indent: str = "  "
          ) -> list[str]:
    """Rows of cells as aligned lines: columns as wide as their widest cell, the columns in
    ``right`` right-aligned (numbers), two spaces between columns."""
    if not rows:
        return []
    right = set(right)
    widths = [max(len(row[i]) for row in rows) for i in range(len(rows[0]))]
    lines = []
    for row in rows:
        cells = [cell.rjust(width) if i in right else cell.ljust(width)
                 for i, (cell, width) in enumerate(zip(row, widths, strict=True))]
        lines.append(indent + "  ".join(cells).rstrip())
    return lines


def paragraph(text: str, *, indent: str = "  ", width: int | None = None) -> list[str]:
    return textwrap.wrap(text, width or wrap_width(), initial_indent=indent,
                         subsequent_indent=indent, break_on_hyphens=False)


def labelled(label: str, text: str, *, indent: str = "  ", label_width: int = 12,
             width: int | None = None) -> list[str]:
    """``text`` after a fixed-width ``label``, continuation lines aligned under the text."""
    head = f"{indent}{label:<{label_width}} "
    return textwrap.wrap(text, width or wrap_width(), initial_indent=head,
                         subsequent_indent=" " * len(head), break_on_hyphens=False)


def bullets(items: Iterable[str], *, indent: str = "  ", width: int | None = None
            ) -> list[str]:
    lines: list[str] = []
    for item in items:
        lines += textwrap.wrap(item, width or wrap_width(), initial_indent=indent + "- ",
                               subsequent_indent=indent + "  ", break_on_hyphens=False)
    return lines


def unique_advice(doc: Mapping[str, Any]) -> list[str]:
    """The diagnosis's advice and its incidents' advice, each text once, in order met: a
    remedy that applies to several incidents (such as fixing a campaign's design) is
    printed once."""
    texts = list(doc.get("advice") or [])
    for incident in doc.get("incidents") or []:
        texts += list(incident.get("advice") or [])
    return list(dict.fromkeys(texts))


def weights_text(weights: Mapping[str, float]) -> str:
    """``0.20/0.40/0.40`` in arm order."""
    return "/".join(f"{w:.2f}" for w in weights.values())


def declared_weights_lines(doc: Mapping[str, Any]) -> list[str]:
    """For an incident that found the shares steady at other weights than declared (its
    ``observed_weights``), one sentence saying so, with the planned weights beside them."""
    lines: list[str] = []
    for incident in doc.get("incidents") or []:
        observed = incident.get("observed_weights")
        if not observed or incident.get("shape", "persistent") != "persistent":
            continue
        planned = incident.get("planned_weights") or {}
        since = incident.get("start")
        text = (f"The declared weights look wrong: observed about {weights_text(observed)}"
                + (f" ({'/'.join(observed)})" if len(observed) > 1 else ""))
        if planned:
            text += f" where {weights_text(planned)} was declared"
        if since:
            text += f", from {since} on"
        text += (". Check the allocation given to Inrush (and the ramp plan) before reading "
                 "the per-day findings below.")
        lines += paragraph(text)
    return lines


SHAPE_TITLES = {"inflow": "Inflow", "shortfall": "Shortfall", "persistent": "Persistent offset",
                "allocation_step": "Allocation step"}


def incident_lines(doc: Mapping[str, Any]) -> tuple[list[str], set[str]]:
    """The incidents, what the report leads with: shape, arm, days, units and what they mean,
    sources, campaigns, the deciding p-value, impact, context and advice. Also returns the
    texts printed, so that the closing advice does not repeat them."""
    incidents = doc.get("incidents") or []
    printed: set[str] = set()
    lines = ["", "Incidents"]
    if not incidents:
        unseen = doc.get("unseen")
        lines += paragraph("none" if not unseen else f"None found. {unseen['text']}")
        return lines, printed
    deep = "     "
    for number, incident in enumerate(incidents, start=1):
        days = len(incident.get("daily") or [])
        span = (incident["start"] if incident["start"] == incident["end"]
                else f"{incident['start']} to {incident['end']}")
        level = incident["severity"].upper()
        if not incident.get("material", True):
            level += ", not material"
        if incident.get("status"):
            level += f", {incident['status']}"
        ongoing = ", ongoing" if incident.get("ongoing") else ""
        lines.append(f"  {number}. {SHAPE_TITLES.get(incident['shape'], incident['shape'])} — "
                     f"{incident['arm']} — {span} ({days:,} day{'s' if days != 1 else ''}"
                     f"{ongoing}) — {level}")
        lines += paragraph(incident["summary"], indent=deep)
        printed.add(incident["summary"])
        lines += paragraph(f"Units: {signed(incident['units'])}. {incident['units_meaning']}",
                           indent=deep)
        if days > 1:
            lines += paragraph("Per day: " + ", ".join(
                f"{d['date']} {signed(d['units'])}" for d in incident["daily"]), indent=deep)
        if incident.get("sources"):
            lines += paragraph("Sources: " + ", ".join(
                f"{s['source']} {100 * s['share']:.0f}%" for s in incident["sources"][:4]),
                indent=deep)
        if incident.get("campaigns"):
            lines += paragraph("Registered campaigns: " + ", ".join(incident["campaigns"]),
                               indent=deep)
        lines += paragraph(
            f"Deciding test: {p_verdict(incident['p_value'], incident.get('alert_level', 0))}"
            f" ({', '.join(incident.get('detected_by') or [])}; valid however often the data "
            "are read).", indent=deep)
        for metric, impact in (incident.get("impact") or {}).items():
            worst, in_se = impact.get("worst_case"), impact.get("in_se")
            if worst is None:
                continue
            bias = impact.get("estimated_bias")
            lines += paragraph(
                f"Impact on {metric}: could move the effect by at most {worst:,.3g}"
                + (f" ({in_se:.1f} SE)" if in_se is not None else "")
                + (f"; estimated bias {bias:+,.3g}" if bias is not None else "") + ".",
                indent=deep)
        for note in incident.get("context") or []:
            lines += paragraph(f"Context: {note}", indent=deep)
        fresh = [a for a in incident.get("advice") or [] if a not in printed]
        printed.update(fresh)
        lines += bullets(fresh, indent=deep)
    return lines, printed


def format_diagnosis(doc: dict[str, Any], result: Any = None) -> str:
    """A readable report: status, SRM, flagged days with sources, sources, changepoints,
    sensitivity, advice."""
    del result  # accepted for callers that pass the detectors' result too
    lines: list[str] = []
    out = lines.append
    thresholds = doc.get("thresholds") or {}
    alpha = thresholds.get("alpha", 0.0005)
    out(f"Inrush diagnosis of {doc['experiment'] or 'experiment'} as of {doc['as_of']}: "
        f"{doc['status'].upper()}")
    declared = declared_weights_lines(doc)
    if declared:
        out("")
        lines += declared
    incidents, printed = incident_lines(doc)
    lines += incidents

    srm = doc["srm"]
    out("\nSample ratio, whole period")
    rows = [["arm", "units", "planned", "difference", ""]]
    for arm, observed in srm["observed"].items():
        expected = srm["expected"][arm]
        gap = observed - expected
        rows.append([arm, count(observed), count(expected), signed(gap),
                     f"({100 * gap / max(expected, 1):+.2f}%)"])
    lines += table(rows, right=(1, 2, 3, 4))
    lines += paragraph(
        f"Deciding test: anytime-valid {p_verdict(srm['sequential_p_value'], alpha)} (valid "
        "however often the data are read). The one-look chi-square test gives p = "
        f"{p_value(srm['p_value'])}, shown for reference only.")

    flagged = doc["flagged_days"]
    out("\nFlagged days")
    if not flagged:
        out("  none")
    else:
        rows = [["date", "level", "shape", "arm", "units", "p-value", "units came from"]]
        for day in flagged:
            sources = ", ".join(f"{s['source']} {100 * s['share_of_excess']:.0f}%"
                                for s in day["sources"][:2]) or "no single source"
            rows.append([day["date"], day["severity"], day["shape"].replace("_", " "),
                         day["arm"], signed(day["units"]), p_value(day["p_value"]), sources])
        lines += table(rows, right=(4, 5))
        campaigns = sorted({c for day in flagged for c in day.get("campaigns", [])})
        if campaigns:
            lines += paragraph(f"Registered campaigns on these days: {', '.join(campaigns)}.")
        lines += paragraph(
            "Units: the incident's figure for the day. p-value: the incident's deciding test, "
            "valid however often the data are read (each test's alert level is given with the "
            "incident above).")

    out("\nEntry sources, whole period")
    arms = list(srm["observed"])
    rows = [["source", *arms, "p-value", ""]]
    for source in doc["sources"]:
        deciding = source.get("adjusted_sequential_p_value", source.get("adjusted_p_value"))
        rows.append([source["source"], *(count(source["observed"].get(a)) for a in arms),
                     p_value(deciding), "SKEWED" if source["skewed"] else "ok"])
    lines += table(rows, right=range(1, len(arms) + 2))
    lines += paragraph(
        "p-value: anytime-valid test that the source's units follow the allocation, adjusted "
        f"across sources; SKEWED below {alpha:g}.")
    independence = doc.get("source_arm_independence") or {}
    if independence.get("p_value") is not None:
        lines += paragraph("Do the arms draw the same mix of sources? Chi-square test of "
                           f"independence: p = {p_value(independence['p_value'])}.")

    changes = doc["changepoints"]
    out("\nChangepoints")
    if not changes["share"] and not changes["engagement"]:
        out("  none")
    for change in changes["share"]:
        ratios = ", ".join(f"{arm} {change['before'][arm]:.3f} -> {change['after'][arm]:.3f}"
                           for arm in change["before"])
        lines += paragraph(f"{change['date']}  arm share over planned share: {ratios}")
    for metric, per_arm in changes["engagement"].items():
        for arm, items in per_arm.items():
            for change in items:
                lines += paragraph(f"{change['date']}  {metric} of entrants to {arm} against "
                                   f"the other arms: {change['before']:+.3f} -> "
                                   f"{change['after']:+.3f}")
    sensitivity = doc.get("sensitivity")
    if sensitivity:
        out("\nSensitivity")
        lines += paragraph(sensitivity["summary"])

    remaining = [a for a in unique_advice(doc) if a not in printed]
    if remaining:
        out("\nAdvice")
        lines += bullets(remaining)
    return "\n".join(lines) + "\n"


def _estimate(est: dict[str, Any]) -> tuple[str, str]:
    """The difference with its interval, and the relative lift with its interval."""
    rel = est.get("relative")
    relative = ("relative n/a" if rel is None else
                f"relative {100 * rel:+.2f}% [{100 * est['relative_ci_low']:+.2f}%, "
                f"{100 * est['relative_ci_high']:+.2f}%]")
    return (f"{est['arm_mean']:,.4f} vs {est['reference_mean']:,.4f}: difference "
            f"{est['difference']:+,.4f} [{est['ci_low']:+,.4f}, {est['ci_high']:+,.4f}]",
            relative)


def format_reweighting(doc: dict[str, Any]) -> str:
    """Naive vs re-weighted estimates per arm, the decomposition, cohorts and caveats."""
    lines: list[str] = []
    out = lines.append
    lines += paragraph(f"Effect on {doc['metric']}, naive and re-weighted to the "
                       f"{doc['target'].replace('_', ' ')} mix (cohorts by "
                       f"{' and '.join(doc['by'])}; 95% intervals)", indent="")
    if doc.get("default"):
        out(f"\nDefault chosen: {doc['default']['target']} "
            f"({len(doc['default']['excluded_cells'])} contaminated cell(s) left out)")
        lines += bullets([doc["default"]["reason"]])
    for comparison in doc["comparisons"]:
        out(f"\n  {comparison['arm']}")
        for label in ("naive", "adjusted"):
            difference, relative = _estimate(comparison[label])
            lines += paragraph(f"{label:<9} {difference}", indent="    ")
            lines += paragraph(relative, indent=" " * 14)
        parts = comparison["decomposition"]
        lines += paragraph(f"naive gap = composition {parts['composition']:+,.4f} + within "
                           f"cohorts {parts['within']:+,.4f}", indent="    ")
        bounds = comparison.get("bounds") or {}
        if bounds.get("low") is not None:
            lines += paragraph(f"bounds    [{bounds['low']:+,.4f}, {bounds['high']:+,.4f}], 95% "
                               f"[{_signed(bounds['ci_low'])}, {_signed(bounds['ci_high'])}] "
                               "(trimming, Lee 2009)", indent="    ")
    for impact in doc.get("impact") or ():
        if impact.get("worst_case") is None:
            continue
        bias = impact.get("estimated_bias")
        out("")
        lines += paragraph(
            f"{impact['incident']}: could move the effect on {doc['metric']} by at most "
            f"{impact['worst_case']:.4g} ({_signed(impact['in_se'], '.2f')} SE)"
            + (f"; estimated bias of the naive difference {bias:+.4g}" if bias is not None
               else ""), indent="  ")
    out("\n  Cohorts (target weight, measured units per arm)")
    cohorts = doc["cohorts"]
    arms = list(cohorts[0]["arms"]) if cohorts else []
    rows = [["cohort", "weight", *arms]]
    for cohort in cohorts:
        rows.append([cohort["cohort"], f"{cohort['weight']:.4f}",
                     *(count(cohort["arms"][a]["n"]) for a in arms)])
    lines += table(rows, right=range(1, len(arms) + 2), indent="    ")
    out("\nCaveats")
    lines += bullets(doc["caveats"])
    return "\n".join(lines) + "\n"


def _signed(value: float | None, spec: str = "+,.4f") -> str:
    return "n/a" if value is None else format(value, spec)
