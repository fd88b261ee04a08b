"""Alembic environment: runs on the connection the service hands over, or on INRUSH_DATABASE_URL.

On PostgreSQL, concurrent upgrades (several workers or replicas starting together) queue on an
advisory lock taken inside the migration transaction, so only one applies each revision.
"""

from __future__ import annotations

from alembic import context
from sqlalchemy import Connection, text

from service.db import load_models
from service.db.session import make_engine
from service.settings import Settings

# Any fixed 64-bit number; it names Inrush's migration lock among the server's advisory locks.
_MIGRATION_LOCK_ID = 0x1E5C_2026_0001

config = context.config
target_metadata = load_models()


def _run(connection: Connection) -> None:
    context.configure(connection=connection, target_metadata=target_metadata,
                      render_as_batch=connection.dialect.name == "sqlite",
                      compare_type=True)
    with context.begin_transaction():
        if connection.dialect.name == "postgresql":
            connection.execute(text("SELECT pg_advisory_xact_lock(:id)"),
                               {"id": _MIGRATION_LOCK_ID})
        context.run_migrations()


def run_migrations_online() -> None:
    connection = config.attributes.get("connection")
    if connection is not None:
        _run(connection)
        return
    url = config.get_main_option("sqlalchemy.url") or Settings().database_url
    engine = make_engine(url, statement_timeout_ms=0)  # a migration may rewrite big tables
    try:
        with engine.connect() as connection:
            _run(connection)
            connection.commit()
    finally:
        engine.dispose()


if context.is_offline_mode():
    context.configure(url=config.get_main_option("sqlalchemy.url") or Settings().database_url,
                      target_metadata=target_metadata, literal_binds=True)
    with context.begin_transaction():
        context.run_migrations()
else:
    run_migrations_online()
