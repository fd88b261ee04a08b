"""Server-side charts for the status page: matplotlib (Agg) drawn to inline SVG.

They are what a reader without JavaScript sees, the SVG export, and the effect chart; in the
browser ``static/status.js`` draws the daily charts from the same series with the same
colours and dashes (:func:`palette`). Every function takes the plain documents the API
serves (series, reweight) and returns an ``<svg>`` element as text; no JavaScript and nothing
fetched from elsewhere. The look is
Inrush's own: deep teal, ochre, slate and brick on a warm paper background. Each series also
differs by line style and marker, and flagged days by hatching, so the charts read in
greyscale and for colour-blind readers. Every chart has a title and labelled axes.
"""

from __future__ import annotations

import datetime as dt
import html
import io
import re
import threading
from collections.abc import Mapping, Sequence
from dataclasses import dataclass
from typing import Any

import matplotlib
import numpy as np

matplotlib.use("Agg")

import matplotlib.dates as mdates
from matplotlib import rc_context
from matplotlib.axes import Axes
from matplotlib.backends.backend_svg import FigureCanvasSVG
from matplotlib.colors import to_rgba
from matplotlib.figure import Figure
from matplotlib.patches import Patch
from matplotlib.ticker import PercentFormatter

PAPER = "#F6F3EA"
INK = "#1E2A2F"
GRID = "#DAD4C3"
TEAL = "#1F5F5B"
OCHRE = "#B9822A"
SLATE = "#56646D"
BRICK = "#9E4330"
MOSS = "#66783A"
PLUM = "#654A6E"


@dataclass(frozen=True, slots=True)
class Style:
    color: str
    linestyle: str | tuple[int, tuple[int, ...]]
    marker: str


# One style per arm / source, in order; colour, dash and marker all differ.
STYLES: tuple[Style, ...] = (
    Style(TEAL, "-", "o"), Style(OCHRE, "--", "s"), Style(SLATE, ":", "^"),
    Style(BRICK, "-.", "D"), Style(MOSS, (0, (5, 1, 1, 1, 1, 1)), "v"),
    Style(PLUM, (0, (1, 2)), "P"))
ALERT_HATCH, WATCH_HATCH = "////", "...."

_RC = {
    "svg.fonttype": "none",  # keep text as text: searchable, selectable, crisp
    "font.family": ["DejaVu Sans"],
    "font.size": 9.5,
    "axes.titlesize": 11.5,
    "axes.titleweight": "bold",
    "axes.titlelocation": "left",
    "axes.labelsize": 9.5,
    "axes.edgecolor": SLATE,
    "axes.labelcolor": INK,
    "axes.facecolor": PAPER,
    "figure.facecolor": PAPER,
    "text.color": INK,
    "xtick.color": INK,
    "ytick.color": INK,
    "axes.spines.top": False,
    "axes.spines.right": False,
    "axes.grid": True,
    "grid.color": GRID,
    "grid.linewidth": 0.7,
    "legend.frameon": False,
    "legend.fontsize": 8.5,
    "hatch.linewidth": 0.8,
}
# rcParams are process-wide and matplotlib is not thread-safe: one chart at a time.
_LOCK = threading.Lock()


def style(index: int) -> Style:
    return STYLES[index % len(STYLES)]


_DASHES = {"-": [], "--": [6, 4], ":": [1.5, 3], "-.": [6, 3, 1.5, 3]}


def palette() -> list[dict[str, Any]]:
    """The styles as the browser charts take them: colour and a canvas dash pattern (points)."""
    looks = []
    for look in STYLES:
        dash = (_DASHES[look.linestyle] if isinstance(look.linestyle, str)
                else [2 * d for d in look.linestyle[1]])
        looks.append({"color": look.color, "dash": dash})
    return looks


MARKERS_PER_LINE = 40  # beyond this a long series is all markers, and its SVG all paths


