"""Render the status pages from plain documents (diagnosis, series, alerts, reweight).

Nothing here touches the database, so every page can be rendered and checked in a test.
"""

from __future__ import annotations

import datetime as dt
import threading
from collections import OrderedDict
from collections.abc import Callable, Mapping, Sequence
from functools import cache
from typing import Any

from jinja2 import Environment, PackageLoader, select_autoescape
from markupsafe import Markup

from .. import charts
from ..http import entity_tag
from . import assets

STATUS_LABELS = {
    "healthy": ("Healthy", "The arm counts follow the allocation."),
    "watch": ("Watch", "Something deviates from the plan, below the alert level."),
    "alert": ("Alert", "The sample ratio is broken: comparisons of the arms are suspect."),
    "no_data": ("No data", "No units have entered yet."),
}
# A shape beside each status word, so the status never rests on colour alone.
STATUS_MARKS = {"healthy": "\u25cf", "watch": "\u25b2", "alert": "\u25a0", "no_data": "\u25cb"}
REWEIGHT_CAVEAT = (
    "A re-weighted estimate answers a different question: the effect on the population whose "
    "entry-cohort mix the reference arm shows. It rests on the cohorts capturing why the "
    "inflow differs, and it is not a randomised estimate.")


@cache
def environment() -> Environment:
    env = Environment(loader=PackageLoader("service", "templates"),
                      autoescape=select_autoescape(["html"]), trim_blocks=True,
                      lstrip_blocks=True)
    env.filters["pvalue"] = format_p
    env.filters["signed"] = format_signed
    env.filters["pct"] = format_pct
    env.filters["num"] = format_num
    env.filters["when"] = format_when
    env.filters["span"] = format_span
    env.filters["mark"] = severity_mark
    env.filters["signed_pct"] = format_signed_pct
    return env


def format_p(value: Any) -> str:
    if value is None:
        return "n/a"
    value = float(value)
    if value < 1e-12:
        return "< 1e-12"
    return f"{value:.2g}" if value < 0.001 else f"{value:.3f}"


def format_signed(value: Any, digits: int = 0) -> str:
    return "n/a" if value is None else f"{float(value):+,.{digits}f}"


def format_pct(value: Any, digits: int = 0) -> str:
    return "n/a" if value is None else f"{100 * float(value):.{digits}f}%"


def format_signed_pct(value: Any, digits: int = 1) -> str:
    """A relative lift with its sign: ``+2.3%``, ``-1.0%``."""
    return "n/a" if value is None else f"{100 * float(value):+,.{digits}f}%"


def format_num(value: Any, digits: int = 0) -> str:
    return "n/a" if value is None else f"{float(value):,.{digits}f}"


def format_when(value: Any) -> str:
    """``2026-11-10T08:00:00+00:00`` -> ``2026-11-10 08:00 UTC``."""
    if not value:
        return "–"
    try:
        moment = dt.datetime.fromisoformat(str(value))
    except ValueError:
        return str(value)
    if moment.tzinfo is not None:
        moment = moment.astimezone(dt.UTC)
    return moment.strftime("%Y-%m-%d %H:%M") + (" UTC" if moment.tzinfo else "")


def severity_mark(severity: Any) -> str:
    """The shape that goes with a severity word: the mark never rests on colour alone."""
    return STATUS_MARKS.get(str(severity), "\u25b2")


def status_view(status: str | None) -> dict[str, str]:
    key = status if status in STATUS_LABELS else "no_data"
    label, meaning = STATUS_LABELS[key]
    return {"key": key, "label": label, "meaning": meaning, "mark": STATUS_MARKS[key]}


def source_totals(series: Mapping[str, Any]) -> list[dict[str, Any]]:
    """Units per source and arm over the whole period, largest source first."""
    arms = list(series.get("arms", []))
    rows = []
    for source in series.get("sources", []):
        per_arm = {arm: int(sum(source["entered"][arm])) for arm in arms}
        rows.append({"source": source["source"], "arms": per_arm,
                     "total": sum(per_arm.values())})
    return sorted(rows, key=lambda r: -r["total"])


