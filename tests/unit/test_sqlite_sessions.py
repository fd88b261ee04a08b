"""SQLite connections of the service: explicit BEGIN modes, none in autocommit, and a pool
that keeps its connections."""

from __future__ import annotations

from pathlib import Path

from sqlalchemy import text

from service.db.session import Database, begin_write


def test_transactions_begin_explicitly_and_autocommit_begins_none(tmp_path: Path) -> None:
    database = Database(f"sqlite:///{tmp_path / 'trails.db'}")
    try:
        with database.engine.connect() as connection:
            connection.execute(text("SELECT 1"))
            assert connection.connection.driver_connection.in_transaction  # BEGIN DEFERRED
        with database.engine.connect().execution_options(
                isolation_level="AUTOCOMMIT") as connection:
            connection.execute(text("SELECT 1"))
            assert not connection.connection.driver_connection.in_transaction
        with database.sessions() as session:
            begin_write(session)
            session.execute(text("CREATE TABLE trail (id INTEGER)"))
            assert session.connection().connection.driver_connection.in_transaction
            session.commit()
    finally:
        database.dispose()


def test_file_databases_keep_a_pool_of_connections(tmp_path: Path) -> None:
    database = Database(f"sqlite:///{tmp_path / 'trails.db'}", pool_size=3, max_overflow=1)
    try:
        pool = database.engine.pool
        assert pool.size() == 3  # type: ignore[attr-defined]
        connections = [database.engine.connect() for _ in range(4)]
        for connection in connections:
            connection.close()
        assert pool.checkedin() == 3  # type: ignore[attr-defined]  # the overflow one closed
    finally:
        database.dispose()
