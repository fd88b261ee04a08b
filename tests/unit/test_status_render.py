"""Status page rendering from plain documents (no database)."""

from __future__ import annotations

from service.demo import scenario
from service.pages.render import render_experiment_page, render_index_page
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
    assert html.count("<svg") == 4 and "<script" not in html
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
    assert "No data" in empty and "<svg" not in empty


def test_index_marks_status_with_a_shape_and_a_word() -> None:
    html = render_index_page([
        {"id": "route-cards", "title": "Route cards", "status": "alert", "as_of": "2026-11-22",
         "open_alerts": 3, "start_date": "2026-10-26"},
        {"id": "trail-badges", "title": "Trail badges", "status": "healthy", "as_of": None,
         "open_alerts": 0, "start_date": "2026-11-02"}])
    assert "\u25a0 Alert" in html and "\u25cf Healthy" in html
