"""Status page rendering from plain documents (no database)."""

from __future__ import annotations

import copy
import json
import re
from typing import Any

import pytest

from service import charts
from service.demo import scenario
from service.pages.render import (
    format_span,
    pick_metric,
    render_experiment_page,
    render_index_page,
)
from tests.demo_documents import demo_documents

EXPERIMENT = {"id": "route-cards", "title": "Route cards <b>on</b> the trail list",
              "arms": list(scenario.ARMS), "start_date": scenario.START.isoformat()}


def test_full_page_from_documents() -> None:
    documents = demo_documents()
    diagnosis, series, effect = documents.diagnosis, documents.series, documents.effect
    alert = {"id": 4, "title": "2026-11-09: cards got +448 units over plan", "severity": "alert",
             "status": "acknowledged", "acknowledged_by": "trail-analyst",
             "opened_at": "2026-11-10T06:00:00+00:00"}
    html = render_experiment_page(experiment=EXPERIMENT, diagnosis=diagnosis, series=series,
                                  alerts=[alert], reweight=effect, diagnosis_version=2)
    assert "Route cards &lt;b&gt;on&lt;/b&gt; the trail list" in html  # escaped
    # Four server-drawn charts: three as the no-JavaScript fallback, the effect chart inline.
    assert html.count("<svg") == 4 and html.count("<noscript data-svg") == 3
    assert_no_inline_code(html)
    data = page_data(html)
    assert data["series"] == series and data["metric"] == "routes_saved"
    assert data["mode"] == "page" and len(data["palette"]) >= len(series["arms"])
    assert "acknowledged by trail-analyst" in html and "2026-11-10 06:00 UTC" in html
    total = {arm: sum(sum(s["entered"][arm]) for s in series["sources"]) for arm in series["arms"]}
    assert diagnosis["srm"]["observed"] == total  # the ledger and the source table agree
    assert f"{total['cards']:,.0f} units" in html
    assert sum("different question" in c for c in effect["caveats"]) == 1
    caveats = html.split('class="caveats"', 1)[1]
    assert caveats.count("answers a different question") == 1  # not repeated


def test_page_explains_a_missing_effect_and_missing_data() -> None:
    documents = demo_documents()
    diagnosis, series = documents.diagnosis, documents.series
    html = render_experiment_page(experiment=EXPERIMENT, diagnosis=diagnosis, series=series,
                                  alerts=[], reweight=None,
                                  reweight_problem="The re-weighted estimate is undefined: "
                                                   "cohort push|flagged has no units in cards")
    assert "cohort push|flagged has no units in cards" in html
    assert "No unresolved alerts." in html and html.count("<svg") == 3
    empty = render_experiment_page(experiment=EXPERIMENT, diagnosis=None, series=None, alerts=[])
    assert "No data" in empty and "<svg" not in empty and "inrush-data" not in empty


def test_index_marks_status_with_a_shape_and_a_word() -> None:
    html = render_index_page([
        {"id": "route-cards", "title": "Route cards", "status": "alert", "as_of": "2026-11-22",
         "open_alerts": 3, "start_date": "2026-10-26"},
        {"id": "trail-badges", "title": "Trail badges", "status": "healthy", "as_of": None,
         "open_alerts": 0, "start_date": "2026-11-02"}])
    assert "\u25a0 Alert" in html and "\u25cf Healthy" in html
    # One mark per status: the style sheet adds none of its own.
    assert html.count("\u25a0") == 1 and html.count("\u25cf") == 1
    assert "content:" not in html


def assert_no_inline_code(html: str) -> None:
    """Every script element loads a file or is a JSON data block: a strict CSP can hold."""
    for tag in re.findall(r"<script\b[^>]*>", html):
        assert 'type="application/json"' in tag or " src=" in tag, tag
    assert not re.search(r"\son[a-z]+=", html)  # no inline event handlers either


def page_data(html: str) -> dict[str, Any]:
    block = re.search(r'<script type="application/json" id="inrush-data">(.*?)</script>', html,
                      re.S)
    assert block is not None
    return json.loads(block.group(1))


@pytest.fixture
def quick_charts(monkeypatch: pytest.MonkeyPatch) -> None:
    """Daily charts as empty SVGs: these tests are about the page around them (the charts
    have their own tests), and drawing them is most of a render's time."""
    for name in ("share_chart", "entrants_chart"):
        monkeypatch.setattr(charts, name, lambda series: "<svg></svg>")
    monkeypatch.setattr(charts, "engagement_chart", lambda series, metric: "<svg></svg>")


