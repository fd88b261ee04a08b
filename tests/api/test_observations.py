"""PUT/GET /v1/experiments/{id}/observations: upserts, formats and every refusal."""

from __future__ import annotations

import csv
import datetime as dt
import io
import json
from typing import Any

import pytest
from apihelpers import assert_problem, demo_csv_text

URL = "/v1/experiments/route-cards/observations"


def row(date: str = "2026-10-26", arm: str = "control", source: str | None = "organic",
        entered: Any = 100, **metrics: Any) -> dict[str, Any]:
    item: dict[str, Any] = {"date": date, "arm": arm, "entered": entered}
    if source is not None:
        item["source"] = source
    if metrics:
        item["metrics"] = metrics
    return item


def stats(n: Any, total: Any, total_sq: Any) -> dict[str, Any]:
    return {"n": n, "sum": total, "sum_sq": total_sq}


def two_days() -> list[dict[str, Any]]:
    return [row(d, a, s, 500 + i, routes_saved=stats(490 + i, 1200.0 + i, 4100.5 + 3 * i))
            for i, (d, a, s) in enumerate(
                (d, a, s) for d in ("2026-10-26", "2026-10-27") for a in ("control", "cards")
                for s in ("organic", "push"))]


def test_json_rows_are_stored_and_read_back(client: Any, experiment: Any, stored: Any) -> None:
    rows = two_days()
    response = client.put(URL, json={"rows": rows})
    assert response.status_code == 200, response.text
    body = response.json()
    assert (body["written"], body["inserted"], body["updated"]) == (8, 8, 0)
    assert body["diagnosis"]["status"] in ("healthy", "watch", "alert")
    assert body["diagnosis"]["as_of"] == "2026-10-27"
    assert body["diagnosis"]["url"].endswith("/v1/experiments/route-cards/diagnosis")
    got = client.get(URL).json()["rows"]
    assert len(got) == 8
    assert got == stored("route-cards")
    first = next(r for r in got if (r["date"], r["arm"], r["source"]) ==
                 ("2026-10-26", "control", "organic"))
    assert first == {"date": "2026-10-26", "arm": "control", "source": "organic",
                     "entered": 500, "metrics": {"routes_saved": stats(490, 1200.0, 4100.5)}}


def test_missing_source_is_unattributed_and_absent_metrics_stay_absent(
        client: Any, experiment: Any, stored: Any) -> None:
    response = client.put(URL, json={"rows": [
        row(source=None, entered=10), row(arm="cards", source="", entered=11,
                                          routes_saved=stats(5, 10, 30))]})
    assert response.status_code == 200, response.text
    rows = stored("route-cards")
    assert {r["source"] for r in rows} == {"unattributed"}
    assert {r["arm"]: r["metrics"] for r in rows} == {
        "control": {}, "cards": {"routes_saved": stats(5, 10.0, 30.0)}}


def test_resending_is_idempotent_and_corrections_replace(client: Any, experiment: Any,
                                                         stored: Any, counts: Any) -> None:
    rows = two_days()
    client.put(URL, json={"rows": rows})
    snapshot_state, first_rows = counts(), stored("route-cards")
    again = client.put(URL, json={"rows": rows}).json()
    assert (again["written"], again["inserted"], again["updated"]) == (8, 0, 8)
    assert stored("route-cards") == first_rows
    # The same data gives the same diagnosis: no new snapshot, no new alert.
    assert counts() == snapshot_state
    corrected = [dict(rows[0], entered=123, metrics={"routes_saved": stats(100, 250, 900)})]
    answer = client.put(URL, json={"rows": corrected}).json()
    assert (answer["inserted"], answer["updated"]) == (0, 1)
    now = {(r["date"], r["arm"], r["source"]): r for r in stored("route-cards")}
    assert now[("2026-10-26", "control", "organic")]["entered"] == 123
    assert now[("2026-10-26", "control", "organic")]["metrics"] == {
        "routes_saved": stats(100, 250.0, 900.0)}
    assert len(now) == 8


