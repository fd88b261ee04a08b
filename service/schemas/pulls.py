"""Schemas of an experiment's scheduled pull."""

from __future__ import annotations

import datetime as dt
from typing import Any

from pydantic import BaseModel, ConfigDict, Field


class PullConfigIn(BaseModel):
    model_config = ConfigDict(extra="forbid")

    config: dict[str, Any] = Field(
        description="the `inrush pull` config as JSON: {warehouse: {url}, exposures: {...}, "
                    "metrics: [...]}, the same keys as the TOML file; relative `files` "
                    "paths are read from the service's working directory")


class PullRunOut(BaseModel):
    as_of: dt.date
    state: str = Field(description="running | ok | failed")
    started_at: dt.datetime
    finished_at: dt.datetime | None
    written: int | None = Field(description="observation rows written")
    report: dict[str, Any] | None = Field(
        description="what the pull saw: units, rows, dates, crossed_units and crossed "
                    "(per date and source), empty_days, engine, seconds")
    error: str | None = Field(description="why the run failed, naming the config key or "
                                          "column")


class PullRunIn(BaseModel):
    """A pull run elsewhere (``inrush pull --upload``) records what it saw."""

    model_config = ConfigDict(extra="forbid")

    as_of: dt.date
    # The stored column is a 32-bit integer; a cube never has 2^31 rows.
    written: int | None = Field(None, ge=0, le=2**31 - 1,
                                description="observation rows the run wrote")
    report: dict[str, Any] = Field(description="the report `inrush pull --json` prints")


class PullOut(BaseModel):
    experiment: str
    config: dict[str, Any] | None = Field(
        description="the daily pull's config; null when pulls run elsewhere only report here")
    runs_at: str | None = Field(description="UTC time of day of the daily run "
                                            "(INRUSH_PULL_AT); null: scheduled runs are off")
    updated_at: dt.datetime | None = Field(description="when the config was last set")
    runs: list[PullRunOut] = Field(description="the latest runs, newest first (at most 30)")
