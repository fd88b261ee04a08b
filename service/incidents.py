"""Incidents derived from diagnoses: one incident per episode, one lifecycle, one notification.

``sync_incidents`` runs after every diagnosis, in the caller's transaction. An episode of the
new diagnosis is the same incident as a stored one of the experiment when their day spans
overlap (a one-day gap allowed, :meth:`detectors.episodes.Episode.overlaps`); each stored
incident matches at most one episode, pairs taken greedily by the largest overlap (same arm
first). Matching looks first at the incidents the previous diagnosis still contained
(``active``), whatever their status, so that an incident a person resolved is not opened again
as a second one while its episode lasts; then at earlier incidents that were resolved because
the data no longer supported them: one whose days come back is *reopened* (same id, history
kept), never duplicated.

- A matched incident takes the episode's days, units and fields. When its days, arm, shape or
  severity change it records ``updated`` (and notifies ``incident.updated``); a change of the
  unit figure alone is not news. A resolved incident whose episode grows by new days is
  reopened.
- An episode that matches nothing opens a new incident (``incident.opened``).
- A stored incident that no episode matches any more is resolved by the service, with the
  reason "<cause> no longer supports it: ..." (``incident.resolved``).

The findings (rows of ``alerts``, kept by :func:`service.alerting.sync_alerts`) are the
evidence: each finding behind an episode points to its incident. Findings never notify.
People move incidents through open -> acknowledged -> resolved with :func:`acknowledge` and
:func:`resolve`.
"""

from __future__ import annotations

import copy
import datetime as dt
from collections.abc import Iterable, Mapping, Sequence
from dataclasses import dataclass, field
from typing import Any, Protocol

from sqlalchemy import select, update
from sqlalchemy.orm import Session

from detectors.episodes import Episode

from .alerting import CORRECTED_DATA, AlertChanges, sync_alerts
from .db.incident_models import Incident, IncidentEvent
from .db.locks import hold_experiment_lock
from .db.models import Alert, DiagnosisSnapshot, Experiment, utcnow
from .http import entity_tag, json_safe
from .tokens import SYSTEM_ACTOR

OPEN, ACKNOWLEDGED, RESOLVED = "open", "acknowledged", "resolved"
STATUSES = (OPEN, ACKNOWLEDGED, RESOLVED)
# The changes that make an incident news (``incident.updated``).
NEWS = ("start", "end", "days", "arm", "shape", "severity")


class DiagnosisLike(Protocol):
    """What :func:`sync_incidents` reads of a diagnosis."""

    status: str

    @property
    def episodes(self) -> tuple[Episode, ...]: ...

    def findings(self) -> Sequence[Any]: ...


@dataclass
class IncidentChanges:
    """What one diagnosis changed: incidents opened (new or reopened), updated (with
    ``{field: [before, after]}``) and resolved."""

    opened: list[Incident] = field(default_factory=list)
    updated: list[tuple[Incident, dict[str, Any]]] = field(default_factory=list)
    resolved: list[Incident] = field(default_factory=list)
    # What the same diagnosis did to the findings (evidence; no notification of its own).
    evidence: AlertChanges = field(default_factory=AlertChanges)

    def __bool__(self) -> bool:
        return bool(self.opened or self.updated or self.resolved)


class TransitionError(ValueError):
    """The requested lifecycle step is not allowed from the incident's current status."""


def episodes_of(diagnosis: Any) -> tuple[Episode, ...]:
    """The episodes of a diagnosis (none before the detectors group findings into episodes)."""
    return tuple(getattr(diagnosis, "episodes", None) or ()) if diagnosis is not None else ()