def _every(points: int) -> int:
    """Mark every n-th point so that a line carries at most ``MARKERS_PER_LINE`` markers."""
    return max(1, -(-points // MARKERS_PER_LINE))


def _dates(labels: Sequence[str]) -> list[dt.date]:
    return [dt.date.fromisoformat(d) for d in labels]


def _to_svg(figure: Figure, title: str) -> str:
    buffer = io.StringIO()
    FigureCanvasSVG(figure)
    figure.savefig(buffer, format="svg", bbox_inches="tight")
    text = buffer.getvalue()
    start = text.find("<svg")
    svg = text[start:] if start >= 0 else text
    label = html.escape(title, quote=True)
    return re.sub(r"^<svg\b", f'<svg role="img" aria-label="{label}"', svg, count=1)


def _mark_flagged(ax: Axes, days: Sequence[Mapping[str, Any]]) -> list[Patch]:
    """Hatched bands over flagged days (alert: dense diagonal, watch: dots)."""
    seen: set[str] = set()
    for day in days:
        severity = day.get("severity")
        if not day.get("flagged") or severity not in ("alert", "watch"):
            continue
        # A whole day wide, centred on the day's tick (datetimes: a date drops the hours).
        when = dt.datetime.fromisoformat(day["date"])
        color = BRICK if severity == "alert" else OCHRE
        # Fill and hatching as two layers: the SVG writer fades a hatch with its fill's alpha.
        start, end = when - dt.timedelta(hours=12), when + dt.timedelta(hours=12)
        ax.axvspan(start, end, facecolor=to_rgba(color, 0.12), linewidth=0, zorder=0)
        ax.axvspan(start, end, facecolor="none", edgecolor=to_rgba(color, 0.7),
                   hatch=ALERT_HATCH if severity == "alert" else WATCH_HATCH, linewidth=0,
                   zorder=0)
        seen.add(severity)
    legend = []
    if "alert" in seen:
        legend.append(Patch(facecolor=_tint(BRICK, 0.12), edgecolor=to_rgba(BRICK, 0.7),
                            hatch=ALERT_HATCH, label="flagged day (alert)"))
    if "watch" in seen:
        legend.append(Patch(facecolor=_tint(OCHRE, 0.12), edgecolor=to_rgba(OCHRE, 0.7),
                            hatch=WATCH_HATCH, label="flagged day (watch)"))
    return legend


def _tint(color: str, share: float) -> tuple[float, float, float]:
    """``color`` mixed into the paper colour, opaque (a legend swatch keeps its hatching)."""
    top, paper = to_rgba(color), to_rgba(PAPER)
    r, g, b = (share * t + (1 - share) * p for t, p in zip(top[:3], paper[:3], strict=True))
    return (r, g, b)


# Day ticks read "03 Nov" and the year stands once at the axis end ("2026"), never as
# matplotlib's default "2026-Oct" offset.
_TICK_FORMATS = ["%Y", "%b %Y", "%d %b", "%H:%M", "%H:%M", "%S.%f"]
_ZERO_FORMATS = ["", "%b %Y", "%d %b", "%d %b", "%H:%M", "%H:%M"]
_OFFSET_FORMATS = ["", "", "%Y", "%Y", "%d %b %Y", "%d %b %Y %H:%M"]


def _date_axis(ax: Axes) -> None:
    locator = mdates.AutoDateLocator(minticks=3, maxticks=10)
    ax.xaxis.set_major_locator(locator)
    ax.xaxis.set_major_formatter(mdates.ConciseDateFormatter(
        locator, formats=_TICK_FORMATS, zero_formats=_ZERO_FORMATS,
        offset_formats=_OFFSET_FORMATS))


def _empty(title: str, message: str) -> str:
    with _LOCK, rc_context(_RC):
        figure = Figure(figsize=(7.5, 1.6))
        ax = figure.add_subplot()
        ax.set_title(title)
        ax.set_xlabel("Day of entry")
        ax.set_ylabel("")
        ax.set_xticks([])
        ax.set_yticks([])
        ax.grid(False)
        ax.text(0.5, 0.5, message, ha="center", va="center", transform=ax.transAxes)
        return _to_svg(figure, title)


def _finish_daily(ax: Axes, title: str, ylabel: str, flagged: list[Patch], *, ncol: int) -> None:
    """Title, axis labels, date ticks and a legend below holding the flagged-day handles."""
    ax.set_title(title)
    ax.set_xlabel("Day of entry")
    ax.set_ylabel(ylabel)
    _date_axis(ax)
    existing, labels = ax.get_legend_handles_labels()
    ax.legend(existing + flagged, labels + [h.get_label() for h in flagged], ncol=ncol,
              loc="upper center", bbox_to_anchor=(0.5, -0.2))


def share_chart(series: Mapping[str, Any]) -> str:
    """Observed daily share of each arm against its planned share, flagged days hatched."""
    title = "Arm shares against the plan"
    days = list(series.get("days", []))
    if not days:
        return _empty(title, "No days with data yet.")
    dates = _dates([d["date"] for d in days])
    with _LOCK, rc_context(_RC):
        figure = Figure(figsize=(7.5, 3.4))
        ax = figure.add_subplot()
        handles = _mark_flagged(ax, days)
        for i, arm in enumerate(series.get("arms", [])):
            look = style(i)
            observed = [_nan(d["arms"][arm]["observed_share"]) for d in days]
            planned = [d["arms"][arm]["expected_share"] for d in days]
            ax.plot(dates, observed, color=look.color, linestyle=look.linestyle,
                    marker=look.marker, markevery=_every(len(dates)), markersize=4,
                    linewidth=1.6, label=f"{arm}: observed")
            ax.step(dates, planned, where="mid", color=look.color, linestyle=(0, (2, 2)),
                    linewidth=1.0, alpha=0.8, label=f"{arm}: planned")
        ax.yaxis.set_major_formatter(PercentFormatter(1.0, decimals=0))
        _finish_daily(ax, title, "Share of the day's units", handles, ncol=3)
        return _to_svg(figure, title)


ENTRANTS_SOURCES = 5  # drawn one by one; the rest is one line, so wide experiments stay legible


def entrants_chart(series: Mapping[str, Any]) -> str:
    """Units entered per day through each source, one panel per arm (shared scale).

    The ``ENTRANTS_SOURCES`` largest sources are drawn one by one and all others summed as
    one line, so the chart's size does not grow with the number of sources."""
    title = "Entrants per source and arm"
    arms = list(series.get("arms", []))
    sources = list(series.get("sources", []))
    days = list(series.get("days", []))
    if not arms or not sources or not days:
        return _empty(title, "No entrants yet.")
    with _LOCK, rc_context(_RC):
        figure = entrants_figure(series)
        return _to_svg(figure, title)


def entrants_figure(series: Mapping[str, Any]) -> Figure:
    """The entrants chart's figure: each arm's name heads its own panel, above the data; the
    largest sources are drawn and the others summed into one line."""
    title = "Entrants per source and arm"
    arms = list(series.get("arms", []))
    sources = list(series.get("sources", []))
    days = list(series.get("days", []))
    dates = _dates(series.get("dates") or [d["date"] for d in days])
    lines = _largest_sources(sources, arms)
    figure = Figure(figsize=(7.5, 2.4 + 1.9 * len(arms)), layout="constrained")
    axes = figure.subplots(len(arms), 1, sharex=True, sharey=True, squeeze=False)[:, 0]
    for ax, arm in zip(axes, arms, strict=True):
        _mark_flagged(ax, days)
        for j, (label, entered) in enumerate(lines):
            look = style(j)
            ax.plot(dates, entered[arm], color=look.color, linestyle=look.linestyle,
                    marker=look.marker, markevery=_every(len(dates)), markersize=3.5,
                    linewidth=1.4, label=label)
        ax.set_title(f"arm {arm}", loc="right", fontsize=9.5, fontweight="bold", color=SLATE)
        ax.set_ylabel("Units entered")
    axes[0].set_title(title, loc="left")
    axes[-1].set_xlabel("Day of entry")
    _date_axis(axes[-1])
    axes[-1].legend(ncol=min(4, len(lines)), loc="upper center",
                    bbox_to_anchor=(0.5, -0.35), title="entry source")
    return figure


def _largest_sources(sources: Sequence[Mapping[str, Any]], arms: Sequence[str]
                     ) -> list[tuple[str, dict[str, Any]]]:
    """``(label, {arm: daily counts})`` of the largest sources, then the others summed."""
    totals = [sum(sum(source["entered"][arm]) for arm in arms) for source in sources]
    order = sorted(range(len(sources)), key=lambda i: -totals[i])
    if len(sources) <= ENTRANTS_SOURCES + 1:
        return [(str(sources[i]["source"]), sources[i]["entered"]) for i in sorted(order)]
    shown = order[:ENTRANTS_SOURCES]
    rest = order[ENTRANTS_SOURCES:]
    others = {arm: np.sum([sources[i]["entered"][arm] for i in rest], axis=0) for arm in arms}
    return [*((str(sources[i]["source"]), sources[i]["entered"]) for i in shown),
            (f"{len(rest)} other sources", others)]


def engagement_chart(series: Mapping[str, Any], metric: str) -> str:
    """The daily mean of ``metric`` per entrant in each arm, flagged days hatched."""
    title = f"Entrant engagement per arm: {metric}"
    days = list(series.get("days", []))
    if not days or metric not in series.get("metrics", []):
        return _empty(title, f"No metric {metric!r} in the data.")
    dates = _dates([d["date"] for d in days])
    with _LOCK, rc_context(_RC):
        figure = Figure(figsize=(7.5, 3.2))
        ax = figure.add_subplot()
        handles = _mark_flagged(ax, days)
        for i, arm in enumerate(series.get("arms", [])):
            look = style(i)
            values = [_nan(d["arms"][arm]["engagement"].get(metric)) for d in days]
            ax.plot(dates, values, color=look.color, linestyle=look.linestyle,
                    marker=look.marker, markevery=_every(len(dates)), markersize=4,
                    linewidth=1.6, label=arm)
        _finish_daily(ax, title, f"Mean {metric} per entrant", handles, ncol=4)
        return _to_svg(figure, title)


def effect_chart(reweight: Mapping[str, Any]) -> str:
    """Naive and re-weighted differences with 95% intervals, and the trimming bounds when the
    answer has them, one row per compared arm."""
    metric = reweight.get("metric", "metric")
    title = f"Effect on {metric}: naive and re-weighted by entry cohort"
    comparisons = list(reweight.get("comparisons", []))
    if not comparisons:
        return _empty(title, "No comparison available.")
    has_bounds = any(c.get("bounds") for c in comparisons)
    offsets = (0.25, 0.0, -0.25) if has_bounds else (0.18, -0.18)
    with _LOCK, rc_context(_RC):
        figure = Figure(figsize=(7.5, 1.6 + (1.2 if has_bounds else 0.9) * len(comparisons)))
        ax = figure.add_subplot()
        ticks, labels = [], []
        kinds = (("naive", "naive (as randomised, all entrants)", SLATE, "o", "-"),
                 ("adjusted", "re-weighted to the reference arm's cohort mix", TEAL, "s", "--"))
        for row, comparison in enumerate(comparisons):
            base = -row * 1.0
            ticks.append(base)
            labels.append(f"{comparison['arm']} vs reference")
            for k, (key, label, color, marker, dash) in enumerate(kinds):
                estimate = comparison.get(key) or {}
                centre = estimate.get("difference")
                if centre is None:
                    continue
                low = estimate.get("ci_low", centre)
                high = estimate.get("ci_high", centre)
                bars = ax.errorbar([centre], [base + offsets[k]],
                                   xerr=[[centre - low], [high - centre]],
                                   fmt=marker, color=color, ecolor=color, capsize=4,
                                   markersize=6, linewidth=1.6,
                                   label=label if row == 0 else None)
                bars[-1][0].set_linestyle(dash)
            _draw_bounds(ax, comparison.get("bounds"), base + offsets[-1] if has_bounds else 0,
                         first=row == 0)
        ax.axvline(0.0, color=INK, linewidth=0.9, linestyle=":")
        ax.set_yticks(ticks, labels)
        ax.set_ylim(min(ticks) - 0.6, max(ticks) + 0.6)
        ax.set_title(title)
        ax.set_xlabel(f"Difference in mean {metric} per entrant (arm minus reference), "
                      "95% interval")
        ax.set_ylabel("Comparison")
        ax.legend(loc="upper center", bbox_to_anchor=(0.5, -0.35), ncol=1)
        return _to_svg(figure, title)


def _draw_bounds(ax: Axes, bounds: Mapping[str, Any] | None, y: float, *, first: bool) -> None:
    """The identified set [low, high] as a thick band, its 95% interval as thin whiskers."""
    if not bounds or bounds.get("low") is None or bounds.get("high") is None:
        return
    low, high = float(bounds["low"]), float(bounds["high"])
    ci_low = float(bounds.get("ci_low") if bounds.get("ci_low") is not None else low)
    ci_high = float(bounds.get("ci_high") if bounds.get("ci_high") is not None else high)
    ax.plot([ci_low, ci_high], [y, y], color=BRICK, linewidth=1.2, linestyle=":",
            marker="|", markersize=10,
            label="95% interval of the bounds" if first else None)
    ax.plot([low, high], [y, y], color=BRICK, linewidth=6, solid_capstyle="butt", alpha=0.85,
            label="bounds: any mix of the added units (trimming)" if first else None)


def _nan(value: Any) -> float:
    return float("nan") if value is None else float(value)
