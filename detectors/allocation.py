"""Allocation schedules: the planned arm weights and the dates from which they hold (ramps)."""

from __future__ import annotations

import datetime as dt
from collections.abc import Iterable, Mapping, Sequence
from dataclasses import dataclass

import numpy as np

from .errors import InputError, Problem

WEIGHT_TOLERANCE = 1e-9


@dataclass(frozen=True, slots=True)
class AllocationStep:
    """Weights in force from ``start`` (inclusive) until the next step."""

    start: dt.date
    weights: tuple[float, ...]


@dataclass(frozen=True, slots=True)
class AllocationSchedule:
    """A piecewise-constant allocation over the experiment's arms.

    Example:
        >>> import datetime as dt
        >>> s = AllocationSchedule.from_steps(["control", "variant"],
        ...     [{"from": "2026-03-01", "weights": [0.9, 0.1]},
        ...      {"from": "2026-03-08", "weights": [0.5, 0.5]}])
        >>> s.weights_on([dt.date(2026, 3, 7), dt.date(2026, 3, 8)]).tolist()
        [[0.9, 0.1], [0.5, 0.5]]
    """

    arms: tuple[str, ...]
    steps: tuple[AllocationStep, ...]

    @classmethod
    def constant(cls, arms: Sequence[str], weights: Sequence[float] | None = None,
                 start: dt.date = dt.date.min) -> AllocationSchedule:
        """One set of weights for the whole experiment (equal weights when none are given)."""
        if weights is None:
            weights = [1.0 / len(arms)] * len(arms)
        return cls.from_steps(arms, [{"from": start, "weights": list(weights)}])

    @classmethod
    def from_steps(cls, arms: Sequence[str], steps: Iterable[Mapping[str, object]]
                   ) -> AllocationSchedule:
        """Build and validate a schedule from ``[{"from": date, "weights": [...]}, ...]``.

        Weights are given in the order of ``arms`` (or as a ``{arm: weight}`` mapping); each set
        must be positive and sum to 1 within 1e-9.
        """
        arms = tuple(arms)
        problems: list[Problem] = []
        if len(arms) < 2:
            problems.append(Problem("arms", "an experiment needs at least two arms"))
        if len(set(arms)) != len(arms):
            problems.append(Problem("arms", "arm names must be unique"))
        parsed: list[AllocationStep] = []
        for index, step in enumerate(steps):
            field = f"allocation[{index}]"
            try:
                start = _as_date(step["from"])
            except (KeyError, TypeError, ValueError):
                problems.append(Problem(f"{field}.from", "must be an ISO date (YYYY-MM-DD)"))
                continue
            raw = step.get("weights")
            if isinstance(raw, Mapping):
                unknown = sorted(set(map(str, raw)) - set(arms))
                missing = [a for a in arms if a not in raw]
                if unknown or missing:
                    problems.append(Problem(f"{field}.weights",
                                            f"weights must name exactly the arms {list(arms)}"))
                    continue
                raw = [raw[a] for a in arms]
            try:
                weights = tuple(float(w) for w in raw)  # type: ignore[union-attr]
            except (TypeError, ValueError):
                problems.append(Problem(f"{field}.weights", "must be a list of numbers"))
                continue
            if len(weights) != len(arms):
                problems.append(Problem(f"{field}.weights",
                                        f"has {len(weights)} weights for {len(arms)} arms"))
                continue
            if not all(np.isfinite(weights)) or min(weights) <= 0:
                problems.append(Problem(f"{field}.weights", "every weight must be positive"))
                continue
            if abs(sum(weights) - 1.0) > WEIGHT_TOLERANCE:
                problems.append(Problem(f"{field}.weights",
                                        f"weights sum to {sum(weights)!r}, not 1"))
                continue
            parsed.append(AllocationStep(start, weights))
        if not parsed and not problems:
            problems.append(Problem("allocation", "the schedule needs at least one step"))
        starts = [s.start for s in parsed]
        if len(set(starts)) != len(starts):
            problems.append(Problem("allocation", "two steps start on the same date"))
        if problems:
            raise InputError(problems)
        return cls(arms, tuple(sorted(parsed, key=lambda s: s.start)))

    @property
    def first_date(self) -> dt.date:
        return self.steps[0].start

    def weights_on(self, dates: Sequence[dt.date] | np.ndarray) -> np.ndarray:
        """Planned weights for each date, shape ``(len(dates), n_arms)``.

        Dates before the first step take the first step's weights.
        """
        day_numbers = _day_numbers(dates)
        starts = np.array([s.start.toordinal() for s in self.steps])
        table = np.array([s.weights for s in self.steps], dtype=float)
        index = np.clip(np.searchsorted(starts, day_numbers, side="right") - 1, 0, None)
        return table[index]

    def change_dates(self) -> list[dt.date]:
        """Dates on which the weights change (every step after the first)."""
        return [s.start for s in self.steps[1:]]

    def to_steps(self) -> list[dict[str, object]]:
        return [{"from": s.start.isoformat(), "weights": list(s.weights)} for s in self.steps]


def _as_date(value: object) -> dt.date:
    if isinstance(value, dt.datetime):
        return value.date()
    if isinstance(value, dt.date):
        return value
    if isinstance(value, str):
        return dt.date.fromisoformat(value)
    raise TypeError(value)


def _day_numbers(dates: Sequence[dt.date] | np.ndarray) -> np.ndarray:
    array = np.asarray(dates)
    if array.dtype.kind == "M":
        epoch = dt.date(1970, 1, 1).toordinal()
        return array.astype("datetime64[D]").astype(np.int64) + epoch
    return np.array([d.toordinal() for d in array], dtype=np.int64)
