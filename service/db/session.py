"""Engine, sessions and migrations.

SQLite gets WAL journaling, a busy timeout and enforced foreign keys on every connection, and
write transactions start with ``BEGIN IMMEDIATE`` so that two writers queue on the lock instead
of failing when a read transaction tries to upgrade. On PostgreSQL writes to one experiment
are serialised by an advisory lock and the experiment's row lock (``service.db.locks``).
"""

from __future__ import annotations

import time
from collections.abc import Iterator
from pathlib import Path
from typing import Any

import msgspec
from alembic import command
from alembic.config import Config
from fastapi import Request
from sqlalchemy import Engine, create_engine, event, text
from sqlalchemy.engine import make_url
from sqlalchemy.orm import Session, sessionmaker

from ..jsonsafe import encode_json
from ..request_budget import budget_spent, check_budget
from .async_reads import AsyncReads

MIGRATIONS_DIR = Path(__file__).resolve().parent.parent / "migrations"
_BEGIN_OPTION = "inrush_sqlite_begin"


# Connections of the PostgreSQL pool that answers polls (service.revalidation).
QUICK_READ_CONNECTIONS = 4


# Defaults of INRUSH_DATABASE_CONNECT_TIMEOUT_SECONDS and INRUSH_STATEMENT_TIMEOUT_MS.
CONNECT_TIMEOUT_S = 5
STATEMENT_TIMEOUT_MS = 30_000
# TCP keepalives: a server that vanishes mid-statement (no reset) is noticed in about a minute
# instead of the operating system's two hours.
_KEEPALIVES = {"keepalives": 1, "keepalives_idle": 30, "keepalives_interval": 10,
               "keepalives_count": 3}
# JSON columns (diagnosis documents, series) are written and read by msgspec: the documents
# of wide experiments are megabytes, and the standard library's codec was a large share of
# each upload's time (benchmarks/wide_bench.py).
_JSON_CODEC: dict[str, Any] = {
    "json_serializer": lambda value: encode_json(value).decode("utf-8"),
    "json_deserializer": msgspec.json.decode}
_NO_STATEMENT_TIMEOUT = "inrush_no_statement_timeout"
_SQLITE_DEADLINE = "inrush_statement_deadline"