def incident(**changes: Any) -> dict[str, Any]:
    """An incident as the service serves it: ``Episode.to_dict()`` plus the stored fields."""
    base = {
        "id": 7, "experiment": "route-cards", "status": "open",
        "opened_at": "2026-11-10T06:00:00+00:00", "resolved_at": None, "resolution": None,
        "shape": "inflow", "arm": "cards", "start": "2026-11-09", "end": "2026-11-10",
        "ongoing": False, "units": 1791.4,
        "units_meaning": "Units that would have to leave cards alone for the days to fit.",
        "daily": [{"date": "2026-11-09", "units": 903.0}, {"date": "2026-11-10", "units": 888.4}],
        "cells": [], "sources": [{"source": "newsletter", "share": 0.92, "units": 1648.1},
                                 {"source": "push", "share": 0.08, "units": 143.3}],
        "campaigns": ["November trail digest"], "severity": "alert", "material": True,
        "p_value": 2e-9, "detected_by": ["window_scan"],
        "summary": "About 1,791 extra units entered cards on 2 days, mostly via newsletter.",
        "impact": {"routes_saved": {"estimated_bias": -0.016, "worst_case": -0.031,
                                    "standard_error": 0.0055, "in_se": 5.6}},
        "observed_weights": None, "planned_weights": None,
        "context": ["Engagement in cards fell on 2026-11-09."],
        "advice": ["Send the campaign to an equal share of every arm.",
                   "Re-estimate the effect by entry cohort."],
        "evidence": [{"kind": "window", "key": "2026-11-09..2026-11-10", "severity": "alert",
                      "title": "2026-11-09 to 11-10: cards got +1,791 units over plan",
                      "detail": {}}],
    }
    return {**base, **changes}


def test_incidents_lead_the_page_with_shape_arm_days_units_sources_and_advice(
        quick_charts: None) -> None:
    documents = demo_documents()
    diagnosis = copy.deepcopy(documents.diagnosis)
    shortfall = incident(id=9, shape="shortfall", arm="control", start="2026-11-15",
                         end="2026-11-15", units=-240.0, severity="watch", material=False,
                         status="acknowledged", campaigns=[],
                         daily=[{"date": "2026-11-15", "units": -240.0}],
                         sources=[{"source": "organic", "share": 1.0, "units": -240.0}],
                         advice=["Send the campaign to an equal share of every arm.",
                                 "Check client crash reports for 2026-11-15."])
    diagnosis["incidents"] = [shortfall, incident()]
    diagnosis["advice"] = ["Send the campaign to an equal share of every arm.",
                           "Arm shares shifted on 2026-11-09."]
    html = render_experiment_page(experiment=EXPERIMENT, diagnosis=diagnosis,
                                  series=documents.series, alerts=[], reweight=documents.effect)
    panel = html.split('id="incidents"', 1)[1].split("</section>", 1)[0]
    # The alert comes first, then the watch, each with what an analyst acts on.
    assert panel.index("incident-7") < panel.index("incident-9")
    first = panel.split('id="incident-9"', 1)[0]
    for text in ("\u25a0 Inflow", "arm cards", "2026-11-09 to 11-10", "(2 days)",
                 "+1,791 units over plan", "newsletter 92%, push 8%", "November trail digest",
                 "#7 open", "material", "About 1,791 extra units", "-0.031", "5.6",
                 "2026-11-10 06:00 UTC", "Engagement in cards fell"):
        assert text in first, text
    second = panel.split('id="incident-9"', 1)[1]
    for text in ("\u25b2 Shortfall", "arm control", "-240 units under plan",
                 "none registered on these days", "#9 acknowledged", "not material",
                 "Check client crash reports"):
        assert text in second, text
    # Each line of advice appears once on the page.
    assert html.count("Send the campaign to an equal share of every arm.") == 1
    assert html.count("Arm shares shifted on 2026-11-09.") == 1
    assert html.index('id="incidents"') < html.index('id="shares"') < html.index('id="effect"')