def sync_incidents(session: Session, experiment: Experiment, diagnosis: DiagnosisLike | None,
                   *, diagnosis_version: int | None = None, now: dt.datetime | None = None,
                   cause: str = CORRECTED_DATA) -> IncidentChanges:
    """Bring the experiment's incidents (and their evidence) in line with ``diagnosis``.

    ``diagnosis_version`` is the stored snapshot whose document lists the episodes, in order
    (its ``incidents``); ``cause`` says what changed, for the reasons of automatic
    resolutions. Runs inside the caller's transaction and under the experiment's write lock
    (taken here when the transaction does not hold it); the caller commits.
    """
    hold_experiment_lock(session, experiment.id)
    now = now or utcnow()
    # Evidence rows: kept and refreshed, never a notification of their own.
    evidence = sync_alerts(session, experiment, diagnosis,  # type: ignore[arg-type]
                           diagnosis_version=diagnosis_version, now=now, cause=cause)
    episodes = episodes_of(diagnosis)
    stored = list(session.scalars(
        select(Incident).where(Incident.experiment_id == experiment.id)
        .order_by(Incident.id).with_for_update(of=Incident)
        .execution_options(populate_existing=True)))
    changes = IncidentChanges(evidence=evidence)
    live = [i for i in stored if i.active]
    pairs = _match(episodes, live)
    unmatched = [e for e in range(len(episodes)) if e not in pairs]
    dormant = [i for i in stored if not i.active]
    pairs.update(_match([episodes[e] for e in unmatched], dormant, index=unmatched))

    for position, episode in enumerate(episodes):
        incident = pairs.get(position)
        if incident is None:
            incident = _open(session, experiment.id, episode, position, diagnosis_version, now)
            changes.opened.append(incident)
            continue
        was_active = incident.active
        diff = _apply(incident, episode, position, diagnosis_version, now)
        if incident.status == RESOLVED:
            grew = was_active and _grew(diff)
            if not was_active or grew:
                note = ("the episode grew after it was resolved" if grew
                        else "the data supports it again")
                _reopen(incident, note, diagnosis_version, now)
                changes.opened.append(incident)
            elif any(name in diff for name in NEWS):
                _record(incident, "updated", RESOLVED, RESOLVED, SYSTEM_ACTOR, None,
                        diagnosis_version, now, diff)
        elif any(name in diff for name in NEWS):
            _record(incident, "updated", incident.status, incident.status, SYSTEM_ACTOR, None,
                    diagnosis_version, now, diff)
            changes.updated.append((incident, diff))

    current = {id(i) for i in pairs.values()}
    for incident in live:
        if id(incident) in current:
            continue
        incident.active = False
        incident.position = None
        incident.updated_at = now
        if incident.status != RESOLVED:
            reason = f"{cause} no longer supports it: {_why_gone(incident, episodes, pairs)}"
            _resolve(incident, SYSTEM_ACTOR, reason, diagnosis_version, now)
            changes.resolved.append(incident)
    session.flush()
    _link_evidence(session, experiment.id, episodes)
    if diagnosis_version is not None:
        retag(session, experiment.id, diagnosis_version)
    return changes


def acknowledge(session: Session, incident: Incident, actor: str, note: str | None = None,
                now: dt.datetime | None = None) -> Incident:
    """open -> acknowledged: someone is looking into it."""
    if incident.status != OPEN:
        raise TransitionError(f"incident {incident.id} is {incident.status}; only an open "
                              "incident can be acknowledged")
    now = now or utcnow()
    incident.status = ACKNOWLEDGED
    incident.acknowledged_at = now
    incident.acknowledged_by = actor
    incident.updated_at = now
    _record(incident, "acknowledged", OPEN, ACKNOWLEDGED, actor, note, None, now)
    _retag_bound(session, incident)
    return incident


def resolve(session: Session, incident: Incident, actor: str, note: str | None = None,
            now: dt.datetime | None = None) -> Incident:
    """open or acknowledged -> resolved, by a person. While the data still shows the episode
    it stays this incident (no second one is opened); it is reopened if the episode grows."""
    if incident.status == RESOLVED:
        raise TransitionError(f"incident {incident.id} is resolved already "
                              f"(by {incident.resolved_by})")
    _resolve(incident, actor, note or f"resolved by {actor}", None, now or utcnow())
    _retag_bound(session, incident)
    return incident


class Transition(Protocol):
    def __call__(self, session: Session, incident: Incident, actor: str,
                 note: str | None = None, now: dt.datetime | None = None) -> Incident: ...


# --- serving -------------------------------------------------------------------------------

def explanation(episode: Mapping[str, Any]) -> str | None:
    """What the registered campaigns on the episode's days and source say about it."""
    names = [str(n) for n in episode.get("campaigns") or []]
    if not names:
        return None
    listed = ", ".join(names)
    plural = "s" if len(names) > 1 else ""
    if episode.get("shape") == "inflow":
        return (f"Explained by the registered campaign{plural} {listed}: it reached "
                f"{episode.get('arm')} on these days through this source. The arms are not "
                "comparable over these days unless the campaign reached the other arms "
                "equally.")
    return (f"The registered campaign{plural} {listed} ran on these days, but a campaign adds "
            f"units and this episode is a {str(episode.get('shape', '')).replace('_', ' ')}: "
            "the campaign does not explain it.")


def incident_fields(incident: Incident) -> dict[str, Any]:
    """The stored fields an incident adds to its episode (JSON values)."""
    def when(value: dt.datetime | None) -> str | None:
        return value.isoformat() if value else None

    return {"id": incident.id, "experiment": incident.experiment_id, "status": incident.status,
            "opened_at": when(incident.opened_at),
            "acknowledged_at": when(incident.acknowledged_at),
            "resolved_at": when(incident.resolved_at), "resolution": incident.resolution,
            "explained_by": explanation(incident.episode or {})}


