"""Each request's time budget, and work given up when its client has gone away.

:class:`RequestBudgetMiddleware` gives every HTTP request a :class:`Budget`: a deadline
(``INRUSH_REQUEST_TIMEOUT_SECONDS`` after it arrived) and an abandonment flag, set when the
client disconnects. The budget travels in a context variable, which the worker threads of the
request inherit, and the database engine consults it (``service.db.session``):

* no statement starts once the budget is spent or the client has gone
  (:class:`RequestAbandonedError`, answered 503 with ``Retry-After``; nothing is written, the
  transaction rolls back);
* on SQLite a statement already running is interrupted as well (the progress handler);
  on PostgreSQL it ends at the statement timeout at the latest.

Work outside the database (the detectors) is not interrupted; the row and metric limits of
uploads bound it.
"""

from __future__ import annotations

import threading
import time
from contextvars import ContextVar
from dataclasses import dataclass, field

import anyio
from anyio.streams.memory import MemoryObjectReceiveStream, MemoryObjectSendStream
from starlette.types import ASGIApp, Message, Receive, Scope, Send


@dataclass
class Budget:
    """The time left to one request, and whether its client is still there."""

    seconds: float
    deadline: float
    gone: threading.Event = field(default_factory=threading.Event)

    def spent(self) -> str | None:
        """Why the request's work should stop now, or ``None`` while it may go on."""
        if self.gone.is_set():
            return "the client closed the connection"
        if time.monotonic() > self.deadline:
            return f"the request took longer than its budget of {self.seconds:g} s"
        return None


CURRENT: ContextVar[Budget | None] = ContextVar("inrush_request_budget", default=None)


class RequestAbandonedError(RuntimeError):
    """A database statement was not started: the request is past its budget or its client
    has gone away."""


def check_budget() -> None:
    """Raise :class:`RequestAbandonedError` when the current request should stop."""
    budget = CURRENT.get()
    reason = budget.spent() if budget is not None else None
    if reason is not None:
        raise RequestAbandonedError(reason)


def budget_spent() -> bool:
    """Whether the current request should stop (cheap: for SQLite's progress handler)."""
    budget = CURRENT.get()
    return budget is not None and budget.spent() is not None


class RequestBudgetMiddleware:
    """Sets each request's budget and watches for its client going away.

    A task of its own reads the server's ``receive`` channel for the whole request and hands
    the messages on to the application one at a time (so the body still streams with back
    pressure); an ``http.disconnect`` marks the budget. Without it a request whose body was
    read would never hear of the disconnect.
    """

    def __init__(self, app: ASGIApp, seconds: float) -> None:
        self.app = app
        self.seconds = seconds

    async def __call__(self, scope: Scope, receive: Receive, send: Send) -> None:
        if scope["type"] != "http":
            await self.app(scope, receive, send)
            return
        budget = Budget(self.seconds, time.monotonic() + self.seconds)
        token = CURRENT.set(budget)
        sender: MemoryObjectSendStream[Message]
        receiver: MemoryObjectReceiveStream[Message]
        sender, receiver = anyio.create_memory_object_stream(1)

        async def watch() -> None:
            async with sender:
                while True:
                    message = await receive()
                    if message["type"] == "http.disconnect":
                        budget.gone.set()
                    try:
                        await sender.send(message)
                    except (anyio.BrokenResourceError, anyio.ClosedResourceError):
                        return  # the application has finished
                    if message["type"] == "http.disconnect":
                        return

        async def relayed_receive() -> Message:
            try:
                return await receiver.receive()
            except anyio.EndOfStream:
                return {"type": "http.disconnect"}

        try:
            async with anyio.create_task_group() as tasks:
                tasks.start_soon(watch)
                try:
                    await self.app(scope, relayed_receive, send)
                finally:
                    receiver.close()
                    tasks.cancel_scope.cancel()
        except BaseExceptionGroup as group:  # the application's own error, not a group
            if len(group.exceptions) == 1:
                raise group.exceptions[0] from None
            raise
        finally:
            CURRENT.reset(token)
