"""SQLAlchemy 2.0 typed models. Types are portable: the same schema runs on SQLite and PostgreSQL.

The Alembic migrations in ``service/migrations/versions`` create exactly this schema; a test
compares them.
"""

from __future__ import annotations

import datetime as dt
from typing import Any

from sqlalchemy import (
    JSON,
    BigInteger,
    Date,
    DateTime,
    ForeignKey,
    Index,
    Integer,
    MetaData,
    String,
    Text,
    UniqueConstraint,
)
from sqlalchemy.dialects.postgresql import JSONB
from sqlalchemy.engine import Dialect
from sqlalchemy.orm import DeclarativeBase, Mapped, mapped_column, relationship
from sqlalchemy.types import TypeDecorator

# Constraint names are fixed so that migrations can refer to them on every backend.
NAMING_CONVENTION = {
    "ix": "ix_%(table_name)s_%(column_0_N_name)s",
    "uq": "uq_%(table_name)s_%(column_0_N_name)s",
    "ck": "ck_%(table_name)s_%(constraint_name)s",
    "fk": "fk_%(table_name)s_%(column_0_name)s_%(referred_table_name)s",
    "pk": "pk_%(table_name)s",
}

# JSONB on PostgreSQL (indexable, compact), plain JSON text elsewhere.
PortableJSON = JSON().with_variant(JSONB(), "postgresql")
# SQLite only auto-increments INTEGER PRIMARY KEY columns.
BigId = BigInteger().with_variant(Integer(), "sqlite")


class UTCDateTime(TypeDecorator[dt.datetime]):
    """Timezone-aware UTC datetimes on every backend (SQLite keeps no offset, so store UTC)."""

    impl = DateTime(timezone=True)
    cache_ok = True

    def process_bind_param(self, value: dt.datetime | None, dialect: Dialect
                           ) -> dt.datetime | None:
        if value is None:
            return None
        if value.tzinfo is None:
            raise ValueError("naive datetimes are ambiguous; pass an aware UTC datetime")
        value = value.astimezone(dt.UTC)
        return value.replace(tzinfo=None) if dialect.name == "sqlite" else value

    def process_result_value(self, value: dt.datetime | None, dialect: Dialect
                             ) -> dt.datetime | None:
        if value is None:
            return None
        return value.replace(tzinfo=dt.UTC) if value.tzinfo is None else value.astimezone(dt.UTC)


def utcnow() -> dt.datetime:
    return dt.datetime.now(dt.UTC)


class Base(DeclarativeBase):
    metadata = MetaData(naming_convention=NAMING_CONVENTION)


class Experiment(Base):
    __tablename__ = "experiments"

    id: Mapped[str] = mapped_column(String(64), primary_key=True)
    title: Mapped[str] = mapped_column(String(200))
    start_date: Mapped[dt.date] = mapped_column(Date)
    arms: Mapped[list[str]] = mapped_column(PortableJSON)
    # Normalised steps: [{"from": "YYYY-MM-DD", "weights": [w per arm]}].
    allocation: Mapped[list[dict[str, Any]]] = mapped_column(PortableJSON)
    webhook_url: Mapped[str | None] = mapped_column(String(2048), default=None)
    webhook_secret: Mapped[str | None] = mapped_column(String(256), default=None)
    created_at: Mapped[dt.datetime] = mapped_column(UTCDateTime, default=utcnow)
    updated_at: Mapped[dt.datetime] = mapped_column(UTCDateTime, default=utcnow)
    # Bumped by every committed write that changes what the diagnosis reads (rows, allocation,
    # campaigns): a diagnosis computed outside the write lock is stored only if it is current.
    data_version: Mapped[int] = mapped_column(Integer, default=0, server_default="0")


class Observation(Base):
    """One (date, arm, source) cohort of an experiment; the primary key is the upsert key."""

    __tablename__ = "observations"

    experiment_id: Mapped[str] = mapped_column(
        ForeignKey("experiments.id", ondelete="CASCADE"), primary_key=True)
    date: Mapped[dt.date] = mapped_column(Date, primary_key=True)
    arm: Mapped[str] = mapped_column(String(64), primary_key=True)
    source: Mapped[str] = mapped_column(String(128), primary_key=True)
    entered: Mapped[int] = mapped_column(BigInteger)
    # {metric: {"n": int, "sum": float, "sum_sq": float}}; metrics absent on the row are absent.
    metrics: Mapped[dict[str, dict[str, float]]] = mapped_column(PortableJSON, default=dict)
    updated_at: Mapped[dt.datetime] = mapped_column(UTCDateTime, default=utcnow)


