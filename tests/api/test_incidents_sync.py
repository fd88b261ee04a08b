"""service.incidents.sync_incidents on SQLite and PostgreSQL: one incident per episode across
re-uploads and corrections, its lifecycle, and one notification per incident transition.

The rules under test are the service's bookkeeping (matching by day overlap, growth, automatic
resolution, reopening), so the diagnoses are stand-ins with hand-made episodes
(tests/episode_fixtures.py), not statistics.
"""

from __future__ import annotations

import datetime as dt
from collections import Counter
from collections.abc import Iterator
from typing import Any

import pytest
from sqlalchemy import func, select
from sqlalchemy.orm import Session

from detectors.episodes import ALLOCATION_STEP, SHORTFALL, Evidence
from service import incidents
from service.alerting import LATER_DATA
from service.analysis import latest_snapshot
from service.db.incident_models import Incident
from service.db.models import Alert, DiagnosisSnapshot, Experiment
from service.db.notify_models import Outbox
from service.db.session import Database
from service.http import entity_tag, json_safe
from service.incidents import IncidentChanges, served_document, sync_incidents
from service.notify.outbox import enqueue_for_changes
from tests.episode_fixtures import START, StandIn, day, episode

EXPERIMENT = "route-cards"
NOW = dt.datetime(2026, 11, 12, 6, 0, tzinfo=dt.UTC)


@pytest.fixture
def database(database_url: str) -> Iterator[Database]:
    db = Database(database_url)
    db.migrate()
    with db.sessions() as session:
        session.add(Experiment(id=EXPERIMENT, title="Route cards", start_date=START,
                               arms=["control", "cards"],
                               allocation=[{"from": START.isoformat(), "weights": [0.5, 0.5]}],
                               webhook_url="https://hooks.larkspur.example/inrush",
                               webhook_secret="whsec_bGFya3NwdXI="))
        session.commit()
    yield db
    db.dispose()


@pytest.fixture
def session(database: Database) -> Iterator[Session]:
    with database.sessions() as session:
        yield session


_clock = iter(range(1, 10_000))


def run(session: Session, diagnosis: StandIn | None, *, cause: str = "corrected data"
        ) -> IncidentChanges:
    """What refresh_diagnosis does after the detectors: keep the document as a snapshot when it
    differs, sync the incidents, queue their notifications; then commit."""
    now = NOW + dt.timedelta(minutes=next(_clock))
    experiment = session.get(Experiment, EXPERIMENT)
    assert experiment is not None
    document = json_safe(diagnosis.to_dict()) if diagnosis else None
    etag = entity_tag(document)
    latest = latest_snapshot(session, EXPERIMENT, documents=False)
    version = latest.version if latest else 0
    if latest is None or latest.etag != etag:
        version += 1
        session.add(DiagnosisSnapshot(
            experiment_id=EXPERIMENT, version=version, as_of=None,
            status=diagnosis.status if diagnosis else "no_data", document=document,
            series=None, etag=etag, series_etag=entity_tag(None), created_at=now))
        session.flush()
    changes = sync_incidents(session, experiment, diagnosis,  # type: ignore[arg-type]
                             diagnosis_version=version, now=now, cause=cause)
    enqueue_for_changes(session, experiment, changes, now=now)
    session.commit()
    return changes


def sent(session: Session) -> Counter[str]:
    return Counter(session.scalars(select(Outbox.event_type)))


def stored(session: Session) -> list[Incident]:
    session.expire_all()
    return list(session.scalars(select(Incident).order_by(Incident.id)))


def test_a_campaign_uploaded_day_by_day_is_one_incident(session: Session) -> None:
    first = run(session, StandIn(episode([3])), cause=LATER_DATA)
    assert len(first.opened) == 1
    # The second campaign day arrives: the same incident grows.
    grown = run(session, StandIn(episode([3, 4])), cause=LATER_DATA)
    assert grown.opened == [] and len(grown.updated) == 1
    incident, diff = grown.updated[0]
    assert diff["end"] == [day(3).isoformat(), day(4).isoformat()]
    # Later days without an imbalance: the episode keeps its two days, nothing is news; the
    # status of the diagnosis may move (alert to watch) without any change either.
    for status in ("alert", "watch", "alert"):
        assert not run(session, StandIn(episode([3, 4]), status=status), cause=LATER_DATA)
    [only] = stored(session)
    assert only.id == incident.id and only.status == "open" and only.active
    assert (only.start_date, only.end_date, only.units) == (day(3), day(4), 900.0)
    assert [e.action for e in only.events] == ["opened", "updated"]
    assert sent(session) == {"incident.opened": 1, "incident.updated": 1}


