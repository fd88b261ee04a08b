"""From the engine's per-cell statistics to observation rows, and the pull's report.

``sum_sq`` without cancellation: when every per-unit value of a cell is a whole number and the
engine's float64 sum of squares stays below 2**53, that sum is exact (every partial sum is an
integer float64 represents exactly), and it is used as it is. Otherwise ``sum_sq`` is rebuilt
as ``M2 + sum**2 / n``, where ``M2 = n * var_pop`` is the sum of squares about the cell mean (a
shifted statistic the engines compute with stable one-pass updates), added in exact rational
arithmetic and rounded once to float64. A naive float64 ``sum(x*x)`` of large values would
instead carry rounding errors as large as the variance itself.
"""

from __future__ import annotations

import datetime as dt
from collections.abc import Sequence
from dataclasses import dataclass, field
from fractions import Fraction
from typing import Any

_EXACT_LIMIT = 2.0**53


@dataclass(frozen=True)
class Crossed:
    """Units exposed to more than one arm, by their first-exposure date and source."""

    date: dt.date
    source: str
    units: int


@dataclass(frozen=True)
class Cube:
    rows: list[dict[str, Any]]  # observation rows: date, arm, source, entered, metrics
    crossed: list[Crossed] = field(default_factory=list)

    @property
    def crossed_units(self) -> int:
        return sum(c.units for c in self.crossed)

    @property
    def units(self) -> int:
        return sum(int(r["entered"]) for r in self.rows)

    @property
    def dates(self) -> list[dt.date]:
        return sorted({dt.date.fromisoformat(r["date"]) for r in self.rows})

    @property
    def arms(self) -> list[str]:
        return sorted({r["arm"] for r in self.rows})

    def empty_days(self) -> list[dt.date]:
        """Days between the first and last date on which no unit entered at all (a logging
        gap reads as a day without traffic)."""
        dates = self.dates
        if not dates:
            return []
        seen = set(dates)
        span = (dates[-1] - dates[0]).days
        return [d for d in (dates[0] + dt.timedelta(days=i) for i in range(span + 1))
                if d not in seen]

    def with_arms(self, arms: Sequence[str]) -> Cube:
        """Every arm on every (date, source) seen, with zero rows where none entered, so that a
        re-pull overwrites a cell that has emptied since (for instance when its units turned
        out to be crossed) instead of leaving the old row in place."""
        metrics = sorted({name for r in self.rows for name in r["metrics"]})
        have = {(r["date"], r["arm"], r["source"]) for r in self.rows}
        cells = sorted({(r["date"], r["source"]) for r in self.rows})
        zeros = [{"date": d, "arm": a, "source": s, "entered": 0,
                  "metrics": {m: {"n": 0, "sum": 0.0, "sum_sq": 0.0} for m in metrics}}
                 for d, s in cells for a in arms if (d, a, s) not in have]
        return Cube(_sorted([*self.rows, *zeros]), self.crossed)


def cube_from_cells(cells: Sequence[Sequence[Any]], metrics: Sequence[str]) -> Cube:
    """Rows ``(d, a, s, entered, [n, sum, sumsq, var, whole] per metric)`` from the query."""
    rows: list[dict[str, Any]] = []
    crossed: list[Crossed] = []
    for cell in cells:
        day, arm, source, entered = cell[0], cell[1], cell[2], int(cell[3])
        day = day if isinstance(day, dt.date) and not isinstance(day, dt.datetime) \
            else dt.date.fromisoformat(str(day)[:10])
        if arm is None:
            crossed.append(Crossed(day, str(source), entered))
            continue
        stats = {}
        for k, name in enumerate(metrics):
            n, total, total_sq, var, whole = cell[4 + 5 * k: 9 + 5 * k]
            stats[name] = sufficient_statistics(int(n), total, total_sq, var, whole)
        rows.append({"date": day.isoformat(), "arm": str(arm), "source": str(source),
                     "entered": entered, "metrics": stats})
    crossed.sort(key=lambda c: (c.date, c.source))
    return Cube(_sorted(rows), crossed)


def sufficient_statistics(n: int, total: Any, total_sq: Any, var: Any, whole: Any
                          ) -> dict[str, float | int]:
    """``{n, sum, sum_sq}`` of one cell from the engine's aggregates (see the module doc)."""
    if n == 0:
        return {"n": 0, "sum": 0.0, "sum_sq": 0.0}
    total = float(total)
    if whole is not None and int(whole) == 1 and abs(float(total_sq)) < _EXACT_LIMIT:
        return {"n": n, "sum": total, "sum_sq": float(total_sq)}
    m2 = Fraction(max(float(var or 0.0), 0.0)) * n
    return {"n": n, "sum": total, "sum_sq": float(m2 + Fraction(total) ** 2 / n)}


def _sorted(rows: list[dict[str, Any]]) -> list[dict[str, Any]]:
    return sorted(rows, key=lambda r: (r["date"], r["arm"], r["source"]))
