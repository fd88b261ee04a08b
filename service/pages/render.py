"""Render the status pages from plain documents (diagnosis, series, alerts, reweight).

Nothing here touches the database, so every page can be rendered and checked in a test.
"""

from __future__ import annotations

import datetime as dt
from collections.abc import Mapping, Sequence
from functools import cache
from typing import Any

from jinja2 import Environment, PackageLoader, select_autoescape
from markupsafe import Markup

from .. import charts

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
                           pull: Mapping[str, Any] | None = None) -> str:
    """The status page of one experiment.

    ``experiment``: ``id, title, arms, start_date``; ``diagnosis`` and ``series``: the API's
    documents (``None`` before any unit); ``alerts``: unresolved alerts as the API lists them;
    ``reweight``: a reweight answer for the first metric, or ``reweight_problem`` saying why
    there is none; ``campaigns``: registered campaigns with their checks and ``sensitivity``
    the sensitivity answer, as the API gives them; ``pull``: ``{"last": run}`` when the
    experiment has a daily pull (``run`` as the pull resource lists it, or ``None``).
    """
    status = diagnosis.get("status") if diagnosis else "no_data"
    metrics = list((series or {}).get("metrics", []))
    metric = reweight.get("metric") if reweight else (metrics[0] if metrics else None)
    # The SVG text comes from matplotlib, which escapes the labels it writes.
    chart_svgs: dict[str, Markup] = {}
    if series:
        chart_svgs["share"] = Markup(charts.share_chart(series))
        chart_svgs["entrants"] = Markup(charts.entrants_chart(series))
        if metric:
            chart_svgs["engagement"] = Markup(charts.engagement_chart(series, metric))
    if reweight and reweight.get("comparisons"):
        chart_svgs["effect"] = Markup(charts.effect_chart(reweight))
    caveats = list(reweight.get("caveats", [])) if reweight else []
    if reweight and not any("different question" in c for c in caveats):
        caveats.append(REWEIGHT_CAVEAT)
    return environment().get_template("experiment.html").render(
        experiment=experiment, diagnosis=diagnosis, series=series, alerts=list(alerts),
        status=status_view(status), charts=chart_svgs, metric=metric, reweight=reweight,
        reweight_problem=reweight_problem, caveats=caveats,
        sources=source_totals(series) if series else [],
        arms=list(experiment.get("arms", [])), version=diagnosis_version,
        links=dict(links or {}), campaigns=list(campaigns), sensitivity=sensitivity,
        pull=pull)


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
