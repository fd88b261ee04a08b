"""Conditional GET helpers and middleware (RFC 9110 If-None-Match / 304, RFC 9111 caching)."""

from __future__ import annotations

import hashlib
import json

from fastapi import FastAPI
from fastapi.responses import JSONResponse, Response
from fastapi.testclient import TestClient

from service.http import canonical_json
from service.http_cache import (
    REVALIDATE,
    ConditionalGetMiddleware,
    conditional_json,
    strong_etag,
)

ALERTS = {"items": [{"id": 3, "experiment": "route-cards", "status": "open"}], "next": None}


def app() -> FastAPI:
    application = FastAPI()
    state = {"alerts": ALERTS}

    @application.get("/v1/alerts")
    def alerts() -> dict[str, object]:
        return state["alerts"]

    @application.get("/v1/experiments/{experiment_id}/diagnosis")
    def tagged(experiment_id: str) -> Response:
        return JSONResponse({"experiment": experiment_id}, headers={"ETag": '"own-tag"'})

    @application.get("/v1/experiments")
    def untracked() -> dict[str, str]:
        return {"not": "polled"}

    @application.get("/v1/alerts/{alert_id}")
    def missing(alert_id: int) -> Response:
        return JSONResponse({"status": 404}, status_code=404)

    application.add_middleware(ConditionalGetMiddleware)
    application.state.data = state
    return application


def test_strong_etag_is_the_content_hash() -> None:
    body = canonical_json(ALERTS)
    # Independent computation: quoted, first 32 hex digits of the SHA-256 of the bytes.
    assert strong_etag(body) == '"' + hashlib.sha256(body).hexdigest()[:32] + '"'
    assert not strong_etag(body).startswith("W/")


def test_helper_answers_304_to_a_matching_tag() -> None:
    first = conditional_json(ALERTS, None)
    tag = first.headers["etag"]
    assert first.status_code == 200 and first.headers["cache-control"] == REVALIDATE
    assert json.loads(first.body) == ALERTS
    again = conditional_json(ALERTS, f'"other", {tag}')
    assert again.status_code == 304 and again.body == b"" and again.headers["etag"] == tag
    assert conditional_json(ALERTS, "*").status_code == 304
    assert conditional_json({**ALERTS, "next": "9"}, tag).status_code == 200


def test_middleware_tags_untagged_polled_routes() -> None:
    application = app()
    with TestClient(application) as client:
        first = client.get("/v1/alerts")
        tag = first.headers["etag"]
        assert first.status_code == 200 and first.headers["cache-control"] == REVALIDATE
        assert tag == strong_etag(first.content)
        second = client.get("/v1/alerts", headers={"If-None-Match": tag})
        assert second.status_code == 304 and second.content == b""
        assert second.headers["etag"] == tag and second.headers["cache-control"] == REVALIDATE
        application.state.data["alerts"] = {"items": [], "next": None}
        changed = client.get("/v1/alerts", headers={"If-None-Match": tag})
        assert changed.status_code == 200 and changed.headers["etag"] != tag


def test_middleware_leaves_own_tags_errors_and_other_paths_alone() -> None:
    with TestClient(app()) as client:
        own = client.get("/v1/experiments/route-cards/diagnosis")
        assert own.headers["etag"] == '"own-tag"' and own.headers["cache-control"] == REVALIDATE
        other = client.get("/v1/experiments")
        assert "etag" not in other.headers and "cache-control" not in other.headers
        error = client.get("/v1/alerts/12")
        assert error.status_code == 404 and "etag" not in error.headers
