"""One pull: check the configured columns, run the cube query in the engine, build the cube."""

from __future__ import annotations

import datetime as dt
import time
import zoneinfo
from dataclasses import dataclass

from detectors.errors import InputError, Problem

from .config import PullConfig
from .cube import Cube, cube_from_cells
from .engines import Engine, bind_relations, open_engine
from .query import EXPOSURES_VIEW, build_query, metric_view, naive_timestamp


@dataclass(frozen=True)
class PullResult:
    as_of: dt.date
    cutoff: dt.datetime  # UTC: the end of ``as_of`` in the configured zone
    cube: Cube
    engine: str
    seconds: float

    def report(self) -> dict[str, object]:
        """What the pull saw, as a JSON-ready document (stored with scheduled runs)."""
        cube = self.cube
        return {
            "as_of": self.as_of.isoformat(), "cutoff": self.cutoff.isoformat(),
            "engine": self.engine, "seconds": round(self.seconds, 3),
            "rows": len(cube.rows), "units": cube.units,
            "first_date": cube.dates[0].isoformat() if cube.dates else None,
            "last_date": cube.dates[-1].isoformat() if cube.dates else None,
            "crossed_units": cube.crossed_units,
            "crossed": [{"date": c.date.isoformat(), "source": c.source, "units": c.units}
                        for c in cube.crossed],
            "empty_days": [d.isoformat() for d in cube.empty_days()],
        }


def default_as_of(config: PullConfig, now: dt.datetime | None = None) -> dt.date:
    """Yesterday in the configured zone: today's exposures are still arriving."""
    zone = zoneinfo.ZoneInfo(config.exposures.timezone)
    now = now or dt.datetime.now(dt.UTC)
    return now.astimezone(zone).date() - dt.timedelta(days=1)


def cutoff_for(config: PullConfig, as_of: dt.date) -> dt.datetime:
    """The UTC instant at which ``as_of`` ends in the configured zone."""
    zone = zoneinfo.ZoneInfo(config.exposures.timezone)
    midnight = dt.datetime.combine(as_of + dt.timedelta(days=1), dt.time(), tzinfo=zone)
    return midnight.astimezone(dt.UTC)


def run_pull(config: PullConfig, as_of: dt.date) -> PullResult:
    """Aggregate in the configured engine; raises :class:`InputError` naming the config key
    or column at fault, or saying that nothing was exposed before the cutoff."""
    started = time.perf_counter()
    cutoff = cutoff_for(config, as_of)
    with open_engine(config) as engine:
        relations = bind_relations(engine, config)
        exposure_types = check_columns(engine, config, relations)
        naive = naive_timestamp(exposure_types[config.exposures.time], engine.dialect)
        query = build_query(config, cutoff, engine.dialect, relations, naive)
        cells = engine.fetch(query.sql)
    cube = cube_from_cells(cells, query.metrics)
    if not cube.rows:
        detail = (f"; all {cube.crossed_units} units were exposed to more than one arm"
                  if cube.crossed_units else "")
        raise InputError([Problem("exposures", "no unit was exposed before the end of "
                                  f"{as_of.isoformat()} ({config.exposures.timezone}){detail}")])
    return PullResult(as_of, cutoff, cube, config.warehouse.engine,
                      time.perf_counter() - started)


_TIME = ("timestamp", "datetime")
_NUMBER = ("int", "float", "double", "decimal", "numeric", "real", "hugeint", "long",
           "short", "byte", "number")
_TEXT = ("char", "text", "string", "varchar", "uuid")


def _kind(type_name: str) -> str:
    lowered = type_name.lower()
    if any(word in lowered for word in _TIME):
        return "timestamp"
    if lowered == "date":
        return "date"
    if any(word in lowered for word in _NUMBER) and "interval" not in lowered:
        return "number"
    if any(word in lowered for word in _TEXT):
        return "text"
    return lowered


def check_columns(engine: Engine, config: PullConfig, relations: dict[str, str]
                  ) -> dict[str, str]:
    """Every configured column exists with a usable type; all problems at once. Returns the
    exposures' column types."""
    problems: list[Problem] = []
    ex = config.exposures
    exposure_types = engine.column_types(relations[EXPOSURES_VIEW], "exposures")
    wanted = [("unit", ex.unit, None), ("arm", ex.arm, None), ("time", ex.time, "timestamp")]
    if ex.source:
        wanted.append(("source", ex.source, None))
    problems += _missing("exposures", exposure_types, wanted)
    for k, metric in enumerate(config.metrics):
        key = f"metrics[{k}]"
        types = engine.column_types(relations[metric_view(k)], key)
        columns = [("unit", metric.unit, None), ("time", metric.time, "timestamp")]
        if metric.value:
            columns.append(("value", metric.value, "number"))
        problems += _missing(key, types, columns)
        if metric.unit in types and ex.unit in exposure_types:
            mine, theirs = _kind(types[metric.unit]), _kind(exposure_types[ex.unit])
            if mine != theirs:
                problems.append(Problem(f"{key}.unit", f"column {metric.unit!r} is "
                                        f"{types[metric.unit]} but the exposures' unit column "
                                        f"{ex.unit!r} is {exposure_types[ex.unit]}: they must "
                                        "compare equal"))
    if problems:
        raise InputError(problems)
    return exposure_types


def _missing(key: str, types: dict[str, str], wanted: list[tuple[str, str, str | None]]
             ) -> list[Problem]:
    problems = []
    for field, column, kind in wanted:
        if column not in types:
            listed = ", ".join(sorted(types)[:20])
            problems.append(Problem(f"{key}.{field}", f"column {column!r} is not in {key} "
                                    f"(its columns: {listed})"))
        elif kind is not None and _kind(types[column]) != kind:
            need = ("a timestamp (a date alone cannot place the exposure in the configured "
                    "time zone)" if kind == "timestamp" else "numeric")
            problems.append(Problem(f"{key}.{field}", f"column {column!r} is {types[column]}; "
                                    f"it must be {need}"))
    return problems
