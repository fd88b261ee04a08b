"""``inrush reanalyze``: re-diagnosis of stored experiments in parallel processes, on SQLite
and PostgreSQL (``database_url`` from tests/conftest.py).

Experiments are loaded through the same functions the upload endpoint uses; a detector
upgrade is imitated by making the stored latest snapshot differ from what the installed
detectors compute.
"""

from __future__ import annotations

import datetime as dt
import threading
from collections.abc import Iterator
from typing import Any

import pytest
from sqlalchemy import func, select, update

from service.analysis import latest_snapshot, refresh_diagnosis
from service.cli import main
from service.cli.maintenance import NEW_VERSION, REANALYSIS, UNCHANGED, reanalyze_one
from service.db.locks import lock_experiment_for_write
from service.db.models import Alert, DiagnosisSnapshot, Experiment, utcnow
from service.db.session import Database
from service.demo import scenario
from service.ingest import parse_csv_body, upsert_rows, validate_rows

pytestmark = pytest.mark.timeout(120)

CSV = scenario.CSV_PATH.read_bytes()
LAST_DAY = scenario.START + dt.timedelta(days=scenario.DAYS - 1)


@pytest.fixture
def database(database_url: str, monkeypatch: pytest.MonkeyPatch) -> Iterator[Database]:
    monkeypatch.setenv("INRUSH_DATABASE_URL", database_url)
    db = Database(database_url)
    db.migrate()
    try:
        yield db
    finally:
        db.dispose()


def _create(database: Database, experiment_id: str, *, with_rows: bool = True) -> None:
    """The demo experiment under another id, with the demo rows uploaded and diagnosed."""
    now = utcnow()
    with database.sessions.begin() as session:
        session.add(Experiment(id=experiment_id, title=scenario.TITLE, start_date=scenario.START,
                               arms=list(scenario.ARMS),
                               allocation=[{"from": scenario.START.isoformat(),
                                            "weights": [0.5, 0.5]}],
                               created_at=now, updated_at=now))
    if not with_rows:
        return
    with database.sessions() as session:
        experiment = lock_experiment_for_write(session, experiment_id)
        assert experiment is not None
        rows = validate_rows(parse_csv_body(CSV, 10_000), experiment, today=LAST_DAY,
                             future_days=0)
        upsert_rows(session, experiment, rows)
        refresh_diagnosis(session, experiment)
        session.commit()


def _make_stale(database: Database, experiment_id: str) -> None:
    """Imitate a snapshot computed by older detectors that found nothing: the latest snapshot
    says healthy and the experiment has no alerts."""
    with database.sessions.begin() as session:
        latest = latest_snapshot(session, experiment_id)
        assert latest is not None
        latest.status, latest.document, latest.etag = "healthy", {"older": True}, "older"
        session.execute(Alert.__table__.delete().where(Alert.experiment_id == experiment_id))


def _versions(database: Database, experiment_id: str) -> list[int]:
    with database.sessions() as session:
        return list(session.scalars(select(DiagnosisSnapshot.version).where(
            DiagnosisSnapshot.experiment_id == experiment_id)
            .order_by(DiagnosisSnapshot.version)))


def _alerts(database: Database, experiment_id: str) -> list[Any]:
    with database.sessions() as session:
        return list(session.execute(select(Alert.kind, Alert.key, Alert.status,
                                           Alert.resolution_reason)
                                    .where(Alert.experiment_id == experiment_id)
                                    .order_by(Alert.kind, Alert.key)))


def test_unchanged_results_keep_every_version(database: Database,
                                              capsys: pytest.CaptureFixture[str]) -> None:
    _create(database, "route-cards")
    _create(database, "route-cards-eu")
    _create(database, "route-cards-empty", with_rows=False)
    before = {i: _versions(database, i) for i in ("route-cards", "route-cards-eu")}
    alerts = _alerts(database, "route-cards")

    assert main(["reanalyze", "--all", "--jobs", "2", "--no-progress"]) == 0
    out = capsys.readouterr().out
    assert ("re-analysed 3 experiments" in out and "with 2 processes" in out
            and "0 new diagnosis versions, 2 unchanged, 1 skipped (never diagnosed), "
                "0 failed" in out), out
    assert {i: _versions(database, i) for i in before} == before
    assert _versions(database, "route-cards-empty") == []
    assert _alerts(database, "route-cards") == alerts


