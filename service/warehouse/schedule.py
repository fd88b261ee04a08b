"""Daily pulls inside ``inrush serve``: at ``INRUSH_PULL_AT`` (UTC), every experiment with a
pull config is pulled as of yesterday in its config's zone and stored through the ingest path.

Each run is recorded (``pull_runs``) with its report or its error. A run is claimed by
inserting its row first: the unique (experiment, as_of) key lets exactly one worker process
run each experiment's day, however many workers or replicas share the database. A failed day
is not retried until the next day's run, which rewrites every earlier day anyway (the cube
always covers the whole experiment).
"""

from __future__ import annotations

import datetime as dt
import logging
import threading
from dataclasses import dataclass
from typing import Any

from detectors.errors import InputError

logger = logging.getLogger("inrush.pull")

OK, FAILED, RUNNING = "ok", "failed", "running"


@dataclass(frozen=True)
class RunOutcome:
    experiment_id: str
    as_of: dt.date
    state: str
    error: str | None = None


def parse_time_of_day(text: str) -> dt.time:
    hours, _, minutes = text.partition(":")
    return dt.time(int(hours), int(minutes or 0))


def run_due(database: Any, *, at: dt.time, now: dt.datetime, future_days: int
            ) -> list[RunOutcome]:
    """Run every pull due at ``now`` and not yet claimed; what each did."""
    from sqlalchemy import select

    from ..db.pull_models import PullSchedule

    if now.astimezone(dt.UTC).time() < at:
        return []
    with database.sessions() as session:
        schedules = [(s.experiment_id, dict(s.config))
                     for s in session.scalars(select(PullSchedule)
                                              .order_by(PullSchedule.experiment_id))]
    outcomes = []
    for experiment_id, document in schedules:
        outcome = _run_one(database, experiment_id, document, now, future_days)
        if outcome is not None:
            outcomes.append(outcome)
    return outcomes


def _run_one(database: Any, experiment_id: str, document: dict[str, Any], now: dt.datetime,
             future_days: int) -> RunOutcome | None:
    from sqlalchemy.exc import IntegrityError

    from ..db.models import utcnow
    from ..db.pull_models import PullRun
    from .config import config_from_dict
    from .deliver import store_into
    from .pull import default_as_of, run_pull

    try:
        config = config_from_dict(document)
        as_of = default_as_of(config, now)
    except InputError as error:
        config, as_of, early = None, now.astimezone(dt.UTC).date() - dt.timedelta(days=1), error
    else:
        early = None
    with database.sessions() as session:
        run = PullRun(experiment_id=experiment_id, as_of=as_of, state=RUNNING,
                      started_at=utcnow())
        session.add(run)
        try:
            session.commit()
        except IntegrityError:  # claimed by another process, or already run today
            return None
        run_id = run.id
    state, error_text, written, report = FAILED, None, None, None
    try:
        if early is not None:
            raise early
        assert config is not None
        result = run_pull(config, as_of)
        report = result.report()
        delivered = store_into(database, result.cube, experiment=experiment_id,
                               future_days=future_days, today=now.date())
        written, state = delivered.written, OK
        report["delivered"] = {"written": delivered.written, "status": delivered.status}
    except InputError as error:
        error_text = "; ".join(f"{p.field}: {p.message}" for p in error.problems[:20])
    except Exception as error:  # recorded and logged, the scheduler goes on
        logger.exception("pull of %s as of %s failed", experiment_id, as_of)
        error_text = f"{type(error).__name__}: {error}"[:2000]
    with database.sessions() as session:
        stored = session.get(PullRun, run_id)
        assert stored is not None
        stored.state, stored.error, stored.written, stored.report = (
            state, error_text, written, report)
        stored.finished_at = utcnow()
        session.commit()
    if state == FAILED:
        logger.warning("pull of %s as of %s failed: %s", experiment_id, as_of, error_text)
    return RunOutcome(experiment_id, as_of, state, error_text)


class PullScheduler:
    """A daemon thread that calls :func:`run_due` every ``interval`` seconds."""

    def __init__(self, database: Any, *, at: dt.time, future_days: int,
                 interval: float = 60.0) -> None:
        self._database, self._at, self._future_days = database, at, future_days
        self._interval = interval
        self._stop = threading.Event()
        self._thread = threading.Thread(target=self._loop, name="inrush-pull", daemon=True)

    def start(self) -> PullScheduler:
        self._thread.start()
        return self

    def stop(self, timeout: float = 5.0) -> None:
        self._stop.set()
        self._thread.join(timeout)

    def _loop(self) -> None:
        while not self._stop.is_set():
            try:
                run_due(self._database, at=self._at, now=dt.datetime.now(dt.UTC),
                        future_days=self._future_days)
            except Exception:  # a database outage must not end the thread
                logger.exception("scheduled pulls could not be started")
            self._stop.wait(self._interval)
