"""Observation rows in bulk: columnar upserts and columnar reads.

Uploads and diagnoses move whole experiments of rows (180 days x 4 arms x 12 sources is
8,640), so neither goes through ORM objects:

* writes: the rows go to a per-connection temporary table, then into ``observations`` with
  one ``INSERT ... SELECT ... ON CONFLICT DO UPDATE``, inside the caller's transaction, so a
  failure leaves nothing written. On PostgreSQL the columns travel as one binary ``COPY``
  whose bytes numpy lays out (:func:`binary_copy_payload`), and the database writes each
  row's ``metrics`` document from the float columns; on SQLite they are bound with
  ``executemany`` and the documents are built in Python (:meth:`ObservationColumns.metrics_json`);
* reads: one ``SELECT`` with a column per metric statistic, extracted from the JSON by the
  database, turned into numpy arrays without a Python loop over rows. Right after an upload
  only the rows it did not write are read back; its own are taken from memory, and nothing
  is read when they are all the experiment has.
"""

from __future__ import annotations

import json
from collections.abc import Sequence
from dataclasses import dataclass, field
from typing import TYPE_CHECKING, Any

import numpy as np
from sqlalchemy import Row, bindparam, select, text
from sqlalchemy.orm import Session

from detectors.data import STAT_FIELDS

from .models import Observation, UTCDateTime

if TYPE_CHECKING:
    import datetime as dt

_STAGING = "inrush_observations_incoming"
_CODED = "inrush_observations_incoming_coded"  # PostgreSQL: what the binary COPY fills
_KEY = ("experiment_id", "date", "arm", "source")
_SAME_KEY = (f"{_STAGING}.date = observations.date AND {_STAGING}.arm = observations.arm "
             f"AND {_STAGING}.source = observations.source")
_NOT_STAGED = f"NOT EXISTS (SELECT 1 FROM {_STAGING} WHERE {_SAME_KEY})"


@dataclass(frozen=True, eq=False)
class ObservationColumns:
    """Rows of one experiment as columns, one entry per row.

    ``metrics`` maps a metric name to an ``(rows, 3)`` array of ``n, sum, sum_sq``; where a
    metric is absent on a row, ``present[name]`` is False (its stored JSON omits the metric)
    and the statistics are zeros.
    """

    dates: np.ndarray  # datetime64[D]
    arms: np.ndarray  # str
    sources: np.ndarray  # str
    entered: np.ndarray  # int64
    metrics: dict[str, np.ndarray] = field(default_factory=dict)
    present: dict[str, np.ndarray] = field(default_factory=dict)

    def __len__(self) -> int:
        return int(self.dates.shape[0])

    def concat(self, other: ObservationColumns) -> ObservationColumns:
        """These rows followed by ``other``'s; a metric missing on one side is absent there."""
        if not len(self):
            return other
        if not len(other):
            return self
        names = list(dict.fromkeys([*self.metrics, *other.metrics]))
        return ObservationColumns(
            np.concatenate([self.dates, other.dates]),
            np.concatenate([self.arms, other.arms]),
            np.concatenate([self.sources, other.sources]),
            np.concatenate([self.entered, other.entered]),
            {name: np.concatenate([self._stats(name), other._stats(name)]) for name in names},
            {name: np.concatenate([self._present(name), other._present(name)])
             for name in names})

    def _stats(self, name: str) -> np.ndarray:
        return self.metrics[name] if name in self.metrics else np.zeros((len(self), 3))

    def _present(self, name: str) -> np.ndarray:
        return self.present[name] if name in self.present else np.zeros(len(self), bool)

    def metrics_json(self) -> list[str]:
        """The stored ``metrics`` document of each row, as JSON text."""
        # Per-row text has to be built in Python; each metric's fragments are made in one
        # pass over plain lists (repr gives the shortest float text that reads back exactly).
        pieces: list[list[str]] = []
        for name, values in self.metrics.items():
            label = json.dumps(name)
            pieces.append([
                f'{label}: {{"n": {n}, "sum": {total!r}, "sum_sq": {squares!r}}}' if kept
                else "" for n, total, squares, kept in zip(
                    values[:, 0].astype(np.int64).tolist(), values[:, 1].tolist(),
                    values[:, 2].tolist(), self.present[name].tolist(), strict=True)])
        if not pieces:
            return ["{}"] * len(self)
        return ["{" + ", ".join(part for part in parts if part) + "}"
                for parts in zip(*pieces, strict=True)]


