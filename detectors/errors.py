"""Errors raised by the detectors for input they cannot analyse."""

from __future__ import annotations

from dataclasses import dataclass


@dataclass(frozen=True, slots=True)
class Problem:
    """One thing wrong with the input: where it is and what is wrong with it.

    ``row`` is the 0-based position of the offending row in the input (``None`` when the problem
    is not tied to a row, such as an allocation schedule); ``field`` names the column or setting.
    """

    field: str
    message: str
    row: int | None = None

    def as_dict(self) -> dict[str, object]:
        return {"row": self.row, "field": self.field, "message": self.message}


class InputError(ValueError):
    """The input cannot be analysed as given; ``problems`` lists every reason found."""

    def __init__(self, problems: list[Problem] | Problem | str, field: str = "input") -> None:
        if isinstance(problems, str):
            problems = [Problem(field=field, message=problems)]
        elif isinstance(problems, Problem):
            problems = [problems]
        self.problems: list[Problem] = list(problems)
        shown = "; ".join(_describe(p) for p in self.problems[:5])
        more = f" (and {len(self.problems) - 5} more)" if len(self.problems) > 5 else ""
        super().__init__(shown + more)


class UndefinedEstimateError(InputError):
    """An estimate is undefined, e.g. a cohort with positive weight has no units in an arm."""

    def __init__(self, message: str, cohort: str, arm: str) -> None:
        super().__init__([Problem(field="cohort", message=message)])
        self.cohort = cohort
        self.arm = arm


def _describe(problem: Problem) -> str:
    where = f"row {problem.row}, " if problem.row is not None else ""
    return f"{where}{problem.field}: {problem.message}"
