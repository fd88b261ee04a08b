"""/v1/experiments/{id}/campaigns: register outreach campaigns and check them before they run."""

from __future__ import annotations

from fastapi import APIRouter, Depends, Request
from sqlalchemy import select
from sqlalchemy.exc import IntegrityError
from sqlalchemy.orm import Session

from ..analysis import NO_DATA, bump_data_version, latest_snapshot, rediagnose
from ..auth import require_read, require_write
from ..campaigns import campaign_document, planned_campaign, stored_campaigns
from ..db.campaign_models import Campaign
from ..db.models import utcnow
from ..db.session import get_session
from ..problems import ProblemError
from ..schemas.campaigns import CampaignCreate, CampaignCreated, CampaignList, CampaignOut
from ..schemas.common import problem_responses
from ..schemas.observations import AlertCounts, DiagnosisRef
from ..tokens import Principal
from ..traffic import stored_arm_traffic
from .common import experiment_url, get_experiment, lock_experiment

router = APIRouter(prefix="/v1/experiments/{experiment_id}/campaigns", tags=["campaigns"])

# Named in the reason when the re-run diagnosis resolves an alert.
NEW_CAMPAIGN = "the registered campaign"


@router.post("", status_code=201, response_model=CampaignCreated,
             responses=problem_responses(400, 401, 403, 404, 409, 413, 422))
def register_campaign(experiment_id: str, body: CampaignCreate, request: Request,
                      session: Session = Depends(get_session),
                      _: Principal = Depends(require_write)) -> CampaignCreated:
    """Register a planned or past campaign and check whether it will break the sample ratio.

    ``check.warnings`` is empty when the campaign reaches the same share of every arm; otherwise
    it says how it departs from the allocation, the expected excess units per arm and day (from
    ``expected_size``, or estimated from the experiment's recent traffic), and the fix: target
    the same share of every arm, or log who would have been targeted in every arm and analyse
    by intent to treat. The diagnosis is re-run so that flagged days on the campaign's days and
    source name it. 409 when the experiment has a campaign of that name; 422 names each invalid
    field and nothing is written.
    """
    experiment = lock_experiment(session, experiment_id)
    planned = planned_campaign(experiment, name=body.name, source=body.source,
                               start=body.start, end=body.end, audience=body.audience,
                               expected_size=body.expected_size)
    if session.scalar(select(Campaign.id).where(Campaign.experiment_id == experiment_id,
                                                Campaign.name == planned.name)) is not None:
        raise _exists(experiment_id, planned.name)
    row = Campaign(experiment_id=experiment_id, name=planned.name, source=planned.source,
                   start_date=planned.start, end_date=planned.end,
                   audience={arm: planned.audience.get(arm, 0.0) for arm in experiment.arms},
                   expected_size=planned.expected_size, created_at=utcnow())
    session.add(row)
    try:
        session.flush()
    except IntegrityError:  # the lock serialises writers; this is the database's last word
        session.rollback()
        raise _exists(experiment_id, planned.name) from None
    diagnosis, alerts = None, AlertCounts(opened=0, resolved=0)
    diagnosed = latest_snapshot(session, experiment_id) is not None
    bump_data_version(session, experiment)
    session.commit()
    if diagnosed:
        refresh = rediagnose(session, experiment_id, cause=NEW_CAMPAIGN)
        snapshot = refresh.snapshot
        diagnosis = DiagnosisRef(
            status=None if snapshot.status == NO_DATA else snapshot.status,
            as_of=snapshot.as_of.isoformat() if snapshot.as_of else None,
            version=snapshot.version,
            url=experiment_url(request, experiment_id, "/diagnosis"))
        alerts = AlertCounts(opened=len(refresh.alerts.opened),
                             resolved=len(refresh.alerts.resolved))
    document = campaign_document(row, experiment, stored_arm_traffic(session, experiment))
    session.commit()
    return CampaignCreated(**document, diagnosis=diagnosis, alerts=alerts)


@router.get("", response_model=CampaignList, responses=problem_responses(401, 403, 404))
def list_campaigns(experiment_id: str, session: Session = Depends(get_session),
                   _: Principal = Depends(require_read)) -> CampaignList:
    """The experiment's campaigns by start date, each with its check on the current
    allocation schedule and stored traffic."""
    experiment = get_experiment(session, experiment_id)
    traffic = stored_arm_traffic(session, experiment)
    return CampaignList(items=[CampaignOut(**campaign_document(row, experiment, traffic))
                               for row in stored_campaigns(session, experiment_id)])


def _exists(experiment_id: str, name: str) -> ProblemError:
    return ProblemError(409, f"Experiment {experiment_id!r} has a campaign named {name!r} "
                        "already; choose another name.")
