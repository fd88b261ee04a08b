"""Migration 0004 on SQLite and PostgreSQL with stored findings, notifications and delivery
attempts from before incidents: the findings are grouped into incidents and linked to them,
nothing else is lost, and the next diagnosis continues the carried-over incidents."""

from __future__ import annotations

import datetime as dt
from collections.abc import Iterator
from typing import Any

import pytest
import sqlalchemy as sa
from sqlalchemy.orm import Session

from service.db.incident_models import Incident
from service.db.models import Alert, Experiment
from service.db.session import Database
from service.incidents import sync_incidents
from tests.episode_fixtures import StandIn, day, episode

T0 = dt.datetime(2026, 11, 10, 6, 0, tzinfo=dt.UTC)


def when(hours: int) -> dt.datetime:
    return T0 + dt.timedelta(hours=hours)


def finding(experiment: str, kind: str, key: str, *, status: str = "open",
            severity: str = "alert", active: bool = True, detail: dict[str, Any] | None = None,
            hours: int = 0) -> dict[str, Any]:
    return {"experiment_id": experiment, "kind": kind, "key": key, "status": status,
            "severity": severity, "title": f"{kind} {key}", "detail": detail or {},
            "active": active, "opened_at": when(hours), "last_seen_at": when(hours + 1),
            "acknowledged_at": when(hours + 2) if status != "open" else None,
            "acknowledged_by": "analyst" if status != "open" else None,
            "resolved_at": when(hours + 3) if status == "resolved" else None,
            "resolved_by": "inrush" if status == "resolved" else None,
            "resolution_reason": "later data no longer supports it" if status == "resolved"
            else None, "updated_at": when(hours + 1)}


def skewed_day(date: dt.date, units: float, **kwargs: Any) -> dict[str, Any]:
    return finding("route-cards", "skewed_day", date.isoformat(), detail={
        "date": date.isoformat(), "inflow_arm": "cards",
        "excess": {"control": -units, "cards": units},
        "sources": [{"source": "newsletter", "share_of_excess": 1.0, "excess": units}],
        "campaigns": ["autumn-trails"]}, **kwargs)


# These tests start from revision 0003 and migrate forward themselves.
pytestmark = pytest.mark.empty_database


@pytest.fixture
def database(database_url: str) -> Iterator[Database]:
    db = Database(database_url)
    db.migrate("0003")
    yield db
    db.dispose()


def seed_0003(database: Database) -> dict[str, int]:
    """Rows as revision 0003 stored them; the ids of the findings by name."""
    tables = sa.MetaData()
    tables.reflect(bind=database.engine)
    t = tables.tables
    ids: dict[str, int] = {}
    with database.engine.begin() as connection:
        for experiment, start in (("route-cards", day(0)), ("ridge-maps", day(3))):
            connection.execute(t["experiments"].insert().values(
                id=experiment, title=experiment, start_date=start, arms=["control", "cards"],
                allocation=[{"from": start.isoformat(), "weights": [0.5, 0.5]}],
                webhook_url="https://hooks.larkspur.example/inrush", webhook_secret=None,
                created_at=T0, updated_at=T0))
            connection.execute(t["diagnosis_snapshots"].insert().values(
                experiment_id=experiment, version=3, as_of=day(30), status="alert",
                document={"status": "alert"}, series={}, etag='"a"', series_etag='"b"',
                created_at=T0))
        rows = {
            "first": skewed_day(day(14), 448.0),
            "second": skewed_day(day(15), 447.0, status="acknowledged"),
            "later": skewed_day(day(21), 300.0),
            "old": skewed_day(day(2), 250.0, status="resolved", active=False),
            "source": finding("route-cards", "skewed_source", "newsletter"),
            "srm": finding("route-cards", "srm", "overall"),
            "shift": finding("route-cards", "share_changepoint", day(14).isoformat(),
                             severity="watch", detail={"date": day(14).isoformat()}),
            "outcome": finding("route-cards", "engagement_changepoint",
                               f"routes_saved:cards:{day(26).isoformat()}", severity="watch",
                               detail={"date": day(26).isoformat()}),
            "steady": finding("ridge-maps", "srm", "overall", status="acknowledged", detail={
                "observed": {"control": 50200, "cards": 49000},
                "expected": {"control": 49600.0, "cards": 49600.0}}),
        }
        for name, row in rows.items():
            ids[name] = connection.execute(t["alerts"].insert().values(**row)
                                           .returning(t["alerts"].c.id)).scalar_one()
        connection.execute(t["alert_events"].insert().values(
            alert_id=ids["first"], at=T0, action="opened", from_status=None, to_status="open",
            actor="inrush", note=None, diagnosis_version=3))
        outbox = connection.execute(t["notify_outbox"].insert().values(
            alert_id=ids["first"], experiment_id="route-cards", event_type="alert.opened",
            event_id="inrush-alert-1-t1", payload={"type": "alert.opened"}, status="delivered",
            attempts=1, next_attempt_at=None, created_at=T0, delivered_at=T0)
            .returning(t["notify_outbox"].c.id)).scalar_one()
        connection.execute(t["notify_delivery_attempts"].insert().values(
            outbox_id=outbox, attempt=1, started_at=T0, duration_ms=12, status_code=200))
    return ids


