"""Engine, sessions and migrations.

SQLite gets WAL journaling, a busy timeout and enforced foreign keys on every connection, and
write transactions start with ``BEGIN IMMEDIATE`` so that two writers queue on the lock instead
of failing when a read transaction tries to upgrade. On PostgreSQL writes to one experiment
are serialised by an advisory lock and the experiment's row lock (``service.db.locks``).
"""

from __future__ import annotations

from collections.abc import Iterator
from pathlib import Path
from typing import Any

from alembic import command
from alembic.config import Config
from fastapi import Request
from sqlalchemy import Engine, create_engine, event, text
from sqlalchemy.engine import make_url
from sqlalchemy.orm import Session, sessionmaker

from .async_reads import AsyncReads

MIGRATIONS_DIR = Path(__file__).resolve().parent.parent / "migrations"
_BEGIN_OPTION = "inrush_sqlite_begin"


# Connections of the PostgreSQL pool that answers polls (service.revalidation).
QUICK_READ_CONNECTIONS = 4


def make_engine(url: str, *, busy_timeout_ms: int = 30_000, pool_size: int = 12,
                max_overflow: int = 4) -> Engine:
    """An engine for ``url``; SQLite connections are configured for concurrent service use.

    ``pool_size`` connections are kept open and at most ``max_overflow`` more are opened
    under load (a file database too: opening and configuring a connection per request would
    cost more than the request). A server database's pooled connection is tested with a
    round trip before it is handed out, so that one the server closed (a restart, an idle
    timeout) is replaced instead of failing the request.
    """
    parsed = make_url(url)
    if parsed.get_backend_name() != "sqlite":
        return create_engine(url, pool_pre_ping=True, pool_size=pool_size,
                             max_overflow=max_overflow, hide_parameters=True)
    database = parsed.database or ""
    if database and database != ":memory:" and not database.startswith("file:"):
        Path(database).expanduser().resolve().parent.mkdir(parents=True, exist_ok=True)
    # hide_parameters: error messages and logs never show bound values (webhook secrets...).
    pooled = {} if database in ("", ":memory:") else {"pool_size": pool_size,
                                                         "max_overflow": max_overflow}
    engine = create_engine(url, hide_parameters=True, **pooled,
                           connect_args={"check_same_thread": False,
                                         "timeout": busy_timeout_ms / 1000})

    @event.listens_for(engine, "connect")
    def _configure(dbapi_connection: Any, _record: Any) -> None:
        # Let SQLAlchemy's "begin" event below emit BEGIN instead of the driver.
        dbapi_connection.isolation_level = None
        cursor = dbapi_connection.cursor()
        cursor.execute("PRAGMA journal_mode=WAL")
        cursor.execute(f"PRAGMA busy_timeout={int(busy_timeout_ms)}")
        cursor.execute("PRAGMA foreign_keys=ON")
        cursor.execute("PRAGMA synchronous=NORMAL")
        cursor.close()

    @event.listens_for(engine, "begin")
    def _begin(connection: Any) -> None:
        options = connection.get_execution_options()
        if options.get("isolation_level") == "AUTOCOMMIT":
            return  # each statement on its own, as asked
        connection.exec_driver_sql(f"BEGIN {options.get(_BEGIN_OPTION, 'DEFERRED')}")

    return engine


class Database:
    """The engine and session factory of one service instance."""

    def __init__(self, url: str, *, busy_timeout_ms: int = 30_000, pool_size: int = 12,
                 max_overflow: int = 4) -> None:
        self.url = url
        self.engine = make_engine(url, busy_timeout_ms=busy_timeout_ms, pool_size=pool_size,
                                  max_overflow=max_overflow)
        self.sessions = sessionmaker(self.engine, expire_on_commit=False)
        # Polls answered before routing (service.revalidation) read through connections of
        # their own. A read that fails leaves the request to the routes, so these may skip
        # what makes the routes' connections robust, and their reads run on the event loop:
        # * PostgreSQL (``async_reads``): a few asynchronous connections, not pinged before
        #   use (the ping's round trip would double the cost of the read);
        # * SQLite file (``quick_reads``): one connection that never waits for a lock (busy
        #   timeout 0): in WAL mode a reader is refused only while a checkpoint or recovery
        #   holds the file;
        # * SQLite in memory: none (every request is routed).
        self.quick_reads: Engine | None = None
        self.async_reads: AsyncReads | None = None
        database = self.engine.url.database or ""
        if self.engine.dialect.name == "postgresql":
            self.async_reads = AsyncReads(url, QUICK_READ_CONNECTIONS)
        elif self.engine.dialect.name == "sqlite" and database not in ("", ":memory:") \
                and not database.startswith("file:"):
            self.quick_reads = make_engine(url, busy_timeout_ms=0, pool_size=1, max_overflow=0)

    @property
    def dialect(self) -> str:
        return self.engine.dialect.name

    def migrate(self, revision: str = "head") -> None:
        """Apply the Alembic migrations up to ``revision``."""
        with self.engine.begin() as connection:
            config = alembic_config(self.url)
            config.attributes["connection"] = connection
            command.upgrade(config, revision)

    def current_revision(self) -> str | None:
        with self.engine.connect() as connection:
            from alembic.runtime.migration import MigrationContext

            return MigrationContext.configure(connection).get_current_revision()

    def ping(self) -> None:
        """Raise if the database cannot be reached."""
        with self.engine.connect() as connection:
            connection.execute(text("SELECT 1"))

    def dispose(self) -> None:
        """Close the pooled connections (the asynchronous ones close with the application,
        in its event loop: :meth:`AsyncReads.close`)."""
        self.engine.dispose()
        if self.quick_reads is not None:
            self.quick_reads.dispose()


def alembic_config(url: str) -> Config:
    """A programmatic Alembic configuration (no alembic.ini needed at run time)."""
    config = Config()
    config.set_main_option("script_location", str(MIGRATIONS_DIR))
    # ConfigParser interpolates '%': escape it so passwords with '%' survive.
    config.set_main_option("sqlalchemy.url", url.replace("%", "%%"))
    return config


def begin_write(session: Session) -> None:
    """Start the session's write transaction (``BEGIN IMMEDIATE`` on SQLite).

    Any read transaction the request opened before (authentication) is ended first: a SQLite
    read transaction that later writes fails at once if another writer committed meanwhile.
    """
    if session.in_transaction():
        session.commit()
    if session.get_bind().dialect.name == "sqlite":
        session.connection(execution_options={_BEGIN_OPTION: "IMMEDIATE"})


def get_session(request: Request) -> Iterator[Session]:
    """FastAPI dependency: one session per request, closed (rolled back if open) at the end."""
    database: Database = request.app.state.database
    with database.sessions() as session:
        yield session
