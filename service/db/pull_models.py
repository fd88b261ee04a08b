"""Scheduled pulls: an experiment's ``inrush pull`` config and the record of each daily run."""

from __future__ import annotations

import datetime as dt
from typing import Any

from sqlalchemy import Date, ForeignKey, Integer, String, Text, UniqueConstraint
from sqlalchemy.orm import Mapped, mapped_column

from .models import Base, BigId, PortableJSON, UTCDateTime, utcnow


class PullSchedule(Base):
    """The pull config of an experiment (the TOML document as JSON), run once a day by
    ``inrush serve`` when ``INRUSH_PULL_AT`` is set."""

    __tablename__ = "pull_schedules"

    experiment_id: Mapped[str] = mapped_column(
        ForeignKey("experiments.id", ondelete="CASCADE"), primary_key=True)
    config: Mapped[dict[str, Any]] = mapped_column(PortableJSON)
    updated_at: Mapped[dt.datetime] = mapped_column(UTCDateTime, default=utcnow)


class PullRun(Base):
    """One scheduled run. The row is inserted before the run starts: the unique key lets
    exactly one worker process claim each experiment's day."""

    __tablename__ = "pull_runs"
    __table_args__ = (UniqueConstraint("experiment_id", "as_of"),)

    id: Mapped[int] = mapped_column(BigId, primary_key=True, autoincrement=True)
    experiment_id: Mapped[str] = mapped_column(
        ForeignKey("experiments.id", ondelete="CASCADE"))
    as_of: Mapped[dt.date] = mapped_column(Date)
    state: Mapped[str] = mapped_column(String(16))  # running | ok | failed
    started_at: Mapped[dt.datetime] = mapped_column(UTCDateTime, default=utcnow)
    finished_at: Mapped[dt.datetime | None] = mapped_column(UTCDateTime, default=None)
    written: Mapped[int | None] = mapped_column(Integer, default=None)
    report: Mapped[dict[str, Any] | None] = mapped_column(PortableJSON, default=None)
    error: Mapped[str | None] = mapped_column(Text, default=None)
