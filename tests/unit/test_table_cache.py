"""The table cache: a table advanced by an upload's cells equals the table assembled from all
the rows stored after it (``ObservationTable.from_cells``, the detectors' own assembly)."""

from __future__ import annotations

import datetime as dt

import numpy as np

from detectors import ObservationTable
from service.db.observation_store import ObservationColumns
from service.table_cache import TableCache, advance, build

ARMS = ("control", "cards")
START = dt.date(2026, 10, 26)


def _rows(keys: list[tuple[int, str, str]], entered: list[int],
          metrics: dict[str, list[tuple[float, float, float] | None]]) -> ObservationColumns:
    dates = np.array([np.datetime64(START + dt.timedelta(days=d), "D") for d, _, _ in keys])
    stats = {name: np.array([v or (0.0, 0.0, 0.0) for v in values], float)
             for name, values in metrics.items()}
    present = {name: np.array([v is not None for v in values]) for name, values in metrics.items()}
    return ObservationColumns(dates, np.array([a for _, a, _ in keys]),
                              np.array([s for _, _, s in keys]), np.array(entered, np.int64),
                              stats, present)


def _stored_after(old: dict[tuple[int, str, str], tuple[int, dict]],
                  new: dict[tuple[int, str, str], tuple[int, dict]]) -> ObservationTable:
    """The reference: every row stored after the upsert, assembled by ``from_cells``."""
    merged = {**old, **new}
    keys = sorted(merged)
    names = sorted({name for _, metrics in merged.values() for name in metrics})
    columns = _rows(keys, [merged[k][0] for k in keys],
                    {name: [merged[k][1].get(name) for k in keys] for name in names})
    return ObservationTable.from_cells(ARMS, columns.dates, columns.arms, columns.sources,
                                       columns.entered, columns.metrics, start=START)


def _assert_same(left: ObservationTable | None, right: ObservationTable) -> None:
    assert left is not None
    assert left.arms == right.arms and left.sources == right.sources
    np.testing.assert_array_equal(left.dates, right.dates)
    np.testing.assert_array_equal(left.entered, right.entered)
    assert sorted(left.metrics) == sorted(right.metrics)
    for name in right.metrics:
        np.testing.assert_array_equal(left.metrics[name], right.metrics[name])


def _as_columns(rows: dict[tuple[int, str, str], tuple[int, dict]]) -> ObservationColumns:
    keys = sorted(rows)
    names = sorted({name for _, metrics in rows.values() for name in metrics})
    return _rows(keys, [rows[k][0] for k in keys],
                 {name: [rows[k][1].get(name) for k in keys] for name in names})


def test_advancing_by_an_upload_equals_assembling_every_stored_row() -> None:
    saved = (5.0, 9.0, 30.0)
    first = {(d, arm, source): (100 + d, {"routes_saved": saved, "photos": (3.0, 1.0, 1.0)})
             for d in range(3) for arm in ARMS for source in ("organic", "newsletter")}
    entry = build(ARMS, START, 1, _as_columns(first))
    _assert_same(entry.table, _stored_after({}, first))
    # Replaces some cells (one without "photos", the only rows left carrying it are the
    # others), adds a source that sorts between the old ones and two days later.
    upload = {(1, "cards", "organic"): (7, {"routes_saved": (7.0, 2.0, 1.0)}),
              (4, "control", "partner"): (9, {"routes_saved": (9.0, 3.0, 2.0)}),
              (0, "control", "organic"): (1, {})}
    advanced = advance(entry, 2, _as_columns(upload), stored=len(first) + 1, arms=ARMS,
                       start=START)
    assert advanced is not None and advanced.version == 2
    _assert_same(advanced.table, _stored_after(first, upload))
    assert entry.table is not None and entry.table.entered[1, 1, 1] == 101  # old one unchanged


def test_a_metric_no_row_carries_any_more_disappears() -> None:
    rows = {(0, "control", "organic"): (10, {"photos": (1.0, 1.0, 1.0)}),
            (0, "cards", "organic"): (10, {})}
    entry = build(ARMS, START, 1, _as_columns(rows))
    assert entry.table is not None and "photos" in entry.table.metrics
    upload = {(0, "control", "organic"): (12, {})}
    advanced = advance(entry, 2, _as_columns(upload), stored=2, arms=ARMS, start=START)
    assert advanced is not None and advanced.table is not None
    assert advanced.table.metrics == {}


def test_advancing_needs_the_previous_version_unless_the_upload_is_everything() -> None:
    rows = {(0, "control", "organic"): (10, {}), (0, "cards", "organic"): (11, {})}
    entry = build(ARMS, START, 3, _as_columns(rows))
    upload = _as_columns({(1, "cards", "organic"): (5, {})})
    assert advance(entry, 5, upload, stored=3, arms=ARMS, start=START) is None
    whole = advance(None, 1, _as_columns(rows), stored=2, arms=ARMS, start=START)
    assert whole is not None and whole.table is not None
    _assert_same(whole.table, _stored_after({}, rows))


def test_the_cache_keeps_the_newest_version_within_its_bound() -> None:
    rows = _as_columns({(0, "control", "organic"): (10, {})})
    cache = TableCache(max_bytes=10_000)
    cache.put("a", build(ARMS, START, 2, rows))
    cache.put("a", build(ARMS, START, 1, rows))  # an older read arriving late is ignored
    assert cache.get("a", 1) is None and cache.get("a", 2) is not None
    cache.put("b", build(ARMS, START, 1, rows))
    size = build(ARMS, START, 1, rows).nbytes
    small = TableCache(max_bytes=size)
    small.put("a", build(ARMS, START, 1, rows))
    small.put("b", build(ARMS, START, 1, rows))
    assert small.get("a", 1) is None and small.get("b", 1) is not None  # least recent out
