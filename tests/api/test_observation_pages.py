"""GET /v1/experiments/{id}/observations: streamed exports and pages with a cursor."""

from __future__ import annotations

import csv
import io
from typing import Any

from apihelpers import assert_problem, demo_csv_text, upload_csv

URL = "/v1/experiments/route-cards/observations"


def _pages(client: Any, limit: int, accept: str = "application/json") -> list[Any]:
    """Every page, following ``Link: rel="next"`` until there is none."""
    pages = []
    url: str | None = f"{URL}?limit={limit}"
    while url is not None:
        response = client.get(url, headers={"Accept": accept})
        assert response.status_code == 200, response.text
        pages.append(response)
        link = response.headers.get("link")
        url = link[1:link.index(">")] if link else None
        assert len(pages) < 1000
    return pages


def test_pages_cover_every_row_once_in_order(client: Any, experiment: dict[str, Any]) -> None:
    upload_csv(client, demo_csv_text())
    whole = client.get(URL).json()
    assert whole["next"] is None
    assert len(whole["rows"]) == 224
    pages = _pages(client, 50)
    assert [len(p.json()["rows"]) for p in pages] == [50, 50, 50, 50, 24]
    assert [row for page in pages for row in page.json()["rows"]] == whole["rows"]
    assert all(p.json()["next"] for p in pages[:-1]) and pages[-1].json()["next"] is None


def test_csv_pages_join_to_the_streamed_export(client: Any, experiment: dict[str, Any]) -> None:
    upload_csv(client, demo_csv_text())
    streamed = client.get(URL, headers={"Accept": "text/csv"})
    assert streamed.status_code == 200
    assert streamed.headers["content-type"].startswith("text/csv")
    whole = list(csv.reader(io.StringIO(streamed.text)))
    pages = [list(csv.reader(io.StringIO(p.text))) for p in _pages(client, 60, "text/csv")]
    assert all(page[0] == whole[0] for page in pages)  # each page has the header
    assert [line for page in pages for line in page[1:]] == whole[1:]


def test_streamed_export_uploads_back_to_the_same_rows(client: Any, experiment: dict[str, Any],
                                                      stored: Any) -> None:
    upload_csv(client, demo_csv_text())
    before = stored("route-cards")
    exported = client.get(URL, headers={"Accept": "text/csv"}).text
    result = upload_csv(client, exported)
    assert result["updated"] == len(before) and result["inserted"] == 0
    assert stored("route-cards") == before


def test_a_page_respects_the_date_range(client: Any, experiment: dict[str, Any]) -> None:
    upload_csv(client, demo_csv_text())
    ranged = client.get(f"{URL}?from=2026-10-28&to=2026-10-29&limit=5").json()
    assert {row["date"] for row in ranged["rows"]} == {"2026-10-28"}
    following = client.get(f"{URL}?from=2026-10-28&to=2026-10-29&limit=100"
                           f"&cursor={ranged['next']}").json()
    dates = [row["date"] for row in ranged["rows"] + following["rows"]]
    assert sorted(set(dates)) == ["2026-10-28", "2026-10-29"] and following["next"] is None


def test_a_cursor_it_did_not_issue_is_a_problem_naming_it(client: Any,
                                                          experiment: dict[str, Any]) -> None:
    for cursor in ("not-base64!", "WyJ4Il0", "WzEsMiwzXQ"):  # junk, ["x"], [1,2,3]
        body = assert_problem(client.get(f"{URL}?limit=5&cursor={cursor}"), 422)
        assert body["errors"][0]["field"] == "cursor"
    assert_problem(client.get(f"{URL}?limit=0"), 422)


def test_an_empty_experiment_streams_an_empty_export(client: Any,
                                                     experiment: dict[str, Any]) -> None:
    assert client.get(URL).json() == {"rows": [], "next": None}
    assert client.get(URL, headers={"Accept": "text/csv"}).text == \
        "date,arm,source,entered\n"


def test_series_between_two_dates_cuts_every_daily_list_alike(
        client: Any, experiment: dict[str, Any]) -> None:
    upload_csv(client, demo_csv_text())
    whole = client.get("/v1/experiments/route-cards/series").json()
    response = client.get("/v1/experiments/route-cards/series?from=2026-10-28&to=2026-10-30")
    assert response.status_code == 200
    part = response.json()
    start = whole["dates"].index("2026-10-28")
    assert part["dates"] == ["2026-10-28", "2026-10-29", "2026-10-30"]
    assert [d["date"] for d in part["days"]] == part["dates"]
    assert part["days"] == whole["days"][start:start + 3]
    for cut, full in zip(part["sources"], whole["sources"], strict=True):
        assert cut["source"] == full["source"]
        assert cut["entered"] == {arm: counts[start:start + 3]
                                  for arm, counts in full["entered"].items()}
    # Each range has its own tag, and revalidates against it.
    tag = response.headers["etag"]
    assert tag != client.get("/v1/experiments/route-cards/series").headers["etag"]
    again = client.get("/v1/experiments/route-cards/series?from=2026-10-28&to=2026-10-30",
                       headers={"If-None-Match": tag})
    assert again.status_code == 304