def test_re_sending_the_same_data_changes_nothing(session: Session) -> None:
    run(session, StandIn(episode([3, 4])))
    for _ in range(3):
        assert not run(session, StandIn(episode([3, 4])))
    assert len(stored(session)) == 1
    assert sent(session) == {"incident.opened": 1}


def test_updates_only_on_days_arm_shape_or_severity(session: Session) -> None:
    [opened] = run(session, StandIn(episode([3, 4], severity="watch"))).opened
    # A corrected count changes the units only: stored, but not news.
    assert not run(session, StandIn(episode([3, 4], units=700.0, severity="watch")))
    [refreshed] = stored(session)
    assert refreshed.units == 1400.0 and [e.action for e in refreshed.events] == ["opened"]
    changed = run(session, StandIn(episode([3, 4], units=700.0)))  # watch -> alert
    assert [diff for _, diff in changed.updated] == [{"severity": ["watch", "alert"]}]
    changed = run(session, StandIn(episode([3, 4], units=700.0, arm="control")))
    assert set(changed.updated[0][1]) == {"arm"}
    changed = run(session, StandIn(episode([3, 4], units=700.0, arm="control",
                                           shape=SHORTFALL)))
    assert set(changed.updated[0][1]) == {"shape"}
    assert [i.id for i in stored(session)] == [opened.id]
    assert sent(session) == {"incident.opened": 1, "incident.updated": 3}
    outbox = session.scalars(select(Outbox).where(Outbox.event_type == "incident.updated")
                             .order_by(Outbox.id)).all()
    assert outbox[0].payload["data"]["changes"] == {"severity": ["watch", "alert"]}


def test_corrected_data_resolves_once_with_a_reason(session: Session) -> None:
    [opened] = run(session, StandIn(episode([3, 4]))).opened
    gone = run(session, StandIn())
    assert [i.id for i in gone.resolved] == [opened.id]
    [incident] = stored(session)
    assert incident.status == "resolved" and not incident.active
    assert incident.resolved_by == "inrush"
    assert incident.resolution is not None
    assert incident.resolution.startswith("corrected data no longer supports it: ")
    assert "no imbalance episode" in incident.resolution
    assert not run(session, StandIn())  # resolved once
    assert sent(session) == {"incident.opened": 1, "incident.resolved": 1}
    resolved = session.scalars(select(Outbox).where(
        Outbox.event_type == "incident.resolved")).one()
    assert resolved.payload["data"]["incident"]["resolution"] == incident.resolution


def test_days_that_come_back_reopen_the_same_incident(session: Session) -> None:
    [opened] = run(session, StandIn(episode([3, 4]))).opened
    run(session, StandIn())
    back = run(session, StandIn(episode([4, 5])))
    assert [i.id for i in back.opened] == [opened.id]
    [incident] = stored(session)
    assert incident.status == "open" and incident.resolution is None
    assert [e.action for e in incident.events] == ["opened", "resolved", "reopened"]
    assert sent(session) == {"incident.opened": 2, "incident.resolved": 1}


def test_a_separate_episode_opens_a_separate_incident(session: Session) -> None:
    run(session, StandIn(episode([3, 4])))
    both = run(session, StandIn(episode([3, 4]), episode([12, 13], source="push")))
    assert len(both.opened) == 1 and both.opened[0].start_date == day(12)
    assert len(stored(session)) == 2
    # A one-day gap still counts as the same episode (day 5 missing, day 6 flagged).
    assert not run(session, StandIn(episode([3, 4]), episode([12, 13], source="push"))).opened
    joined = run(session, StandIn(episode([3, 4, 6]), episode([12, 13], source="push")))
    assert joined.opened == [] and len(joined.updated) == 1


def test_two_incidents_joined_by_corrected_data(session: Session) -> None:
    first, second = run(session, StandIn(episode([3, 4]), episode([8, 9, 10]))).opened
    joined = run(session, StandIn(episode(list(range(3, 11)))))
    # The larger overlap keeps its incident; the other is resolved, pointing to it.
    assert [i.id for i, _ in joined.updated] == [second.id]
    assert [i.id for i in joined.resolved] == [first.id]
    resolution = joined.resolved[0].resolution or ""
    assert f"part of incident {second.id}" in resolution


def test_a_person_resolves_and_no_second_incident_opens(session: Session) -> None:
    [opened] = run(session, StandIn(episode([3, 4]))).opened
    incidents.resolve(session, opened, "analyst", "campaign known, arms re-balanced")
    session.commit()
    # The data still shows the episode: it stays this incident, resolved, without a message.
    assert not run(session, StandIn(episode([3, 4], units=500.0)))
    [incident] = stored(session)
    assert incident.status == "resolved" and incident.resolved_by == "analyst"
    # It grows by a new day: something is still pushing units in, so it is reopened.
    again = run(session, StandIn(episode([3, 4, 5])))
    assert [i.id for i in again.opened] == [opened.id]
    assert stored(session)[0].status == "open"
    assert sent(session) == {"incident.opened": 2}


