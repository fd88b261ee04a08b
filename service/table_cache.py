"""Observation tables kept in memory between requests, keyed by the experiment's data version.

Reading a wide experiment back from the database (146,000 rows, a JSON document each) costs far
more than diagnosing it, and after an upload of one day all other rows are what they were. So
the dense table of each recently used experiment is kept here together with the
``data_version`` it reflects (``experiments.data_version``, bumped in the same transaction as
every write of rows):

* an upload that moves the version from ``v`` to ``v + 1`` turns the cached table of ``v`` into
  the table of ``v + 1`` by replacing the cells it wrote (:func:`advance`), in time linear in
  the table and without reading the database;
* a reader asks for the table of the version it read in its own transaction
  (:meth:`TableCache.get`); on a miss (another process wrote, or the entry was evicted) it
  reads every row and stores the result.

A cached table is never changed in place (readers on other threads may hold it); ``advance``
builds a new one. The cache is per process and bounded in bytes (least recently used entries
go first); each entry also keeps, per metric, which cells carry it, so that a metric that no
stored row carries any more disappears exactly as it would from a fresh read.
"""

from __future__ import annotations

import datetime as dt
import threading
import weakref
from collections import OrderedDict
from collections.abc import Sequence
from dataclasses import dataclass

import numpy as np
import pandas as pd
from sqlalchemy import Engine

from detectors import ObservationTable

from .db.observation_store import ObservationColumns

DEFAULT_MAX_BYTES = 512 * 1024 * 1024


@dataclass(frozen=True, eq=False)
class CachedTable:
    """The stored rows of one experiment at ``version``: the dense table (``None`` without
    rows) and, per metric, a ``(days, arms, sources)`` mask of the cells whose row carries it."""

    version: int
    table: ObservationTable | None
    present: dict[str, np.ndarray]

    @property
    def nbytes(self) -> int:
        if self.table is None:
            return 0
        return int(self.table.entered.nbytes + sum(c.nbytes for c in self.table.metrics.values())
                   + sum(p.nbytes for p in self.present.values()))


def build(arms: Sequence[str], start: dt.date, version: int,
          rows: ObservationColumns) -> CachedTable:
    """The cache entry of rows read in full (every stored row of the experiment)."""
    if not len(rows):
        return CachedTable(version, None, {})
    empty = ObservationTable(tuple(arms), np.array([np.datetime64(start, "D")]), (),
                             np.zeros((1, len(arms), 0), np.int64), {})
    return _replace_cells(CachedTable(version, empty, {}), rows, version)


def advance(previous: CachedTable | None, version: int, upload: ObservationColumns, *,
            stored: int, arms: Sequence[str], start: dt.date) -> CachedTable | None:
    """The entry after an upload that moved the data version to ``version``.

    ``previous`` must be the entry of ``version - 1``; without it, the upload's rows make the
    entry only if they are all the experiment holds (``stored`` rows after the upload).
    ``None`` when neither holds (the next reader reads the database).
    """
    if previous is not None and previous.version == version - 1 and previous.table is not None:
        return _replace_cells(previous, upload, version)
    if stored == len(upload):
        return build(arms, start, version, upload)
    return None


def _replace_cells(entry: CachedTable, rows: ObservationColumns, version: int) -> CachedTable:
    """A new entry with the cells of ``rows`` replaced (not added to), axes grown as needed."""
    old = entry.table
    assert old is not None
    arms = old.arms
    sources = np.union1d(np.asarray(old.sources, dtype=str), rows.sources.astype(str))
    first = old.dates[0]
    last = max(old.dates[-1], rows.dates.max().astype("datetime64[D]"))
    dates = np.arange(first, last + np.timedelta64(1, "D"), dtype="datetime64[D]")
    shape = (dates.size, len(arms), sources.size)
    keep = (slice(0, old.n_days), slice(None),
            np.searchsorted(sources, np.asarray(old.sources, dtype=str)))

    def grown(cube: np.ndarray | None, dtype: type, tail: tuple[int, ...] = ()) -> np.ndarray:
        new = np.zeros(shape + tail, dtype=dtype)
        if cube is not None:
            new[keep] = cube
        return new

    cell = (np.asarray((rows.dates.astype("datetime64[D]") - first).astype(np.int64)),
            pd.Categorical(rows.arms, categories=arms).codes.astype(np.int64),
            np.searchsorted(sources, rows.sources.astype(str)))
    entered = grown(old.entered, np.int64)
    entered[cell] = rows.entered
    metrics: dict[str, np.ndarray] = {}
    present: dict[str, np.ndarray] = {}
    for name in dict.fromkeys([*old.metrics, *rows.metrics]):
        cube = grown(old.metrics.get(name), float, (3,))
        mask = grown(entry.present.get(name), bool)
        carried = rows.present.get(name)
        if carried is None:  # the new rows do not carry the metric at all
            cube[cell] = 0.0
            mask[cell] = False
        else:
            cube[cell] = np.where(carried[:, None], rows.metrics[name], 0.0)
            mask[cell] = carried
        if mask.any():
            metrics[name], present[name] = cube, mask
    table = ObservationTable(arms, dates, tuple(str(s) for s in sources), entered, metrics)
    return CachedTable(version, table, present)


class TableCache:
    """Entries by experiment id, least recently used first out, at most ``max_bytes``."""

    def __init__(self, max_bytes: int = DEFAULT_MAX_BYTES) -> None:
        self.max_bytes = max_bytes
        self._entries: OrderedDict[str, CachedTable] = OrderedDict()
        self._lock = threading.Lock()

    def get(self, experiment_id: str, version: int) -> CachedTable | None:
        with self._lock:
            entry = self._entries.get(experiment_id)
            if entry is None or entry.version != version:
                return None
            self._entries.move_to_end(experiment_id)
            return entry

    def latest(self, experiment_id: str) -> CachedTable | None:
        with self._lock:
            return self._entries.get(experiment_id)

    def put(self, experiment_id: str, entry: CachedTable | None) -> None:
        """Keep ``entry`` unless a newer version is kept already; ``None`` forgets the id."""
        with self._lock:
            current = self._entries.get(experiment_id)
            if entry is None:
                self._entries.pop(experiment_id, None)
                return
            if current is not None and current.version > entry.version:
                return
            if entry.nbytes > self.max_bytes:
                self._entries.pop(experiment_id, None)
                return
            self._entries[experiment_id] = entry
            self._entries.move_to_end(experiment_id)
            total = sum(e.nbytes for e in self._entries.values())
            while total > self.max_bytes and len(self._entries) > 1:
                _, evicted = self._entries.popitem(last=False)
                total -= evicted.nbytes

    def clear(self) -> None:
        with self._lock:
            self._entries.clear()


_CACHES: weakref.WeakKeyDictionary[Engine, TableCache] = weakref.WeakKeyDictionary()
_CACHES_LOCK = threading.Lock()


def cache_for(engine: Engine, max_bytes: int | None = None) -> TableCache:
    """The cache of one database (made on first use; ``max_bytes`` sets its bound)."""
    with _CACHES_LOCK:
        cache = _CACHES.get(engine)
        if cache is None:
            cache = _CACHES[engine] = TableCache(
                DEFAULT_MAX_BYTES if max_bytes is None else max_bytes)
        elif max_bytes is not None:
            cache.max_bytes = max_bytes
        return cache


__all__ = ["DEFAULT_MAX_BYTES", "CachedTable", "TableCache", "advance", "build", "cache_for"]
