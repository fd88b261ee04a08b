"""``inrush reanalyze``: re-run stored diagnoses in parallel processes.

For nightly runs and after an upgrade of the detectors: every selected experiment is
diagnosed again from its stored rows, exactly as after an upload. A result that differs from
the latest snapshot becomes a new diagnosis version and may open, update or resolve
incidents (and queue their notifications); an identical one changes nothing. Each process has
its own engine and takes the experiment's write lock (``service.db.locks``), so a re-analysis
never races an upload handled by a running service.
"""

from __future__ import annotations

import argparse
import os
import sys
import time
from collections.abc import Callable, Iterable, Sequence
from dataclasses import dataclass
from typing import TYPE_CHECKING

from . import EXIT_BAD_INPUT, EXIT_FAILURE, EXIT_OK

if TYPE_CHECKING:
    from ..db.session import Database

# Named in the reason of an alert this run resolves: "<cause> no longer supports it: ...".
REANALYSIS = "a re-analysis with the current detectors"

NEW_VERSION, UNCHANGED, SKIPPED, FAILED = "new_version", "unchanged", "skipped", "failed"


@dataclass(frozen=True)
class Outcome:
    """What re-analysing one experiment did."""

    experiment_id: str
    state: str  # new_version | unchanged | skipped (never diagnosed) | failed
    seconds: float
    version: int | None = None
    status: str | None = None
    opened: int = 0
    resolved: int = 0
    error: str | None = None


def register(subparsers: argparse._SubParsersAction) -> None:  # type: ignore[type-arg]
    reanalyze = subparsers.add_parser(
        "reanalyze", help="re-run the diagnosis of stored experiments",
        description="Diagnose experiments again from their stored rows with the installed "
                    "detectors (nightly, or after an upgrade). A changed result becomes a new "
                    "diagnosis version and opens or resolves incidents, with notifications, as "
                    "an upload would; experiments never diagnosed are skipped. Works on the "
                    "database named by INRUSH_DATABASE_URL, also while the service runs. "
                    "Exit status 1 if any experiment failed.")
    which = reanalyze.add_mutually_exclusive_group(required=True)
    which.add_argument("--all", action="store_true", help="every experiment")
    which.add_argument("--experiment", action="append", metavar="ID",
                       help="this experiment (repeat for several)")
    reanalyze.add_argument(
        "--jobs", type=int, default=None, metavar="N",
        help="processes, each with its own database connection (default: the number of CPUs "
             "on PostgreSQL, 1 on SQLite, whose single writer makes processes take turns)")
    reanalyze.add_argument("--no-progress", action="store_true", help="no progress bar")
    reanalyze.set_defaults(handler=run_reanalyze)


def run_reanalyze(args: argparse.Namespace) -> int:
    from sqlalchemy.exc import SQLAlchemyError

    from ..db.session import Database
    from ..settings import Settings

    if args.jobs is not None and args.jobs < 1:
        print("inrush reanalyze: --jobs must be at least 1", file=sys.stderr)
        return EXIT_BAD_INPUT
    url = Settings().database_url
    database = Database(url)
    try:
        ids, missing = _select(database, None if args.all else args.experiment)
        dialect = database.dialect
    except SQLAlchemyError as error:
        print(f"inrush reanalyze: cannot read the experiments of INRUSH_DATABASE_URL: {error}",
              file=sys.stderr)
        return EXIT_FAILURE
    finally:
        database.dispose()  # before any worker process starts
    if missing:
        print("inrush reanalyze: no experiment " + ", ".join(repr(m) for m in missing),
              file=sys.stderr)
        return EXIT_BAD_INPUT
    if not ids:
        print("no experiments to re-analyse")
        return EXIT_OK
    if args.jobs is not None:
        jobs = args.jobs
    else:
        jobs = (os.cpu_count() or 1) if dialect == "postgresql" else 1
    jobs = min(jobs, len(ids))
    started = time.perf_counter()
    outcomes = reanalyze(url, ids, jobs=jobs, progress=not args.no_progress)
    print(summary(outcomes, jobs=jobs, seconds=time.perf_counter() - started))
    return EXIT_FAILURE if any(o.state == FAILED for o in outcomes) else EXIT_OK


def reanalyze(url: str, experiment_ids: Sequence[str], *, jobs: int = 1,
              progress: bool = False) -> list[Outcome]:
    """Re-analyse ``experiment_ids`` on the database at ``url`` with ``jobs`` processes (1: in
    this process); one outcome per experiment, in the order given."""
    from tqdm import tqdm

    with tqdm(total=len(experiment_ids), unit="experiment", disable=not progress,
              file=sys.stderr, dynamic_ncols=True) as bar:
        def done(outcome: Outcome) -> None:
            bar.update(1)
            if outcome.state == FAILED:
                bar.set_postfix_str(f"failed: {outcome.experiment_id}")

        if jobs <= 1:
            found = _run_here(url, experiment_ids, done)
        else:
            found = _run_in_processes(url, experiment_ids, jobs, done)
    return [found[i] for i in experiment_ids]