@dataclass(frozen=True, eq=False)
class StagedUpload:
    """An upsert made in the open transaction; its rows stay staged until the transaction ends.

    Pass it to :func:`read_observations` in the same transaction to read back only the stored
    rows it did not write.
    """

    experiment_id: str
    columns: ObservationColumns
    updated: int
    stored: int  # rows the experiment has after the upsert, these included

    @property
    def inserted(self) -> int:
        return len(self.columns) - self.updated


def upsert_observations(session: Session, experiment_id: str, rows: ObservationColumns,
                        now: dt.datetime) -> StagedUpload:
    """Insert or replace ``rows`` (key: experiment, date, arm, source) in the open transaction.

    The count of replaced rows is exact when the caller holds the experiment's write lock
    (``service.db.locks``).
    """
    dialect = session.get_bind().dialect.name
    driver = session.connection().connection.driver_connection
    if dialect == "postgresql":
        _stage_postgresql(driver, rows)
    elif dialect == "sqlite":
        records = zip(rows.dates.astype("datetime64[D]").astype(str).tolist(),
                      rows.arms.tolist(), rows.sources.tolist(), rows.entered.tolist(),
                      rows.metrics_json(), strict=True)
        cursor = driver.cursor()  # type: ignore[union-attr]
        try:
            cursor.execute(f"CREATE TEMPORARY TABLE IF NOT EXISTS {_STAGING} (date date, "
                           "arm text, source text, entered integer, metrics text, "
                           "PRIMARY KEY (date, arm, source))")
            cursor.execute(f"DELETE FROM {_STAGING}")
            cursor.executemany(f"INSERT INTO {_STAGING} VALUES (?, ?, ?, ?, ?)", records)
        finally:
            cursor.close()
    else:
        raise RuntimeError(f"upserts are implemented for SQLite and PostgreSQL, not {dialect}")
    # Before the upsert: the experiment's stored rows (counted in the primary key's index)
    # and how many of them it replaces (looked up from the staged side: its size, not the
    # experiment's, sets the cost of the join).
    before, updated = session.execute(text(
        "SELECT (SELECT count(*) FROM observations WHERE experiment_id = :id), "
        f"(SELECT count(*) FROM {_STAGING} JOIN observations ON {_SAME_KEY} "
        "AND observations.experiment_id = :id)"), {"id": experiment_id}).one()
    # "WHERE true" lets SQLite tell the upsert clause from a join constraint.
    session.execute(text(
        "INSERT INTO observations (experiment_id, date, arm, source, entered, metrics, "
        f"updated_at) SELECT :id, date, arm, source, entered, metrics, :now FROM {_STAGING} "
        f"WHERE true ON CONFLICT ({', '.join(_KEY)}) DO UPDATE SET entered = excluded.entered, "
        "metrics = excluded.metrics, updated_at = excluded.updated_at"
    ).bindparams(bindparam("now", type_=UTCDateTime)), {"id": experiment_id, "now": now})
    updated = int(updated or 0)
    return StagedUpload(experiment_id, rows, updated, int(before or 0) + len(rows) - updated)


_PG_EPOCH_DAYS = 10_957  # 2000-01-01, day 0 of PostgreSQL's binary dates, after 1970-01-01
_COPY_SIGNATURE = b"PGCOPY\n\xff\r\n\x00" + bytes(8)  # signature, flags 0, no extension
_COPY_TRAILER = b"\xff\xff"
_FLOAT8_OID, _BOOL_OID = 701, 16


