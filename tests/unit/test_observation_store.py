"""Bulk upserts and columnar reads of observation rows (service.db.observation_store), on each
backend: what is read back is exactly what was written, a read right after an upload equals a
full read, and a failed transaction leaves nothing behind."""

from __future__ import annotations

import datetime as dt
import json
from collections.abc import Iterator

import numpy as np
import pytest
from sqlalchemy import func, select

from detectors import ObservationTable
from service.db.models import Experiment, Observation, utcnow
from service.db.observation_store import (
    ObservationColumns,
    read_observations,
    upsert_observations,
)
from service.db.session import Database

START = dt.date(2026, 3, 2)
ARMS = ["control", "cards"]


@pytest.fixture
def database(database_url: str) -> Iterator[Database]:
    db = Database(database_url)
    db.migrate()
    with db.sessions.begin() as session:
        now = utcnow()
        session.add(Experiment(id="trail-test", title="Trail test", start_date=START,
                               arms=ARMS, allocation=[{"from": START.isoformat(),
                                                       "weights": [0.5, 0.5]}],
                               created_at=now, updated_at=now))
    try:
        yield db
    finally:
        db.dispose()


def _columns(days: range, *, seed: int, metrics: tuple[str, ...] = ("hikes", "photos"),
             absent_every: int = 0) -> ObservationColumns:
    """Rows for every (day, arm, source) of ``days``; metric values with full float precision,
    and, with ``absent_every``, every n-th row without its second metric."""
    rng = np.random.default_rng(seed)
    keys = [(START + dt.timedelta(days=d), arm, source) for d in days for arm in ARMS
            for source in ("organic", "newsletter", "push")]
    count = len(keys)
    entered = rng.integers(50, 500, count)
    values: dict[str, np.ndarray] = {}
    present: dict[str, np.ndarray] = {}
    for position, name in enumerate(metrics):
        n = np.minimum(entered, rng.integers(10, 500, count)).astype(float)
        total = n * rng.random(count) * 3.7 + 1 / 3
        squares = total * total / n + rng.random(count) * 10 + 0.1
        values[name] = np.column_stack([n, total, squares])
        kept = np.ones(count, bool)
        if absent_every and position == 1:
            kept[::absent_every] = False
            values[name][~kept] = 0.0
        present[name] = kept
    return ObservationColumns(np.array([k[0] for k in keys], dtype="datetime64[D]"),
                              np.array([k[1] for k in keys]), np.array([k[2] for k in keys]),
                              entered.astype(np.int64), values, present)


def _take(columns: ObservationColumns, order: np.ndarray) -> ObservationColumns:
    return ObservationColumns(columns.dates[order], columns.arms[order], columns.sources[order],
                              columns.entered[order],
                              {k: v[order] for k, v in columns.metrics.items()},
                              {k: v[order] for k, v in columns.present.items()})


def _sorted(columns: ObservationColumns) -> ObservationColumns:
    return _take(columns, np.lexsort((columns.sources, columns.arms, columns.dates)))


def _assert_same(left: ObservationColumns, right: ObservationColumns) -> None:
    left, right = _sorted(left), _sorted(right)
    assert left.dates.tolist() == right.dates.tolist()
    assert left.arms.tolist() == right.arms.tolist()
    assert left.sources.tolist() == right.sources.tolist()
    assert left.entered.tolist() == right.entered.tolist()
    assert sorted(left.metrics) == sorted(right.metrics)
    for name in left.metrics:
        # Exact: floats go through the database as shortest round-trip text.
        assert left.metrics[name].tolist() == right.metrics[name].tolist()
        assert left.present[name].tolist() == right.present[name].tolist()


def test_rows_read_back_exactly_as_written(database: Database) -> None:
    written = _columns(range(10), seed=1, absent_every=4)
    # Whole numbers, one of 16 digits, negative zero and the extremes of float64 as well.
    special = [100.0, 1e15, 1e16, 2.0**53, -0.0, 5e-324, 1.7976931348623157e308, 1e-5]
    written.metrics["hikes"][:len(special), 1] = special
    written.metrics["hikes"][:len(special), 2] = special[::-1]
    with database.sessions() as session:
        staged = upsert_observations(session, "trail-test", written, utcnow())
        session.commit()
    assert (staged.inserted, staged.updated) == (len(written), 0)
    with database.sessions() as session:
        _assert_same(read_observations(session, "trail-test"), written)
        stored = session.scalars(select(Observation).where(
            Observation.experiment_id == "trail-test")).all()
    absent = [o for o in stored if "photos" not in o.metrics]
    assert len(absent) == int((~written.present["photos"]).sum()) > 0
    assert all(isinstance(o.metrics["hikes"]["n"], int) for o in stored)
    # The stored documents read back with the types Python wrote: sums are floats, whole or not.
    assert all(isinstance(o.metrics["hikes"][stat], float) for o in stored
               for stat in ("sum", "sum_sq"))
    expected = {(d, a, s): json.loads(text) for d, a, s, text in zip(
        written.dates.astype(str).tolist(), written.arms.tolist(), written.sources.tolist(),
        written.metrics_json(), strict=True)}
    assert {(o.date.isoformat(), o.arm, o.source): o.metrics for o in stored} == expected


