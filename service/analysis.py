"""From stored rows to a stored diagnosis: load the table, run the detectors, keep a snapshot,
derive incidents (and their findings). Every function runs inside the caller's transaction."""

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
from .db.locks import hold_experiment_lock
from .db.models import DiagnosisSnapshot, Experiment, Observation, utcnow
from .db.observation_store import StagedUpload, read_observations
from .http import entity_tag, json_safe
from .incidents import IncidentChanges, sync_incidents
from .ingest import check_experiment_limits
from .notify.outbox import enqueue_for_changes

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


def load_table(session: Session, experiment: Experiment, *,
               staged: StagedUpload | None = None) -> ObservationTable | None:
    """All stored rows of the experiment as an observation table (``None`` without rows).

    The rows were validated when they were written, so the table is assembled without
    checking them again. ``staged``: the upload this transaction just made (its rows are
    taken from memory instead of being read back).
    """
    rows = read_observations(session, experiment.id, staged)
    if staged is not None:  # an upload: refused (and rolled back) past the experiment's limits
        check_experiment_limits(rows)
    if not len(rows):
        return None
    return ObservationTable.from_cells(experiment.arms, rows.dates, rows.arms, rows.sources,
                                       rows.entered, rows.metrics, start=experiment.start_date)


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


def refresh_diagnosis(session: Session, experiment: Experiment, *,
                      config: DiagnosisConfig | None = None,
                      now: dt.datetime | None = None, cause: str = CORRECTED_DATA,
                      staged: StagedUpload | None = None) -> Refresh:
    """Diagnose every stored row, keep the result as a new snapshot if it differs from the
    latest one, and sync the incidents (``cause``: what changed, for resolution reasons).
    Takes the experiment's write lock unless the transaction holds it already
    (:mod:`service.db.locks`): two workers never diagnose one experiment at once.
    ``staged``: the upload that this transaction just made, if any (see :func:`load_table`)."""
    hold_experiment_lock(session, experiment.id)
    now = now or utcnow()
    table = load_table(session, experiment, staged=staged)
    schedule = schedule_for(experiment)
    diagnosis: Diagnosis | None = None
    document: dict[str, Any] | None = None
    series: dict[str, Any] | None = None
    if table is not None and int(table.entered.sum()) > 0:
        # Registered campaigns are named on the flagged days of their dates and source.
        diagnosis = diagnose(table, schedule, config=config, experiment=experiment.id,
                             campaigns=known_campaigns(session, experiment.id),
                             impact=impact_function)
        document = json_safe(diagnosis.to_dict())
        series = json_safe(daily_series(table, schedule, diagnosis))
    elif table is not None:
        series = json_safe(daily_series(table, schedule, None))
    status = diagnosis.status if diagnosis else NO_DATA
    etag, series_etag = entity_tag(document), entity_tag(series)

    latest = latest_snapshot(session, experiment.id, documents=False)
    new_version = latest is None or (latest.etag, latest.series_etag) != (etag, series_etag)
    if new_version:
        snapshot = DiagnosisSnapshot(
            experiment_id=experiment.id, version=(latest.version + 1) if latest else 1,
            as_of=diagnosis.as_of if diagnosis else None, status=status, document=document,
            series=series, etag=etag, series_etag=series_etag, created_at=now)
        session.add(snapshot)
        session.flush()
    else:
        assert latest is not None
        snapshot = latest
    changes = sync_incidents(session, experiment, diagnosis,
                             diagnosis_version=snapshot.version, now=now, cause=cause)
    # Same transaction as the incidents (outbox): delivered later by the notification worker.
    enqueue_for_changes(session, experiment, changes, now=now)
    return Refresh(snapshot, diagnosis, changes.evidence, new_version, changes)


__all__ = ["NO_DATA", "InputError", "Refresh", "SnapshotSummary", "latest_snapshot",
           "latest_summaries", "load_table",
           "refresh_diagnosis", "schedule_for", "snapshot_version",
           "stored_rows"]
