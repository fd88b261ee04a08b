"""CSV exports neutralise cells a spreadsheet would run as formulas (OWASP, "CSV Injection":
a leading =, +, -, @, tab or CR gets an apostrophe), and an exported file uploaded again
stores the very same rows."""

from __future__ import annotations

import csv
import io
from typing import Any

from apihelpers import EXPERIMENT

ARMS = ["=control", "-cards"]
SOURCES = ["=HYPERLINK(\"http://x.invalid\",\"go\")", "+1 promo", "-", "@home", "'quoted",
           "'=twice", "organic"]


def _experiment(client: Any, experiment_id: str) -> None:
    response = client.post("/v1/experiments", json={
        **EXPERIMENT, "id": experiment_id, "arms": ARMS,
        "allocation": [{"from": EXPERIMENT["start_date"], "weights": [0.5, 0.5]}]})
    assert response.status_code == 201, response.text


def test_exports_are_neutralised_and_round_trip(client: Any, stored: Any) -> None:
    _experiment(client, "formulas")
    rows = [{"date": "2026-10-26", "arm": arm, "source": source, "entered": 40 + i,
             "metrics": {"delta_km": {"n": 10, "sum": -1.0, "sum_sq": 3.5}}}
            for i, (arm, source) in enumerate((a, s) for a in ARMS for s in SOURCES)]
    written = client.put("/v1/experiments/formulas/observations", json={"rows": rows})
    assert written.status_code == 200, written.text

    exported = client.get("/v1/experiments/formulas/observations",
                          headers={"Accept": "text/csv"}).text
    cells = list(csv.reader(io.StringIO(exported)))
    header, body = cells[0], cells[1:]
    for line in body:
        for column in ("arm", "source"):
            value = line[header.index(column)]
            assert not value.startswith(("=", "+", "-", "@", "\t", "\r")), value
        # Numeric columns are numbers, negative ones included: never escaped.
        assert line[header.index("delta_km.sum")] == "-1"
    assert ["2026-10-26", "'=control", "'=HYPERLINK(\"http://x.invalid\",\"go\")"] in [
        line[:3] for line in body]
    assert ["2026-10-26", "'-cards", "''quoted"] in [line[:3] for line in body]

    _experiment(client, "formulas-again")
    again = client.put("/v1/experiments/formulas-again/observations",
                       content=exported.encode(), headers={"Content-Type": "text/csv"})
    assert again.status_code == 200, again.text
    assert stored("formulas-again") == stored("formulas")
    assert {r["source"] for r in stored("formulas-again")} == set(SOURCES)
