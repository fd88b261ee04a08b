"""Registered campaigns: validation, the pre-flight check, and what the diagnosis is told.

The check (:func:`detectors.campaigns.check_campaign`) runs on the experiment's current
allocation schedule. Without an ``expected_size`` the campaign's size is estimated from the
stored traffic of the days before the campaign starts (its own days would count its inflow);
when no such day has units, from all stored traffic; without any traffic, the excess is given
per 1,000 campaign arrivals.
"""

from __future__ import annotations

import datetime as dt
from collections.abc import Mapping
from typing import Any

from sqlalchemy import select
from sqlalchemy.orm import Session

from detectors import AllocationSchedule, InputError, Problem
from detectors.campaigns import Campaign as PlannedCampaign
from detectors.campaigns import CampaignCheck, check_campaign

from .db.campaign_models import Campaign
from .db.models import Experiment
from .traffic import ArmTraffic

MAX_CAMPAIGN_DAYS = 366


def planned_campaign(experiment: Experiment, *, name: str, source: str, start: dt.date,
                     end: dt.date, audience: Mapping[str, float],
                     expected_size: int | None) -> PlannedCampaign:
    """The detectors' campaign, validated against the experiment; every problem at once."""
    arms = list(experiment.arms)
    problems = [Problem(f"audience.{arm}", f"is not one of the experiment's arms {arms}")
                for arm in audience if arm not in arms]
    try:
        campaign = PlannedCampaign(name, source, start, end,
                                   {a: s for a, s in audience.items() if a in arms},
                                   expected_size)
    except InputError as error:
        problems.extend(p for p in error.problems
                        if not (problems and p.field == "audience" and "reaches no arm"
                                in p.message))
        raise InputError(problems) from None
    if campaign.end < experiment.start_date:
        problems.append(Problem("end", f"{campaign.end.isoformat()} is before the experiment's "
                                       f"start {experiment.start_date.isoformat()}: the "
                                       "campaign cannot bring units into it"))
    if campaign.days > MAX_CAMPAIGN_DAYS:
        problems.append(Problem("end", f"the campaign lasts {campaign.days} days; at most "
                                       f"{MAX_CAMPAIGN_DAYS} are accepted"))
    if problems:
        raise InputError(problems)
    return campaign


def as_planned(row: Campaign) -> PlannedCampaign:
    return PlannedCampaign(row.name, row.source, row.start_date, row.end_date,
                           dict(row.audience), row.expected_size)


def stored_campaigns(session: Session, experiment_id: str) -> list[Campaign]:
    return list(session.scalars(select(Campaign).where(Campaign.experiment_id == experiment_id)
                                .order_by(Campaign.start_date, Campaign.name)))


def known_campaigns(session: Session, experiment_id: str) -> list[PlannedCampaign]:
    """The registered campaigns, as :func:`detectors.diagnose` takes them."""
    return [as_planned(row) for row in stored_campaigns(session, experiment_id)]


def preflight(campaign: PlannedCampaign, experiment: Experiment,
              traffic: ArmTraffic | None) -> CampaignCheck:
    """The pre-flight check on the current schedule, sized from the traffic before it."""
    arms = list(experiment.arms)
    schedule = AllocationSchedule.from_steps(arms, experiment.allocation)
    basis = (traffic.before(campaign.start) or traffic) if traffic is not None else None
    return check_campaign(campaign, schedule, arms,
                          basis.counts if basis is not None else None)


def campaign_document(row: Campaign, experiment: Experiment,
                      traffic: ArmTraffic | None) -> dict[str, Any]:
    """A stored campaign with its check, as the API answers it."""
    return {
        "name": row.name, "source": row.source, "start": row.start_date.isoformat(),
        "end": row.end_date.isoformat(),
        "audience": {arm: float(row.audience.get(arm, 0.0)) for arm in experiment.arms},
        "expected_size": row.expected_size, "created_at": row.created_at.isoformat(),
        "check": preflight(as_planned(row), experiment, traffic).to_dict(),
    }


__all__ = ["MAX_CAMPAIGN_DAYS", "as_planned", "campaign_document", "known_campaigns",
           "planned_campaign", "preflight", "stored_campaigns"]
