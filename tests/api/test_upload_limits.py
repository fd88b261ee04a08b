"""What one upload and one experiment may hold: header width, number of metrics, counts and
sums within float64's exact range; past each limit a 422 that names it, and nothing written.
Data at the limits is diagnosed, charted and sized without a 500, 503 or 404."""

from __future__ import annotations

from typing import Any

import pytest
from apihelpers import EXPERIMENT, assert_problem

from detectors.data import MAX_METRICS, MAX_STAT_MAGNITUDE, MAX_UNITS
from service.csvio import MAX_COLUMNS

URL = "/v1/experiments/route-cards/observations"
DAYS = [f"2026-10-{day}" for day in range(26, 32)]


def put_csv(client: Any, text: str) -> Any:
    return client.put(URL, content=text.encode(), headers={"Content-Type": "text/csv"})


def rows_with_metrics(names: list[str], days: list[str] = DAYS, source: str = "organic"
                      ) -> list[dict[str, Any]]:
    stats = {"n": 90, "sum": 180.0, "sum_sq": 500.0}
    return [{"date": day, "arm": arm, "source": source, "entered": 100,
             "metrics": {name: stats for name in names}}
            for day in days for arm in EXPERIMENT["arms"]]


@pytest.mark.timeout(60)
def test_a_header_of_a_million_empty_columns_is_refused_at_once(
        client: Any, experiment: Any, counts: Any) -> None:
    before = counts()
    # Counting the repeats column by column took minutes for a fifth of this.
    body = assert_problem(put_csv(client, "date,arm,entered" + "," * 1_000_000 + "\n"), 422)
    [error] = body["errors"]
    assert error["field"] == "header"
    assert f"at most {MAX_COLUMNS} are accepted" in error["message"]
    assert counts() == before


def test_a_csv_with_too_many_metrics_is_refused_naming_the_limit(client: Any,
                                                                 experiment: Any) -> None:
    names = [f"m{i}" for i in range(MAX_METRICS + 1)]
    header = "date,arm,source,entered," + ",".join(
        f"{name}.{stat}" for name in names for stat in ("n", "sum", "sum_sq"))
    line = "2026-10-26,control,organic,100," + ",".join(["1,1,1"] * len(names))
    body = assert_problem(put_csv(client, f"{header}\n{line}\n"), 422)
    assert f"{MAX_METRICS} metrics" in body["errors"][0]["message"]


def test_json_rows_with_too_many_metrics_are_refused(client: Any, experiment: Any,
                                                     counts: Any) -> None:
    before = counts()
    names = [f"m{i}" for i in range(MAX_METRICS + 1)]
    response = client.put(URL, json={"rows": rows_with_metrics(names, DAYS[:1])})
    body = assert_problem(response, 422)
    assert any(str(MAX_METRICS) in e["message"] for e in body["errors"]), body
    # Spread over rows: each row within the limit, the upload past it.
    split = [*rows_with_metrics(names[:40], DAYS[:1]), *rows_with_metrics(names[40:], DAYS[1:2])]
    body = assert_problem(client.put(URL, json={"rows": split}), 422)
    assert f"at most {MAX_METRICS} are accepted" in body["errors"][0]["message"]
    assert counts() == before


def test_the_metric_limit_holds_across_uploads_and_is_served_at_the_limit(
        client: Any, experiment: Any, counts: Any) -> None:
    first = [f"m{i}" for i in range(MAX_METRICS)]
    # Other rows (new keys) each time: the stored rows keep the earlier metrics.
    for names, source in ((first[:40], "organic"), (first[40:], "push")):
        response = client.put(URL, json={"rows": rows_with_metrics(names, source=source)})
        assert response.status_code == 200, response.text
    before = counts()
    body = assert_problem(client.put(URL, json={"rows": rows_with_metrics(
        ["one_more"], source="newsletter")}), 422)
    assert body["errors"][0]["field"] == "metrics"
    assert f"would carry {MAX_METRICS + 1} metrics" in body["errors"][0]["message"]
    assert counts() == before
    # Every metric at the limit is stored, read back and diagnosed on both backends.
    stored = client.get(URL).json()["rows"]
    assert len({name for row in stored for name in row["metrics"]}) == MAX_METRICS
    assert client.get("/v1/experiments/route-cards/diagnosis").status_code == 200
    assert client.get("/experiments/route-cards").status_code == 200


