"""The aggregation from unit-level exposures to the daily cube, written once as SQL and
rendered by sqlglot for DuckDB, PostgreSQL and Spark SQL.

Semantics (one row per first-exposure date, arm and source):

* Only rows before ``cutoff`` count (the end of the ``as_of`` day in the configured zone), so a
  pull for a given day gives the same cube whenever it runs.
* A unit's first exposure is its earliest exposure; its date (in the configured zone) and
  source are those of that exposure. Two exposures at the same first instant with different
  sources: the alphabetically first source wins (a missing source counts as
  ``unattributed``), so every engine picks the same one.
* A unit exposed to more than one arm is *crossed*: it is left out of the cube and returned in
  rows whose arm is NULL (counted per date and source) for the report.
* A metric sums ``value`` (or counts events) over ``[first exposure, first exposure +
  window_days)``; a unit counts in the metric's ``n`` only when that window closed by
  ``cutoff``. Per cell the engine returns ``n``, ``sum``, ``sum(x*x)``, the population
  variance (a shifted statistic: the engines' one-pass variance aggregates are stable) and
  whether every value was a whole number; :mod:`service.warehouse.cube` turns these into
  ``sum_sq`` without cancellation.

Config values only ever enter the SQL as quoted identifiers or literals built by sqlglot.
"""

from __future__ import annotations

import datetime as dt
from collections.abc import Mapping
from dataclasses import dataclass
from typing import Literal

import sqlglot
from sqlglot import exp

from detectors.data import UNATTRIBUTED

from .config import PullConfig

Dialect = Literal["duckdb", "postgres", "spark"]

# Relation names the engine adapters bind the configured tables or files to.
EXPOSURES_VIEW = "inrush_exposures"


def metric_view(index: int) -> str:
    return f"inrush_metric_{index}"


@dataclass(frozen=True)
class CubeQuery:
    sql: str
    metrics: tuple[str, ...]  # metric names, in the order of their output columns


def naive_timestamp(type_name: str, dialect: Dialect) -> bool:
    """Whether the engine's column type is a timestamp without time zone (read as UTC)."""
    lowered = type_name.lower()
    if dialect == "spark":  # Spark's TIMESTAMP is an instant; TIMESTAMP_NTZ is wall-clock
        return lowered == "timestamp_ntz"
    if dialect == "postgres":
        return lowered in ("timestamp", "timestamp without time zone")
    return lowered.startswith("timestamp") and "time zone" not in lowered \
        and lowered != "timestamptz"


def build_query(config: PullConfig, cutoff: dt.datetime, dialect: Dialect,
                relations: Mapping[str, str] | None = None,
                naive_exposure_time: bool = False) -> CubeQuery:
    """The cube query for ``dialect``. ``cutoff`` is a UTC instant (naive or aware);
    ``relations`` maps :data:`EXPOSURES_VIEW` and each :func:`metric_view` to the table or
    view the engine reads it from (default: those names). ``naive_exposure_time`` says the
    exposures' time column has no time zone (see :func:`naive_timestamp`): the cutoff is
    then compared as UTC wall-clock time with the column as it is, which lets the engine
    filter while it scans instead of converting every row first (on DuckDB the conversion in
    the filter cost about 0.7 CPU seconds per 10 million rows).

    Output columns: ``d`` (date), ``a`` (arm, NULL for crossed units), ``s`` (source),
    ``entered``, then per metric ``k``: ``n_k, sum_k, sumsq_k, var_k, whole_k``.
    """
    ex = config.exposures
    relations = relations or {}
    stamp = cutoff.replace(tzinfo=None).isoformat(sep=" ", timespec="microseconds")
    cut = f"INRUSH_INSTANT({_lit(stamp)})"
    before_cut = (f"{_id(ex.time)} < INRUSH_WALL_CLOCK({_lit(stamp)})" if naive_exposure_time
                  else f"INRUSH_INSTANT({_id(ex.time)}) < {cut}")
    source = (f"COALESCE(CAST({_id(ex.source)} AS TEXT), {_lit(UNATTRIBUTED)})"
              if ex.source else _lit(UNATTRIBUTED))
    ctes = [
        f"""e AS (
  SELECT {_id(ex.unit)} AS u, CAST({_id(ex.arm)} AS TEXT) AS a,
         INRUSH_INSTANT({_id(ex.time)}) AS t, {source} AS s
  FROM {_id(relations.get(EXPOSURES_VIEW, EXPOSURES_VIEW))}
  WHERE {_id(ex.unit)} IS NOT NULL AND {_id(ex.arm)} IS NOT NULL
    AND {before_cut})""",
        _units(dialect),
        f"""clean AS (
  SELECT u, t0, CASE WHEN a_lo = a_hi THEN a_lo END AS a, s,
         CAST(INRUSH_LOCAL(t0, {_lit(ex.timezone)}) AS DATE) AS d
  FROM units)""",
    ]
    joins: list[str] = []
    values: list[str] = []
    columns: list[str] = []
    for k, metric in enumerate(config.metrics):
        window = f"c.t0 + INTERVAL {metric.window_days} DAY"
        # The window closed by the cutoff, as t0 <= cutoff - window: a constant to compare
        # with, instead of date arithmetic on every unit (the sessions are in UTC, where a
        # day is always 24 hours, so the two agree exactly).
        opened_by = (cutoff.replace(tzinfo=None) - dt.timedelta(days=metric.window_days)
                     ).isoformat(sep=" ", timespec="microseconds")
        mature = f"c.a IS NOT NULL AND c.t0 <= INRUSH_INSTANT({_lit(opened_by)})"
        value = f"CAST({_id(metric.value)} AS DOUBLE)" if metric.value else "1"
        events = _id(relations.get(metric_view(k), metric_view(k)))
        ctes.append(f"""m{k} AS (
  SELECT c.u, SUM({value}) AS x
  FROM clean AS c JOIN {events} AS v ON v.{_id(metric.unit)} = c.u
  WHERE {mature}
    AND INRUSH_INSTANT(v.{_id(metric.time)}) >= c.t0
    AND INRUSH_INSTANT(v.{_id(metric.time)}) < {window}
  GROUP BY c.u)""")
        joins.append(f"LEFT JOIN m{k} ON m{k}.u = c.u")
        # NULL for a unit whose window is still open: it is left out of n, sum and variance.
        values.append(f"CASE WHEN {mature} THEN CAST(COALESCE(m{k}.x, 0) AS DOUBLE) END AS x{k}")
        columns += [
            f"COUNT(x{k}) AS n_{k}", f"SUM(x{k}) AS sum_{k}", f"SUM(x{k} * x{k}) AS sumsq_{k}",
            f"VAR_POP(x{k}) AS var_{k}",
            f"MIN(CASE WHEN x{k} = FLOOR(x{k}) THEN 1 WHEN x{k} IS NOT NULL THEN 0 END) "
            f"AS whole_{k}",
        ]
    ctes.append(f"""pu AS (
  SELECT {", ".join(["c.d", "c.a", "c.s", *values])}
  FROM clean AS c {" ".join(joins)})""")
    select = ",\n       ".join(["d", "a", "s", "COUNT(*) AS entered", *columns])
    text = f"WITH {', '.join(ctes)}\nSELECT {select}\nFROM pu\nGROUP BY d, a, s"
    tree = sqlglot.parse_one(text, read="duckdb")
    rendered = tree.transform(lambda node: _engine_function(node, dialect))
    return CubeQuery(rendered.sql(dialect=dialect), tuple(m.name for m in config.metrics))


