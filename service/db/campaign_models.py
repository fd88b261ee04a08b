"""Registered outreach campaigns of an experiment (email, push, SMS, paid links).

A campaign is stored as registered; its pre-flight check is recomputed on every answer from the
experiment's current allocation schedule and stored traffic, so it never goes stale.
"""

from __future__ import annotations

import datetime as dt

from sqlalchemy import BigInteger, Date, ForeignKey, String, UniqueConstraint
from sqlalchemy.orm import Mapped, mapped_column

from .models import Base, BigId, PortableJSON, UTCDateTime, utcnow


class Campaign(Base):
    """One campaign; ``name`` is unique within the experiment (a second one answers 409)."""

    __tablename__ = "campaigns"
    __table_args__ = (UniqueConstraint("experiment_id", "name"),)

    id: Mapped[int] = mapped_column(BigId, primary_key=True, autoincrement=True)
    experiment_id: Mapped[str] = mapped_column(
        ForeignKey("experiments.id", ondelete="CASCADE"))
    name: Mapped[str] = mapped_column(String(100))
    # The entry source its units arrive through, as the observation rows name it.
    source: Mapped[str] = mapped_column(String(128))
    start_date: Mapped[dt.date] = mapped_column(Date)
    end_date: Mapped[dt.date] = mapped_column(Date)  # inclusive
    # {arm: share of that arm's units the campaign reaches}, every arm present (0 = not reached).
    audience: Mapped[dict[str, float]] = mapped_column(PortableJSON)
    expected_size: Mapped[int | None] = mapped_column(BigInteger, default=None)
    created_at: Mapped[dt.datetime] = mapped_column(UTCDateTime, default=utcnow)