def binary_copy_payload(rows: ObservationColumns, arm_codes: np.ndarray,
                        source_codes: np.ndarray) -> bytes:
    """The rows in PostgreSQL's binary ``COPY`` format, laid out by numpy without a loop.

    Columns: ``date date, arm int4, source int4, entered int8, stats float8[], present
    bool[]``; ``arm`` and ``source`` are 1-based positions in the name lists sent beside the
    rows, ``stats`` holds ``n, sum, sum_sq`` of each metric in turn and ``present`` whether
    each metric is on the row. Every field has a fixed width, so a row is one record of a
    big-endian structured array (format: PostgreSQL documentation, "COPY", binary format;
    arrays as ``array_send`` writes them).
    """
    names = list(rows.metrics)
    stats = 3 * len(names)
    layout: list[tuple[Any, ...]] = [
        ("fields", ">i2"),
        ("date_len", ">i4"), ("date", ">i4"),
        ("arm_len", ">i4"), ("arm", ">i4"),
        ("source_len", ">i4"), ("source", ">i4"),
        ("entered_len", ">i4"), ("entered", ">i8"),
        ("stats_len", ">i4"), ("stats_head", ">i4", (5,)),
        ("stats", [("len", ">i4"), ("value", ">f8")], (stats,)),
        ("present_len", ">i4"), ("present_head", ">i4", (5,)),
        ("present", [("len", ">i4"), ("value", "u1")], (len(names),)),
    ]
    record = np.zeros(len(rows), dtype=np.dtype(layout))
    record["fields"] = 6
    record["date_len"], record["arm_len"], record["source_len"] = 4, 4, 4
    record["date"] = rows.dates.astype("datetime64[D]").astype(np.int64) - _PG_EPOCH_DAYS
    record["arm"], record["source"] = arm_codes + 1, source_codes + 1
    record["entered_len"], record["entered"] = 8, rows.entered
    record["stats_len"] = 20 + 12 * stats
    record["stats_head"] = (1, 0, _FLOAT8_OID, stats, 1)
    record["present_len"] = 20 + 5 * len(names)
    record["present_head"] = (1, 0, _BOOL_OID, len(names), 1)
    if names:
        record["stats"]["len"] = 8
        record["stats"]["value"] = np.concatenate([rows.metrics[name] for name in names],
                                                  axis=1)
        record["present"]["len"] = 1
        record["present"]["value"] = np.column_stack([rows.present[name] for name in names])
    return _COPY_SIGNATURE + record.tobytes() + _COPY_TRAILER


def _float_text(value: str) -> str:
    """SQL for a float's JSON text: the shortest text that reads back as the same float, and
    for a whole number its digits with ``.0`` (``jsonb`` would otherwise store ``100`` or
    ``1e+16`` as an integer, and the document would read back an integer where a float was
    written)."""
    return (f"CASE WHEN {value} = trunc({value}) THEN {value}::text::numeric::text || '.0' "
            f"ELSE {value}::text END")


def _stage_postgresql(driver: Any, rows: ObservationColumns) -> None:
    """Fill the staging table: one binary ``COPY`` of coded columns into a second temporary
    table, then one ``INSERT ... SELECT`` that decodes the names and writes each row's
    ``metrics`` document as JSON text, which ``jsonb`` parses (twice as fast as building it
    with ``jsonb_build_object``)."""
    arm_names, arm_codes = np.unique(rows.arms.astype(str), return_inverse=True)
    source_names, source_codes = np.unique(rows.sources.astype(str), return_inverse=True)
    names = list(rows.metrics)
    members = ", ".join(
        f"CASE WHEN present[{i + 1}] THEN %(metric_{i})s || ': {{\"n\": ' || "
        f"stats[{3 * i + 1}]::bigint || ', \"sum\": ' || {_float_text(f'stats[{3 * i + 2}]')} "
        f"|| ', \"sum_sq\": ' || {_float_text(f'stats[{3 * i + 3}]')} || '}}' END"
        for i in range(len(names)))
    document = f"('{{' || concat_ws(', ', {members}) || '}}')::jsonb" if names else "'{}'"
    with driver.cursor() as cursor:
        # Emptied at every commit; the pooled connection keeps them for the next upload. The
        # DELETEs only matter if this transaction staged rows before (TRUNCATE would rewrite
        # the tables' files every time).
        cursor.execute(f"CREATE TEMPORARY TABLE IF NOT EXISTS {_STAGING} (date date, "
                       "arm text, source text, entered bigint, metrics jsonb, "
                       "PRIMARY KEY (date, arm, source)) ON COMMIT DELETE ROWS")
        cursor.execute(f"CREATE TEMPORARY TABLE IF NOT EXISTS {_CODED} (date date, arm int4, "
                       "source int4, entered int8, stats float8[], present bool[]) "
                       "ON COMMIT DELETE ROWS")
        cursor.execute(f"DELETE FROM {_STAGING}")
        cursor.execute(f"DELETE FROM {_CODED}")
        with cursor.copy(f"COPY {_CODED} FROM STDIN (FORMAT BINARY)") as copy:
            copy.write(binary_copy_payload(rows, arm_codes, source_codes))
        # Any positive setting prints each float as the shortest text that reads back as the
        # same value (PostgreSQL 12 and later), whatever the server's default.
        cursor.execute("SET LOCAL extra_float_digits = 1")
        cursor.execute(
            f"INSERT INTO {_STAGING} (date, arm, source, entered, metrics) SELECT date, "
            f"(%(arms)s::text[])[arm], (%(sources)s::text[])[source], entered, {document} "
            f"FROM {_CODED}",
            {"arms": arm_names.tolist(), "sources": source_names.tolist(),
             **{f"metric_{i}": json.dumps(name) for i, name in enumerate(names)}})


