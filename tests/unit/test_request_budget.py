"""Request budgets: a request past its time or abandoned by its client starts no statement,
and SQLite interrupts the one running; the middleware hears a disconnect that comes after
the body was read."""

from __future__ import annotations

import threading
import time
from pathlib import Path
from typing import Any

import anyio
import pytest
from sqlalchemy import text
from sqlalchemy.exc import OperationalError

from service.db.session import Database
from service.problems import database_unavailable
from service.request_budget import (
    CURRENT,
    Budget,
    RequestAbandonedError,
    RequestBudgetMiddleware,
)

# A recursive count to fifty million: seconds of work for SQLite (common practice, no source).
SLOW = ("WITH RECURSIVE c(x) AS (SELECT 1 UNION ALL SELECT x + 1 FROM c WHERE x < 50000000) "
        "SELECT count(*) FROM c")


def _budget(seconds: float = 60.0) -> Budget:
    return Budget(seconds, time.monotonic() + seconds)


def test_no_statement_starts_past_the_budget_or_after_the_client_left(
        database_url: str) -> None:
    database = Database(database_url)
    try:
        with database.engine.connect() as connection:
            late = _budget(0.0)
            token = CURRENT.set(late)
            try:
                time.sleep(0.01)
                with pytest.raises(RequestAbandonedError, match="longer than its budget"):
                    connection.execute(text("SELECT 1"))
                gone = _budget()
                gone.gone.set()
                CURRENT.set(gone)
                with pytest.raises(RequestAbandonedError, match="closed the connection"):
                    connection.execute(text("SELECT 1"))
            finally:
                CURRENT.reset(token)
            assert connection.execute(text("SELECT 1")).scalar() == 1  # no budget: runs
    finally:
        database.dispose()


@pytest.mark.timeout(60)
def test_sqlite_interrupts_the_running_statement_when_the_client_leaves(
        tmp_path: Path) -> None:
    database = Database(f"sqlite:///{tmp_path / 'budget.db'}", statement_timeout_ms=0)
    budget = _budget()
    threading.Timer(0.2, budget.gone.set).start()
    token = CURRENT.set(budget)
    try:
        with pytest.raises(OperationalError, match="interrupted") as caught, \
                database.engine.connect() as connection:
            connection.execute(text(SLOW)).scalar()
        assert database_unavailable(caught.value)
    finally:
        CURRENT.reset(token)
        database.dispose()


def test_the_middleware_hears_a_disconnect_after_the_body() -> None:
    seen: dict[str, Any] = {}

    async def app(scope: Any, receive: Any, send: Any) -> None:
        seen["body"] = (await receive())["body"]
        budget = CURRENT.get()
        assert budget is not None
        # Blocking work on a worker thread, as the routes do; it sees the same budget.
        seen["gone"] = await anyio.to_thread.run_sync(budget.gone.wait, 5)
        seen["reason"] = budget.spent()

    messages = [{"type": "http.request", "body": b"rows", "more_body": False},
                {"type": "http.disconnect"}]

    async def receive() -> dict[str, Any]:
        if len(messages) == 1:
            await anyio.sleep(0.1)  # the client leaves while the work runs
        return messages.pop(0)

    async def send(message: Any) -> None:
        raise AssertionError("nothing is sent to a client that left")

    async def main() -> None:
        await RequestBudgetMiddleware(app, seconds=30)({"type": "http"}, receive, send)

    anyio.run(main)
    assert seen == {"body": b"rows", "gone": True,
                    "reason": "the client closed the connection"}
    assert CURRENT.get() is None
