"""Notification outbox: one row per incident event to deliver, and every delivery attempt.

Rows are written in the transaction that changes the alert (transactional outbox), so an
alert is never committed without its notification and the write never waits on the receiver.
"""

from __future__ import annotations

import datetime as dt
from typing import Any

from sqlalchemy import ForeignKey, Index, Integer, String, Text
from sqlalchemy.orm import Mapped, mapped_column, relationship

from .models import Base, BigId, PortableJSON, UTCDateTime, utcnow

PENDING, DELIVERING, DELIVERED, FAILED = "pending", "delivering", "delivered", "failed"
OUTBOX_STATUSES = (PENDING, DELIVERING, DELIVERED, FAILED)


class Outbox(Base):
    """An incident event waiting for (or done with) delivery to the experiment's webhook."""

    __tablename__ = "notify_outbox"
    __table_args__ = (Index("ix_notify_outbox_status_next_attempt_at", "status",
                            "next_attempt_at"),)

    id: Mapped[int] = mapped_column(BigId, primary_key=True, autoincrement=True)
    # Notifications are sent per incident; rows queued before incidents name an alert.
    alert_id: Mapped[int | None] = mapped_column(
        ForeignKey("alerts.id", ondelete="CASCADE"), index=True, default=None)
    incident_id: Mapped[int | None] = mapped_column(
        ForeignKey("incidents.id", ondelete="CASCADE"), index=True, default=None)
    experiment_id: Mapped[str] = mapped_column(
        ForeignKey("experiments.id", ondelete="CASCADE"), index=True)
    event_type: Mapped[str] = mapped_column(String(32))
    # Stable across retries: the webhook-id header, for the receiver's deduplication.
    event_id: Mapped[str] = mapped_column(String(100), unique=True)
    payload: Mapped[dict[str, Any]] = mapped_column(PortableJSON)
    status: Mapped[str] = mapped_column(String(16), default=PENDING)
    attempts: Mapped[int] = mapped_column(Integer, default=0)
    next_attempt_at: Mapped[dt.datetime | None] = mapped_column(UTCDateTime, default=utcnow)
    claimed_by: Mapped[str | None] = mapped_column(String(100), default=None)
    claimed_until: Mapped[dt.datetime | None] = mapped_column(UTCDateTime, default=None)
    created_at: Mapped[dt.datetime] = mapped_column(UTCDateTime, default=utcnow)
    delivered_at: Mapped[dt.datetime | None] = mapped_column(UTCDateTime, default=None)

    delivery_attempts: Mapped[list[DeliveryAttempt]] = relationship(
        back_populates="outbox", order_by="DeliveryAttempt.id", cascade="all, delete-orphan",
        passive_deletes=True)


class DeliveryAttempt(Base):
    """One try at delivering an outbox row: when, how long, and what came back."""

    __tablename__ = "notify_delivery_attempts"

    id: Mapped[int] = mapped_column(BigId, primary_key=True, autoincrement=True)
    outbox_id: Mapped[int] = mapped_column(ForeignKey("notify_outbox.id", ondelete="CASCADE"),
                                           index=True)
    attempt: Mapped[int] = mapped_column(Integer)
    started_at: Mapped[dt.datetime] = mapped_column(UTCDateTime, default=utcnow)
    duration_ms: Mapped[int | None] = mapped_column(Integer, default=None)
    status_code: Mapped[int | None] = mapped_column(Integer, default=None)
    error: Mapped[str | None] = mapped_column(Text, default=None)
    response_excerpt: Mapped[str | None] = mapped_column(Text, default=None)

    outbox: Mapped[Outbox] = relationship(back_populates="delivery_attempts")