def test_lifecycle_steps(session: Session) -> None:
    [opened] = run(session, StandIn(episode([3, 4]))).opened
    incidents.acknowledge(session, opened, "analyst")
    with pytest.raises(incidents.TransitionError):
        incidents.acknowledge(session, opened, "analyst")
    incidents.resolve(session, opened, "analyst")
    with pytest.raises(incidents.TransitionError):
        incidents.resolve(session, opened, "analyst")
    session.commit()
    [incident] = stored(session)
    assert [(e.action, e.from_status, e.to_status, e.actor) for e in incident.events] == [
        ("opened", None, "open", "inrush"), ("acknowledged", "open", "acknowledged", "analyst"),
        ("resolved", "acknowledged", "resolved", "analyst")]
    # People's steps are not sent: the owner made them.
    assert sent(session) == {"incident.opened": 1}


def test_findings_are_the_evidence_and_never_notify(session: Session) -> None:
    source = Evidence("skewed_source", "newsletter", "alert", "Source newsletter is skewed",
                      {"source": "newsletter"})
    [opened] = run(session, StandIn(episode([3, 4], extra_evidence=[source]))).opened
    alerts = session.scalars(select(Alert).order_by(Alert.kind, Alert.key)).all()
    assert [(a.kind, a.key) for a in alerts] == [
        ("skewed_day", day(3).isoformat()), ("skewed_day", day(4).isoformat()),
        ("skewed_source", "newsletter")]
    assert {a.incident_id for a in alerts} == {opened.id}
    assert all(r.incident_id == opened.id and r.alert_id is None
               for r in session.scalars(select(Outbox)))
    assert session.scalar(select(func.count()).select_from(Outbox)) == 1


def test_campaigns_explain_inflows_only(session: Session) -> None:
    [opened] = run(session, StandIn(episode([3, 4], campaigns=["autumn-trails"]))).opened
    document = incidents.incident_document(opened)
    assert document["campaigns"] == ["autumn-trails"]
    assert document["explained_by"].startswith("Explained by the registered campaign "
                                               "autumn-trails")
    outbox = session.scalars(select(Outbox)).one()
    assert outbox.payload["data"]["incident"]["campaigns"] == ["autumn-trails"]
    assert outbox.payload["data"]["incident"]["explained_by"] == document["explained_by"]
    run(session, StandIn(episode([3, 4], campaigns=["autumn-trails"], shape=ALLOCATION_STEP)))
    explained = incidents.incident_document(stored(session)[0])["explained_by"]
    assert "does not explain it" in explained


def test_the_served_document_and_its_tag_follow_the_lifecycle(session: Session) -> None:
    run(session, StandIn(episode([3, 4]), episode([12])))
    snapshot = latest_snapshot(session, EXPERIMENT)
    assert snapshot is not None
    document, tag = served_document(session, snapshot)
    assert document is not None and tag != snapshot.etag and tag == snapshot.served_etag
    first, second = stored(session)
    assert [(i["id"], i["status"], i["start"]) for i in document["incidents"]] == [
        (first.id, "open", day(3).isoformat()), (second.id, "open", day(12).isoformat())]
    assert snapshot.document is not None and "id" not in snapshot.document["incidents"][0]
    incidents.acknowledge(session, second, "analyst")
    session.commit()
    session.expire_all()
    snapshot = latest_snapshot(session, EXPERIMENT)
    assert snapshot is not None
    acknowledged, new_tag = served_document(session, snapshot)
    assert acknowledged is not None and new_tag != tag and new_tag == snapshot.served_etag
    assert acknowledged["incidents"][1]["status"] == "acknowledged"
    # A later diagnosis: the earlier version is served as computed, under its own tag.
    run(session, StandIn(episode([3, 4, 5]), episode([12])))
    earlier = session.scalars(select(DiagnosisSnapshot).where(
        DiagnosisSnapshot.version == snapshot.version)).one()
    assert served_document(session, earlier) == (earlier.document, earlier.etag)


def test_no_data_resolves_with_its_own_reason(session: Session) -> None:
    run(session, StandIn(episode([3])))
    [resolved] = run(session, None).resolved
    assert "no imbalance episode" in (resolved.resolution or "")


def _events(session: Session) -> list[tuple[Any, ...]]:
    return [(e.event_type, e.incident_id) for e in session.scalars(
        select(Outbox).order_by(Outbox.id))]