def render_experiment_page(*, experiment: Mapping[str, Any],
                           diagnosis: Mapping[str, Any] | None,
                           series: Mapping[str, Any] | None,
                           alerts: Sequence[Mapping[str, Any]],
                           reweight: Mapping[str, Any] | None = None,
                           reweight_problem: str | None = None,
                           diagnosis_version: int | None = None,
                           links: Mapping[str, str] | None = None,
                           campaigns: Sequence[Mapping[str, Any]] = (),
                           sensitivity: Mapping[str, Any] | None = None,
                           metric: str | None = None,
                           refreshed_at: Any = None,
                           csv_href: str | None = None,
                           series_tag: str | None = None,
                           pull: Mapping[str, Any] | None = None) -> str:
    """The status page of one experiment.

    ``experiment``: ``id, title, arms, start_date``; ``diagnosis`` and ``series``: the API's
    documents (``None`` before any unit); ``alerts``: unresolved alerts as the API lists them;
    ``reweight``: a reweight answer for ``metric`` (default: the first metric), or
    ``reweight_problem`` saying why there is none; ``campaigns``: registered campaigns with
    their checks and ``sensitivity`` the sensitivity answer, as the API gives them;
    ``refreshed_at``: when the diagnosis was computed; ``csv_href``: where the series CSV is;
    ``series_tag``: the stored entity tag of ``series``, under which its charts are kept
    between requests (computed when absent); ``pull``: ``{"last": run}`` when the experiment
    has a daily pull (``run`` as the pull resource lists it, or ``None``).
    """
    context = experiment_context(
        experiment=experiment, diagnosis=diagnosis, series=series, alerts=alerts,
        effects={}, campaigns=campaigns, sensitivity=sensitivity, metric=metric,
        refreshed_at=refreshed_at, diagnosis_version=diagnosis_version, mode="page",
        series_tag=series_tag)
    chosen = context["metric"]
    if chosen is not None or reweight is not None or reweight_problem is not None:
        context["effects"] = [effect_view(reweight, reweight_problem, chosen)]
    context.update(links=dict(links or {}), csv_href=csv_href, pull=pull,
                   scripts=assets.script_urls(), stylesheets=assets.stylesheet_urls())
    return environment().get_template("experiment.html").render(**context)


def experiment_context(*, experiment: Mapping[str, Any], diagnosis: Mapping[str, Any] | None,
                       series: Mapping[str, Any] | None, alerts: Sequence[Mapping[str, Any]],
                       effects: Mapping[str, tuple[Mapping[str, Any] | None, str | None]],
                       campaigns: Sequence[Mapping[str, Any]],
                       sensitivity: Mapping[str, Any] | None, metric: str | None,
                       refreshed_at: Any, diagnosis_version: int | None,
                       mode: str, series_tag: str | None = None) -> dict[str, Any]:
    """What the page and the report show, from the API's documents.

    ``effects``: per metric, a reweight answer or why there is none. The server-drawn charts
    are the fallback without JavaScript and the SVG export; in the browser the same series is
    drawn by ``static/status.js`` from the ``page_data`` block.
    """
    status = diagnosis.get("status") if diagnosis else "no_data"
    metrics = list((series or {}).get("metrics", []))
    chosen, metric_note = pick_metric(metrics, metric)
    # The SVG text comes from matplotlib, which escapes the labels it writes.
    chart_svgs: dict[str, Markup] = {}
    engagement: dict[str, Markup] = {}
    if series and series.get("days"):
        # Drawn once per stored series (its tag) and kept between requests.
        tag = series_tag or entity_tag(dict(series))
        chart_svgs["share"] = Markup(_drawn(("share", tag), charts.share_chart, series))
        chart_svgs["entrants"] = Markup(_drawn(("entrants", tag), charts.entrants_chart,
                                               series))
        shown = metrics if mode == "report" else [chosen] if chosen else []
        engagement = {m: Markup(_drawn(("engagement", tag, m), charts.engagement_chart,
                                       series, m)) for m in shown}
    incidents = incident_views(diagnosis)
    shown_advice = {line for incident in incidents for line in incident["advice"]}
    advice = [line for line in (diagnosis or {}).get("advice", []) if line not in shown_advice]
    page_data = {"experiment": experiment.get("id"), "mode": mode, "metric": chosen,
                 "series": series, "palette": charts.palette()} if series else None
    return {
        "experiment": experiment, "diagnosis": diagnosis, "series": series,
        "alerts": list(alerts), "status": status_view(status), "charts": chart_svgs,
        "engagement": engagement, "metric": chosen, "metrics": metrics,
        "metric_note": metric_note,
        "effects": [effect_view(*effects[m], m) for m in metrics if m in effects],
        "incidents": incidents, "advice": advice,
        # A diagnosis made before findings were grouped has no such member: say nothing then.
        "grouped": bool(diagnosis) and "incidents" in (diagnosis or {}),
        "sources": source_totals(series) if series else [],
        "arms": list(experiment.get("arms", [])), "version": diagnosis_version,
        "refreshed_at": refreshed_at, "campaigns": list(campaigns),
        "sensitivity": sensitivity, "page_data": page_data, "mode": mode,
    }


