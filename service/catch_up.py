"""Diagnoses owed after a stop: a background thread that re-diagnoses stale experiments.

An upload commits its rows (and bumps the experiment's ``data_version``) before its diagnosis
is computed and stored (:func:`service.analysis.rediagnose`). A process that stops in
between leaves the rows stored and the latest diagnosis older than them; nothing is lost, but
the diagnosis and its alerts are owed. This thread finds such experiments
(:func:`service.analysis.stale_experiments`) at startup and then every
``INRUSH_CATCH_UP_SECONDS`` (taking only those still stale at the version the pass before
found: a newer change is likely being diagnosed by the request that made it), and diagnoses
them. Replicas may run it at once: the version check
under the experiment's lock stores each result once, so alerts still open and notify once.
"""

from __future__ import annotations

import logging
import threading

from .alerting import CORRECTED_DATA
from .analysis import rediagnose, stale_experiments
from .db.session import Database

logger = logging.getLogger("inrush.catch_up")


def catch_up(database: Database, *, seen: dict[str, int] | None = None) -> dict[str, int]:
    """Diagnose the stale experiments; returns every stale one found, with its data version.

    With ``seen`` (what the previous pass found) only those still stale at the same version
    are diagnosed: one whose change is newer may be in the hands of the request that made
    it, which diagnoses it within moments."""
    with database.sessions() as session:
        stale = stale_experiments(session)
    for experiment_id, version in stale.items():
        if seen is not None and seen.get(experiment_id) != version:
            continue
        try:
            with database.sessions() as session:
                rediagnose(session, experiment_id, cause=CORRECTED_DATA)
        except LookupError:
            continue  # deleted meanwhile
        except Exception:  # one experiment's failure must not stop the others
            logger.exception("catching up the diagnosis of %s failed", experiment_id)
    return stale


class CatchUpThread:
    """Runs :func:`catch_up` at start (every stale experiment) and then every ``interval``
    seconds (those found stale at the same version by the pass before) until stopped."""

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
        seen: dict[str, int] | None = None
        while not self._stop.is_set():
            try:
                seen = catch_up(self.database, seen=seen)
            except Exception:  # a database hiccup must not end the thread
                logger.exception("catching up stale diagnoses failed; retrying")
            if self.interval <= 0:
                return
            self._stop.wait(self.interval)


__all__ = ["CatchUpThread", "catch_up"]
