"""Options of ``inrush analyze`` and ``inrush reweight`` read into plain values, checked with
messages in the command line's own terms (``--allocation 2026-03-08:0.5,0.5``, not a schedule
field). Standard library only: the parser must stay light (see ``service.cli``)."""

from __future__ import annotations

import datetime as dt
import difflib
from collections.abc import Sequence
from dataclasses import dataclass

# Weights that sum to 1 within this are taken (and scaled to sum to 1 exactly): 0.33,0.33,0.34
# is what a person writes for thirds.
SUM_TOLERANCE = 0.005


@dataclass(frozen=True)
class OptionProblem:
    """A command-line value that cannot be used: the option, and what to do about it."""

    option: str
    message: str


class OptionError(ValueError):
    def __init__(self, problems: Sequence[OptionProblem]) -> None:
        super().__init__("; ".join(f"{p.option}: {p.message}" for p in problems))
        self.problems = list(problems)


@dataclass(frozen=True)
class AllocationStep:
    start: dt.date | None  # None: from the first day of the data
    weights: tuple[float, ...]


@dataclass(frozen=True)
class AnalysisOptions:
    arms: tuple[str, ...]
    steps: tuple[AllocationStep, ...]
    start: dt.date | None
    end: dt.date | None

    def schedule_steps(self, first_day: dt.date) -> list[dict[str, object]]:
        """Steps in the shape ``AllocationSchedule.from_steps`` takes; a step without a date
        holds from ``first_day``."""
        return [{"from": step.start or first_day, "weights": list(step.weights)}
                for step in self.steps]


def parse_options(arms: str, weights: str | None, allocation: Sequence[str] | None,
                  start: str | None, end: str | None) -> AnalysisOptions:
    """Read ``--arms``, ``--weights``, ``--allocation`` (repeatable), ``--start`` and
    ``--end``; every problem found is raised at once (:class:`OptionError`)."""
    problems: list[OptionProblem] = []
    names = tuple(a.strip() for a in arms.split(",") if a.strip())
    if len(names) < 2:
        problems.append(OptionProblem("--arms", f"{arms!r} names {len(names)} arm(s); give at "
                                      "least two, reference arm first: --arms control,variant"))
    repeated = sorted({a for a in names if names.count(a) > 1})
    if repeated:
        problems.append(OptionProblem("--arms", f"{', '.join(map(repr, repeated))} is named "
                                      "twice; each arm once"))
    first = _date(start, "--start", problems) if start else None
    last = _date(end, "--end", problems) if end else None
    if first and last and last < first:
        problems.append(OptionProblem("--end", f"{end} is before --start {start}"))
    steps: list[AllocationStep] = []
    if weights and allocation:
        problems.append(OptionProblem("--weights", "give --weights (one set for the whole "
                                      "period) or --allocation (weights from a date on), not "
                                      "both"))
    elif weights:
        parsed = _weights(weights, f"--weights {weights}", len(names), problems)
        if parsed:
            steps.append(AllocationStep(None, parsed))
    elif allocation:
        for text in allocation:
            step = _step(text, len(names), problems)
            if step:
                steps.append(step)
        dates = [s.start for s in steps]
        repeated_dates = sorted({d for d in dates if d and dates.count(d) > 1})
        if repeated_dates:
            problems.append(OptionProblem("--allocation", "two steps start on "
                                          + ", ".join(d.isoformat() for d in repeated_dates)
                                          + "; give each date once"))
    elif names:
        steps.append(AllocationStep(None, tuple(1.0 / len(names) for _ in names)))
    if problems:
        raise OptionError(problems)
    return AnalysisOptions(names, tuple(sorted(steps, key=lambda s: s.start or dt.date.min)),
                           first, last)


def _date(text: str, option: str, problems: list[OptionProblem]) -> dt.date | None:
    try:
        return dt.date.fromisoformat(text.strip())
    except ValueError:
        problems.append(OptionProblem(option, f"{text!r} is not a date; write it YYYY-MM-DD"))
        return None


def _step(text: str, n_arms: int, problems: list[OptionProblem]) -> AllocationStep | None:
    shown = f"--allocation {text}"
    date_text, colon, weight_text = text.partition(":")
    if not colon:
        problems.append(OptionProblem("--allocation", f"{text!r} has no date: write "
                                      "DATE:W1,W2,... (weights in --arms order, in force from "
                                      "DATE on), for example 2026-03-01:0.1,0.9"))
        return None
    start = _date(date_text, shown, problems)
    weights = _weights(weight_text, shown, n_arms, problems)
    return AllocationStep(start, weights) if start and weights else None


def _weights(text: str, shown: str, n_arms: int, problems: list[OptionProblem]
             ) -> tuple[float, ...] | None:
    cells = [c.strip() for c in text.split(",")]
    try:
        values = [float(c) for c in cells]
    except ValueError:
        bad = next(c for c in cells if not _is_number(c))
        problems.append(OptionProblem(shown, f"{bad!r} is not a number; weights are numbers "
                                      "separated by commas, in --arms order"))
        return None
    if n_arms and len(values) != n_arms:
        problems.append(OptionProblem(shown, f"{len(values)} weight(s) for {n_arms} arms; "
                                      "give one per arm, in --arms order"))
        return None
    if any(not (v > 0) or v == float("inf") for v in values):
        problems.append(OptionProblem(shown, "every weight must be a positive number"))
        return None
    total = sum(values)
    if abs(total - 1) > SUM_TOLERANCE:
        scaled = ",".join(f"{v / total:.4g}" for v in values)
        problems.append(OptionProblem(shown, f"the weights sum to {total:g}, not 1; did you "
                                      f"mean {scaled}?"))
        return None
    return tuple(v / total for v in values)


def _is_number(text: str) -> bool:
    try:
        float(text)
    except ValueError:
        return False
    return True


def close_names(value: str, choices: Sequence[str]) -> str | None:
    """The choice ``value`` was most likely meant to be (same letters ignoring case, or
    ``difflib``'s closest), or ``None``."""
    folded = {c.casefold(): c for c in choices}
    if value.casefold() in folded:
        return folded[value.casefold()]
    matches = difflib.get_close_matches(value, list(choices), n=1, cutoff=0.6)
    return matches[0] if matches else None
