"""From stored rows to a stored diagnosis: load the table, run the detectors, keep a snapshot,
derive incidents (and their findings). :func:`rediagnose` manages its own transactions (the
detectors run with none open); every other function runs inside the caller's transaction."""

from __future__ import annotations

import datetime as dt
from dataclasses import dataclass
from typing import Any

from sqlalchemy import Row, func, select
from sqlalchemy.orm import Session, defer

from detectors import (
    AllocationSchedule,
    Diagnosis,
    DiagnosisConfig,
    InputError,
    ObservationTable,
    daily_series,
    diagnose,
)
from detectors.contamination import impact_function

from .alerting import CORRECTED_DATA, AlertChanges
from .campaigns import known_campaigns
from .db.locks import hold_experiment_lock, lock_experiment_for_write
from .db.models import DiagnosisSnapshot, Experiment, Observation, utcnow
from .db.observation_store import StagedUpload, read_observations
from .http import entity_tag, json_safe
from .incidents import IncidentChanges, sync_incidents
from .ingest import check_experiment_limits, check_table_limits
from .notify.outbox import enqueue_for_changes
from .table_cache import CachedTable, advance, build, cache_for

NO_DATA = "no_data"


@dataclass
class Refresh:
    """The outcome of re-diagnosing an experiment."""

    snapshot: DiagnosisSnapshot
    diagnosis: Diagnosis | None
    alerts: AlertChanges  # the findings (evidence of the incidents)
    new_version: bool
    incidents: IncidentChanges


def schedule_for(experiment: Experiment) -> AllocationSchedule:
    return AllocationSchedule.from_steps(experiment.arms, experiment.allocation)


def stored_rows(session: Session, experiment_id: str, *, first: dt.date | None = None,
                last: dt.date | None = None) -> list[Row[tuple[dt.date, str, str, int, Any]]]:
    """Stored rows (``date, arm, source, entered, metrics``) sorted by date, arm and source."""
    query = select(Observation.date, Observation.arm, Observation.source, Observation.entered,
                   Observation.metrics).where(Observation.experiment_id == experiment_id)
    if first is not None:
        query = query.where(Observation.date >= first)
    if last is not None:
        query = query.where(Observation.date <= last)
    return list(session.execute(query.order_by(Observation.date, Observation.arm,
                                               Observation.source)))


def load_table(session: Session, experiment: Experiment) -> ObservationTable | None:
    """All stored rows of the experiment as an observation table (``None`` without rows).

    Taken from the process's table cache when it holds the experiment's ``data_version`` as
    loaded in this session (:mod:`service.table_cache`); read from the database otherwise.
    """
    return current_rows(session, experiment).table


def current_rows(session: Session, experiment: Experiment) -> CachedTable:
    """The stored rows as of ``experiment.data_version``, or of a later version if another
    writer committed after ``experiment`` was loaded (a later read of the version tells).

    The rows were validated when they were written, so a table read from the database is
    assembled without checking them again; it is cached only if the version read after the
    rows is still the one read before them (no write can have come between).
    """
    bind = session.get_bind()
    cache = cache_for(getattr(bind, "engine", bind))
    version = experiment.data_version
    hit = cache.get(experiment.id, version)
    if hit is not None:
        return hit
    entry = build(experiment.arms, experiment.start_date, version,
                  read_observations(session, experiment.id))
    if session.scalar(select(Experiment.data_version)
                      .where(Experiment.id == experiment.id)) == version:
        cache.put(experiment.id, entry)
    return entry


def record_upload(session: Session, experiment: Experiment, staged: StagedUpload) -> int:
    """Bump the data version for an upload made in the open write transaction, check the
    experiment's limits on the rows it now holds, commit; then move the cached table on by the
    upload's rows. Returns the new version."""
    version = bump_data_version(session, experiment)
    bind = session.get_bind()
    cache = cache_for(getattr(bind, "engine", bind))
    entry = advance(cache.get(experiment.id, version - 1), version, staged.columns,
                    stored=staged.stored, arms=experiment.arms, start=experiment.start_date)
    # Refused (and rolled back by the caller) past the experiment's limits, before the commit.
    if entry is not None and entry.table is not None:
        check_table_limits(entry.table)
    else:
        check_experiment_limits(read_observations(session, experiment.id, staged))
    session.commit()
    cache.put(experiment.id, entry)
    return version


def bump_data_version(session: Session, experiment: Experiment) -> int:
    """Mark a change of what the diagnosis reads (rows, allocation, campaigns), in the caller's
    write transaction, which holds the experiment's lock. Returns the new version."""
    experiment.data_version = (experiment.data_version or 0) + 1
    session.flush()
    return experiment.data_version


