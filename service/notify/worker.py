"""The delivery worker: claims due outbox rows, delivers them, records every attempt.

Several workers (threads, processes, replicas) may run against one database; each row is
delivered by one of them at a time:

* PostgreSQL: the due row is picked with ``SELECT ... FOR UPDATE SKIP LOCKED`` and leased in
  the same transaction, so concurrent workers pick different rows without waiting.
* SQLite: a compare-and-set ``UPDATE ... WHERE id = ? AND (claimed_until IS NULL OR
  claimed_until < now)``; only the worker whose update changed the row owns it.

The lease (``claimed_until``) outlives one delivery; a worker that dies mid-delivery leaves a
lease that expires, after which another worker retries the row. Delivery is therefore
at-least-once: receivers drop duplicates by ``webhook-id``, which is the same on every retry.
The HTTP call happens outside any database transaction.
"""

from __future__ import annotations

import datetime as dt
import logging
import os
import random
import socket
import threading
import uuid
from collections.abc import Callable, Collection
from dataclasses import dataclass

import httpx
from sqlalchemy import ColumnElement, Select, and_, or_, select, update
from sqlalchemy.orm import Session

from ..db.models import Experiment, utcnow
from ..db.notify_models import DELIVERED, DELIVERING, FAILED, PENDING, DeliveryAttempt, Outbox
from ..db.session import Database, begin_write
from . import backoff
from .delivery import DeliveryResult, deliver, encode_body, make_client
from .safety import Resolver, system_resolver
from .settings import NotifySettings

logger = logging.getLogger("inrush.notify")

LEASE_MARGIN_SECONDS = 60.0
LOST_LEASE = ("no result was recorded: the worker's lease expired (the worker stopped or "
              "crashed during the delivery)")


@dataclass(frozen=True, slots=True)
class Claim:
    """A row this worker owns until ``until``; ``attempt`` is the number of this try."""

    outbox_id: int
    attempt: int
    until: dt.datetime


def due(now: dt.datetime) -> ColumnElement[bool]:
    """Rows to deliver now: waiting or abandoned by a dead worker, and not leased."""
    return and_(Outbox.status.in_((PENDING, DELIVERING)), Outbox.next_attempt_at <= now,
                or_(Outbox.claimed_until.is_(None), Outbox.claimed_until < now))


