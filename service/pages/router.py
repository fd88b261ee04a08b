"""``GET /experiments`` and ``GET /experiments/{id}``: the status pages.

A read token is taken from ``Authorization: Bearer``, from the ``inrush_token`` cookie, or
once from ``?token=``: that answer sets the cookie (HttpOnly, SameSite=Strict, Secure over
https) and redirects to the same page without the token in the address.
"""

from __future__ import annotations

from typing import Annotated, Any
from urllib.parse import urlencode

from fastapi import APIRouter, Depends, Query, Request
from fastapi.responses import HTMLResponse, RedirectResponse, Response
from sqlalchemy import func, select
from sqlalchemy.orm import Session

from detectors import InputError, ObservationTable
from detectors.contamination import cells_from_document
from detectors.errors import UndefinedEstimateError
from detectors.honest import default_effect

from ..analysis import latest_snapshot, latest_summaries, load_table, schedule_for
from ..campaigns import campaign_document, stored_campaigns
from ..db.models import Alert, Experiment
from ..db.session import get_session
from ..http import json_safe
from ..incidents import served_document
from ..routers.alerts import alert_out
from ..routers.common import base_url
from ..settings import Settings
from ..tokens import Principal, Scope, authenticate
from ..traffic import ArmTraffic, sensitivity_document, thresholds_of
from . import assets
from .export import series_csv
from .render import (
    pick_metric,
    render_experiment_page,
    render_index_page,
    render_not_found,
    render_token_page,
)

COOKIE = "inrush_token"
COOKIE_PATH = "/experiments"
UNRESOLVED = ("open", "acknowledged")
PAGE_HEADERS = {"Cache-Control": "private, no-store", "X-Content-Type-Options": "nosniff",
                "Referrer-Policy": "no-referrer",
                # Scripts only from this origin's /static (no inline code: the page's data
                # sits in a JSON block, which is not executed); styles may be inline.
                "Content-Security-Policy": "default-src 'none'; script-src 'self'; "
                                           "style-src 'self' 'unsafe-inline'; "
                                           "img-src 'self' data: blob:; form-action 'self'; "
                                           "base-uri 'none'; frame-ancestors 'none'"}

router = APIRouter(tags=["pages"], include_in_schema=False)
router.include_router(assets.router)


def _bearer(request: Request) -> str | None:
    scheme, _, value = request.headers.get("authorization", "").partition(" ")
    return (value.strip() or None) if scheme.lower() == "bearer" else None


def _principal(request: Request, session: Session, token: str | None) -> Principal | None:
    if not token:
        return None
    settings: Settings = request.app.state.settings
    admin = settings.admin_token.get_secret_value() if settings.admin_token else None
    principal = authenticate(session, token, admin)
    return principal if principal is not None and principal.scope >= Scope.read else None


def _without_token(request: Request) -> str:
    query = [(k, v) for k, v in request.query_params.multi_items() if k != "token"]
    return request.url.path + (f"?{urlencode(query)}" if query else "")


def _gate(request: Request, session: Session, token: str | None) -> Response | None:
    """``None`` when the reader may see the page; else the answer to send instead."""
    if token is not None:  # ?token= : check it, keep it in a cookie, drop it from the URL
        if _principal(request, session, token) is None:
            return _ask(request, "That token is unknown, revoked or lacks read scope.")
        response = RedirectResponse(_without_token(request), status_code=303,
                                    headers={"Cache-Control": "no-store"})
        response.set_cookie(COOKIE, token, httponly=True, samesite="strict", path=COOKIE_PATH,
                            secure=request.url.scheme == "https")
        return response
    for candidate in (_bearer(request), request.cookies.get(COOKIE)):
        if candidate and _principal(request, session, candidate) is not None:
            return None
    if request.cookies.get(COOKIE):
        response = _ask(request, "The saved token is no longer accepted.")
        response.delete_cookie(COOKIE, path=COOKIE_PATH)
        return response
    return _ask(request, "This page shows experiment data; open it with a token that has read "
                         "scope.")


def _ask(request: Request, reason: str) -> HTMLResponse:
    return HTMLResponse(render_token_page(reason=reason, next_path=request.url.path),
                        status_code=401, headers={**PAGE_HEADERS,
                                                  "WWW-Authenticate": 'Bearer realm="inrush"'})


TokenQuery = Annotated[str | None, Query(description="read token, once; kept in a cookie")]
MetricQuery = Annotated[str | None, Query(max_length=200,
                                          description="metric to chart and estimate")]


@router.get("/experiments", response_class=HTMLResponse)
def index_page(request: Request, session: Session = Depends(get_session),
               token: TokenQuery = None) -> Response:
    blocked = _gate(request, session, token)
    if blocked is not None:
        return blocked
    experiments = list(session.scalars(select(Experiment).order_by(Experiment.id)))
    summaries = latest_summaries(session, [e.id for e in experiments])
    counts = dict(session.execute(
        select(Alert.experiment_id, func.count()).where(Alert.status.in_(UNRESOLVED))
        .group_by(Alert.experiment_id)).all())
    rows = []
    for experiment in experiments:
        summary = summaries.get(experiment.id)
        rows.append({"id": experiment.id, "title": experiment.title,
                     "start_date": experiment.start_date.isoformat(),
                     "status": summary.status if summary else "no_data",
                     "as_of": summary.as_of.isoformat() if summary and summary.as_of else None,
                     "open_alerts": counts.get(experiment.id, 0)})
    return HTMLResponse(render_index_page(rows), headers=PAGE_HEADERS)