def reanalyze_one(database: Database, experiment_id: str) -> Outcome:
    """Diagnose one experiment again (computed outside its write lock, stored under it, see
    :func:`service.analysis.rediagnose`); failures become an outcome."""
    from ..analysis import latest_snapshot, rediagnose
    from ..db.models import Experiment

    started = time.perf_counter()
    try:
        with database.sessions() as session:
            if session.get(Experiment, experiment_id) is None:
                return Outcome(experiment_id, FAILED, time.perf_counter() - started,
                               error="the experiment does not exist (any more)")
            if latest_snapshot(session, experiment_id, documents=False) is None:
                return Outcome(experiment_id, SKIPPED, time.perf_counter() - started)
            refresh = rediagnose(session, experiment_id, cause=REANALYSIS)
            snapshot = refresh.snapshot
            return Outcome(experiment_id, NEW_VERSION if refresh.new_version else UNCHANGED,
                           time.perf_counter() - started, version=snapshot.version,
                           status=snapshot.status, opened=len(refresh.incidents.opened),
                           resolved=len(refresh.incidents.resolved))
    except Exception as error:  # one experiment's failure must not stop the others
        return Outcome(experiment_id, FAILED, time.perf_counter() - started,
                       error=f"{type(error).__name__}: {error}".strip())


def summary(outcomes: Iterable[Outcome], *, jobs: int, seconds: float) -> str:
    """The report printed at the end: totals, then each experiment that changed or failed."""
    outcomes = list(outcomes)
    count = {state: sum(o.state == state for o in outcomes)
             for state in (NEW_VERSION, UNCHANGED, SKIPPED, FAILED)}
    diagnosed = [o for o in outcomes if o.state in (NEW_VERSION, UNCHANGED)]
    lines = [
        f"re-analysed {len(outcomes)} experiment{'s' * (len(outcomes) != 1)} in {seconds:.1f} s "
        f"with {jobs} process{'es' * (jobs != 1)}: {count[NEW_VERSION]} new diagnosis "
        f"version{'s' * (count[NEW_VERSION] != 1)}, {count[UNCHANGED]} unchanged, "
        f"{count[SKIPPED]} skipped (never diagnosed), {count[FAILED]} failed; incidents opened "
        f"{sum(o.opened for o in outcomes)}, resolved {sum(o.resolved for o in outcomes)}"]
    if diagnosed:
        slowest = max(diagnosed, key=lambda o: o.seconds)
        lines.append(f"slowest: {slowest.experiment_id} ({slowest.seconds * 1000:.0f} ms)")
    for o in outcomes:
        if o.state == NEW_VERSION:
            lines.append(f"  {o.experiment_id}: new version {o.version} ({o.status}), incidents "
                         f"opened {o.opened}, resolved {o.resolved}")
    failed = [o for o in outcomes if o.state == FAILED]
    if failed:
        lines.append("failed:")
        lines.extend(f"  {o.experiment_id}: {o.error}" for o in failed)
    return "\n".join(lines)


def _select(database: Database, wanted: Sequence[str] | None) -> tuple[list[str], list[str]]:
    """(experiment ids to re-analyse, requested ids that do not exist); all when ``None``."""
    from sqlalchemy import select

    from ..db.models import Experiment

    with database.sessions() as session:
        if wanted is None:
            return list(session.scalars(select(Experiment.id).order_by(Experiment.id))), []
        unique = list(dict.fromkeys(wanted))
        known = set(session.scalars(select(Experiment.id).where(Experiment.id.in_(unique))))
    return [i for i in unique if i in known], [i for i in unique if i not in known]


def _run_here(url: str, experiment_ids: Sequence[str], done: Callable[[Outcome], None]
              ) -> dict[str, Outcome]:
    from ..db.session import Database

    database = Database(url)
    found: dict[str, Outcome] = {}
    try:
        for experiment_id in experiment_ids:
            found[experiment_id] = outcome = reanalyze_one(database, experiment_id)
            done(outcome)
    finally:
        database.dispose()
    return found


def _run_in_processes(url: str, experiment_ids: Sequence[str], jobs: int,
                      done: Callable[[Outcome], None]) -> dict[str, Outcome]:
    import multiprocessing
    from concurrent.futures import ProcessPoolExecutor, as_completed

    # "spawn": a fresh interpreter per process, so no database connection, lock or thread of
    # this process is inherited.
    found: dict[str, Outcome] = {}
    with ProcessPoolExecutor(max_workers=jobs, mp_context=multiprocessing.get_context("spawn"),
                             initializer=_start_worker, initargs=(url,)) as pool:
        futures = {pool.submit(_worker_reanalyze, i): i for i in experiment_ids}
        for future in as_completed(futures):
            experiment_id = futures[future]
            try:
                outcome = future.result()
            except Exception as error:  # the process died (BrokenProcessPool) or similar
                outcome = Outcome(experiment_id, FAILED, 0.0,
                                  error=f"{type(error).__name__}: {error}".strip())
            found[experiment_id] = outcome
            done(outcome)
    return found


_WORKER_DATABASE: Database | None = None


def _start_worker(url: str) -> None:
    """Process initialiser: this process's own engine."""
    global _WORKER_DATABASE
    from ..db.session import Database

    _WORKER_DATABASE = Database(url)


def _worker_reanalyze(experiment_id: str) -> Outcome:
    assert _WORKER_DATABASE is not None, "the process was not initialised"
    return reanalyze_one(_WORKER_DATABASE, experiment_id)
