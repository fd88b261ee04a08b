"""PostgreSQL reads awaited on the event loop, for the poll fast path (``service.revalidation``).

A conditional GET that is answered 304 costs one indexed read; handing that read to a worker
thread and back costs more than the read itself. :class:`AsyncReads` keeps a few psycopg
asynchronous connections (``psycopg_pool.AsyncConnectionPool``, autocommit, not checked before
use) and awaits one query on the event loop. It is opened at the first read, in the loop that
serves requests, and closed when the application stops.

Nothing here retries or waits long: a read that fails (a connection the server closed, an
outage, no free connection within :data:`WAIT_FOR_CONNECTION_S`) raises
:class:`QuickReadError`, and the caller leaves the request to the routes.
"""

from __future__ import annotations

import asyncio
from collections.abc import Mapping
from typing import Any

from sqlalchemy.engine import make_url

WAIT_FOR_CONNECTION_S = 1.0


class QuickReadError(RuntimeError):
    """The read could not be made; the routes should answer instead."""


class AsyncReads:
    """A small pool of asynchronous PostgreSQL connections for single-row reads."""

    def __init__(self, url: str, size: int, *, connect_timeout_s: int = 5,
                 statement_timeout_ms: int = 30_000) -> None:
        # psycopg takes the libpq URL: the SQLAlchemy one without its driver name.
        self.conninfo = make_url(url).set(drivername="postgresql").render_as_string(
            hide_password=False)
        self.size = size
        self.connection_options: dict[str, Any] = {"autocommit": True,
                                                   "connect_timeout": connect_timeout_s}
        if statement_timeout_ms:
            self.connection_options["options"] = f"-c statement_timeout={statement_timeout_ms}"
        self._pool: Any = None
        self._loop: asyncio.AbstractEventLoop | None = None
        self._opening = asyncio.Lock()

    async def _opened_pool(self) -> Any:
        if self._pool is not None and self._loop is not asyncio.get_running_loop():
            # Connections belong to the loop that opened them (one per process when serving;
            # a test may run others): elsewhere the routes answer.
            raise QuickReadError("the connections belong to another event loop")
        if self._pool is None:
            async with self._opening:
                if self._pool is None:
                    from psycopg_pool import AsyncConnectionPool

                    pool = AsyncConnectionPool(self.conninfo, min_size=1, max_size=self.size,
                                               kwargs=self.connection_options, open=False,
                                               timeout=WAIT_FOR_CONNECTION_S)
                    await pool.open(wait=False)
                    self._pool, self._loop = pool, asyncio.get_running_loop()
        return self._pool

    async def fetch_one(self, query: str, parameters: Mapping[str, Any]) -> tuple[Any, ...] | None:
        """The first row of ``query`` (psycopg ``%(name)s`` parameters); raise
        :class:`QuickReadError` when it cannot be read."""
        import psycopg
        from psycopg_pool import PoolTimeout

        pool = await self._opened_pool()
        try:
            async with pool.connection() as connection:
                cursor = await connection.execute(query, parameters)
                row: tuple[Any, ...] | None = await cursor.fetchone()
                return row
        except (psycopg.Error, PoolTimeout, OSError) as error:
            raise QuickReadError(str(error)) from error

    async def close(self) -> None:
        """Close the connections (a later read opens a new pool, e.g. in another loop)."""
        pool, self._pool, self._loop = self._pool, None, None
        self._opening = asyncio.Lock()  # a lock, too, belongs to the loop that waited on it
        if pool is not None:
            await pool.close()
