"""Service settings, read from ``INRUSH_*`` environment variables."""

from __future__ import annotations

from pydantic import Field, SecretStr, ValidationError, field_validator
from pydantic_settings import BaseSettings, SettingsConfigDict

MIB = 1024 * 1024
MIN_ADMIN_TOKEN_CHARS = 24  # 24 random URL-safe characters are 144 bits


class Settings(BaseSettings):
    """Everything the service can be configured with; each field is ``INRUSH_<NAME>``."""

    model_config = SettingsConfigDict(env_prefix="INRUSH_", extra="ignore")

    database_url: str = Field(
        "sqlite:///./inrush.db",
        description="SQLAlchemy URL: sqlite:///PATH or postgresql+psycopg://USER@HOST/DB")
    admin_token: SecretStr | None = Field(
        None, description=f"bootstrap token accepted with admin scope, at least "
                          f"{MIN_ADMIN_TOKEN_CHARS} characters (mint others with `inrush token "
                          "create`); empty means unset")
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

    database_connect_timeout_seconds: int = Field(
        5, ge=2, le=300, description="how long opening a database connection may take (a "
                                     "server that accepts and does not answer fails then)")
    statement_timeout_ms: int = Field(
        30_000, ge=0, description="longest a database statement may run before it is "
                                  "cancelled and the request answers 503 (0: no limit); "
                                  "migrations are exempt")
    request_timeout_seconds: float = Field(
        60.0, gt=0, le=3600,
        description="time budget of a request's database work: past it (or once the client "
                    "has gone) no statement starts, SQLite's running one is interrupted, and "
                    "the request answers 503 having written nothing")
    health_timeout_seconds: float = Field(
        2.0, gt=0, le=60, description="how long /healthz waits for the database before it "
                                      "answers 503")
    api_docs: bool = Field(
        False, description="serve the interactive API pages /docs and /redoc, which load "
                           "their scripts, styles and fonts from public CDNs (the OpenAPI "
                           "document at /openapi.json is always served)")

    catch_up_seconds: float = Field(
        60.0, ge=0, description="how often stale diagnoses (rows committed by a process that "
                                "stopped before diagnosing them) are caught up; 0: at startup "
                                "only")
    table_cache_mb: int = Field(
        512, ge=0, description="memory per worker process for observation tables kept between "
                               "requests (0 disables the cache)")

    pull_at: str | None = Field(
        None, pattern=r"^([01][0-9]|2[0-3]):[0-5][0-9]$",
        description="UTC time of day (HH:MM) at which `inrush serve` runs the pulls of "
                    "experiments that have a pull config; unset: no scheduled pulls")

    @field_validator("admin_token", mode="before")
    @classmethod
    def _strong_admin_token(cls, value: object) -> object:
        text = value.get_secret_value() if isinstance(value, SecretStr) else value
        if text is None or text == "":
            return None
        if isinstance(text, str) and len(text) < MIN_ADMIN_TOKEN_CHARS:
            # settings_problems prints this without the value.
            raise ValueError(f"must be at least {MIN_ADMIN_TOKEN_CHARS} "
                             f"characters (it has {len(text)}); make one with: python -c "
                             "'import secrets; print(secrets.token_urlsafe(32))'")
        return value

    def base_url(self, fallback: str) -> str:
        """The public base URL without a trailing slash (``fallback`` when unset)."""
        return (self.public_url or fallback).rstrip("/")


def settings_problems(error: ValidationError) -> str:
    """One line per invalid setting, named by its variable, without the value (which may be
    a secret)."""
    lines = []
    for item in error.errors(include_input=False, include_url=False):
        name = "INRUSH_" + "_".join(str(part) for part in item["loc"]).upper()
        lines.append(f"  {name}: {item['msg'].removeprefix('Value error, ')}")
    return "\n".join(lines)