@router.get("/experiments/{experiment_id}", response_class=HTMLResponse)
def experiment_page(experiment_id: str, request: Request,
                    session: Session = Depends(get_session),
                    token: TokenQuery = None, metric: MetricQuery = None) -> Response:
    blocked = _gate(request, session, token)
    if blocked is not None:
        return blocked
    experiment = session.get(Experiment, experiment_id)
    if experiment is None:
        return HTMLResponse(render_not_found(experiment_id), status_code=404,
                            headers=PAGE_HEADERS)
    snapshot = latest_snapshot(session, experiment_id)
    # The incidents with their stored lifecycle fields, as the diagnosis endpoint serves them.
    document = served_document(session, snapshot)[0] if snapshot else None
    series = snapshot.series if snapshot else None
    alerts = session.scalars(select(Alert).where(Alert.experiment_id == experiment_id,
                                                 Alert.status.in_(UNRESOLVED))
                             .order_by(Alert.id.desc()))
    alert_rows = [alert_out(request, a).model_dump(mode="json") for a in alerts]
    chosen, _ = pick_metric(list((series or {}).get("metrics", [])), metric)
    table = load_table(session, experiment)  # cached per data version: read once per page
    effect, problem = _effect(table, experiment, document, chosen)
    traffic = (ArmTraffic.from_table(table, schedule_for(experiment))
               if table is not None else None)
    campaigns = [campaign_document(row, experiment, traffic)
                 for row in stored_campaigns(session, experiment_id)]
    alpha, max_window = thresholds_of(document)
    sensitivity = (sensitivity_document(traffic, alpha=alpha, max_window=max_window)
                   if traffic is not None else None)
    pull = _pull_summary(session, experiment_id)
    base = base_url(request)
    links = {"diagnosis (JSON)": f"{base}/v1/experiments/{experiment_id}/diagnosis",
             "daily series (JSON)": f"{base}/v1/experiments/{experiment_id}/series",
             "incidents (JSON)": f"{base}/v1/experiments/{experiment_id}/incidents",
             "alerts (JSON)": f"{base}/v1/alerts?experiment={experiment_id}",
             "campaigns (JSON)": f"{base}/v1/experiments/{experiment_id}/campaigns",
             "sensitivity (JSON)": f"{base}/v1/experiments/{experiment_id}/sensitivity"}
    if pull is not None:
        links["daily pull (JSON)"] = f"{base}/v1/experiments/{experiment_id}/pull"
    html = render_experiment_page(
        experiment={"id": experiment.id, "title": experiment.title, "arms": experiment.arms,
                    "start_date": experiment.start_date.isoformat()},
        diagnosis=document, series=series, alerts=alert_rows, reweight=effect,
        reweight_problem=problem, diagnosis_version=snapshot.version if snapshot else None,
        links=links, campaigns=campaigns, sensitivity=sensitivity, metric=metric,
        refreshed_at=snapshot.created_at.isoformat() if snapshot else None,
        csv_href=f"/experiments/{experiment_id}/series.csv",
        series_tag=snapshot.series_etag if snapshot else None, pull=pull)
    return HTMLResponse(html, headers=PAGE_HEADERS)


@router.get("/experiments/{experiment_id}/series.csv")
def series_csv_file(experiment_id: str, request: Request,
                    session: Session = Depends(get_session)) -> Response:
    """The daily series of the latest diagnosis as CSV (the status page's download)."""
    blocked = _gate(request, session, None)
    if blocked is not None:
        return blocked
    if session.get(Experiment, experiment_id) is None:
        return HTMLResponse(render_not_found(experiment_id), status_code=404,
                            headers=PAGE_HEADERS)
    snapshot = latest_snapshot(session, experiment_id)
    series = snapshot.series if snapshot else None
    text = series_csv(series or {})
    return Response(text, media_type="text/csv; charset=utf-8", headers={
        "Cache-Control": "private, no-store", "X-Content-Type-Options": "nosniff",
        "Content-Disposition": f'attachment; filename="{experiment_id}-series.csv"'})


def _pull_summary(session: Session, experiment_id: str) -> dict[str, Any] | None:
    """The latest pull run, or ``None`` without a pull config or any run."""
    from ..db.pull_models import PullSchedule
    from ..routers.pulls import recent_runs

    runs = recent_runs(session, experiment_id, limit=1)
    if not runs and session.get(PullSchedule, experiment_id) is None:
        return None
    return {"last": runs[0].model_dump(mode="json") if runs else None}


def _effect(table: ObservationTable | None, experiment: Experiment,
            document: dict[str, Any] | None, metric: str | None
            ) -> tuple[dict[str, Any] | None, str | None]:
    """The effect on ``metric`` as the reweight endpoint answers a call without options (the
    honest default that leaves the incidents' cells out, with bounds); or why there is none."""
    if document is None or metric is None:
        return None, "No metric has been uploaded, so there is no effect to estimate."
    if table is None:
        return None, "No observations are stored."
    try:
        answer = default_effect(table, metric, cells_from_document(document),
                                schedule_for(experiment),
                                incidents=len(document.get("incidents") or ()))
    except (UndefinedEstimateError, InputError) as error:
        return None, f"The re-weighted estimate is undefined: {error}"
    return json_safe(answer), None
