"""Input problems for people and for programs: grouped lines for the terminal, an RFC 9457
problem document for ``--json``.

Rows are numbered as the API numbers them (``service.problems.problems_as_errors``): ``row`` is
the 0-based position of the data row, ``line`` the file line on which it starts (the header
is line 1). The terminal names lines only, which is what an editor shows. Standard library
only, so that the parser stays light.
"""

from __future__ import annotations

from collections.abc import Iterable, Mapping, Sequence
from typing import Any

PROBLEM_TYPE_PATH = "/problems/"  # where a running service describes each problem type
LISTED_LINES = 8  # line numbers shown per grouped problem
LISTED_GROUPS = 40

# Field names of the data contract that mean something else on the command line.
_FIELD_WORDS = {"body": "file", "rows": "file", "metric": "--metric"}


def error_items(problems: Iterable[Any], lines: Sequence[int] | None) -> list[dict[str, Any]]:
    """``{row, line, field, message}`` per problem, as the API lists a CSV upload's."""
    items: list[dict[str, Any]] = []
    for problem in problems:
        item: dict[str, Any] = {"row": problem.row, "field": problem.field,
                                "message": problem.message}
        if problem.row is not None:
            item["line"] = (int(lines[problem.row]) if lines is not None
                            and problem.row < len(lines) else problem.row + 2)
        items.append(item)
    return items


def grouped_lines(items: Sequence[Mapping[str, Any]]) -> list[str]:
    """One entry per distinct problem: what is wrong, then on which lines it occurs ("in 25
    rows: lines 3, 6, 9, ..."), in the order first met."""
    groups: dict[tuple[str, str], list[Mapping[str, Any]]] = {}
    for item in items:
        groups.setdefault((item["field"], item["message"]), []).append(item)
    out: list[str] = []
    for (field, message), members in list(groups.items())[:LISTED_GROUPS]:
        word = _FIELD_WORDS.get(field, field)
        text = f"the row {message}" if field == "row" else f"{word}: {message}"
        located = [m["line"] for m in members if m.get("line") is not None]
        if len(located) == 1:
            text = f"line {located[0]}: {text}"
        elif located:
            shown = ", ".join(str(n) for n in located[:LISTED_LINES])
            more = ", …" if len(located) > LISTED_LINES else ""
            text += f" (in {len(located):,} rows: lines {shown}{more})"
        out.append(text)
    if len(groups) > LISTED_GROUPS:
        out.append(f"… and {len(groups) - LISTED_GROUPS:,} more kinds of problem (--json "
                   "lists every one)")
    return out


def summary(items: Sequence[Mapping[str, Any]]) -> str:
    rows = {i["row"] for i in items if i.get("row") is not None}
    problems = f"{len(items):,} problem{'s' if len(items) != 1 else ''}"
    return f"{problems} in {len(rows):,} row{'s' if len(rows) != 1 else ''}" if rows \
        else problems


def problem_document(items: Sequence[Mapping[str, Any]], *, slug: str = "invalid-input",
                     title: str = "Invalid input", status: int = 422,
                     instance: str | None = None, detail: str | None = None
                     ) -> dict[str, Any]:
    """An RFC 9457 problem document of the API's shape. ``type`` is the path at which a
    running service describes the problem type (a relative reference: there is no server)."""
    document: dict[str, Any] = {
        "type": f"{PROBLEM_TYPE_PATH}{slug}", "title": title, "status": status,
        "detail": detail or f"The input was rejected: {summary(items)}; nothing was analysed.",
    }
    if instance:
        document["instance"] = instance
    document["errors_total"] = len(items)
    document["errors"] = [dict(i) for i in items]
    return document