def pick_metric(metrics: Sequence[str], asked: str | None) -> tuple[str | None, str | None]:
    """The metric to show (``asked`` when the data has it, else the first) and, when the ask
    could not be met, a sentence saying so."""
    if asked and asked in metrics:
        return asked, None
    chosen = metrics[0] if metrics else None
    if not asked:
        return chosen, None
    if chosen is None:
        return None, f"There is no metric {asked!r}: no metric has been uploaded."
    return chosen, (f"There is no metric {asked!r}; showing {chosen!r} (metrics: "
                    f"{', '.join(metrics)}).")


def _caveats(reweight: Mapping[str, Any] | None) -> list[str]:
    caveats = list(reweight.get("caveats", [])) if reweight else []
    if reweight and not any("different question" in c for c in caveats):
        caveats.append(REWEIGHT_CAVEAT)
    return caveats


def effect_view(reweight: Mapping[str, Any] | None, problem: str | None,
                metric: str | None) -> dict[str, Any]:
    """The effect section of one metric: per compared arm the naive estimate, the honest
    (re-weighted) estimate and the bounds side by side, with what the figures rest on."""
    comparisons = list(reweight.get("comparisons", [])) if reweight else []
    rows = []
    for comparison in comparisons:
        naive, adjusted = comparison.get("naive") or {}, comparison.get("adjusted") or {}
        bounds = comparison.get("bounds") or None
        rows.append({"arm": comparison.get("arm"), "naive": estimate_view(naive),
                     "adjusted": estimate_view(adjusted), "bounds": bounds_view(bounds),
                     "decomposition": comparison.get("decomposition"),
                     "warnings": effect_warnings(naive, adjusted, bounds)})
    return {"metric": (reweight or {}).get("metric", metric), "rows": rows,
            "problem": problem if not rows else None, "basis": effect_basis(reweight),
            "caveats": _caveats(reweight),
            "chart": Markup(_drawn(("effect", entity_tag(dict(reweight))), charts.effect_chart,
                                   reweight)) if rows and reweight else None}


def estimate_view(estimate: Mapping[str, Any]) -> dict[str, str]:
    """An estimate's figures as text: difference and relative lift, each signed with its 95%
    interval."""
    difference = estimate.get("difference")
    relative = estimate.get("relative")
    return {
        "difference": format_signed(difference, 3),
        "interval": _interval(estimate.get("ci_low"), estimate.get("ci_high"), format_signed, 3),
        "relative": "n/a" if relative is None else format_signed_pct(relative),
        "relative_interval": _interval(estimate.get("relative_ci_low"),
                                       estimate.get("relative_ci_high"),
                                       lambda v, _d: format_signed_pct(v), 1),
        "means": (f"{format_num(estimate.get('arm_mean'), 3)} vs "
                  f"{format_num(estimate.get('reference_mean'), 3)}"),
    }


def bounds_view(bounds: Mapping[str, Any] | None) -> dict[str, str] | None:
    if not bounds or bounds.get("low") is None or bounds.get("high") is None:
        return None
    return {"range": f"{format_signed(bounds['low'], 3)} to {format_signed(bounds['high'], 3)}",
            "interval": _interval(bounds.get("ci_low"), bounds.get("ci_high"), format_signed, 3)}


def _interval(low: Any, high: Any, fmt: Any, digits: int) -> str:
    if low is None or high is None:
        return "interval n/a"
    return f"95%: {fmt(low, digits)} to {fmt(high, digits)}"


def effect_warnings(naive: Mapping[str, Any], adjusted: Mapping[str, Any],
                    bounds: Mapping[str, Any] | None) -> list[str]:
    """Sentences for the cases where the naive figure alone would mislead a decision."""
    warnings = []
    n_low, n_high = naive.get("ci_low"), naive.get("ci_high")
    naive_settled = n_low is not None and n_high is not None and (n_low > 0 or n_high < 0)
    a, n = adjusted.get("difference"), naive.get("difference")
    if a is not None and n is not None and a * n < 0:
        warnings.append("The naive and the honest estimate point in opposite directions.")
    if bounds and naive_settled and bounds.get("ci_low") is not None \
            and bounds.get("ci_high") is not None and bounds["ci_low"] <= 0 <= bounds["ci_high"]:
        warnings.append("The naive interval excludes zero but the bounds include it: the "
                        "direction of the effect is not settled by these data.")
    return warnings


TARGET_LABELS = {"reference_arm": "the reference arm's cohort mix",
                 "pooled_unflagged": "the mix of all arms on unflagged days",
                 "custom": "custom cohort weights"}


