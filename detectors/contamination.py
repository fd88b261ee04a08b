"""Contaminated cells and how much an incident can move an effect estimate.

A contaminated cell is one (day, entry source, arm) where an incident put units over (+) or
under (-) plan. The cells come from a diagnosis document (its incidents, or for documents
without incidents its alert-level flagged days) or from detector episodes, and feed the honest
estimate and the trimming bounds of :mod:`detectors.honest`.

:func:`incident_impact` says, per metric, how far one incident can move the effect:

* ``estimated_bias``: the naive difference minus the honest one (the incident's cells left out);
* ``worst_case``: the largest distance between the naive difference (within allocation
  periods, combined with the regular population's period weights; the plain naive difference
  when the allocation never changed) and an end of the trimming bounds around it (Lee 2009,
  the incident's cells trimmed where the excess sits): how far the incident could have moved
  the naive reading, assuming only that it added (or removed) units in its arm. It is 0 for
  an incident without units, whatever the noise;
* ``standard_error``: of the naive difference; ``in_se = worst_case / standard_error``.

An incident is material when ``in_se >= DEFAULT_MATERIALITY`` (configurable by the caller).

Example:
    >>> document = {"incidents": [{"arm": "cards", "cells": [
    ...     {"date": "2026-03-01", "source": "push", "units": 400.0}]}]}
    >>> cells_from_document(document)
    (ContaminatedCell(date=datetime.date(2026, 3, 1), source='push', arm='cards', units=400.0),)
"""

from __future__ import annotations

import datetime as dt
import math
from collections.abc import Callable, Iterable, Mapping, Sequence
from dataclasses import dataclass
from typing import Any

import numpy as np

from .allocation import AllocationSchedule
from .data import ObservationTable
from .episodes import Episode, EpisodeCell, MetricImpact
from .errors import InputError
from .honest import bounds_parts, honest_arrays, layout, naive_estimates

# An incident whose worst case is below this many standard errors of the naive difference is
# immaterial (common practice, no source: a quarter SE barely moves a 95% interval).
DEFAULT_MATERIALITY = 0.25
# Episode shapes whose cells all go one way (units added, or units missing).
ONE_WAY = ("inflow", "shortfall")


@dataclass(frozen=True, slots=True)
class ContaminatedCell:
    """Signed units over (+) or under (-) plan in ``arm`` on ``date`` through ``source``."""

    date: dt.date
    source: str
    arm: str
    units: float


def cells_from_document(document: Mapping[str, Any]) -> tuple[ContaminatedCell, ...]:
    """The contaminated cells of a diagnosis document.

    With an ``incidents`` key: each incident's ``cells`` (``[{date, source, units}]``) in the
    incident's ``arm``. Without it (documents written before incidents existed): the
    alert-level ``flagged_days``, each with its ``inflow_arm`` and per-source ``excess``
    (observed minus expected, converted to units that entered the arm alone with the day's
    ``estimated_inflow`` over its arm excess).
    Malformed entries are skipped (the document was written by the service itself).
    """
    out: list[ContaminatedCell] = []
    incidents = document.get("incidents")
    if incidents is not None:
        for incident in incidents or ():
            arm = incident.get("arm")
            made = [_cell(cell.get("date"), cell.get("source"), arm, cell.get("units"))
                    for cell in incident.get("cells") or ()]
            cells = [c for c in made if c is not None]
            out += _one_direction(cells) if incident.get("shape") in ONE_WAY else cells
        return tuple(out)
    for day in document.get("flagged_days") or ():
        if day.get("severity") != "alert":
            continue
        # A flagged day's per-source excess is observed minus expected (c_k - p_k n); the
        # units that entered arm k alone are that over (1 - p_k), which is the day's
        # estimated_inflow over its arm excess.
        arm_excess = (day.get("excess") or {}).get(day.get("inflow_arm"))
        inflow = day.get("estimated_inflow")
        if not _positive(arm_excess) or not _positive(inflow):
            continue
        scale = float(inflow) / float(arm_excess)
        for source in day.get("sources") or ():
            excess = source.get("excess")
            made = _cell(day.get("date"), source.get("source"), day.get("inflow_arm"),
                         excess * scale if _positive(excess) else None)
            if made is not None:
                out.append(made)
    return tuple(out)


def cells_from_episodes(episodes: Iterable[Episode]) -> tuple[ContaminatedCell, ...]:
    """The contaminated cells of detector episodes (each cell in its episode's arm)."""
    out: list[ContaminatedCell] = []
    for episode in episodes:
        cells = [ContaminatedCell(c.date, c.source, episode.arm, float(c.units))
                 for c in episode.cells if c.units != 0]
        out += _one_direction(cells) if episode.shape in ONE_WAY else cells
    return tuple(out)


def _one_direction(cells: Sequence[ContaminatedCell]) -> list[ContaminatedCell]:
    """The cells that go the episode's way: an inflow's sources that fell short of plan on its
    days (or a shortfall's that exceeded it) are noise, not a second incident."""
    total = sum(c.units for c in cells)
    return [c for c in cells if c.units * total > 0]