def test_stored_findings_become_incidents(database: Database) -> None:
    ids = seed_0003(database)
    database.migrate()
    with Session(database.engine) as session:
        incidents = {(i.experiment_id, i.start_date): i
                     for i in session.scalars(sa.select(Incident))}
        assert set(incidents) == {("route-cards", day(14)), ("route-cards", day(21)),
                                  ("ridge-maps", day(3))}
        campaign = incidents["route-cards", day(14)]
        assert (campaign.shape, campaign.arm, campaign.end_date) == ("inflow", "cards", day(15))
        assert campaign.units == 895.0 and campaign.severity == "alert" and campaign.material
        # One of its findings is still open: so is the incident.
        assert campaign.status == "open" and campaign.active
        assert campaign.acknowledged_at is None
        assert campaign.episode["campaigns"] == ["autumn-trails"]
        assert campaign.episode["sources"][0]["source"] == "newsletter"
        assert campaign.diagnosis_version == 3 and campaign.position is None
        assert [e.action for e in campaign.events] == ["opened"]
        later = incidents["route-cards", day(21)]
        assert later.units == 300.0 and later.status == "open"
        steady = incidents["ridge-maps", day(3)]
        # The whole-period mismatch alone: a steady offset from the first day, told as the
        # units moved into the arm over plan.
        assert (steady.shape, steady.arm, steady.units) == ("persistent", "control", 600.0)
        assert steady.end_date == day(30) and steady.status == "acknowledged"
        assert steady.acknowledged_by == "analyst"
        assert [e.action for e in steady.events] == ["opened", "acknowledged"]

        links = {a.id: a.incident_id for a in session.scalars(sa.select(Alert))}
        assert {links[ids[n]] for n in ("first", "second", "source", "srm", "shift")} == {
            campaign.id}
        assert links[ids["later"]] == later.id and links[ids["steady"]] == steady.id
        # Outcome context and resolved history stay findings without an incident.
        assert links[ids["outcome"]] is None and links[ids["old"]] is None
        # Nothing else changed: the finding's history, its notification and delivery.
        assert session.execute(sa.text("SELECT count(*) FROM alert_events")).scalar() == 1
        outbox = session.execute(sa.text(
            "SELECT alert_id, incident_id, status FROM notify_outbox")).one()
        assert tuple(outbox) == (ids["first"], None, "delivered")
        assert session.execute(sa.text(
            "SELECT count(*) FROM notify_delivery_attempts")).scalar() == 1

        # The next diagnosis continues the carried-over incident instead of opening another.
        experiment = session.get(Experiment, "route-cards")
        assert experiment is not None
        changes = sync_incidents(session, experiment, StandIn(episode([14, 15, 16])),
                                 diagnosis_version=None)
        assert changes.opened == []
        assert [(i.id, sorted(diff)) for i, diff in changes.updated] == [
            (campaign.id, ["days", "end", "units"])]
        assert [i.id for i in changes.resolved] == [later.id]
        session.commit()
