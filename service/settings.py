"""Service settings, read from ``INRUSH_*`` environment variables."""

from __future__ import annotations

from pydantic import Field, SecretStr
from pydantic_settings import BaseSettings, SettingsConfigDict

MIB = 1024 * 1024


class Settings(BaseSettings):
    """Everything the service can be configured with; each field is ``INRUSH_<NAME>``."""

    model_config = SettingsConfigDict(env_prefix="INRUSH_", extra="ignore")

    database_url: str = Field(
        "sqlite:///./inrush.db",
        description="SQLAlchemy URL: sqlite:///PATH or postgresql+psycopg://USER@HOST/DB")
    admin_token: SecretStr | None = Field(
        None, description="bootstrap token accepted with admin scope (mint others with "
                          "`inrush token create`)")
    max_body_bytes: int = Field(10 * MIB, gt=0, description="largest request body accepted")
    max_rows: int = Field(100_000, gt=0, description="most observation rows in one request")
    public_url: str | None = Field(
        None, description="base URL of the service as its clients see it, for links")
    future_days: int = Field(
        1, ge=0, le=366,
        description="how many days after today (UTC) an observation date may lie; time zones "
                    "ahead of UTC export tomorrow's date before UTC reaches it")
    migrate_on_start: bool = Field(True, description="apply database migrations at startup")
    sqlite_busy_timeout_ms: int = Field(30_000, ge=0,
                                        description="how long a SQLite writer waits for a lock")
    request_threads: int = Field(
        12, ge=1, le=256,
        description="threads per worker process for request work that blocks (database, "
                    "detectors); more only contend for the interpreter lock")
    database_pool_size: int = Field(
        12, ge=1, description="database connections each worker process keeps open (one per "
                              "request thread, so that none is opened per request)")
    database_max_overflow: int = Field(
        4, ge=0, description="extra connections a worker process may open under load "
                             "(background work; closed again when returned)")

    pull_at: str | None = Field(
        None, pattern=r"^([01][0-9]|2[0-3]):[0-5][0-9]$",
        description="UTC time of day (HH:MM) at which `inrush serve` runs the pulls of "
                    "experiments that have a pull config; unset: no scheduled pulls")

    def base_url(self, fallback: str) -> str:
        """The public base URL without a trailing slash (``fallback`` when unset)."""
        return (self.public_url or fallback).rstrip("/")
