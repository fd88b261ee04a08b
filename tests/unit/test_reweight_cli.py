"""``inrush reweight`` on a CSV: the honest default, custom cohort weights, bounds and impact."""

from __future__ import annotations

import json
from pathlib import Path
from typing import Any

import pytest

from detectors import AllocationSchedule, ObservationTable, diagnose, reweight
from detectors.contamination import cells_from_document
from detectors.honest import honest_effect
from service.cli import main
from service.csvio import read_observations_csv
from service.demo import scenario

DEMO = Path(scenario.__file__).with_name("larkspur_route_cards.csv")
BASE = ["reweight", str(DEMO), "--arms", "control,cards", "--metric", "routes_saved"]


def run(capsys: pytest.CaptureFixture[str], *extra: str) -> tuple[int, Any, str]:
    code = main([*BASE, *extra])
    captured = capsys.readouterr()
    if code == 0 and "--json" in extra:
        return code, json.loads(captured.out), captured.err
    return code, captured.out, captured.err


def demo_table() -> tuple[ObservationTable, AllocationSchedule]:
    table = ObservationTable.from_frame(read_observations_csv(DEMO), scenario.ARMS)
    return table, AllocationSchedule.constant(scenario.ARMS, None, table.dates[0].item())


def test_default_is_the_honest_estimate_with_its_reason_bounds_and_impact(
        capsys: pytest.CaptureFixture[str]) -> None:
    code, document, _ = run(capsys, "--json")
    assert code == 0
    table, schedule = demo_table()
    cells = cells_from_document(diagnose(table, schedule).to_dict())
    expected = honest_effect(table, "routes_saved", cells, schedule).to_dict()
    assert document["comparisons"] == json.loads(json.dumps(expected["comparisons"]))
    assert document["default"]["target"] == "uncontaminated"
    assert len(document["default"]["excluded_cells"]) == len(cells) > 0
    (impact,) = document["impact"]
    assert impact["worst_case"] > 0 and impact["in_se"] > 0
    code, text, _ = run(capsys)
    assert "Default chosen: uncontaminated" in text
    assert "bounds    [" in text and "could move the effect on routes_saved by at" in text


def test_cohort_weights_file_sets_a_custom_target(capsys: pytest.CaptureFixture[str],
                                                  tmp_path: Path) -> None:
    weights = tmp_path / "weights.json"
    weights.write_text(json.dumps({"organic": 3, "push": 1}))
    code, document, _ = run(capsys, "--cohort-weights", str(weights), "--json")
    assert code == 0
    table, _ = demo_table()
    direct = reweight(table, "routes_saved", target="custom",
                      weights={"organic": 3, "push": 1}, flagged_dates=[])
    assert document["target"] == "custom" and "default" not in document
    assert document["comparisons"][0]["adjusted"] == pytest.approx(
        direct.comparisons[0].adjusted.to_dict())
    assert document["comparisons"][0]["bounds"]["low"] is not None
    assert {c["cohort"]: c["weight"] for c in document["cohorts"]}["organic"] == 0.75


@pytest.mark.parametrize(("content", "message"), [
    (None, "cannot read"), ("{not json", "is not JSON"), ("[1, 2]", "must hold a JSON object"),
    ('{"nowhere": 1}', "not a cohort"), ('{"organic": -1}', "finite number >= 0")])
def test_bad_cohort_weights_are_named_exit_2(capsys: pytest.CaptureFixture[str],
                                             tmp_path: Path, content: str | None,
                                             message: str) -> None:
    path = tmp_path / "weights.json"
    if content is not None:
        path.write_text(content)
    code, _, err = run(capsys, "--cohort-weights", str(path))
    assert code == 2
    assert message in err


def test_cohort_weights_and_target_together_are_refused(capsys: pytest.CaptureFixture[str],
                                                        tmp_path: Path) -> None:
    path = tmp_path / "weights.json"
    path.write_text('{"organic": 1}')
    code, _, err = run(capsys, "--cohort-weights", str(path), "--target", "reference_arm")
    assert code == 2 and "--cohort-weights" in err
