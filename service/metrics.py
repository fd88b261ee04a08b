"""Prometheus metrics: ``GET /metrics`` in the text exposition format.

Two kinds of metric, each safe with several worker processes or replicas:

* Per-experiment gauges (``inrush_open_incidents``, ``inrush_open_alerts``,
  ``inrush_srm_p_value``,
  ``inrush_flagged_days``, ``inrush_last_data_date_seconds``, label ``experiment``) are read
  from the database at scrape time by a custom collector, so every worker answers the same.
* Request metrics (``inrush_http_requests_total``, ``inrush_http_request_duration_seconds``,
  labels ``method``, ``route`` -- the path template, never the raw path -- and ``status``) are
  counted in the process. With several worker processes set ``PROMETHEUS_MULTIPROC_DIR`` to an
  empty directory writable by all of them, before they start: prometheus-client then keeps the
  counts in files there and every worker's ``/metrics`` reports the sum over all workers. Empty
  the directory whenever the service restarts.

``INRUSH_METRICS_TOKEN`` makes ``/metrics`` require ``Authorization: Bearer <that token>``;
unset, the endpoint needs no authentication.
"""

from __future__ import annotations

import datetime as dt
import hmac
import logging
import os
import time
from collections.abc import Iterable, Iterator
from typing import Any

from fastapi import APIRouter, FastAPI, Request
from fastapi.responses import Response
from prometheus_client import CONTENT_TYPE_LATEST, CollectorRegistry, Counter, Histogram
from prometheus_client import generate_latest as _generate_latest
from prometheus_client.core import GaugeMetricFamily, Metric
from prometheus_client.multiprocess import MultiProcessCollector
from prometheus_client.registry import Collector
from pydantic import Field, SecretStr
from pydantic_settings import BaseSettings, SettingsConfigDict
from sqlalchemy import func, select
from sqlalchemy.exc import SQLAlchemyError
from starlette.types import ASGIApp, Message, Receive, Scope, Send

from .db.incident_models import Incident
from .db.models import Alert, DiagnosisSnapshot, Experiment
from .db.session import Database
from .problems import ProblemError

logger = logging.getLogger("inrush.service")

MULTIPROC_ENV = "PROMETHEUS_MULTIPROC_DIR"
UNRESOLVED = ("open", "acknowledged")
# Request latency buckets (seconds): uploads re-run the diagnosis, so the tail is long.
LATENCY_BUCKETS = (0.005, 0.01, 0.025, 0.05, 0.1, 0.25, 0.5, 1.0, 2.5, 5.0, 10.0, 30.0)

REQUEST_REGISTRY = CollectorRegistry(auto_describe=True)
REQUESTS = Counter("inrush_http_requests", "HTTP requests answered, by route template and "
                   "status", ["method", "route", "status"], registry=REQUEST_REGISTRY)
LATENCY = Histogram("inrush_http_request_duration_seconds", "Time to answer HTTP requests",
                    ["method", "route"], buckets=LATENCY_BUCKETS, registry=REQUEST_REGISTRY)


class MetricsSettings(BaseSettings):
    model_config = SettingsConfigDict(env_prefix="INRUSH_", extra="ignore")

    metrics_token: SecretStr | None = Field(
        None, description="bearer token /metrics requires; unset: no authentication")


def _route_template(scope: Scope) -> str:
    route = scope.get("route")
    path = getattr(route, "path", None)
    return str(path) if path else "(unmatched)"


class RequestMetricsMiddleware:
    """Counts requests and times them, labelled by route template, method and status."""

    def __init__(self, app: ASGIApp) -> None:
        self.app = app

    async def __call__(self, scope: Scope, receive: Receive, send: Send) -> None:
        if scope["type"] != "http":
            await self.app(scope, receive, send)
            return
        started = time.perf_counter()
        status = 500

        async def recording_send(message: Message) -> None:
            nonlocal status
            if message["type"] == "http.response.start":
                status = int(message["status"])
            await send(message)

        try:
            await self.app(scope, receive, recording_send)
        finally:
            method, route = scope["method"], _route_template(scope)
            REQUESTS.labels(method, route, str(status)).inc()
            LATENCY.labels(method, route).observe(time.perf_counter() - started)


def _date_seconds(value: dt.date) -> float:
    return dt.datetime.combine(value, dt.time(), tzinfo=dt.UTC).timestamp()