def test_replacing_counts_updates_and_keeps_other_rows(database: Database) -> None:
    first = _columns(range(10), seed=1)
    with database.sessions() as session:
        upsert_observations(session, "trail-test", first, utcnow())
        session.commit()
    replacement = _columns(range(8, 12), seed=2)  # days 8-9 replaced, 10-11 new
    with database.sessions() as session:
        staged = upsert_observations(session, "trail-test", replacement, utcnow())
        assert staged.updated == 2 * 2 * 3 and staged.inserted == 2 * 2 * 3
        after_upload = read_observations(session, "trail-test", staged)
        session.commit()
    with database.sessions() as session:
        full = read_observations(session, "trail-test")
    _assert_same(after_upload, full)
    kept = np.flatnonzero(first.dates < np.datetime64(START + dt.timedelta(days=8)))
    expected = _take(first, kept).concat(replacement)
    _assert_same(full, expected)


def test_read_after_upload_merges_metrics_missing_on_either_side(database: Database) -> None:
    with database.sessions() as session:
        upsert_observations(session, "trail-test",
                            _columns(range(5), seed=3, metrics=("hikes",)), utcnow())
        session.commit()
    newer = _columns(range(5, 7), seed=4, metrics=("photos",))
    with database.sessions() as session:
        staged = upsert_observations(session, "trail-test", newer, utcnow())
        merged = read_observations(session, "trail-test", staged)
        session.commit()
    with database.sessions() as session:
        full = read_observations(session, "trail-test")
    _assert_same(merged, full)
    assert sorted(full.metrics) == ["hikes", "photos"]
    assert int(full.present["photos"].sum()) == len(newer)


def test_a_rolled_back_upload_leaves_nothing(database: Database) -> None:
    with database.sessions() as session:
        upsert_observations(session, "trail-test", _columns(range(3), seed=5), utcnow())
        session.rollback()
    with database.sessions() as session:
        assert session.scalar(select(func.count()).select_from(Observation)) == 0
        assert len(read_observations(session, "trail-test")) == 0


def test_table_from_stored_rows_equals_table_from_validated_frame(database: Database) -> None:
    written = _columns(range(6), seed=6, absent_every=3)
    with database.sessions() as session:
        upsert_observations(session, "trail-test", written, utcnow())
        session.commit()
        rows = read_observations(session, "trail-test")
    trusted = ObservationTable.from_cells(ARMS, rows.dates, rows.arms, rows.sources,
                                          rows.entered, rows.metrics, start=START)
    import pandas as pd

    frame = pd.DataFrame({"date": written.dates.astype(str), "arm": written.arms,
                          "source": written.sources, "entered": written.entered})
    for name, values in written.metrics.items():
        for column, stat in enumerate(("n", "sum", "sum_sq")):
            frame[f"{name}.{stat}"] = np.where(written.present[name], values[:, column], np.nan)
    checked = ObservationTable.from_frame(frame, ARMS, start=START)
    assert trusted.sources == checked.sources
    assert trusted.dates.tolist() == checked.dates.tolist()
    assert np.array_equal(trusted.entered, checked.entered)
    for name in checked.metrics:
        assert np.array_equal(trusted.metrics[name], checked.metrics[name])


def test_metrics_json_is_the_stored_document() -> None:
    columns = _columns(range(2), seed=7, absent_every=2)
    documents = [json.loads(text) for text in columns.metrics_json()]
    for index, document in enumerate(documents):
        for name, values in columns.metrics.items():
            if columns.present[name][index]:
                n, total, squares = values[index].tolist()
                assert document[name] == {"n": int(n), "sum": total, "sum_sq": squares}
            else:
                assert name not in document
    empty = ObservationColumns(columns.dates, columns.arms, columns.sources, columns.entered)
    assert empty.metrics_json() == ["{}"] * len(columns)


def test_read_after_an_upload_of_every_stored_row_equals_a_full_read(database: Database) -> None:
    """When the upload holds every row the experiment has (a first upload, or one that
    replaces them all), the read after it comes from memory: it must equal a full read."""
    first = _columns(range(4), seed=8, absent_every=3)
    again = _columns(range(4), seed=9)
    for upload in (first, again):
        with database.sessions() as session:
            staged = upsert_observations(session, "trail-test", upload, utcnow())
            assert staged.stored == len(upload)
            after_upload = read_observations(session, "trail-test", staged)
            session.commit()
        with database.sessions() as session:
            _assert_same(after_upload, read_observations(session, "trail-test"))
        _assert_same(after_upload, upload)