def metric_names(session: Session, experiment_id: str, *, besides_staged: bool = False
                 ) -> list[str]:
    """Every metric name found in the experiment's stored rows, sorted (``besides_staged``:
    only in rows that the staged upload did not write)."""
    if session.get_bind().dialect.name == "postgresql":
        query = ("SELECT DISTINCT jsonb_object_keys(metrics) FROM observations "
                 "WHERE experiment_id = :id")
    else:
        query = ("SELECT DISTINCT item.key FROM observations, json_each(observations.metrics) "
                 "AS item WHERE observations.experiment_id = :id")
    if besides_staged:
        query += f" AND {_NOT_STAGED}"
    return sorted(str(name) for (name,) in session.execute(text(query), {"id": experiment_id}))


def read_observations(session: Session, experiment_id: str,
                      staged: StagedUpload | None = None) -> ObservationColumns:
    """All stored rows of the experiment as columns.

    With ``staged`` (the upload this transaction just made) only the stored rows it did not
    write are read, and its own rows are added from memory.
    """
    if staged is not None:
        if staged.experiment_id != experiment_id:
            raise ValueError("the staged upload belongs to another experiment")
        if staged.stored == len(staged.columns):  # the upload holds every stored row
            return staged.columns
    names = metric_names(session, experiment_id, besides_staged=staged is not None)
    # as_float: a direct cast (SQLite would print a REAL with 15 digits on the way to text).
    extracted = [Observation.metrics[(name, stat)].as_float()
                 for name in names for stat in STAT_FIELDS]
    query = select(Observation.date, Observation.arm, Observation.source, Observation.entered,
                   *extracted).where(Observation.experiment_id == experiment_id)
    if staged is not None:
        query = query.where(text(_NOT_STAGED))
    stored = _to_columns(session.execute(query).all(), names)
    return stored if staged is None else stored.concat(staged.columns)


def _to_columns(result: Sequence[Row[tuple[object, ...]]], names: Sequence[str]
                ) -> ObservationColumns:
    if not result:
        return ObservationColumns(np.array([], dtype="datetime64[D]"), np.array([], str),
                                  np.array([], str), np.array([], np.int64))
    columns = list(zip(*result, strict=True))
    stats = np.array(columns[4:], dtype=float).T if names else np.zeros((len(result), 0))
    metrics: dict[str, np.ndarray] = {}
    present: dict[str, np.ndarray] = {}
    for position, name in enumerate(names):
        values = stats[:, 3 * position:3 * position + 3]
        absent = np.isnan(values).all(axis=1)
        present[name] = ~absent
        metrics[name] = np.where(absent[:, None], 0.0, values)
    return ObservationColumns(np.array(columns[0], dtype="datetime64[D]"),
                              np.array(columns[1], dtype=str), np.array(columns[2], dtype=str),
                              np.array(columns[3], dtype=np.int64), metrics, present)