def latest_snapshot(session: Session, experiment_id: str, *, documents: bool = True
                    ) -> DiagnosisSnapshot | None:
    """The experiment's latest snapshot; with ``documents=False`` its diagnosis and series
    documents are loaded only if they are used."""
    query = (select(DiagnosisSnapshot).where(DiagnosisSnapshot.experiment_id == experiment_id)
             .order_by(DiagnosisSnapshot.version.desc()).limit(1))
    if not documents:
        query = query.options(defer(DiagnosisSnapshot.document), defer(DiagnosisSnapshot.series))
    return session.scalar(query)


@dataclass(frozen=True)
class SnapshotSummary:
    version: int
    status: str
    as_of: dt.date | None
    created_at: dt.datetime


def latest_summaries(session: Session, experiment_ids: list[str]) -> dict[str, SnapshotSummary]:
    """The latest snapshot's summary per experiment, in one query and without documents."""
    if not experiment_ids:
        return {}
    latest = (select(DiagnosisSnapshot.experiment_id,
                     func.max(DiagnosisSnapshot.version).label("version"))
              .where(DiagnosisSnapshot.experiment_id.in_(experiment_ids))
              .group_by(DiagnosisSnapshot.experiment_id).subquery())
    rows = session.execute(
        select(DiagnosisSnapshot.experiment_id, DiagnosisSnapshot.version,
               DiagnosisSnapshot.status, DiagnosisSnapshot.as_of, DiagnosisSnapshot.created_at)
        .join(latest, (DiagnosisSnapshot.experiment_id == latest.c.experiment_id)
              & (DiagnosisSnapshot.version == latest.c.version)))
    return {row[0]: SnapshotSummary(*row[1:]) for row in rows}


def snapshot_version(session: Session, experiment_id: str, version: int
                     ) -> DiagnosisSnapshot | None:
    return session.scalar(select(DiagnosisSnapshot).where(
        DiagnosisSnapshot.experiment_id == experiment_id, DiagnosisSnapshot.version == version))


REFRESH_ATTEMPTS = 4


@dataclass(frozen=True)
class _Computed:
    diagnosis: Diagnosis | None
    document: dict[str, Any] | None
    series: dict[str, Any] | None


def rediagnose(session: Session, experiment_id: str, *, config: DiagnosisConfig | None = None,
               now: dt.datetime | None = None, cause: str = CORRECTED_DATA) -> Refresh:
    """Diagnose the experiment's current data and store the result: a new snapshot if it
    differs from the latest one, and the alert changes with their notifications
    (``cause``: what changed, for resolution reasons). Returns what was stored.

    Call it after the change was committed with :func:`bump_data_version` (any transaction
    the session has open is committed first). The diagnosis is computed outside any write lock, so
    uploads to other experiments never wait for it:

    1. a read transaction takes the experiment's ``data_version`` and then its rows (from the
       table cache when it holds that version), campaigns and allocation;
    2. the detectors run with no transaction open;
    3. a short write transaction takes the experiment's lock and stores the result only if
       ``data_version`` is still the one read, so a result computed from data that another
       writer has changed since is never stored, and alerts open and notify once. Otherwise
       steps 1-3 run again on the newer data (which includes this caller's change).

    After ``REFRESH_ATTEMPTS - 1`` lost races (a stream of writes to this one experiment),
    the last attempt computes while holding the lock (:func:`refresh_diagnosis`), which
    guarantees progress.
    """
    for _ in range(REFRESH_ATTEMPTS - 1):
        if session.in_transaction():
            session.commit()
        experiment = session.scalar(select(Experiment).where(Experiment.id == experiment_id)
                                    .execution_options(populate_existing=True))
        if experiment is None:
            raise LookupError(f"experiment {experiment_id!r} does not exist")
        version = experiment.data_version
        rows = current_rows(session, experiment)
        campaigns = known_campaigns(session, experiment_id)
        schedule = schedule_for(experiment)
        session.commit()  # nothing is held while the detectors run
        computed = _compute(rows.table, schedule, campaigns, experiment_id, config)
        experiment = lock_experiment_for_write(session, experiment_id)
        if experiment is None:
            raise LookupError(f"experiment {experiment_id!r} does not exist")
        if experiment.data_version != version:
            session.commit()  # superseded (nothing written): diagnose the newer data
            continue
        refresh = _store(session, experiment, version, computed, now=now or utcnow(),
                         cause=cause)
        session.commit()
        return refresh
    experiment = lock_experiment_for_write(session, experiment_id)
    if experiment is None:
        raise LookupError(f"experiment {experiment_id!r} does not exist")
    refresh = refresh_diagnosis(session, experiment, config=config, now=now, cause=cause)
    session.commit()
    return refresh