def incident_document(incident: Incident) -> dict[str, Any]:
    """The INCIDENT of the contract: the episode as last seen with the stored fields."""
    return {**copy.deepcopy(incident.episode or {}), "shape": incident.shape,
            "arm": incident.arm, "start": incident.start_date.isoformat(),
            "end": incident.end_date.isoformat(), "severity": incident.severity,
            "material": incident.material, **incident_fields(incident)}


def bound_incidents(session: Session, experiment_id: str, version: int) -> list[Incident]:
    """The incidents whose episodes diagnosis ``version`` lists, in the document's order."""
    return list(session.scalars(
        select(Incident).where(Incident.experiment_id == experiment_id,
                               Incident.diagnosis_version == version,
                               Incident.active.is_(True), Incident.position.is_not(None))
        .order_by(Incident.position)))


def served_document(session: Session, snapshot: DiagnosisSnapshot
                    ) -> tuple[dict[str, Any] | None, str]:
    """The diagnosis document as served and its tag: the stored document with the stored
    fields of its incidents merged into ``incidents``. A snapshot whose episodes are bound to
    no incident (an earlier version, or no episode) is served as stored, under its own tag."""
    document = snapshot.document
    bound = bound_incidents(session, snapshot.experiment_id, snapshot.version)
    listed = (document or {}).get("incidents")
    if document is None or not bound or not isinstance(listed, list):
        return document, snapshot.etag
    merged = dict(document)
    merged["incidents"] = [dict(item) for item in listed]
    for incident in bound:
        assert incident.position is not None
        if incident.position < len(merged["incidents"]):
            merged["incidents"][incident.position].update(incident_fields(incident))
    return merged, _served_tag(snapshot.etag, bound)


def retag(session: Session, experiment_id: str, version: int) -> None:
    """Store the served tag of diagnosis ``version`` (after its incidents changed)."""
    etag = session.scalar(select(DiagnosisSnapshot.etag).where(
        DiagnosisSnapshot.experiment_id == experiment_id, DiagnosisSnapshot.version == version))
    if etag is None:
        return
    bound = bound_incidents(session, experiment_id, version)
    session.execute(update(DiagnosisSnapshot).where(
        DiagnosisSnapshot.experiment_id == experiment_id, DiagnosisSnapshot.version == version)
        .values(served_etag=_served_tag(etag, bound) if bound else None)
        .execution_options(synchronize_session=False))


def _served_tag(etag: str, bound: Iterable[Incident]) -> str:
    return entity_tag([etag, [[i.position, incident_fields(i)] for i in bound]])


def _retag_bound(session: Session, incident: Incident) -> None:
    session.flush()
    if incident.active and incident.diagnosis_version is not None:
        retag(session, incident.experiment_id, incident.diagnosis_version)


# --- matching and changes --------------------------------------------------------------------

def _overlap_days(episode: Episode, incident: Incident) -> int:
    first, last = max(episode.start, incident.start_date), min(episode.end, incident.end_date)
    return (last - first).days + 1  # 0 or less: adjacent within the allowed gap


def _match(episodes: Sequence[Episode], incidents: Sequence[Incident], *,
           index: Sequence[int] | None = None) -> dict[int, Incident]:
    """Greedy one-to-one pairs ``{episode position: incident}`` by the largest day overlap
    (same arm, then the older incident, first on ties)."""
    positions = list(index) if index is not None else list(range(len(episodes)))
    candidates = sorted(
        ((_overlap_days(e, i), e.arm == i.arm, -i.id, pos, i)
         for pos, e in zip(positions, episodes, strict=True) for i in incidents
         if e.overlaps(i.start_date, i.end_date)),
        key=lambda c: c[:4], reverse=True)
    pairs: dict[int, Incident] = {}
    taken: set[int] = set()
    for *_, pos, incident in candidates:
        if pos in pairs or id(incident) in taken:
            continue
        pairs[pos] = incident
        taken.add(id(incident))
    return pairs


def _summary(incident: Incident) -> dict[str, Any]:
    days = [d.get("date") for d in (incident.episode or {}).get("daily", [])]
    start, end = incident.start_date, incident.end_date  # None on a new incident
    return {"start": start.isoformat() if start else None,
            "end": end.isoformat() if end else None, "days": days, "arm": incident.arm,
            "shape": incident.shape, "severity": incident.severity, "units": incident.units}