def test_a_diagnosis_without_incidents_member_shows_no_incident_claim(quick_charts: None) -> None:
    documents = demo_documents()
    diagnosis = {k: v for k, v in documents.diagnosis.items() if k != "incidents"}
    html = render_experiment_page(experiment=EXPERIMENT, diagnosis=diagnosis,
                                  series=documents.series, alerts=[])
    assert 'id="incidents"' not in html and "No incident" not in html
    empty = render_experiment_page(experiment=EXPERIMENT, diagnosis={**diagnosis,
                                                                     "incidents": []},
                                   series=documents.series, alerts=[])
    assert "No incident" in empty


def test_effect_shows_naive_honest_and_bounds_side_by_side_with_signs(quick_charts: None) -> None:
    documents = demo_documents()
    effect = copy.deepcopy(documents.effect)
    naive = effect["comparisons"][0]["naive"]
    html = render_experiment_page(experiment=EXPERIMENT, diagnosis=documents.diagnosis,
                                  series=documents.series, alerts=[], reweight=effect)
    section = html.split('id="effect"', 1)[1]
    # Relative lifts carry their sign and their interval.
    relative = (f"relative {100 * naive['relative']:+.1f}% (95%: "
                f"{100 * naive['relative_ci_low']:+.1f}% to "
                f"{100 * naive['relative_ci_high']:+.1f}%)")
    assert relative in section
    assert "Not available for this estimate." in section  # no bounds in this answer
    assert "re-weighted to the reference arm&#39;s cohort mix, cohorts by source x flagged" \
        in section
    # With bounds that straddle zero while the naive interval does not, the page says so.
    effect["comparisons"][0]["bounds"] = {"low": -0.02, "high": 0.15, "ci_low": -0.04,
                                          "ci_high": 0.17}
    effect["default"] = {"reason": "Cells of the open incident were left out."}
    html = render_experiment_page(experiment=EXPERIMENT, diagnosis=documents.diagnosis,
                                  series=documents.series, alerts=[], reweight=effect)
    section = html.split('id="effect"', 1)[1]
    assert naive["ci_low"] > 0  # the demo's naive interval excludes zero
    assert "-0.020 to +0.150" in section and "95%: -0.040 to +0.170" in section
    assert "the direction of the effect is not settled" in section
    assert "Cells of the open incident were left out." in section
    assert "bounds: any mix of the added units" in section  # drawn in the effect chart


def test_metric_choice_honours_the_query_and_says_when_it_cannot(quick_charts: None) -> None:
    assert pick_metric(["routes_saved", "trail_minutes"], "trail_minutes") == (
        "trail_minutes", None)
    chosen, note = pick_metric(["routes_saved", "trail_minutes"], "Trail_Minutes")
    assert chosen == "routes_saved" and note is not None and "'Trail_Minutes'" in note
    assert pick_metric([], None) == (None, None)
    documents = demo_documents()
    html = render_experiment_page(experiment=EXPERIMENT, diagnosis=documents.diagnosis,
                                  series=documents.series, alerts=[], metric="nope")
    assert "There is no metric &#39;nope&#39;; showing &#39;routes_saved&#39;" in html
    assert '<option value="routes_saved" selected>' in html


def test_freshness_line_and_day_spans(quick_charts: None) -> None:
    documents = demo_documents()
    html = render_experiment_page(experiment=EXPERIMENT, diagnosis=documents.diagnosis,
                                  series=documents.series, alerts=[], diagnosis_version=3,
                                  refreshed_at="2026-11-23T07:05:00+00:00")
    line = html.split('id="freshness"', 1)[1].split("</p>", 1)[0]
    assert f"Data up to <strong>{documents.diagnosis['as_of']}</strong>" in line
    assert "refreshed at <strong>2026-11-23 07:05 UTC</strong>" in line and "version 3" in line
    campaign = {"name": "November trail digest", "source": "newsletter", "start": "2026-11-09",
                "end": "2026-11-10", "audience": {"control": 0.0, "cards": 0.4},
                "check": {"balanced": False, "warnings": ["unbalanced", "Only cards gets it."]}}
    html = render_experiment_page(experiment=EXPERIMENT, diagnosis=documents.diagnosis,
                                  series=documents.series, alerts=[], campaigns=[campaign])
    # Campaign days on one line, however narrow the column.
    assert '<td class="when">2026-11-09 to 11-10</td>' in html
    assert re.search(r"td\.when \{ white-space: nowrap; \}", html)
    assert format_span("2026-11-03", "2026-11-05") == "2026-11-03 to 11-05"
    assert format_span("2026-12-30", "2027-01-02") == "2026-12-30 to 2027-01-02"
    assert format_span("2026-11-03", None) == "2026-11-03"