def refresh_diagnosis(session: Session, experiment: Experiment, *,
                      config: DiagnosisConfig | None = None,
                      now: dt.datetime | None = None, cause: str = CORRECTED_DATA,
                      staged: StagedUpload | None = None) -> Refresh:
    """Diagnose every row the transaction sees and store the result in it (the caller
    commits): a new snapshot if it differs from the latest one, and the incident changes.
    Takes the experiment's write lock unless the transaction holds it already
    (:mod:`service.db.locks`), and holds it while the detectors run: :func:`rediagnose` is
    what requests use. The rows are read from the database (uncommitted changes of this
    transaction included), not from the table cache. ``staged``: an upload this transaction
    just made (its rows are taken from memory instead of being read back)."""
    hold_experiment_lock(session, experiment.id)
    rows = read_observations(session, experiment.id, staged)
    table = (ObservationTable.from_cells(experiment.arms, rows.dates, rows.arms, rows.sources,
                                         rows.entered, rows.metrics,
                                         start=experiment.start_date) if len(rows) else None)
    computed = _compute(table, schedule_for(experiment), known_campaigns(session, experiment.id),
                        experiment.id, config)
    return _store(session, experiment, experiment.data_version, computed,
                  now=now or utcnow(), cause=cause)


def _compute(table: ObservationTable | None, schedule: AllocationSchedule,
             campaigns: list[Any], experiment_id: str,
             config: DiagnosisConfig | None) -> _Computed:
    if table is None:
        return _Computed(None, None, None)
    if int(table.entered.sum()) == 0:
        return _Computed(None, None, json_safe(daily_series(table, schedule, None)))
    # Registered campaigns are named on the flagged days of their dates and source.
    diagnosis = diagnose(table, schedule, config=config, experiment=experiment_id,
                         campaigns=campaigns, impact=impact_function)
    return _Computed(diagnosis, json_safe(diagnosis.to_dict()),
                     json_safe(daily_series(table, schedule, diagnosis)))


def _store(session: Session, experiment: Experiment, version: int, computed: _Computed, *,
           now: dt.datetime, cause: str) -> Refresh:
    """Keep the snapshot and sync the incidents, in the write transaction holding the lock."""
    diagnosis, document, series = computed.diagnosis, computed.document, computed.series
    status = diagnosis.status if diagnosis else NO_DATA
    etag, series_etag = entity_tag(document), entity_tag(series)
    latest = latest_snapshot(session, experiment.id, documents=False)
    new_version = latest is None or (latest.etag, latest.series_etag) != (etag, series_etag)
    if new_version:
        snapshot = DiagnosisSnapshot(
            experiment_id=experiment.id, version=(latest.version + 1) if latest else 1,
            as_of=diagnosis.as_of if diagnosis else None, status=status, document=document,
            series=series, etag=etag, series_etag=series_etag, data_version=version,
            created_at=now)
        session.add(snapshot)
    else:
        assert latest is not None
        snapshot = latest
        snapshot.data_version = version  # the same result holds for the newer data
    session.flush()
    changes = sync_incidents(session, experiment, diagnosis,
                             diagnosis_version=snapshot.version, now=now, cause=cause)
    # Same transaction as the incidents (outbox): delivered later by the notification worker.
    enqueue_for_changes(session, experiment, changes, now=now)
    return Refresh(snapshot, diagnosis, changes.evidence, new_version, changes)


def stale_experiments(session: Session) -> dict[str, int]:
    """Experiments whose latest diagnosis predates their data, with their ``data_version``: a
    process stopped between committing a change and storing its diagnosis, or a request is
    diagnosing it right now. :func:`rediagnose` catches up."""
    latest = (select(DiagnosisSnapshot.experiment_id,
                     func.max(DiagnosisSnapshot.data_version).label("version"))
              .group_by(DiagnosisSnapshot.experiment_id).subquery())
    has_rows = select(Observation.experiment_id).where(
        Observation.experiment_id == Experiment.id).exists()
    query = (select(Experiment.id, Experiment.data_version)
             .outerjoin(latest, latest.c.experiment_id == Experiment.id)
             .where(((latest.c.version.is_not(None))
                     & (Experiment.data_version > latest.c.version))
                    | (latest.c.experiment_id.is_(None) & has_rows))
             .order_by(Experiment.id))
    return {str(ident): int(version) for ident, version in session.execute(query)}


__all__ = ["NO_DATA", "InputError", "Refresh", "SnapshotSummary", "bump_data_version",
           "current_rows", "latest_snapshot", "latest_summaries", "load_table",
           "record_upload", "rediagnose", "refresh_diagnosis", "schedule_for", "snapshot_version",
           "stale_experiments", "stored_rows"]
