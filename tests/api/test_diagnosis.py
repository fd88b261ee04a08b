"""GET .../diagnosis, .../diagnoses and .../series: stored snapshots, ETags, history."""

from __future__ import annotations

import datetime as dt
import io
import json
from typing import Any

import pandas as pd
import pytest
from apihelpers import DEMO_CSV, assert_problem, corrected_demo_csv, demo_csv_text, upload_csv
from scipy import stats

from detectors import AllocationSchedule, ObservationTable, diagnose
from detectors.contamination import impact_function
from service.csvio import read_observations_csv
from service.demo import scenario

BASE = "/v1/experiments/route-cards"


def test_no_diagnosis_before_data(client: Any, experiment: Any, counts: Any) -> None:
    before = counts()
    for path in ("/diagnosis", "/series"):
        assert_problem(client.get(BASE + path), 404, "no-diagnosis")
    assert client.get(BASE + "/diagnoses").json() == {"items": []}
    assert_problem(client.get("/v1/experiments/nope/diagnosis"), 404, "not-found")
    assert counts() == before


def test_served_document_is_the_detectors_diagnosis_of_the_stored_rows(
        client: Any, experiment: Any) -> None:
    upload_csv(client, demo_csv_text())
    served = client.get(BASE + "/diagnosis")
    assert served.status_code == 200
    table = ObservationTable.from_frame(read_observations_csv(DEMO_CSV), scenario.ARMS)
    # The service measures each incident's impact on the metrics, as diagnose's hook does.
    direct = diagnose(table, AllocationSchedule.constant(scenario.ARMS, [0.5, 0.5],
                                                         scenario.START),
                      experiment="route-cards", impact=impact_function).to_dict()
    document = served.json()
    # Each incident is the detectors' episode with the stored incident's fields added.
    stored = ("id", "experiment", "status", "opened_at", "acknowledged_at", "resolved_at",
              "resolution", "explained_by")
    assert document["incidents"] and all(
        incident["status"] == "open" and isinstance(incident["id"], int)
        for incident in document["incidents"])
    plain = {**document, "incidents": [{k: v for k, v in i.items() if k not in stored}
                                       for i in document["incidents"]]}
    assert plain == json.loads(json.dumps(direct))
    assert document["experiment"] == "route-cards"
    assert document["status"] == "alert"
    campaign_days = {(scenario.START + dt.timedelta(days=d)).isoformat()
                     for d in scenario.CAMPAIGN_DAYS}
    alert_days = {d["date"] for d in document["flagged_days"] if d["severity"] == "alert"}
    assert alert_days == campaign_days


def test_whole_period_srm_matches_scipy_chisquare(client: Any, experiment: Any) -> None:
    upload_csv(client, demo_csv_text())
    srm = client.get(BASE + "/diagnosis").json()["srm"]
    # Reference: scipy.stats.chisquare (Pearson goodness of fit) on the arm totals of the same
    # file against the planned 50/50 split, computed independently with pandas.
    totals = pd.read_csv(DEMO_CSV).groupby("arm")["entered"].sum()
    observed = [int(totals["control"]), int(totals["cards"])]
    expected = [sum(observed) / 2] * 2
    reference = stats.chisquare(observed, expected)
    assert srm["observed"] == {"control": observed[0], "cards": observed[1]}
    assert srm["statistic"] == pytest.approx(reference.statistic, rel=1e-9)
    assert srm["p_value"] == pytest.approx(reference.pvalue, rel=1e-9)


def test_etag_and_conditional_requests(client: Any, experiment: Any) -> None:
    upload_csv(client, demo_csv_text())
    first = client.get(BASE + "/diagnosis")
    etag = first.headers["etag"]
    assert etag.startswith('"') and etag.endswith('"')
    for header in (etag, f"W/{etag}", f'"other", {etag}', "*"):
        again = client.get(BASE + "/diagnosis", headers={"If-None-Match": header})
        assert again.status_code == 304, header
        assert again.content == b""
        assert again.headers["etag"] == etag
    assert client.get(BASE + "/diagnosis", headers={"If-None-Match": '"stale"'}
                      ).status_code == 200
    # Same data again: same diagnosis, same tag, no new version.
    upload_csv(client, demo_csv_text())
    assert client.get(BASE + "/diagnosis", headers={"If-None-Match": etag}).status_code == 304
    assert len(client.get(BASE + "/diagnoses").json()["items"]) == 1