@pytest.mark.parametrize("entered", [2**53 + 1, 2**53, MAX_UNITS + 1, 1e300])
def test_counts_beyond_the_exact_range_are_refused_not_rounded(
        client: Any, experiment: Any, entered: float) -> None:
    rows = [{"date": "2026-10-26", "arm": "control", "source": "organic", "entered": entered}]
    body = assert_problem(client.put(URL, json={"rows": rows}), 422)
    assert body["errors"][0]["field"] == "entered"
    assert f"{MAX_UNITS:,}" in body["errors"][0]["message"]
    # In CSV too (the fast reader parses 2^53 + 1 as an exact int64).
    body = assert_problem(put_csv(client, "date,arm,source,entered\n"
                                          f"2026-10-26,control,organic,{int(entered)}\n"), 422)
    assert body["errors"][0]["field"] == "entered"


def test_the_largest_count_is_stored_exactly(client: Any, experiment: Any) -> None:
    rows = [{"date": "2026-10-26", "arm": "control", "source": "organic",
             "entered": MAX_UNITS}]
    assert client.put(URL, json={"rows": rows}).status_code == 200
    assert client.get(URL).json()["rows"][0]["entered"] == MAX_UNITS


def test_totals_past_the_exact_range_are_refused_within_and_across_uploads(
        client: Any, experiment: Any, counts: Any) -> None:
    # (1,024 rows of 2^53 units on one day once overflowed the int64 totals.)
    one_day = [{"date": "2026-10-26", "arm": "control", "source": f"s{i}",
                "entered": MAX_UNITS // 1000} for i in range(1024)]
    body = assert_problem(client.put(URL, json={"rows": one_day}), 422)
    assert any(e["field"] == "entered" and e["row"] is None for e in body["errors"])
    half = [{"date": "2026-10-26", "arm": arm, "source": "organic", "entered": MAX_UNITS // 2}
            for arm in EXPERIMENT["arms"]]
    assert client.put(URL, json={"rows": half}).status_code == 200
    before = counts()
    more = [{"date": "2026-10-27", "arm": "control", "source": "organic", "entered": 1}]
    body = assert_problem(client.put(URL, json={"rows": more}), 422)
    assert f"at most {MAX_UNITS:,} (10^12) are accepted in all" in body["errors"][0]["message"]
    assert counts() == before


def test_metric_statistics_past_the_bound_are_refused(client: Any, experiment: Any) -> None:
    rows = [{"date": "2026-10-26", "arm": "control", "source": "organic", "entered": 10,
             "metrics": {"km": {"n": 10, "sum": 1e101, "sum_sq": 1e300}}}]
    body = assert_problem(client.put(URL, json={"rows": rows}), 422)
    assert body["errors"][0]["field"] == "km"
    assert f"{MAX_STAT_MAGNITUDE:g}" in body["errors"][0]["message"]


def test_data_at_the_limits_is_served_without_errors(client: Any, experiment: Any) -> None:
    # Totals just under the limit over 6 days x 2 arms x 2 sources, an inflow into one arm
    # on one day, and metric statistics at the bound.
    per_cell = (MAX_UNITS - 2**30) // 24
    rows = []
    for day in DAYS:
        for arm in EXPERIMENT["arms"]:
            for source in ("organic", "newsletter"):
                extra = 2**30 if (day, arm, source) == (DAYS[3], "cards", "newsletter") else 0
                n = per_cell + extra
                mean = MAX_STAT_MAGNITUDE ** 0.5 / n * 0.5
                rows.append({"date": day, "arm": arm, "source": source, "entered": n,
                             "metrics": {"km": {"n": 1_000_000, "sum": 1e6 * mean,
                                                "sum_sq": MAX_STAT_MAGNITUDE}}})
    response = client.put(URL, json={"rows": rows})
    assert response.status_code == 200, response.text
    for path in ("/v1/experiments/route-cards/diagnosis", "/v1/experiments/route-cards/series",
                 "/v1/experiments/route-cards/sensitivity", "/experiments/route-cards",
                 "/v1/experiments/route-cards/campaigns"):
        answer = client.get(path)
        assert answer.status_code == 200, (path, answer.text[:2000])
    answer = client.post("/v1/experiments/route-cards/reweight", json={"metric": "km"})
    assert answer.status_code in (200, 422), answer.text[:2000]
    assert client.get(URL, headers={"Accept": "text/csv"}).status_code == 200
