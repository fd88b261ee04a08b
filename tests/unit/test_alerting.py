"""service.alerting.sync_alerts on stand-in diagnoses whose findings the test chooses.

The rule under test is the service's own bookkeeping (one alert per finding, automatic
resolution with its cause, reopening), so the diagnoses are stand-ins, not statistics.
"""

from __future__ import annotations

import datetime as dt
from collections.abc import Iterator
from pathlib import Path
from types import SimpleNamespace
from typing import Any

import pytest
from sqlalchemy import select
from sqlalchemy.orm import Session

from detectors import DiagnosisConfig, Finding
from service import alerting
from service.db.models import Alert, Experiment
from service.db.session import Database

NOW = dt.datetime(2026, 11, 12, 6, 0, tzinfo=dt.UTC)


def stand_in(*findings: Finding) -> Any:
    """What sync_alerts reads of a Diagnosis: findings and, for reasons, the summaries."""
    return SimpleNamespace(
        findings=lambda: findings, config=DiagnosisConfig(),
        srm=SimpleNamespace(p_value=0.2, sequential_p_value=0.4),
        flagged_days=(), sources=(SimpleNamespace(source="newsletter", adjusted_p_value=0.3,
                                                         adjusted_sequential_p_value=0.3),))


def day(date: str, title: str = "cards got +448 units over plan") -> Finding:
    return Finding("skewed_day", date, "alert", f"{date}: {title}", {"date": date})


SOURCE = Finding("skewed_source", "newsletter", "alert", "Source newsletter is skewed", {})


@pytest.fixture
def session(tmp_path: Path) -> Iterator[Session]:
    database = Database(f"sqlite:///{tmp_path / 'alerts.db'}")
    database.migrate()
    with database.sessions() as session:
        session.add(Experiment(id="route-cards", title="t", start_date=dt.date(2026, 10, 26),
                               arms=["control", "cards"],
                               allocation=[{"from": "2026-10-26", "weights": [0.5, 0.5]}]))
        session.commit()
        yield session
    database.dispose()


def experiment(session: Session) -> Experiment:
    found = session.get(Experiment, "route-cards")
    assert found is not None
    return found


def stored(session: Session) -> dict[tuple[str, str], Alert]:
    return {(a.kind, a.key): a for a in session.scalars(select(Alert))}


def test_each_finding_opens_one_alert_and_repeats_only_refresh_it(session: Session) -> None:
    changes = alerting.sync_alerts(session, experiment(session),
                                   stand_in(day("2026-11-09"), SOURCE), now=NOW)
    assert sorted(a.key for a in changes.opened) == ["2026-11-09", "newsletter"]
    later = NOW + dt.timedelta(days=1)
    again = alerting.sync_alerts(session, experiment(session),
                                 stand_in(day("2026-11-09", "cards got +450"), SOURCE), now=later)
    assert again.opened == [] and again.resolved == []
    alerts = stored(session)
    assert len(alerts) == 2
    alert = alerts[("skewed_day", "2026-11-09")]
    assert alert.title == "2026-11-09: cards got +450"
    assert (alert.opened_at, alert.last_seen_at) == (NOW, later)
    assert [e.action for e in alert.events] == ["opened"]


@pytest.mark.parametrize("cause", [alerting.CORRECTED_DATA, alerting.LATER_DATA,
                                   alerting.NEW_ALLOCATION])
def test_a_vanished_finding_is_resolved_by_the_service_naming_the_cause(
        session: Session, cause: str) -> None:
    alerting.sync_alerts(session, experiment(session), stand_in(day("2026-11-09"), SOURCE))
    changes = alerting.sync_alerts(session, experiment(session), stand_in(SOURCE), cause=cause)
    assert [a.key for a in changes.resolved] == ["2026-11-09"]
    alert = stored(session)[("skewed_day", "2026-11-09")]
    assert (alert.status, alert.resolved_by, alert.active) == ("resolved", "inrush", False)
    assert alert.resolution_reason == (
        f"{cause} no longer supports it: no window of days containing 2026-11-09 reaches the "
        "alert level p < 0.002 any more")
    assert stored(session)[("skewed_source", "newsletter")].status == "open"


def test_reasons_describe_what_the_new_diagnosis_says(session: Session) -> None:
    srm = Finding("srm", "overall", "alert", "SRM", {})
    alerting.sync_alerts(session, experiment(session), stand_in(srm, SOURCE))
    alerting.sync_alerts(session, experiment(session), stand_in())
    reasons = {k: a.resolution_reason for k, a in stored(session).items()}
    assert "chi-square p = 0.2" in reasons[("srm", "overall")]
    assert "Holm-adjusted anytime-valid p = 0.3" in reasons[("skewed_source", "newsletter")]
    alerting.sync_alerts(session, experiment(session), stand_in(srm))
    alerting.sync_alerts(session, experiment(session), None)
    assert "no units" in stored(session)[("srm", "overall")].resolution_reason


def test_a_returning_finding_reopens_the_same_alert(session: Session) -> None:
    alerting.sync_alerts(session, experiment(session), stand_in(day("2026-11-09")))
    first_id = stored(session)[("skewed_day", "2026-11-09")].id
    alerting.sync_alerts(session, experiment(session), stand_in())
    changes = alerting.sync_alerts(session, experiment(session), stand_in(day("2026-11-09")))
    alert = stored(session)[("skewed_day", "2026-11-09")]
    assert [a.id for a in changes.opened] == [first_id] == [alert.id]
    assert (alert.status, alert.resolved_by, alert.resolution_reason) == ("open", None, None)
    assert [e.action for e in alert.events] == ["opened", "resolved", "reopened"]


def test_a_person_resolution_stands_while_the_finding_persists(session: Session) -> None:
    alerting.sync_alerts(session, experiment(session), stand_in(day("2026-11-09")))
    alert = stored(session)[("skewed_day", "2026-11-09")]
    alerting.acknowledge(session, alert, "analyst-ana", "looking")
    alerting.resolve(session, alert, "analyst-ana", "known newsletter")
    changes = alerting.sync_alerts(session, experiment(session), stand_in(day("2026-11-09")))
    assert changes.opened == [] and changes.resolved == []
    assert (alert.status, alert.resolved_by) == ("resolved", "analyst-ana")


def test_transitions_out_of_order_are_refused(session: Session) -> None:
    alerting.sync_alerts(session, experiment(session), stand_in(day("2026-11-09")))
    alert = stored(session)[("skewed_day", "2026-11-09")]
    alerting.resolve(session, alert, "analyst-ana")
    assert alert.resolution_reason == "resolved by analyst-ana"
    with pytest.raises(alerting.TransitionError):
        alerting.acknowledge(session, alert, "analyst-ana")
    with pytest.raises(alerting.TransitionError):
        alerting.resolve(session, alert, "analyst-ana")
