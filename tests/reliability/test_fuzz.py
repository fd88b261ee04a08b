"""Fuzzing: the HTTP API against its own OpenAPI document, and the CSV reader.

* schemathesis generates requests for every operation of the app's OpenAPI document, valid
  and invalid ones, and sends them in-process (ASGI) with an admin token, so that more than
  authentication is exercised; the database holds the demo experiment with its data and
  alerts, and generated experiment and alert ids are often swapped for real ones. No answer
  may be a 5xx, and every answer must conform to the document (status code, content type,
  headers, body schema). ``INRUSH_FUZZ_EXAMPLES`` examples per operation (default 25, with a
  per-example deadline); ``make fuzz`` runs 2000.
* hypothesis checks ``service.csvio``: what ``write_observations_csv`` writes reads back as the
  same rows, and arbitrary text or bytes never raise anything but ``InputError``.
"""

from __future__ import annotations

import datetime as dt
import os
from collections.abc import Iterator
from typing import Any

import hypothesis.strategies as st
import pandas as pd
import pytest
import schemathesis
from fastapi import FastAPI
from fastapi.testclient import TestClient
from hypothesis import HealthCheck, given, settings
from schemathesis.checks import not_a_server_error
from schemathesis.specs.openapi.checks import (
    content_type_conformance,
    response_headers_conformance,
    response_schema_conformance,
    status_code_conformance,
)

from detectors.errors import InputError
from service.app import create_app
from service.csvio import read_observations_csv, write_observations_csv
from service.settings import Settings
from tests.reliability.conftest import ADMIN_TOKEN, seed_demo
from tests.reliability.support import record

FUZZ_EXAMPLES = int(os.environ.get("INRUSH_FUZZ_EXAMPLES", "25"))
# Per generated request: generous, as two cores are shared and uploads re-run the diagnosis.
DEADLINE = dt.timedelta(seconds=float(os.environ.get("INRUSH_FUZZ_DEADLINE_SECONDS", "10")))
CHECKS = [not_a_server_error, status_code_conformance, content_type_conformance,
          response_headers_conformance, response_schema_conformance]
_sent: dict[str, int] = {}


def _document() -> dict[str, Any]:
    # The document does not depend on the database (as for `inrush openapi`).
    return create_app(Settings(database_url="sqlite://", admin_token=None, public_url=None,
                               migrate_on_start=False)).openapi()


schema = schemathesis.openapi.from_dict(_document())
# Real ids, filled in by the fixture; generated ones almost never exist.
KNOWN: dict[str, Any] = {"experiment_id": "route-cards", "alert_id": 1}


@schema.hook
def flatmap_path_parameters(context: Any, path_parameters: dict[str, Any]) -> Any:
    # Half the time, a resource that exists.
    real = {name: KNOWN[name] for name in path_parameters or {} if name in KNOWN}
    if not real:
        return st.just(path_parameters)
    return st.sampled_from([path_parameters, {**path_parameters, **real}])


@pytest.fixture(scope="module")
def target_app(backend_url: str) -> Iterator[FastAPI]:
    """The app under fuzzing, on the demo experiment with its data and alerts."""
    app = create_app(Settings(database_url=backend_url, admin_token=ADMIN_TOKEN,
                              public_url=None, max_body_bytes=512 * 1024, max_rows=2000))
    with TestClient(app, raise_server_exceptions=False) as client:  # runs the migrations
        client.headers["Authorization"] = f"Bearer {ADMIN_TOKEN}"
        KNOWN["alert_id"] = seed_demo(client)[0]
        _sent.clear()
        yield app
    record(f"fuzz.cases.{'postgres' if 'postgresql' in backend_url else 'sqlite'}",
           sum(_sent.values()))


@schema.parametrize()
@settings(max_examples=FUZZ_EXAMPLES, deadline=DEADLINE,
          suppress_health_check=list(HealthCheck), database=None)
def test_api_answers_no_5xx_and_conforms_to_its_openapi(case: Any, target_app: FastAPI
                                                        ) -> None:
    _sent[case.operation.label] = _sent.get(case.operation.label, 0) + 1
    case.call_and_validate(headers={"Authorization": f"Bearer {ADMIN_TOKEN}"}, checks=CHECKS,
                           app=target_app)


# -- the CSV reader --------------------------------------------------------------------------

_text = st.text(alphabet=st.characters(blacklist_categories=("Cs",), blacklist_characters="\x00"),
                min_size=1, max_size=30)
_name = st.from_regex(r"[A-Za-z_][A-Za-z0-9_]{0,10}", fullmatch=True)
_finite = st.floats(allow_nan=False, allow_infinity=False, width=64)


@st.composite
def observation_rows(draw: st.DrawFn) -> list[dict[str, Any]]:
    metrics = draw(st.lists(_name, max_size=3, unique=True))
    count = draw(st.integers(1, 12))
    rows = []
    for _ in range(count):
        day = dt.date(2026, 10, 26) + dt.timedelta(days=draw(st.integers(0, 60)))
        stats = {}
        for name in metrics:
            if draw(st.booleans()):
                stats[name] = {"n": draw(st.integers(0, 10**6)), "sum": draw(_finite),
                               "sum_sq": draw(_finite)}
        rows.append({"date": day.isoformat(), "arm": draw(_text),
                     # Leading/trailing spaces are trimmed from sources on reading (by design).
                     "source": draw(_text.map(str.strip).filter(bool)),
                     "entered": draw(st.integers(0, 2**53)), "metrics": stats})
    return rows


@given(observation_rows())
@settings(max_examples=max(50, FUZZ_EXAMPLES * 4), deadline=None)
def test_csv_written_reads_back_as_the_same_rows(rows: list[dict[str, Any]]) -> None:
    frame = read_observations_csv(write_observations_csv(rows).encode("utf-8"))
    assert len(frame) == len(rows)
    for i, original in enumerate(rows):
        got = frame.iloc[i]
        assert got["date"] == original["date"]
        assert got["arm"] == original["arm"]
        assert got["source"] == original["source"]
        assert int(got["entered"]) == original["entered"]
        for name in {c.rpartition(".")[0] for c in frame.columns if "." in c}:
            stats = original["metrics"].get(name)
            cells = [got[f"{name}.{s}"] for s in ("n", "sum", "sum_sq")]
            if stats is None:
                assert all(pd.isna(c) for c in cells)
            else:  # repr of a float reads back as the same float
                assert int(cells[0]) == stats["n"]
                assert float(cells[1]) == stats["sum"]
                assert float(cells[2]) == stats["sum_sq"]


@given(st.one_of(st.text(max_size=300), st.binary(max_size=300),
                 st.lists(st.lists(st.text(max_size=8), max_size=6), max_size=6).map(
                     lambda cells: "\n".join(",".join(r) for r in cells))))
@settings(max_examples=max(100, FUZZ_EXAMPLES * 8), deadline=None)
def test_csv_reader_raises_only_input_errors(source: str | bytes) -> None:
    try:
        frame = read_observations_csv(source)
    except InputError as error:
        assert error.problems and all(p.message for p in error.problems)
    else:
        assert {"date", "arm", "entered"} <= set(frame.columns)
        assert len(frame) >= 1
