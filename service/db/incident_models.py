"""Incidents: one stored imbalance episode with one lifecycle, and its history of transitions.

An incident is what an owner acts on; the findings behind it (rows of ``alerts``) are its
evidence and point to it through ``alerts.incident_id``.
"""

from __future__ import annotations

import datetime as dt
from typing import Any

from sqlalchemy import Date, Float, ForeignKey, Index, Integer, String, Text
from sqlalchemy.orm import Mapped, mapped_column, relationship

from .models import Alert, Base, BigId, PortableJSON, UTCDateTime, utcnow


class Incident(Base):
    """One episode of an experiment (shape, arm, days, units), matched across diagnoses by
    day overlap (:mod:`service.incidents`)."""

    __tablename__ = "incidents"
    __table_args__ = (Index("ix_incidents_status_opened_at", "status", "opened_at"),)

    id: Mapped[int] = mapped_column(BigId, primary_key=True, autoincrement=True)
    experiment_id: Mapped[str] = mapped_column(
        ForeignKey("experiments.id", ondelete="CASCADE"), index=True)
    shape: Mapped[str] = mapped_column(String(24))  # inflow | shortfall | persistent | ...
    arm: Mapped[str] = mapped_column(String(64))
    start_date: Mapped[dt.date] = mapped_column(Date)
    end_date: Mapped[dt.date] = mapped_column(Date)  # inclusive
    units: Mapped[float] = mapped_column(Float)  # signed: + over plan, - under plan
    severity: Mapped[str] = mapped_column(String(16))  # alert | watch
    material: Mapped[bool] = mapped_column(default=False)
    status: Mapped[str] = mapped_column(String(16))  # open | acknowledged | resolved
    # Whether the latest diagnosis still contains the episode.
    active: Mapped[bool] = mapped_column(default=True)
    # The episode as the latest diagnosis that contained it described it (Episode.to_dict()).
    episode: Mapped[dict[str, Any]] = mapped_column(PortableJSON, default=dict)
    # Where that episode sits: the diagnosis version and its index in the document's
    # "incidents" list (None for incidents carried over from stored findings).
    diagnosis_version: Mapped[int | None] = mapped_column(Integer, default=None)
    position: Mapped[int | None] = mapped_column(Integer, default=None)
    opened_at: Mapped[dt.datetime] = mapped_column(UTCDateTime, default=utcnow)
    last_seen_at: Mapped[dt.datetime] = mapped_column(UTCDateTime, default=utcnow)
    acknowledged_at: Mapped[dt.datetime | None] = mapped_column(UTCDateTime, default=None)
    acknowledged_by: Mapped[str | None] = mapped_column(String(100), default=None)
    resolved_at: Mapped[dt.datetime | None] = mapped_column(UTCDateTime, default=None)
    resolved_by: Mapped[str | None] = mapped_column(String(100), default=None)
    resolution: Mapped[str | None] = mapped_column(Text, default=None)
    updated_at: Mapped[dt.datetime] = mapped_column(UTCDateTime, default=utcnow)

    events: Mapped[list[IncidentEvent]] = relationship(
        back_populates="incident", order_by="IncidentEvent.id", cascade="all, delete-orphan",
        passive_deletes=True)
    evidence: Mapped[list[Alert]] = relationship(
        Alert, primaryjoin="Incident.id == foreign(Alert.incident_id)", order_by=Alert.id,
        viewonly=True)

    @property
    def unresolved(self) -> bool:
        return self.status != "resolved"


class IncidentEvent(Base):
    """One transition or change of an incident: opened, updated, acknowledged, resolved,
    reopened. ``changes`` holds ``{field: [before, after]}`` for an update."""

    __tablename__ = "incident_events"

    id: Mapped[int] = mapped_column(BigId, primary_key=True, autoincrement=True)
    incident_id: Mapped[int] = mapped_column(
        ForeignKey("incidents.id", ondelete="CASCADE"), index=True)
    at: Mapped[dt.datetime] = mapped_column(UTCDateTime, default=utcnow)
    action: Mapped[str] = mapped_column(String(16))
    from_status: Mapped[str | None] = mapped_column(String(16))
    to_status: Mapped[str] = mapped_column(String(16))
    actor: Mapped[str] = mapped_column(String(100))
    note: Mapped[str | None] = mapped_column(Text, default=None)
    changes: Mapped[dict[str, Any] | None] = mapped_column(PortableJSON, default=None)
    diagnosis_version: Mapped[int | None] = mapped_column(Integer, default=None)

    incident: Mapped[Incident] = relationship(back_populates="events")