def make_engine(url: str, *, busy_timeout_ms: int = 30_000, pool_size: int = 12,
                max_overflow: int = 4, connect_timeout_s: int = CONNECT_TIMEOUT_S,
                statement_timeout_ms: int = STATEMENT_TIMEOUT_MS,
                respect_budgets: bool = True) -> Engine:
    """An engine for ``url``; SQLite connections are configured for concurrent service use.

    ``pool_size`` connections are kept open and at most ``max_overflow`` more are opened
    under load (a file database too: opening and configuring a connection per request would
    cost more than the request). A server database's pooled connection is tested with a
    round trip before it is handed out, so that one the server closed (a restart, an idle
    timeout) is replaced instead of failing the request.

    Time limits: connecting to a server gives up after ``connect_timeout_s`` (psycopg would
    wait 130 s for a server that accepts and never answers), and a statement is cancelled
    after ``statement_timeout_ms`` (PostgreSQL's ``statement_timeout``; on SQLite a progress
    handler interrupts it, rows still being fetched included); 0 turns that limit off.
    Migrations run without the statement limit.

    With ``respect_budgets``, a request's statements stop when the request is past its time
    budget or its client has gone (``service.request_budget``): none starts then, and on
    SQLite the one running is interrupted.
    """
    parsed = make_url(url)
    if parsed.get_backend_name() != "sqlite":
        engine = create_engine(url, pool_pre_ping=True, pool_size=pool_size,
                               max_overflow=max_overflow, hide_parameters=True, **_JSON_CODEC,
                               connect_args={"connect_timeout": connect_timeout_s,
                                             **_KEEPALIVES})
        if respect_budgets:
            event.listen(engine, "before_cursor_execute", _check_budget)
        if statement_timeout_ms and engine.dialect.name == "postgresql":
            @event.listens_for(engine, "connect")
            def _limit_statements(dbapi_connection: Any, _record: Any) -> None:
                with dbapi_connection.cursor() as cursor:
                    cursor.execute(f"SET statement_timeout = {int(statement_timeout_ms)}")
                dbapi_connection.commit()
        return engine
    database = parsed.database or ""
    if database and database != ":memory:" and not database.startswith("file:"):
        Path(database).expanduser().resolve().parent.mkdir(parents=True, exist_ok=True)
    # hide_parameters: error messages and logs never show bound values (webhook secrets...).
    pooled = {} if database in ("", ":memory:") else {"pool_size": pool_size,
                                                         "max_overflow": max_overflow}
    engine = create_engine(url, hide_parameters=True, **pooled, **_JSON_CODEC,
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
        # The deadline of the statement running now (None: none); SQLite calls the handler
        # every few thousand virtual-machine steps, and a true answer interrupts.
        deadline: list[float | None] = [None]
        _record.info[_SQLITE_DEADLINE] = deadline

        def _interrupt() -> bool:
            return ((deadline[0] is not None and time.monotonic() > deadline[0])
                    or (respect_budgets and budget_spent()))

        if statement_timeout_ms or respect_budgets:
            dbapi_connection.set_progress_handler(_interrupt, 20_000)

    if respect_budgets:
        event.listen(engine, "before_cursor_execute", _check_budget)

    if statement_timeout_ms:
        limit_s = statement_timeout_ms / 1000

        @event.listens_for(engine, "before_cursor_execute")
        def _start_clock(connection: Any, *_: Any) -> None:
            deadline = connection.info.get(_SQLITE_DEADLINE)
            if deadline is not None:  # kept until the next statement: fetching counts too
                deadline[0] = (None if connection.get_execution_options().get(
                    _NO_STATEMENT_TIMEOUT) else time.monotonic() + limit_s)

        @event.listens_for(engine, "checkin")
        def _stop_clock(_dbapi_connection: Any, record: Any) -> None:
            deadline = record.info.get(_SQLITE_DEADLINE)
            if deadline is not None:
                deadline[0] = None

    @event.listens_for(engine, "begin")
    def _begin(connection: Any) -> None:
        options = connection.get_execution_options()
        if options.get("isolation_level") == "AUTOCOMMIT":
            return  # each statement on its own, as asked
        connection.exec_driver_sql(f"BEGIN {options.get(_BEGIN_OPTION, 'DEFERRED')}")

    return engine


def _check_budget(connection: Any, *_: Any) -> None:
    if not connection.get_execution_options().get(_NO_STATEMENT_TIMEOUT):
        check_budget()


class Database:
    """The engine and session factory of one service instance."""

    def __init__(self, url: str, *, busy_timeout_ms: int = 30_000, pool_size: int = 12,
                 max_overflow: int = 4, connect_timeout_s: int = CONNECT_TIMEOUT_S,
                 statement_timeout_ms: int = STATEMENT_TIMEOUT_MS) -> None:
        self.url = url
        self.engine = make_engine(url, busy_timeout_ms=busy_timeout_ms, pool_size=pool_size,
                                  max_overflow=max_overflow, connect_timeout_s=connect_timeout_s,
                                  statement_timeout_ms=statement_timeout_ms)
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
            self.async_reads = AsyncReads(url, QUICK_READ_CONNECTIONS,
                                          connect_timeout_s=connect_timeout_s,
                                          statement_timeout_ms=statement_timeout_ms)
        elif self.engine.dialect.name == "sqlite" and database not in ("", ":memory:") \
                and not database.startswith("file:"):
            # Its reads answer polls before routing; a failed one leaves the request to the
            # routes, which respect the request's budget.
            self.quick_reads = make_engine(url, busy_timeout_ms=0, pool_size=1, max_overflow=0,
                                           statement_timeout_ms=statement_timeout_ms,
                                           respect_budgets=False)

    @property
    def dialect(self) -> str:
        return self.engine.dialect.name

    def migrate(self, revision: str = "head") -> None:
        """Apply the Alembic migrations up to ``revision``."""
        # A migration may rewrite a large table: no statement limit.
        with self.engine.execution_options(**{_NO_STATEMENT_TIMEOUT: True}).begin() \
                as connection:
            if self.dialect == "postgresql":
                connection.exec_driver_sql("SET LOCAL statement_timeout = 0")
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