def test_new_data_makes_a_new_version_and_history_is_kept(client: Any, experiment: Any) -> None:
    frame = pd.read_csv(DEMO_CSV)
    days = sorted(frame["date"].unique())
    upload_csv(client, frame[frame["date"].isin(days[:10])].to_csv(index=False))
    first = client.get(BASE + "/diagnosis")
    assert first.json()["as_of"] == days[9]
    upload_csv(client, demo_csv_text())
    latest = client.get(BASE + "/diagnosis")
    assert latest.headers["etag"] != first.headers["etag"]
    assert latest.headers["x-inrush-diagnosis-version"] == "2"
    history = client.get(BASE + "/diagnoses").json()["items"]
    assert [h["version"] for h in history] == [2, 1]
    assert [h["as_of"] for h in history] == [days[-1], days[9]]
    old = client.get(BASE + "/diagnosis", params={"version": 1})
    assert old.json() == first.json() and old.headers["etag"] == first.headers["etag"]
    assert_problem(client.get(BASE + "/diagnosis", params={"version": 9}), 404)
    shown = client.get(BASE).json()["diagnosis"]
    assert (shown["version"], shown["status"], shown["as_of"]) == (2, "alert", days[-1])


def test_series_matches_the_uploaded_counts(client: Any, experiment: Any) -> None:
    upload_csv(client, demo_csv_text())
    response = client.get(BASE + "/series")
    assert response.status_code == 200
    series = response.json()
    frame = pd.read_csv(DEMO_CSV)
    per_day = frame.groupby(["date", "arm"])["entered"].sum()
    assert series["arms"] == list(scenario.ARMS)
    assert series["dates"] == sorted(frame["date"].unique())
    for day in series["days"]:
        for arm in scenario.ARMS:
            assert day["arms"][arm]["entered"] == per_day[(day["date"], arm)]
            assert day["arms"][arm]["expected_share"] == 0.5
    flagged = {d["date"] for d in series["days"] if d["flagged"]}
    diagnosis = client.get(BASE + "/diagnosis").json()
    assert flagged == {d["date"] for d in diagnosis["flagged_days"]}
    assert client.get(BASE + "/series", headers={"If-None-Match": response.headers["etag"]}
                      ).status_code == 304


def test_changing_the_allocation_rediagnoses(client: Any, experiment: Any) -> None:
    upload_csv(client, demo_csv_text())
    before = client.get(BASE + "/diagnosis").json()
    response = client.patch(BASE, json={"allocation": [
        {"from": "2026-10-26", "weights": [0.6, 0.4]}]})
    assert response.status_code == 200, response.text
    assert response.json()["diagnosis"]["version"] == 2
    after = client.get(BASE + "/diagnosis").json()
    assert after != before
    assert after["srm"]["expected"]["control"] == pytest.approx(
        0.6 * sum(after["srm"]["observed"].values()), abs=0.01)
    series = client.get(BASE + "/series").json()
    assert {d["arms"]["control"]["expected_share"] for d in series["days"]} == {0.6}
    # The same allocation again changes nothing.
    client.patch(BASE, json={"allocation": [{"from": "2026-10-26", "weights": [0.6, 0.4]}]})
    assert len(client.get(BASE + "/diagnoses").json()["items"]) == 2


def test_rows_without_units_leave_no_diagnosis(client: Any, experiment: Any) -> None:
    body = ("date,arm,source,entered\n2026-10-26,control,organic,0\n"
            "2026-10-26,cards,organic,0\n")
    answer = upload_csv(client, body)
    assert answer["diagnosis"]["status"] is None
    assert_problem(client.get(BASE + "/diagnosis"), 404, "no-diagnosis")


def test_corrected_data_changes_the_diagnosis(client: Any, experiment: Any) -> None:
    upload_csv(client, demo_csv_text())
    upload_csv(client, corrected_demo_csv())
    document = client.get(BASE + "/diagnosis").json()
    assert not [d for d in document["flagged_days"] if d["severity"] == "alert"]
    reread = pd.read_csv(io.StringIO(client.get(
        BASE + "/observations", headers={"Accept": "text/csv"}).text))
    assert int(reread["entered"].sum()) == int(pd.read_csv(DEMO_CSV)["entered"].sum()) - \
        scenario._CAMPAIGN_SIZE * len(scenario.CAMPAIGN_DAYS)