def test_csv_upload_with_bom_and_csv_download_round_trip(client: Any, experiment: Any) -> None:
    text = demo_csv_text()
    response = client.put(URL, content=b"\xef\xbb\xbf" + text.encode(),
                          headers={"Content-Type": "text/csv; charset=utf-8"})
    assert response.status_code == 200, response.text
    expected_rows = list(csv.DictReader(io.StringIO(text)))
    assert response.json()["written"] == len(expected_rows)
    download = client.get(URL, headers={"Accept": "text/csv"})
    assert download.status_code == 200
    assert download.headers["content-type"].startswith("text/csv")
    got = {(r["date"], r["arm"], r["source"]): r
           for r in csv.DictReader(io.StringIO(download.text))}
    assert len(got) == len(expected_rows)
    for original in expected_rows:
        back = got[(original["date"], original["arm"], original["source"])]
        for column, value in original.items():
            assert float(back[column]) == float(value) if column not in (
                "date", "arm", "source") else back[column] == value
    # What was downloaded uploads again unchanged.
    again = client.put(URL, content=download.content, headers={"Content-Type": "text/csv"})
    assert (again.json()["inserted"], again.json()["updated"]) == (0, len(expected_rows))


def test_csv_without_source_column_and_with_blank_metric_cells(client: Any, experiment: Any,
                                                                stored: Any) -> None:
    body = ("date,arm,entered,routes_saved.n,routes_saved.sum,routes_saved.sum_sq\n"
            "2026-10-26,control,10,,,\n2026-10-26,cards,12,12,30,90\n\n")
    response = client.put(URL, content=body, headers={"Content-Type": "text/csv"})
    assert response.status_code == 200, response.text
    rows = {r["arm"]: r for r in stored("route-cards")}
    assert rows["control"]["metrics"] == {} and rows["control"]["source"] == "unattributed"
    assert rows["cards"]["metrics"] == {"routes_saved": stats(12, 30.0, 90.0)}


def test_read_filters_and_negotiation(client: Any, experiment: Any) -> None:
    client.put(URL, json={"rows": two_days()})
    only = client.get(URL, params={"from": "2026-10-27", "to": "2026-10-27"}).json()["rows"]
    assert {r["date"] for r in only} == {"2026-10-27"}
    assert client.get(URL, headers={"Accept": "text/csv;q=0.5, application/json"}) \
        .headers["content-type"].startswith("application/json")
    assert client.get(URL, headers={"Accept": "text/*"}).headers["content-type"] \
        .startswith("text/csv")
    assert_problem(client.get(URL, headers={"Accept": "application/xml"}), 406)


# --- refusals: each one leaves every table as it was --------------------------------------

def errors_of(body: dict[str, Any]) -> set[tuple[int | None, str]]:
    return {(e["row"], e["field"]) for e in body["errors"]}


@pytest.mark.parametrize(("bad", "field"), [
    (row(date="2026/10/27"), "date"),
    (row(date="2026-02-30"), "date"),
    (row(date="2026-10-25"), "date"),  # before start_date
    (row(date=(dt.date.today() + dt.timedelta(days=30)).isoformat()), "date"),
    (row(arm="treatment"), "arm"),
    (row(entered=-1), "entered"),
    (row(entered=2.5), "entered"),
    (row(entered="12"), "entered"),
    (row(entered=True), "entered"),
    (row(entered=None), "entered"),
    (row(entered=10, routes_saved=stats(11, 20, 50)), "routes_saved.n"),
    (row(entered=10, routes_saved=stats(4, 20, 99)), "routes_saved.sum_sq"),
    (row(entered=10, routes_saved=stats(-1, 0, 0)), "routes_saved.n"),
    (row(entered=10, routes_saved={"n": 4, "sum": 20}), "metrics.routes_saved.sum_sq"),
    (row(entered=10, routes_saved=stats(0, 3, 9)), "routes_saved"),
    ({**row(), "enterd": 5}, "enterd"),
    (row(arm=7), "arm"),
    ("not an object", "row"),
])
def test_each_invalid_row_is_named_and_nothing_is_written(client: Any, experiment: Any,
                                                          counts: Any, bad: Any,
                                                          field: str) -> None:
    client.put(URL, json={"rows": two_days()})
    before = counts()
    rows: list[Any] = [row("2026-10-28", "control"), row("2026-10-28", "cards"), bad]
    body = assert_problem(client.put(URL, json={"rows": rows}), 422, "invalid-input")
    assert (2, field) in errors_of(body), body["errors"]
    assert all(e["row"] == 2 for e in body["errors"]), body["errors"]
    assert counts() == before
    assert "2026-10-28" not in {r["date"] for r in client.get(URL).json()["rows"]}