def _units(dialect: Dialect) -> str:
    """One row per unit: first instant, lowest and highest arm, source of the first exposure.

    DuckDB and Spark order structs field by field, so the minimum of ``(t, s)`` is the first
    exposure with ties going to the smallest source, in one aggregate. That is what makes the
    tie-break cheap: with ``ARG_MIN(s, (t, s))`` beside ``MIN(t)`` the whole query took 2.2x
    the CPU time on DuckDB at 100 million rows (98 s against 44.5 s, benchmarks/RESULTS.md).
    PostgreSQL has no minimum of a row value, so it takes the first element of the ordered
    array.
    """
    if dialect == "postgres":
        return """units AS (
  SELECT u, MIN(t) AS t0, MIN(a) AS a_lo, MAX(a) AS a_hi, INRUSH_FIRST(s, t) AS s
  FROM e GROUP BY u)"""
    return """units AS (
  SELECT u, first_seen.t AS t0, a_lo, a_hi, first_seen.s AS s
  FROM (SELECT u, MIN(STRUCT_PACK(t := t, s := s)) AS first_seen, MIN(a) AS a_lo,
               MAX(a) AS a_hi
        FROM e GROUP BY u) AS per_unit)"""


def _engine_function(node: exp.Expression, dialect: Dialect) -> exp.Expression:
    """The things SQL spells differently per engine."""
    if not isinstance(node, exp.Anonymous):
        return node
    name = node.name.upper()
    args = node.expressions
    if name == "INRUSH_INSTANT":  # the column as an instant (naive timestamps are UTC)
        # Each engine's session time zone is UTC (the adapters set it), so these casts read a
        # naive timestamp as UTC and leave an aware one the same instant.
        kind = "TIMESTAMP" if dialect == "spark" else "TIMESTAMPTZ"
        return exp.cast(args[0], kind, dialect=dialect)
    if name == "INRUSH_WALL_CLOCK":  # a UTC wall-clock literal, to compare naive columns
        kind = "TIMESTAMP_NTZ" if dialect == "spark" else "TIMESTAMP"
        return exp.cast(args[0], kind, dialect=dialect)
    if name == "INRUSH_LOCAL":  # wall-clock time of an instant in a zone
        instant, zone = args
        if dialect == "spark":
            return exp.func("FROM_UTC_TIMESTAMP", instant, zone, dialect="spark")
        return exp.func("TIMEZONE", zone, instant, dialect=dialect)
    if name == "INRUSH_FIRST":  # value at the earliest time, ties to the smallest value
        value, time = args
        ordered = sqlglot.parse_one(
            f"(ARRAY_AGG({value.sql('postgres')} ORDER BY {time.sql('postgres')}, "
            f"{value.sql('postgres')}))[1]", read="postgres")
        return ordered
    return node


def _id(name: str) -> str:
    """A quoted identifier (``schema.table`` quoted part by part)."""
    return ".".join(exp.to_identifier(part, quoted=True).sql("duckdb")
                    for part in name.split("."))


def _lit(text: str) -> str:
    return exp.Literal.string(text).sql("duckdb")
