"""The per-experiment write lock, shared by every worker process and replica.

Writes that re-diagnose an experiment (observation uploads, allocation changes, campaign
registrations, ``inrush reanalyze``) are serialised per experiment, so that each diagnosis sees
every row committed before it and two writers never both compute snapshot version n + 1:

* PostgreSQL: a transaction-scoped advisory lock keyed by a 64-bit hash of the experiment id
  (``pg_advisory_xact_lock``); writers of other experiments do not wait, and the lock is
  released at commit or rollback. It is re-entrant within a transaction.
* SQLite: the database-wide write lock, held from the start of a ``BEGIN IMMEDIATE``
  transaction (:func:`service.db.session.begin_write`); SQLite has a single writer anyway.

:func:`lock_experiment_for_write` takes the advisory lock before the experiment's row lock,
always in that order, so two writers cannot deadlock on the pair.

Example:
    >>> experiment_lock_key("route-cards") == experiment_lock_key("route-cards")
    True
    >>> -(2**63) <= experiment_lock_key("route-cards") < 2**63
    True
"""

from __future__ import annotations

import hashlib

from sqlalchemy import select, text, update
from sqlalchemy.orm import Session

from .models import Experiment
from .session import _BEGIN_OPTION, begin_write

# Keeps Inrush's keys apart from the migration lock and from other users of the server.
_KEY_PREFIX = b"inrush.experiment-write:"


def experiment_lock_key(experiment_id: str) -> int:
    """The signed 64-bit advisory-lock key of an experiment (stable across processes; Python's
    own ``hash`` of a string is salted per process, so it cannot be used)."""
    digest = hashlib.blake2b(_KEY_PREFIX + experiment_id.encode("utf-8"), digest_size=8)
    return int.from_bytes(digest.digest(), "big", signed=True)


def hold_experiment_lock(session: Session, experiment_id: str) -> None:
    """Make sure the session's transaction holds the experiment's write lock.

    On PostgreSQL the advisory lock is taken (at once if this transaction holds it already).
    On SQLite a transaction begun by ``begin_write`` holds the lock already; any other one
    takes it now with a write that changes nothing. That fails (database is locked) rather
    than going on if the transaction read data that another writer has replaced since.
    """
    dialect = session.get_bind().dialect.name
    if dialect == "postgresql":
        session.execute(text("SELECT pg_advisory_xact_lock(:key)"),
                        {"key": experiment_lock_key(experiment_id)})
    elif dialect == "sqlite":
        if session.connection().get_execution_options().get(_BEGIN_OPTION) != "IMMEDIATE":
            session.execute(update(Experiment).where(Experiment.id == experiment_id)
                            .values(updated_at=Experiment.updated_at)
                            .execution_options(synchronize_session=False))
    else:
        raise RuntimeError(f"experiment locks are implemented for SQLite and PostgreSQL, "
                           f"not {dialect}")


def lock_experiment_for_write(session: Session, experiment_id: str) -> Experiment | None:
    """Start the write transaction, take the experiment's lock, then lock and (re)load its row.

    Any read transaction open before is ended first (see ``begin_write``). The row is loaded
    with ``populate_existing`` so that an Experiment the session read before the lock is
    refreshed with what other writers committed meanwhile (allocation, webhook). ``None`` when
    the experiment does not exist.
    """
    begin_write(session)
    hold_experiment_lock(session, experiment_id)
    return session.scalar(select(Experiment).where(Experiment.id == experiment_id)
                          .with_for_update().execution_options(populate_existing=True))