def test_all_problems_are_listed_together(client: Any, experiment: Any, counts: Any) -> None:
    before = counts()
    body = assert_problem(client.put(URL, json={"rows": [
        row(), row(date="nope"), row(arm="x", entered=-3), row()]}), 422)
    assert errors_of(body) == {(1, "date"), (2, "arm"), (2, "entered"),
                               (3, "date,arm,source")}
    assert body["errors_total"] == 4
    assert counts() == before


def test_a_huge_number_of_problems_is_listed_up_to_a_cap(client: Any, experiment: Any) -> None:
    body = assert_problem(client.put(URL, json={"rows": [row(arm="x")] * 1500}), 422)
    assert body["errors_total"] == 1500 + 0 and len(body["errors"]) == 1000


@pytest.mark.parametrize(("document", "field"), [
    ({"rows": []}, "rows"),
    ({"rows": {"date": "2026-10-26"}}, "rows"),
    ([row()], "rows"),
    ({"rows": [row()], "extra": 1}, "extra"),
])
def test_wrong_shapes_are_422(client: Any, experiment: Any, counts: Any, document: Any,
                              field: str) -> None:
    before = counts()
    body = assert_problem(client.put(URL, json=document), 422)
    assert field in {e["field"] for e in body["errors"]}
    assert counts() == before


@pytest.mark.parametrize("raw", [b'{"rows": [', b'{"rows": [{"entered": NaN}]}', b"\xff\xfe{}"])
def test_malformed_json_is_400(client: Any, experiment: Any, counts: Any, raw: bytes) -> None:
    before = counts()
    assert_problem(client.put(URL, content=raw, headers={"Content-Type": "application/json"}),
                   400, "malformed-body")
    assert counts() == before


@pytest.mark.parametrize(("body", "field", "line"), [
    ("date,arm,source,entered\n2026-10-26,control,organic,10\n2026-10-26,cards,organic\n",
     "row", 3),
    ("date,arm,source,entered\n2026-10-26,control,organic,ten\n", "entered", 2),
    ("date,arm,entered,colour\n2026-10-26,control,10,red\n", "header", None),
    ("date,arm,source\n2026-10-26,control,organic\n", "header", None),
    ("date,arm,source,entered\n", "rows", None),
    ("", "body", None),
    ("date,arm,entered,m.n,m.sum\n2026-10-26,control,10,1,2\n", "m.sum_sq", None),
    ('date,arm,source,entered\n2026-10-26,"control,organic,10\n', "body", None),
])
def test_bad_csv_is_refused_with_lines(client: Any, experiment: Any, counts: Any, body: str,
                                       field: str, line: int | None) -> None:
    before = counts()
    problem = assert_problem(client.put(URL, content=body.encode(),
                                        headers={"Content-Type": "text/csv"}), 422)
    match = [e for e in problem["errors"] if e["field"] == field]
    assert match, problem["errors"]
    if line is not None:
        assert match[0]["line"] == line
    assert counts() == before