class NotifyWorker:
    """Delivers queued notifications of one database; :meth:`run_once` does one pass."""

    def __init__(self, database: Database, settings: NotifySettings | None = None, *,
                 name: str | None = None, client: httpx.Client | None = None,
                 resolver: Resolver = system_resolver, rng: random.Random | None = None,
                 clock: Callable[[], dt.datetime] = utcnow,
                 schedule: tuple[float, ...] = backoff.NOMINAL_DELAYS) -> None:
        self.database = database
        self.settings = settings or NotifySettings()
        self.name = name or f"{socket.gethostname()}:{os.getpid()}:{uuid.uuid4().hex[:8]}"
        self.client = client or make_client(self.settings.webhook_timeout_seconds)
        self.resolver = resolver
        self.rng = rng or random.Random()
        self.clock = clock
        self.schedule = schedule
        self.lease_seconds = 3 * self.settings.webhook_timeout_seconds + LEASE_MARGIN_SECONDS
        self._stop = threading.Event()
        self._thread: threading.Thread | None = None

    # -- claiming ---------------------------------------------------------------------------

    def claim_next(self, skip: Collection[int] = ()) -> Claim | None:
        """Lease the next due row (not one of ``skip``), or ``None`` when nothing is due."""
        with self.database.sessions() as session:
            if self.database.dialect == "postgresql":
                return self._claim_skip_locked(session, skip)
            return self._claim_compare_and_set(session, skip)

    @staticmethod
    def _candidates(now: dt.datetime, skip: Collection[int]) -> Select[tuple[int, str, int]]:
        query = select(Outbox.id, Outbox.status, Outbox.attempts).where(due(now))
        if skip:
            query = query.where(Outbox.id.not_in(list(skip)))
        return query.order_by(Outbox.next_attempt_at, Outbox.id)

    def _claim_skip_locked(self, session: Session, skip: Collection[int]) -> Claim | None:
        now = self.clock()
        with session.begin():
            row = session.execute(
                self._candidates(now, skip)
.limit(1).with_for_update(skip_locked=True)).first()
            if row is None:
                return None
            return self._lease(session, row.id, row.status, row.attempts, now, None)

    def _claim_compare_and_set(self, session: Session, skip: Collection[int]) -> Claim | None:
        now = self.clock()
        candidates = session.execute(self._candidates(now, skip).limit(5)).all()
        session.rollback()
        for row in candidates:
            begin_write(session)
            claim = self._lease(session, row.id, row.status, row.attempts, now, due(now))
            session.commit()
            if claim is not None:
                return claim
        return None

    def _lease(self, session: Session, outbox_id: int, status: str, attempts: int,
               now: dt.datetime, guard: ColumnElement[bool] | None) -> Claim | None:
        """Take the row (``guard``: the compare-and-set condition); record a lost attempt."""
        until = now + dt.timedelta(seconds=self.lease_seconds)
        exhausted = attempts >= len(self.schedule)
        values = ({"status": FAILED, "claimed_by": None, "claimed_until": None,
                   "next_attempt_at": None} if exhausted else
                  {"status": DELIVERING, "claimed_by": self.name, "claimed_until": until,
                   "attempts": Outbox.attempts + 1})
        statement = update(Outbox).where(Outbox.id == outbox_id)
        if guard is not None:
            statement = statement.where(guard)
        result = session.execute(statement.values(**values)
                                 .execution_options(synchronize_session=False))
        if result.rowcount != 1:  # type: ignore[attr-defined]
            return None  # another worker won the row
        if status == DELIVERING:
            session.add(DeliveryAttempt(outbox_id=outbox_id, attempt=attempts, started_at=now,
                                        error=LOST_LEASE))
        if exhausted:
            logger.warning("notification %s failed: its last attempt was lost", outbox_id)
            return None
        return Claim(outbox_id=outbox_id, attempt=attempts + 1, until=until)

    # -- delivering -------------------------------------------------------------------------

    def deliver_claim(self, claim: Claim) -> DeliveryResult:
        """Deliver a leased row and record the outcome."""
        with self.database.sessions() as session:
            row = session.get(Outbox, claim.outbox_id)
            if row is None:  # deleted with its experiment meanwhile
                return DeliveryResult(False, True, None, "the notification was deleted", None, 0)
            experiment = session.get(Experiment, row.experiment_id)
            url = experiment.webhook_url if experiment else None
            secret = experiment.webhook_secret if experiment else None
            event_id, body = row.event_id, encode_body(row.payload)
            session.rollback()
        started = self.clock()
        if not url:
            outcome = DeliveryResult(False, True, None, "the experiment has no webhook any more",
                                     None, 0)
        else:
            outcome = deliver(self.client, url, secret, event_id, body,
                              allow_hosts=self.settings.allowed_hosts(), resolver=self.resolver,
                              timestamp=int(started.timestamp()),
                              timeout_seconds=self.settings.webhook_timeout_seconds)
        self._record(claim, started, outcome)
        return outcome

    def _record(self, claim: Claim, started: dt.datetime, outcome: DeliveryResult) -> None:
        finished = self.clock()
        if outcome.delivered:
            values = {"status": DELIVERED, "delivered_at": finished, "next_attempt_at": None}
        else:
            retry_at = (None if outcome.permanent else
                        backoff.next_attempt_at(finished, claim.attempt, self.rng, self.schedule))
            values = ({"status": FAILED, "next_attempt_at": None} if retry_at is None else
                      {"status": PENDING, "next_attempt_at": retry_at})
        with self.database.sessions() as session:
            begin_write(session)
            session.add(DeliveryAttempt(
                outbox_id=claim.outbox_id, attempt=claim.attempt, started_at=started,
                duration_ms=outcome.duration_ms, status_code=outcome.status_code,
                error=outcome.error, response_excerpt=outcome.response_excerpt))
            # Only the lease holder moves the row on (a lease lost to a slow delivery leaves
            # the row to the worker that holds it now).
            session.execute(update(Outbox)
                            .where(Outbox.id == claim.outbox_id, Outbox.claimed_by == self.name)
                            .values(claimed_by=None, claimed_until=None, **values)
                            .execution_options(synchronize_session=False))
            session.commit()
        if not outcome.delivered:
            logger.info("notification %s attempt %s failed: %s", claim.outbox_id,
                        claim.attempt, outcome.error)

    def run_once(self, limit: int = 100) -> int:
        """Deliver due rows until none is left (at most ``limit``), each at most once per
        pass (a retry due at once waits for the next pass); the number attempted."""
        attempted: set[int] = set()
        while len(attempted) < limit and not self._stop.is_set():
            claim = self.claim_next(skip=attempted)
            if claim is None:
                break
            attempted.add(claim.outbox_id)
            self.deliver_claim(claim)
        return len(attempted)

    # -- background thread ------------------------------------------------------------------

    def start(self) -> None:
        """Run :meth:`run_once` every ``notify_poll_seconds`` in a daemon thread."""
        if self._thread is not None:
            return
        self._stop.clear()
        self._thread = threading.Thread(target=self._loop, name="inrush-notify", daemon=True)
        self._thread.start()

    def stop(self, timeout: float | None = None) -> None:
        """Ask the thread to stop after the current delivery and wait for it."""
        self._stop.set()
        if self._thread is not None:
            self._thread.join(timeout if timeout is not None
                              else self.settings.webhook_timeout_seconds + 5)
            self._thread = None
        self.client.close()

    def _loop(self) -> None:
        while not self._stop.is_set():
            try:
                self.run_once()
            except Exception:  # a database hiccup must not end the worker
                logger.exception("notification worker pass failed; retrying")
            self._stop.wait(self.settings.notify_poll_seconds)


def start_worker(database: Database, settings: NotifySettings | None = None
                 ) -> NotifyWorker | None:
    """Start a worker unless ``INRUSH_NOTIFY_WORKER=0``; returns it (to stop) or ``None``."""
    settings = settings or NotifySettings()
    if not settings.notify_worker:
        return None
    worker = NotifyWorker(database, settings)
    worker.start()
    return worker
