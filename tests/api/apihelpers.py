"""Constants and assertions shared by the API tests (imported as a top-level module)."""

from __future__ import annotations

import datetime as dt
import io
from pathlib import Path
from typing import Any

import pandas as pd

DEMO_CSV = Path(__file__).resolve().parents[2] / "service" / "demo" / "larkspur_route_cards.csv"

EXPERIMENT = {
    "id": "route-cards",
    "title": "Route cards on the trail list",
    "start_date": "2026-10-26",
    "arms": ["control", "cards"],
    "allocation": [{"from": "2026-10-26", "weights": [0.5, 0.5]}],
}



def demo_csv_text() -> str:
    return DEMO_CSV.read_text(encoding="utf-8")


def two_metric_demo_csv() -> str:
    """The demo export with a second metric, minutes on trail, scaled from routes saved (x12),
    for pages and reports that switch between metrics."""
    frame = pd.read_csv(io.StringIO(demo_csv_text()))
    frame["trail_minutes.n"] = frame["routes_saved.n"]
    frame["trail_minutes.sum"] = frame["routes_saved.sum"] * 12.0
    frame["trail_minutes.sum_sq"] = frame["routes_saved.sum_sq"] * 144.0
    return frame.to_csv(index=False)


def assert_problem(response: Any, status: int, slug: str | None = None) -> dict[str, Any]:
    """The response is an RFC 9457 problem with ``status`` (and type ending in ``slug``)."""
    assert response.status_code == status, response.text
    assert response.headers["content-type"].startswith("application/problem+json")
    body = response.json()
    for member in ("type", "title", "status", "detail"):
        assert member in body, body
    assert body["status"] == status
    if slug is not None:
        assert body["type"].endswith(f"/problems/{slug}"), body["type"]
    return body


def upload_csv(client: Any, text: str, experiment_id: str = "route-cards") -> dict[str, Any]:
    response = client.put(f"/v1/experiments/{experiment_id}/observations",
                          content=text.encode("utf-8"), headers={"Content-Type": "text/csv"})
    assert response.status_code == 200, response.text
    return response.json()


def corrected_demo_csv() -> str:
    """The demo export with the newsletter campaign's extra units in ``cards`` taken out.

    The campaign days and size are the scenario's own constants; metric sums are scaled with
    the units so that the sufficient statistics stay consistent.
    """
    import pandas as pd

    from service.demo import scenario

    frame = pd.read_csv(DEMO_CSV)
    days = {(scenario.START + dt.timedelta(days=d)).isoformat()
            for d in scenario.CAMPAIGN_DAYS}
    hit = frame["date"].isin(days) & (frame["arm"] == "cards") & (frame["source"] == "newsletter")
    scale = (frame.loc[hit, "entered"] - scenario._CAMPAIGN_SIZE) / frame.loc[hit, "entered"]
    frame.loc[hit, "entered"] -= scenario._CAMPAIGN_SIZE
    frame.loc[hit, "routes_saved.n"] = frame.loc[hit, "entered"]
    for column in ("routes_saved.sum", "routes_saved.sum_sq"):
        frame.loc[hit, column] = (frame.loc[hit, column] * scale).round(6)
    return frame.to_csv(index=False)