class DiagnosisSnapshot(Base):
    """A diagnosis as computed after a write; every distinct one is kept (``version`` 1, 2...)."""

    __tablename__ = "diagnosis_snapshots"
    __table_args__ = (UniqueConstraint("experiment_id", "version"),)

    id: Mapped[int] = mapped_column(BigId, primary_key=True, autoincrement=True)
    experiment_id: Mapped[str] = mapped_column(
        ForeignKey("experiments.id", ondelete="CASCADE"), index=True)
    version: Mapped[int] = mapped_column(Integer)
    as_of: Mapped[dt.date | None] = mapped_column(Date)
    # "healthy" | "watch" | "alert", or "no_data" when no unit has entered yet.
    status: Mapped[str] = mapped_column(String(16))
    document: Mapped[dict[str, Any] | None] = mapped_column(PortableJSON)
    series: Mapped[dict[str, Any] | None] = mapped_column(PortableJSON)
    etag: Mapped[str] = mapped_column(String(64))
    series_etag: Mapped[str] = mapped_column(String(64))
    # The tag of the document as served: ``document`` with the stored fields of its incidents
    # merged in (service.incidents); it changes when an incident's lifecycle does. ``None``:
    # the document is served as stored, under ``etag``.
    served_etag: Mapped[str | None] = mapped_column(String(64), default=None)
    # The experiment's data_version the snapshot was computed from (None before it existed).
    data_version: Mapped[int | None] = mapped_column(Integer, default=None)
    created_at: Mapped[dt.datetime] = mapped_column(UTCDateTime, default=utcnow)


class Alert(Base):
    """A finding of the diagnosis, deduplicated by ``(experiment, kind, key)``: the evidence
    of an incident (``service.db.incident_models``)."""

    __tablename__ = "alerts"
    __table_args__ = (
        UniqueConstraint("experiment_id", "kind", "key"),
        Index("ix_alerts_status_opened_at", "status", "opened_at"),
    )

    id: Mapped[int] = mapped_column(BigId, primary_key=True, autoincrement=True)
    experiment_id: Mapped[str] = mapped_column(
        ForeignKey("experiments.id", ondelete="CASCADE"), index=True)
    # The incident this finding is evidence of (None: outcome context, or history from
    # before incidents). Incidents go only with their experiment, which takes its findings
    # along, so the key needs no ON DELETE action.
    incident_id: Mapped[int | None] = mapped_column(
        ForeignKey("incidents.id"), index=True, default=None)
    kind: Mapped[str] = mapped_column(String(32))
    key: Mapped[str] = mapped_column(String(200))
    status: Mapped[str] = mapped_column(String(16))  # open | acknowledged | resolved
    severity: Mapped[str] = mapped_column(String(16))
    title: Mapped[str] = mapped_column(String(500))
    detail: Mapped[dict[str, Any]] = mapped_column(PortableJSON, default=dict)
    # Whether the latest diagnosis still supports the finding.
    active: Mapped[bool] = mapped_column(default=True)
    opened_at: Mapped[dt.datetime] = mapped_column(UTCDateTime, default=utcnow)
    last_seen_at: Mapped[dt.datetime] = mapped_column(UTCDateTime, default=utcnow)
    acknowledged_at: Mapped[dt.datetime | None] = mapped_column(UTCDateTime, default=None)
    acknowledged_by: Mapped[str | None] = mapped_column(String(100), default=None)
    resolved_at: Mapped[dt.datetime | None] = mapped_column(UTCDateTime, default=None)
    resolved_by: Mapped[str | None] = mapped_column(String(100), default=None)
    resolution_reason: Mapped[str | None] = mapped_column(Text, default=None)
    updated_at: Mapped[dt.datetime] = mapped_column(UTCDateTime, default=utcnow)

    events: Mapped[list[AlertEvent]] = relationship(
        back_populates="alert", order_by="AlertEvent.id", cascade="all, delete-orphan",
        passive_deletes=True)


class AlertEvent(Base):
    """One transition of an alert: opened, acknowledged, resolved, reopened."""

    __tablename__ = "alert_events"

    id: Mapped[int] = mapped_column(BigId, primary_key=True, autoincrement=True)
    alert_id: Mapped[int] = mapped_column(ForeignKey("alerts.id", ondelete="CASCADE"),
                                          index=True)
    at: Mapped[dt.datetime] = mapped_column(UTCDateTime, default=utcnow)
    action: Mapped[str] = mapped_column(String(16))
    from_status: Mapped[str | None] = mapped_column(String(16))
    to_status: Mapped[str] = mapped_column(String(16))
    actor: Mapped[str] = mapped_column(String(100))
    note: Mapped[str | None] = mapped_column(Text, default=None)
    diagnosis_version: Mapped[int | None] = mapped_column(Integer, default=None)

    alert: Mapped[Alert] = relationship(back_populates="events")


class ApiToken(Base):
    """A bearer token; only its SHA-256 hash is stored."""

    __tablename__ = "api_tokens"

    id: Mapped[int] = mapped_column(Integer, primary_key=True, autoincrement=True)
    name: Mapped[str] = mapped_column(String(100), unique=True)
    scope: Mapped[str] = mapped_column(String(16))  # read | write | admin
    token_hash: Mapped[str] = mapped_column(String(64), unique=True)
    created_at: Mapped[dt.datetime] = mapped_column(UTCDateTime, default=utcnow)
    revoked_at: Mapped[dt.datetime | None] = mapped_column(UTCDateTime, default=None)
