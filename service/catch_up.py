"""Diagnoses owed after a stop: a background thread that re-diagnoses stale experiments.

An upload commits its rows (and bumps the experiment's ``data_version``) before its diagnosis
is computed and stored (:func:`service.analysis.rediagnose`). A process that stops in
between leaves the rows stored and the latest diagnosis older than them; nothing is lost, but
the diagnosis and its alerts are owed. This thread finds such experiments
(:func:`service.analysis.stale_experiments`) once at startup and then every
``INRUSH_CATCH_UP_SECONDS``, and diagnoses them. Replicas may run it at once: the version check
under the experiment's lock stores each result once, so alerts still open and notify once.
"""

from __future__ import annotations

import logging
import threading

from .alerting import CORRECTED_DATA
from .analysis import rediagnose, stale_experiments
from .db.session import Database

logger = logging.getLogger("inrush.catch_up")


def catch_up(database: Database) -> list[str]:
    """Diagnose every stale experiment once; returns their ids."""
    with database.sessions() as session:
        stale = stale_experiments(session)
    for experiment_id in stale:
        try:
            with database.sessions() as session:
                rediagnose(session, experiment_id, cause=CORRECTED_DATA)
        except LookupError:
            continue  # deleted meanwhile
        except Exception:  # one experiment's failure must not stop the others
            logger.exception("catching up the diagnosis of %s failed", experiment_id)
    return stale


class CatchUpThread:
    """Runs :func:`catch_up` at start and then every ``interval`` seconds until stopped."""

    def __init__(self, database: Database, interval: float) -> None:
        self.database = database
        self.interval = interval
        self._stop = threading.Event()
        self._thread = threading.Thread(target=self._loop, name="inrush-catch-up", daemon=True)

    def start(self) -> None:
        self._thread.start()

    def stop(self, timeout: float = 30.0) -> None:
        self._stop.set()
        self._thread.join(timeout)

    def _loop(self) -> None:
        while not self._stop.is_set():
            try:
                catch_up(self.database)
            except Exception:  # a database hiccup must not end the thread
                logger.exception("catching up stale diagnoses failed; retrying")
            if self.interval <= 0:
                return
            self._stop.wait(self.interval)


__all__ = ["CatchUpThread", "catch_up"]