def test_a_detector_change_makes_new_versions_and_alerts(
        database: Database, capsys: pytest.CaptureFixture[str]) -> None:
    for experiment_id in ("route-cards", "route-cards-eu"):
        _create(database, experiment_id)
    expected = {(kind, key) for kind, key, *_ in _alerts(database, "route-cards")}
    assert expected, "the demo data raises alerts"
    for experiment_id in ("route-cards", "route-cards-eu"):
        _make_stale(database, experiment_id)
    # An alert for a finding the current detectors do not make is resolved, with the reason.
    with database.sessions.begin() as session:
        now = utcnow()
        session.add(Alert(experiment_id="route-cards", kind="skewed_day", key="2026-10-27",
                          status="open", severity="alert", title="older finding", detail={},
                          active=True, opened_at=now, last_seen_at=now, updated_at=now))

    assert main(["reanalyze", "--all", "--jobs", "2", "--no-progress"]) == 0
    out = capsys.readouterr().out
    assert "2 new diagnosis versions, 0 unchanged" in out, out
    assert "route-cards: new version 2 (alert)" in out, out
    for experiment_id in ("route-cards", "route-cards-eu"):
        assert _versions(database, experiment_id) == [1, 2]
        found = _alerts(database, experiment_id)
        identities = [(kind, key) for kind, key, *_ in found]
        assert len(identities) == len(set(identities))
        assert {(k, key) for k, key, status, _ in found if status == "open"} == expected
    [older] = [a for a in _alerts(database, "route-cards") if a[1] == "2026-10-27"]
    assert older[2] == "resolved"
    assert older[3].startswith(f"{REANALYSIS} no longer supports it: ")

    # Run again: nothing left to change.
    assert main(["reanalyze", "--experiment", "route-cards", "--no-progress"]) == 0
    assert "0 new diagnosis versions, 1 unchanged" in capsys.readouterr().out
    assert _versions(database, "route-cards") == [1, 2]


def test_a_failing_experiment_is_reported_and_the_others_still_run(
        database: Database, capsys: pytest.CaptureFixture[str]) -> None:
    for experiment_id in ("route-cards", "route-cards-eu"):
        _create(database, experiment_id)
        _make_stale(database, experiment_id)
    # Stored weights that no longer sum to 1 (written around the API, which refuses them).
    with database.sessions.begin() as session:
        session.execute(update(Experiment).where(Experiment.id == "route-cards-eu").values(
            allocation=[{"from": scenario.START.isoformat(), "weights": [0.7, 0.7]}]))

    assert main(["reanalyze", "--all", "--jobs", "2", "--no-progress"]) == 1
    out = capsys.readouterr().out
    assert "1 new diagnosis version, 0 unchanged, 0 skipped (never diagnosed), 1 failed" in out
    assert "failed:\n  route-cards-eu: InputError" in out, out
    assert _versions(database, "route-cards") == [1, 2]
    assert _versions(database, "route-cards-eu") == [1]  # rolled back, nothing half-written


def test_bad_arguments_are_refused(database: Database,
                                   capsys: pytest.CaptureFixture[str]) -> None:
    _create(database, "route-cards")
    assert main(["reanalyze", "--experiment", "route-cards", "--experiment", "no-such",
                 "--no-progress"]) == 2
    assert "no experiment 'no-such'" in capsys.readouterr().err
    assert main(["reanalyze", "--all", "--jobs", "0"]) == 2
    with pytest.raises(SystemExit):  # --all and --experiment exclude each other
        main(["reanalyze", "--all", "--experiment", "route-cards"])
    assert _versions(database, "route-cards") == [1]


def test_concurrent_reanalyses_of_one_experiment_write_one_version(
        database: Database, database_url: str) -> None:
    _create(database, "route-cards")
    _make_stale(database, "route-cards")
    engines = [Database(database_url) for _ in range(4)]
    outcomes: list[Any] = []
    barrier = threading.Barrier(len(engines))

    def run(db: Database) -> None:
        barrier.wait()
        outcomes.append(reanalyze_one(db, "route-cards"))

    threads = [threading.Thread(target=run, args=(db,)) for db in engines]
    for thread in threads:
        thread.start()
    for thread in threads:
        thread.join(60)
    for db in engines:
        db.dispose()
    assert sorted(o.state for o in outcomes) == [NEW_VERSION] + [UNCHANGED] * 3, outcomes
    assert _versions(database, "route-cards") == [1, 2]
    with database.sessions() as session:
        per_identity = session.execute(select(Alert.kind, Alert.key, func.count())
                                       .where(Alert.experiment_id == "route-cards")
                                       .group_by(Alert.kind, Alert.key)).all()
    assert per_identity and all(n == 1 for *_, n in per_identity)
