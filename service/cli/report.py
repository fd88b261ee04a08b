"""Plain-text reports of a diagnosis and a re-weighting, for the terminal."""

from __future__ import annotations

import textwrap
from typing import Any

from .incident_text import format_incidents

_WIDTH = 92


def _p(value: float | None) -> str:
    return "n/a" if value is None else f"{value:.2g}"


def _wrap(text: str, indent: str = "  ") -> str:
    return textwrap.fill(text, _WIDTH, initial_indent=indent + "- ",
                         subsequent_indent=indent + "  ") + "\n"


def format_diagnosis(doc: dict[str, Any], result: Any = None) -> str:
    """A readable report: status, SRM, flagged days with sources, sources, changepoints, advice."""
    lines: list[str] = []
    out = lines.append
    out(f"Inrush diagnosis of {doc['experiment'] or 'experiment'} as of {doc['as_of']}: "
        f"{doc['status'].upper()}\n")
    incidents, printed = format_incidents(doc)
    out(incidents)
    srm = doc["srm"]
    out("\nSample ratio, whole period\n")
    for arm, observed in srm["observed"].items():
        expected = srm["expected"][arm]
        gap = observed - expected
        out(f"  {arm:<16} {observed:>10,} units   planned {expected:>12,.0f}   "
            f"{gap:>+9,.0f} ({100 * gap / max(expected, 1):+.2f}%)\n")
    out(f"  chi-square p = {_p(srm['p_value'])}; anytime-valid p = "
        f"{_p(srm['sequential_p_value'])}; alert level p < {doc['thresholds']['alpha']:g}\n")

    flagged = doc["flagged_days"]
    out("\nFlagged days\n")
    if not flagged:
        out("  none\n")
    for day in flagged:
        sources = ", ".join(f"{s['source']} {100 * s['share_of_excess']:.0f}%"
                            for s in day["sources"][:3]) or "no source adds units"
        out(f"  {day['date']}  {day['severity']:<5}  {day['shape']} {day['arm']} "
            f"{day['units']:+,.0f} units  p = {_p(day['p_value'])}  from: {sources}\n")
        for campaign in day.get("campaigns", []):
            out(f"      campaign running: {campaign}\n")

    out("\nEntry sources (whole period)\n")
    for source in doc["sources"]:
        mark = "SKEWED" if source["skewed"] else "ok"
        counts = "  ".join(f"{arm} {n:,}" for arm, n in source["observed"].items())
        out(f"  {source['source']:<16} {counts:<40} p(adj) = "
            f"{_p(source['adjusted_p_value']):<8} {mark}\n")
    independence = doc["source_arm_independence"]
    if independence["p_value"] is not None:
        out(f"  source x arm independence: p = {_p(independence['p_value'])}\n")

    changes = doc["changepoints"]
    out("\nChangepoints\n")
    if not changes["share"] and not changes["engagement"]:
        out("  none\n")
    for change in changes["share"]:
        ratios = ", ".join(f"{arm} {change['before'][arm]:.3f}->{change['after'][arm]:.3f}"
                           for arm in change["before"])
        out(f"  {change['date']}  arm shares (observed/planned): {ratios}\n")
    for metric, per_arm in changes["engagement"].items():
        for arm, items in per_arm.items():
            for change in items:
                out(f"  {change['date']}  {metric} in {arm}, gap to other arms: "
                    f"{change['before']:+.3f} -> {change['after']:+.3f}\n")
    sensitivity = doc.get("sensitivity")
    if sensitivity:
        out("\nSensitivity\n")
        out(f"  {sensitivity['summary']}\n")

    remaining = [item for item in doc["advice"] if item not in printed]
    if remaining:
        out("\nAdvice\n")
    for item in remaining:
        out(_wrap(item))
    return "".join(lines)


def _estimate(est: dict[str, Any]) -> str:
    rel = est.get("relative")
    rel_text = ("" if rel is None else
                f"  relative {100 * rel:+.2f}% [{100 * est['relative_ci_low']:+.2f}%, "
                f"{100 * est['relative_ci_high']:+.2f}%]")
    return (f"{est['arm_mean']:.4f} vs {est['reference_mean']:.4f}: difference "
            f"{est['difference']:+.4f} [{est['ci_low']:+.4f}, {est['ci_high']:+.4f}]{rel_text}")


def format_reweighting(doc: dict[str, Any]) -> str:
    """Naive vs re-weighted estimates per arm, the decomposition, cohorts and caveats."""
    lines: list[str] = []
    out = lines.append
    out(f"Effect on {doc['metric']}, naive and re-weighted to the {doc['target']} mix "
        f"(cohorts by {'+'.join(doc['by'])}; 95% intervals)\n")
    for comparison in doc["comparisons"]:
        out(f"\n  {comparison['arm']}\n")
        out(f"    naive     {_estimate(comparison['naive'])}\n")
        out(f"    adjusted  {_estimate(comparison['adjusted'])}\n")
        parts = comparison["decomposition"]
        out(f"    naive gap = composition {parts['composition']:+.4f} + within cohorts "
            f"{parts['within']:+.4f}\n")
    out("\n  cohorts (target weight)\n")
    for cohort in doc["cohorts"]:
        sizes = "  ".join(f"{arm} n={v['n']:,}" for arm, v in cohort["arms"].items())
        out(f"    {cohort['cohort']:<28} {cohort['weight']:.4f}   {sizes}\n")
    out("\nCaveats\n")
    for caveat in doc["caveats"]:
        out(_wrap(caveat))
    return "".join(lines)