def _positive(value: Any) -> bool:
    return (not isinstance(value, bool) and isinstance(value, int | float)
            and math.isfinite(value) and value > 0)


def _cell(date: Any, source: Any, arm: Any, units: Any) -> ContaminatedCell | None:
    if not isinstance(source, str) or not isinstance(arm, str):
        return None
    if isinstance(units, bool) or not isinstance(units, int | float) or not math.isfinite(units):
        return None
    if units == 0:
        return None
    try:
        day = date if isinstance(date, dt.date) else dt.date.fromisoformat(str(date))
    except ValueError:
        return None
    return ContaminatedCell(day, source, arm, float(units))


def incident_impact(table: ObservationTable, schedule: AllocationSchedule | None, metric: str,
                    cells: Sequence[ContaminatedCell], *,
                    confidence: float = 0.95) -> MetricImpact:
    """How much the incident whose cells are ``cells`` can move the effect on ``metric``.

    The comparison is the incident's arm against the reference arm; when the reference arm
    (or several arms) is affected, the comparison with the largest ``in_se``. Fields that cannot
    be computed (no measured units, nothing clean left) are ``None``; it never raises for data
    the service stored.

    Example: see :mod:`detectors.honest` for the data; an empty incident moves nothing:
        >>> import pandas as pd
        >>> rows = pd.DataFrame({"date": ["2026-03-01"] * 2, "arm": ["control", "cards"],
        ...     "source": ["organic"] * 2, "entered": [100, 100], "m.n": [100, 100],
        ...     "m.sum": [200.0, 210.0], "m.sum_sq": [500.0, 530.0]})
        >>> table = ObservationTable.from_frame(rows, ["control", "cards"])
        >>> incident_impact(table, None, "m", []).worst_case
        0.0
    """
    empty = MetricImpact(None, None, None, None)
    if metric not in table.metrics:
        return empty
    lay = layout(table, metric, cells, schedule)
    arms = table.arms
    try:
        naive = naive_estimates(lay, 1.0)   # z = 1: the interval's half-width is the SE
    except InputError:                      # an arm without measured units
        return empty
    try:
        n, total, _, pi = honest_arrays(lay)
        with np.errstate(divide="ignore", invalid="ignore"):
            means = np.where(n > 0, total / n, 0.0)
        honest = (pi * means).sum(axis=1)
        honest_diff: np.ndarray | None = honest[1:] - honest[0]
    except ValueError:
        honest_diff = None
    parts = bounds_parts(lay, confidence, by_source=False)
    affected = {arms.index(c.arm) for c in cells if c.arm in arms}
    candidates = (range(1, len(arms)) if not affected or 0 in affected
                  else sorted(a for a in affected if a > 0))
    best: MetricImpact | None = None
    for a in candidates:
        estimate = naive[a - 1]
        se = (estimate.ci_high - estimate.ci_low) / 2
        bias = None if honest_diff is None else _finite(estimate.difference - honest_diff[a - 1])
        set_ = parts[a - 1].difference
        base = parts[a - 1].untrimmed
        worst = None
        if set_.low is not None and set_.high is not None and math.isfinite(base):
            worst = max(set_.high - base, base - set_.low, 0.0)
        in_se = worst / se if worst is not None and se > 0 else None
        impact = MetricImpact(bias, worst, _finite(se), in_se)
        if best is None or (in_se or 0.0) > (best.in_se or 0.0):
            best = impact
    return best or empty


def impact_function(table: ObservationTable, schedule: AllocationSchedule | None
                    ) -> Callable[[Sequence[EpisodeCell], str], dict[str, MetricImpact]]:
    """For :func:`detectors.diagnose.diagnose`'s ``impact``: the function giving an episode's
    :func:`incident_impact` on every metric of ``table`` from its cells and arm.

    Example:
        >>> import pandas as pd
        >>> rows = pd.DataFrame({"date": ["2026-03-01"] * 2, "arm": ["control", "cards"],
        ...     "source": ["organic"] * 2, "entered": [100, 100], "m.n": [100, 100],
        ...     "m.sum": [200.0, 210.0], "m.sum_sq": [500.0, 530.0]})
        >>> table = ObservationTable.from_frame(rows, ["control", "cards"])
        >>> impacts = impact_function(table, None)((), "cards")
        >>> impacts["m"].worst_case
        0.0
    """
    def impacts(cells: Sequence[EpisodeCell], arm: str) -> dict[str, MetricImpact]:
        contaminated = _one_direction([ContaminatedCell(c.date, c.source, arm, float(c.units))
                                       for c in cells if c.units != 0])
        return {metric: incident_impact(table, schedule, metric, contaminated)
                for metric in table.metrics}

    return impacts


def _finite(value: float) -> float | None:
    value = float(value)
    return value if math.isfinite(value) else None