def test_csv_that_is_not_utf8_is_refused(client: Any, experiment: Any, counts: Any) -> None:
    before = counts()
    body = "date,arm,source,entered\n2026-10-26,control,caf\u00e9,10\n".encode("latin-1")
    problem = assert_problem(client.put(URL, content=body, headers={"Content-Type": "text/csv"}),
                             422)
    assert "UTF-8" in problem["errors"][0]["message"]
    assert counts() == before


def test_unknown_experiment_is_404(client: Any, counts: Any) -> None:
    before = counts()
    assert_problem(client.put("/v1/experiments/nope/observations", json={"rows": [row()]}), 404)
    assert_problem(client.get("/v1/experiments/nope/observations"), 404)
    assert counts() == before


@pytest.mark.parametrize("content_type", ["text/plain", "application/x-www-form-urlencoded",
                                          None])
def test_unsupported_content_type_is_415(client: Any, experiment: Any, counts: Any,
                                         content_type: str | None) -> None:
    before = counts()
    headers = {"Content-Type": content_type} if content_type else {}
    response = client.put(URL, content=json.dumps({"rows": [row()]}).encode(), headers=headers)
    assert_problem(response, 415, "unsupported-media-type")
    assert counts() == before


def test_body_over_the_limit_is_413(client: Any, experiment: Any, counts: Any,
                                    settings: Any) -> None:
    before = counts()
    big = b"date,arm,source,entered\n" + b"2026-10-26,control,organic,1\n" * (
        settings.max_body_bytes // 28 + 10)
    assert_problem(client.put(URL, content=big, headers={"Content-Type": "text/csv"}), 413,
                   "content-too-large")

    def chunks() -> Any:  # no Content-Length: the limit applies while streaming
        for start in range(0, len(big), 65536):
            yield big[start:start + 65536]

    assert_problem(client.put(URL, content=chunks(), headers={"Content-Type": "text/csv"}), 413)
    assert counts() == before


def test_too_many_rows_is_413(client: Any, experiment: Any, counts: Any, settings: Any) -> None:
    before = counts()
    rows = [row(entered=1, source=f"s{i}") for i in range(settings.max_rows + 1)]
    body = assert_problem(client.put(URL, json={"rows": rows}), 413)
    assert str(settings.max_rows) in body["detail"]
    assert counts() == before


def test_csv_problems_give_the_rows_and_lines_the_command_line_gives(
        client: Any, experiment: Any, counts: Any, tmp_path: Any,
        capsys: pytest.CaptureFixture[str]) -> None:
    from service.cli import main

    # Semicolon separated, a blank line before the last row: its row is 2, its line 5.
    body = ("date;arm;source;entered\n2026-10-26;control;organic;10\n"
            "2026-10-26;cards;organic;11\n\n2026-10-27;Cards;organic;1.234\n")
    before = counts()
    problem = assert_problem(client.put(URL, content=body.encode(),
                                        headers={"Content-Type": "text/csv"}), 422)
    assert counts() == before
    path = tmp_path / "export.csv"
    path.write_text(body)
    assert main(["analyze", str(path), "--arms", "control,cards", "--json"]) == 2
    offline = json.loads(capsys.readouterr().out)
    assert offline["errors"] == problem["errors"]
    assert {(e["row"], e["line"], e["field"]) for e in problem["errors"]} == {
        (2, 5, "arm"), (2, 5, "entered")}
    messages = " ".join(e["message"] for e in problem["errors"])
    assert "did you mean 'cards'?" in messages
    assert "drop the thousands separator (1234)" in messages


def test_csv_columns_that_look_like_metrics_are_refused_with_the_name_to_use(
        client: Any, experiment: Any) -> None:
    body = "date,arm,source,entered,saves_sum\n2026-10-26,control,organic,10,4\n"
    problem = assert_problem(client.put(URL, content=body.encode(),
                                        headers={"Content-Type": "text/csv"}), 422)
    assert "rename it saves.sum" in problem["errors"][0]["message"]