def _apply(incident: Incident, episode: Episode, position: int, version: int | None,
           now: dt.datetime) -> dict[str, Any]:
    """Take the episode's fields; ``{field: [before, after]}`` of what changed."""
    before = _summary(incident)
    incident.shape, incident.arm = episode.shape, episode.arm
    incident.start_date, incident.end_date = episode.start, episode.end
    incident.units = float(episode.units)
    incident.severity, incident.material = episode.severity, bool(episode.material)
    incident.episode = json_safe(episode.to_dict())
    incident.active = True
    incident.diagnosis_version, incident.position = version, position
    incident.last_seen_at = now
    after = _summary(incident)
    diff = {name: [before[name], after[name]] for name in before
            if before[name] != after[name]}
    if diff:
        incident.updated_at = now
    return diff


def _grew(diff: Mapping[str, Any]) -> bool:
    """Whether the episode gained days past its end or before its start."""
    if "days" in diff:
        old, new = (set(d or ()) for d in diff["days"])
        return bool(new - old)
    return ("end" in diff and diff["end"][1] > diff["end"][0]) or (
        "start" in diff and diff["start"][1] < diff["start"][0])


def _open(session: Session, experiment_id: str, episode: Episode, position: int,
          version: int | None, now: dt.datetime) -> Incident:
    incident = Incident(experiment_id=experiment_id, status=OPEN, opened_at=now,
                        updated_at=now)
    _apply(incident, episode, position, version, now)
    session.add(incident)
    _record(incident, "opened", None, OPEN, SYSTEM_ACTOR, None, version, now)
    return incident


def _reopen(incident: Incident, note: str, version: int | None, now: dt.datetime) -> None:
    incident.status = OPEN
    incident.opened_at = incident.updated_at = now
    incident.acknowledged_at = incident.acknowledged_by = None
    incident.resolved_at = incident.resolved_by = incident.resolution = None
    _record(incident, "reopened", RESOLVED, OPEN, SYSTEM_ACTOR, note, version, now)


def _resolve(incident: Incident, actor: str, reason: str, version: int | None,
             now: dt.datetime) -> None:
    previous = incident.status
    incident.status = RESOLVED
    incident.resolved_at = incident.updated_at = now
    incident.resolved_by = actor
    incident.resolution = reason
    _record(incident, "resolved", previous, RESOLVED, actor, reason, version, now)


def _record(incident: Incident, action: str, from_status: str | None, to_status: str,
            actor: str, note: str | None, version: int | None, now: dt.datetime,
            changes: dict[str, Any] | None = None) -> None:
    incident.events.append(IncidentEvent(
        at=now, action=action, from_status=from_status, to_status=to_status, actor=actor,
        note=note, changes=json_safe(changes) if changes else None, diagnosis_version=version))


def _why_gone(incident: Incident, episodes: Sequence[Episode],
              pairs: Mapping[int, Incident]) -> str:
    """A sentence on what the new diagnosis says instead of the incident."""
    span = (incident.start_date.isoformat() if incident.start_date == incident.end_date
            else f"{incident.start_date.isoformat()} to {incident.end_date.isoformat()}")
    for position, other in pairs.items():
        episode = episodes[position]
        if episode.overlaps(incident.start_date, incident.end_date):
            return (f"its days ({span}) are now part of incident {other.id}, a "
                    f"{episode.shape.replace('_', ' ')} in {episode.arm} from "
                    f"{episode.start.isoformat()} to {episode.end.isoformat()}")
    if not episodes:
        return (f"the latest diagnosis finds no imbalance episode; {incident.arm} follows the "
                f"plan on {span}")
    return f"no episode of the latest diagnosis covers {span} any more"


def _link_evidence(session: Session, experiment_id: str, episodes: Sequence[Episode]) -> None:
    """Point each finding behind an episode to its incident (the first episode naming it)."""
    owner: dict[tuple[str, str], int] = {}
    for position, episode in enumerate(episodes):
        for evidence in episode.evidence:
            owner.setdefault((evidence.kind, evidence.key), position)
    if not owner:
        return
    ids = _incident_ids(session, experiment_id, len(episodes))
    for alert in session.scalars(select(Alert).where(Alert.experiment_id == experiment_id)):
        position = owner.get((alert.kind, alert.key))
        if position is not None and position in ids:
            alert.incident_id = ids[position]
    session.flush()


def _incident_ids(session: Session, experiment_id: str, count: int) -> dict[int, int]:
    rows = session.execute(select(Incident.position, Incident.id).where(
        Incident.experiment_id == experiment_id, Incident.active.is_(True),
        Incident.position.is_not(None), Incident.position < count))
    return {int(position): int(incident_id) for position, incident_id in rows}


__all__ = ["ACKNOWLEDGED", "OPEN", "RESOLVED", "STATUSES", "IncidentChanges",
           "TransitionError", "acknowledge", "bound_incidents", "episodes_of", "explanation",
           "incident_document", "incident_fields", "resolve", "retag", "served_document",
           "sync_incidents"]
