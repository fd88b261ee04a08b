"""The terminal report's wording: thousands separators, the deciding p-value explained, no
JSON paths, aligned tables for any number of arms, wrapped lines, advice printed once, and the
declared-weights sentence when an incident carries observed weights."""

from __future__ import annotations

import copy
import io
import json
import re
from contextlib import redirect_stdout
from typing import Any

import pytest

from service.cli import main
from service.cli.report import (
    MAX_WIDTH,
    count,
    declared_weights_lines,
    format_diagnosis,
    table,
    unique_advice,
)
from service.demo import scenario


@pytest.fixture(scope="module")
def demo_document() -> dict[str, Any]:
    buffer = io.StringIO()
    with redirect_stdout(buffer):
        assert main(["analyze", str(scenario.CSV_PATH), "--arms", "control,cards",
                     "--json"]) == 0
    return json.loads(buffer.getvalue())


def test_counts_carry_thousands_separators_and_no_json_paths(
        demo_document: dict[str, Any]) -> None:
    report = format_diagnosis(demo_document)
    assert "161,441" in report and "14,602" in report and "1,791 units" in report
    # No bare number of five digits or more outside dates and p-values.
    prose = re.sub(r"\d{4}-\d{2}-\d{2}|\d(\.\d+)?e-\d+", "", report)
    assert not re.search(r"(?<![\d.,])\d{4,}(?![\d.,%])", prose), prose
    assert "p(adj)" not in report and "changepoints.engagement" not in report
    assert "97% of it through newsletter" in " ".join(report.split())
    assert "above the alert level 0.0005" in report  # the deciding whole-period p-value


def test_lines_fit_the_width(demo_document: dict[str, Any]) -> None:
    for line in format_diagnosis(demo_document).splitlines():
        assert len(line) <= MAX_WIDTH, line


def test_three_arm_tables_are_aligned(demo_document: dict[str, Any]) -> None:
    doc = copy.deepcopy(demo_document)
    for source in doc["sources"]:
        source["observed"] = {"control": source["observed"]["control"],
                              "cards": source["observed"]["cards"], "map_view": 1_234_567}
    doc["srm"]["observed"]["map_view"] = 7
    doc["srm"]["expected"]["map_view"] = 10.0
    lines = format_diagnosis(doc).splitlines()
    start = lines.index("Entry sources, whole period") + 1
    rows = lines[start:start + 1 + len(doc["sources"])]
    assert rows[0].split() == ["source", "control", "cards", "map_view", "p-value"]
    # Right-aligned columns: every count ends where its header ends.
    for header in ("control", "cards", "map_view"):
        end = rows[0].index(header) + len(header)
        for row in rows[1:]:
            assert row[end - 1].isdigit() and row[end] == " ", (header, row)
    assert table([["a", "1"], ["bbb", "22"]], right=[1]) == ["  a     1", "  bbb  22"]


def test_campaign_design_advice_appears_once_across_incidents(
        demo_document: dict[str, Any]) -> None:
    doc = copy.deepcopy(demo_document)
    design = next(a for a in doc["advice"] if a.startswith("If an email, push or SMS"))
    [incident] = doc["incidents"]
    doc["incidents"] = [incident | {"advice": [design, "Check the newsletter's audience."]},
                        incident | {"advice": [design]}]
    advice = unique_advice(doc)
    assert advice.count(design) == 1 and "Check the newsletter's audience." in advice
    assert " ".join(format_diagnosis(doc).split()).count(" ".join(design.split())) == 1


def test_observed_weights_of_an_incident_are_stated(demo_document: dict[str, Any]) -> None:
    doc = copy.deepcopy(demo_document)
    doc["incidents"] = [doc["incidents"][0] | {
        "shape": "persistent", "start": "2026-10-26",
        "observed_weights": {"control": 0.2, "cards": 0.4, "map": 0.4},
        "planned_weights": {"control": 0.34, "cards": 0.33, "map": 0.33}, "advice": []}]
    text = " ".join(" ".join(declared_weights_lines(doc)).split())
    assert "The declared weights look wrong: observed about 0.20/0.40/0.40" in text
    assert "0.34/0.33/0.33 was declared" in text
    assert text in " ".join(format_diagnosis(doc).split())
    assert declared_weights_lines(demo_document) == []


def test_count() -> None:
    assert count(1974) == "1,974" and count(30736.4) == "30,736" and count(None) == "n/a"