class ExperimentCollector(Collector):
    """Per-experiment gauges computed from the database at scrape time."""

    def __init__(self, database: Database) -> None:
        self.database = database

    def describe(self) -> Iterable[Metric]:
        return []  # collected on demand; nothing to register up front

    def collect(self) -> Iterator[Metric]:
        up = GaugeMetricFamily("inrush_metrics_database_up",
                               "1 when the per-experiment gauges could be read from the "
                               "database at this scrape, 0 when not")
        try:
            families = self._families()
        except SQLAlchemyError:
            logger.exception("reading per-experiment metrics failed")
            up.add_metric([], 0)
            yield up
            return
        up.add_metric([], 1)
        yield up
        yield from families

    def _families(self) -> list[Metric]:
        open_incidents = GaugeMetricFamily(
            "inrush_open_incidents", "Incidents not yet resolved (open or acknowledged)",
            labels=["experiment"])
        open_alerts = GaugeMetricFamily(
            "inrush_open_alerts", "Alerts not yet resolved (open or acknowledged)",
            labels=["experiment"])
        p_value = GaugeMetricFamily(
            "inrush_srm_p_value", "Whole-period sample ratio mismatch p-value (Pearson "
            "chi-square) of the latest diagnosis", labels=["experiment"])
        flagged = GaugeMetricFamily(
            "inrush_flagged_days", "Days flagged at the alert level by the latest diagnosis",
            labels=["experiment"])
        last_day = GaugeMetricFamily(
            "inrush_last_data_date_seconds", "Last day with units in the latest diagnosis, as "
            "unix seconds of its midnight UTC", labels=["experiment"])
        with self.database.sessions() as session:
            ids = list(session.scalars(select(Experiment.id).order_by(Experiment.id)))
            counts = dict(session.execute(
                select(Alert.experiment_id, func.count()).where(Alert.status.in_(UNRESOLVED))
                .group_by(Alert.experiment_id)).all())
            incidents = dict(session.execute(
                select(Incident.experiment_id, func.count())
                .where(Incident.status.in_(UNRESOLVED)).group_by(Incident.experiment_id)).all())
            latest = (select(DiagnosisSnapshot.experiment_id,
                             func.max(DiagnosisSnapshot.version).label("version"))
                      .group_by(DiagnosisSnapshot.experiment_id).subquery())
            documents: dict[str, dict[str, Any] | None] = dict(session.execute(
                select(DiagnosisSnapshot.experiment_id, DiagnosisSnapshot.document)
                .join(latest, (DiagnosisSnapshot.experiment_id == latest.c.experiment_id)
                      & (DiagnosisSnapshot.version == latest.c.version))).all())
        for experiment_id in ids:
            open_incidents.add_metric([experiment_id], incidents.get(experiment_id, 0))
            open_alerts.add_metric([experiment_id], counts.get(experiment_id, 0))
            document = documents.get(experiment_id)
            if not document:
                continue
            srm_p = (document.get("srm") or {}).get("p_value")
            if srm_p is not None:
                p_value.add_metric([experiment_id], float(srm_p))
            flagged.add_metric([experiment_id], sum(
                1 for d in document.get("flagged_days", []) if d.get("severity") == "alert"))
            if document.get("as_of"):
                last_day.add_metric([experiment_id],
                                    _date_seconds(dt.date.fromisoformat(document["as_of"])))
        return [open_incidents, open_alerts, p_value, flagged, last_day]


class _Exposition:
    """The collectors answered at one scrape (what ``generate_latest`` reads)."""

    def __init__(self, sources: list[Any]) -> None:
        self.sources = sources

    def collect(self) -> Iterator[Metric]:
        for source in self.sources:
            yield from source.collect()


def exposition(database: Database) -> bytes:
    """The text exposition: request metrics (all workers' in multiprocess mode) and the
    per-experiment gauges."""
    if os.environ.get(MULTIPROC_ENV):
        requests = CollectorRegistry()
        MultiProcessCollector(requests)
        sources: list[Any] = [requests]
    else:
        sources = [REQUEST_REGISTRY]
    sources.append(ExperimentCollector(database))
    return _generate_latest(_Exposition(sources))  # type: ignore[arg-type]


router = APIRouter(tags=["health"])


@router.get("/metrics", response_class=Response, responses={
    200: {"content": {CONTENT_TYPE_LATEST: {}}, "description": "Prometheus text exposition"},
    401: {"description": "INRUSH_METRICS_TOKEN is set and the bearer token is not it"}})
def metrics(request: Request) -> Response:
    """Prometheus metrics (authentication only when INRUSH_METRICS_TOKEN is set)."""
    token: SecretStr | None = request.app.state.metrics_token
    if token is not None:
        scheme, _, given = request.headers.get("authorization", "").partition(" ")
        if scheme.lower() != "bearer" or not hmac.compare_digest(
                given.strip().encode(), token.get_secret_value().encode()):
            raise ProblemError(401, "This endpoint needs Authorization: Bearer "
                               "<INRUSH_METRICS_TOKEN>.",
                               headers={"WWW-Authenticate": 'Bearer realm="inrush-metrics"'})
    return Response(exposition(request.app.state.database), media_type=CONTENT_TYPE_LATEST)


def install_metrics(app: FastAPI, settings: MetricsSettings | None = None) -> None:
    """Add the request-metrics middleware and ``GET /metrics`` to ``app``."""
    settings = settings or MetricsSettings()
    token = settings.metrics_token
    # An empty INRUSH_METRICS_TOKEN (e.g. a blank compose variable) means "no token".
    app.state.metrics_token = token if token and token.get_secret_value() else None
    app.add_middleware(RequestMetricsMiddleware)
    app.include_router(router)