def effect_basis(reweight: Mapping[str, Any] | None) -> str | None:
    """One sentence on what the honest estimate re-weighted to, and by which cohorts.

    A ``default`` member (the API's account of the cohorts its default chose, a sentence or a
    mapping with ``reason``) is quoted when present.
    """
    if not reweight:
        return None
    target = TARGET_LABELS.get(str(reweight.get("target")), str(reweight.get("target", "?")))
    by = " x ".join("flagged window" if b == "window" else str(b)
                    for b in reweight.get("by", []) or ["source"])
    sentence = f"Honest estimate: re-weighted to {target}, cohorts by {by}."
    default = reweight.get("default")
    if isinstance(default, str) and default:
        sentence += f" {default}"
    elif isinstance(default, Mapping):
        reason = default.get("reason") or default.get("description")
        if reason:
            sentence += f" {reason}"
    return sentence


SHAPE_LABELS = {
    "inflow": ("Inflow", "extra units entered {arm}"),
    "shortfall": ("Shortfall", "units went missing from {arm}"),
    "persistent": ("Steady imbalance", "{arm}'s share is off plan from the first day"),
    "allocation_step": ("Allocation step", "the shares follow other weights than declared"),
}


def incident_views(diagnosis: Mapping[str, Any] | None) -> list[dict[str, Any]]:
    """The diagnosis's incidents (``Episode.to_dict()`` plus the stored ``id``, ``status``,
    ``opened_at``) ready to show, alerts first; advice already shown by an earlier incident is
    not repeated."""
    raw = list((diagnosis or {}).get("incidents", []) or [])
    raw.sort(key=lambda i: (i.get("severity") != "alert", not i.get("material"),
                            str(i.get("start", ""))))
    seen: set[str] = set()
    views = []
    for incident in raw:
        shape = str(incident.get("shape", ""))
        label, phrase = SHAPE_LABELS.get(shape, (shape.replace("_", " ").capitalize(), ""))
        arm = str(incident.get("arm", ""))
        units = incident.get("units")
        advice = [line for line in incident.get("advice", []) if line not in seen]
        seen.update(advice)
        severity = incident.get("severity") if incident.get("severity") in ("alert",
                                                                             "watch") else "watch"
        sources = [f"{s.get('source')} {format_pct(s.get('share'))}"
                   for s in incident.get("sources", [])]
        views.append({
            **incident, "label": label, "phrase": phrase.format(arm=arm),
            "severity": severity,
            "span": format_span(incident.get("start"), incident.get("end")),
            "day_count": len(incident.get("daily", [])),
            "units_text": ("n/a" if units is None else
                           f"{format_signed(units)} units "
                           f"{'over' if float(units) >= 0 else 'under'} plan"),
            "sources_text": ", ".join(sources) or "no source stands out",
            "advice": advice, "lifecycle": incident.get("status") or "open",
        })
    return views


def format_span(start: Any, end: Any) -> str:
    """``2026-11-03`` or ``2026-11-03 to 11-05`` (same year) or both dates in full."""
    if not start:
        return "–"
    start, end = str(start), str(end or start)
    if end == start:
        return start
    if start[:4] == end[:4]:
        return f"{start} to {end[5:]}"
    return f"{start} to {end}"


CHARTS_KEPT = 64
_drawn_charts: OrderedDict[tuple[str, ...], str] = OrderedDict()
_drawn_lock = threading.Lock()


def _drawn(key: tuple[str, ...], draw: Callable[..., str], *args: Any) -> str:
    """A chart drawn once per document: re-reading a page draws nothing (a chart of a year
    of days costs far more than the rest of the page). The most recent ``CHARTS_KEPT``
    charts are kept."""
    with _drawn_lock:
        svg = _drawn_charts.get(key)
        if svg is not None:
            _drawn_charts.move_to_end(key)
            return svg
    svg = draw(*args)
    with _drawn_lock:
        _drawn_charts[key] = svg
        while len(_drawn_charts) > CHARTS_KEPT:
            _drawn_charts.popitem(last=False)
    return svg


def render_index_page(experiments: Sequence[Mapping[str, Any]]) -> str:
    """The list of experiments: ``id, title, status, as_of, open_alerts`` each."""
    rows = [{**e, "status_view": status_view(e.get("status"))} for e in experiments]
    return environment().get_template("index.html").render(experiments=rows)


def render_not_found(experiment_id: str) -> str:
    """The page for an experiment id that does not exist."""
    return environment().get_template("not_found.html").render(experiment_id=experiment_id)


def render_token_page(*, reason: str, next_path: str) -> str:
    """The page that asks for a read token."""
    return environment().get_template("token.html").render(reason=reason, next_path=next_path)
