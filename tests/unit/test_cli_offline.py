"""``inrush analyze`` and ``inrush reweight`` on files: ramps given with --allocation, rows
trimmed by --start/--end, and input problems that say how to fix them (grouped, with the
file lines the API gives too)."""

from __future__ import annotations

import datetime as dt
import json
from pathlib import Path
from typing import Any

import numpy as np
import pandas as pd
import pytest

from service.cli import main
from service.demo import scenario

START = dt.date(2026, 3, 2)
ARMS = "control,variant"


def _ramp_file(path: Path, seed: int, *, days: int = 28, step: int = 7,
               per_day: int = 20_000) -> Path:
    """A correctly run ramp, simulated: 10/90 for ``step`` days, then 50/50; each source's
    daily units split between the arms by a multinomial draw at the weights in force."""
    rng = np.random.default_rng(seed)
    rows = []
    for day in range(days):
        weights = [0.1, 0.9] if day < step else [0.5, 0.5]
        for source, share in (("organic", 0.7), ("newsletter", 0.2), ("push", 0.1)):
            counts = rng.multinomial(rng.poisson(per_day * share), weights)
            for arm, units in zip(("control", "variant"), counts, strict=True):
                rows.append({"date": (START + dt.timedelta(days=day)).isoformat(),
                             "arm": arm, "source": source, "entered": int(units)})
    pd.DataFrame(rows).to_csv(path, index=False)
    return path


def _run(capsys: pytest.CaptureFixture[str], *argv: str) -> tuple[int, str, str]:
    status = main(list(argv))
    captured = capsys.readouterr()
    return status, captured.out, captured.err


def _analyze_json(capsys: pytest.CaptureFixture[str], *argv: str) -> dict[str, Any]:
    status, out, err = _run(capsys, "analyze", *argv, "--json")
    assert status == 0, err + out
    return json.loads(out)


@pytest.mark.parametrize("seed", [1, 2, 3])
def test_a_correctly_run_ramp_given_with_allocation_raises_no_alert(
        tmp_path: Path, capsys: pytest.CaptureFixture[str], seed: int) -> None:
    path = _ramp_file(tmp_path / "ramp.csv", seed)
    ramp = _analyze_json(capsys, str(path), "--arms", ARMS,
                         "--allocation", f"{START}:0.1,0.9",
                         "--allocation", f"{START + dt.timedelta(days=7)}:0.5,0.5")
    assert ramp["status"] != "alert"
    assert not [d for d in ramp["flagged_days"] if d["severity"] == "alert"]
    assert not [s for s in ramp["sources"] if s["skewed"]]
    # The same file read against a constant 50/50 plan is a gross mismatch: the option is
    # what makes the difference.
    flat = _analyze_json(capsys, str(path), "--arms", ARMS, "--weights", "0.5,0.5")
    assert flat["status"] == "alert"


def test_start_and_end_trim_rows_and_say_how_many(tmp_path: Path,
                                                  capsys: pytest.CaptureFixture[str]) -> None:
    path = _ramp_file(tmp_path / "ramp.csv", 4)
    first, last = START + dt.timedelta(days=7), START + dt.timedelta(days=20)
    status, out, err = _run(capsys, "analyze", str(path), "--arms", ARMS, "--weights",
                            "0.5,0.5", "--start", str(first), "--end", str(last), "--json")
    assert status == 0, err
    document = json.loads(out)
    assert document["as_of"] == last.isoformat()
    assert document["status"] != "alert"  # the 10/90 week is left out
    # 3 sources x 2 arms a day: 7 days before, 7 days after.
    assert "left out 42 dated before 2026-03-09 (--start) and 42 dated after 2026-03-22 " \
        "(--end) of 168 rows" in " ".join(err.split())


def test_allocation_mistakes_are_named_in_option_terms(tmp_path: Path,
                                                       capsys: pytest.CaptureFixture[str]
                                                       ) -> None:
    path = _ramp_file(tmp_path / "ramp.csv", 5, days=3)
    status, out, err = _run(capsys, "analyze", str(path), "--arms", ARMS,
                            "--allocation", "2026-03-02:10,90", "--allocation", "0.5,0.5",
                            "--allocation", "2026-03-04:0.2,0.3,0.5")
    text = " ".join(err.split())
    assert status == 2 and out == ""
    assert "--allocation 2026-03-02:10,90: the weights sum to 100, not 1; did you mean " \
        "0.1,0.9?" in text
    assert "'0.5,0.5' has no date: write DATE:W1,W2,..." in text
    assert "3 weight(s) for 2 arms" in text
    assert "allocation[" not in text and "weights:" not in text


def test_repeated_problems_are_grouped_with_their_lines(tmp_path: Path,
                                                        capsys: pytest.CaptureFixture[str]
                                                        ) -> None:
    frame = pd.read_csv(scenario.CSV_PATH, dtype=str)
    frame.loc[frame.index % 3 == 0, "arm"] = frame["arm"].str.title()
    path = tmp_path / "export.csv"
    frame.to_csv(path, index=False)
    status, _, err = _run(capsys, "analyze", str(path), "--arms", "control,cards")
    assert status == 2
    bad = frame.index[frame.index % 3 == 0]
    controls = [i for i in bad if frame["arm"][i] == "Control"]
    text = " ".join(err.split())
    assert (f"arm: 'Control' is not one of the arms control, cards: did you mean 'control'? "
            f"(in {len(controls)} rows: lines {controls[0] + 2}, {controls[1] + 2},") in text
    assert text.count("'Control' is not one of the arms") == 1


def test_json_errors_are_a_problem_document_with_api_row_numbers(
        tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    path = tmp_path / "gaps.csv"
    # A blank line: the data row after it starts on line 5, it is row 2.
    path.write_text("date,arm,source,entered\n2026-03-02,control,organic,10\n"
                    "2026-03-02,variant,organic,11\n\n2026-03-03,Variant,organic,12\n")
    status, out, _ = _run(capsys, "analyze", str(path), "--arms", ARMS, "--json")
    assert status == 2
    problem = json.loads(out)
    assert {"type", "title", "status", "detail"} <= set(problem)
    assert problem["type"].endswith("/problems/invalid-input") and problem["status"] == 422
    assert problem["errors"] == [{"row": 2, "line": 5, "field": "arm", "message":
                                  "'Variant' is not one of the arms control, variant: did "
                                  "you mean 'variant'?"}]


def test_semicolon_and_tab_exports_read_like_the_comma_file(
        tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    comma = _analyze_json(capsys, str(scenario.CSV_PATH), "--arms", "control,cards")
    text = scenario.CSV_PATH.read_text()
    for name, separator in (("semicolon", ";"), ("tab", "\t")):
        path = tmp_path / f"{name}.csv"
        path.write_text(text.replace(",", separator))
        status, out, err = _run(capsys, "analyze", str(path), "--arms", "control,cards",
                                "--json")
        assert status == 0, err
        assert f"read as {name}-separated" in err
        other = json.loads(out)
        assert other["flagged_days"] == comma["flagged_days"]
        assert other["srm"] == comma["srm"]


@pytest.mark.parametrize(("content", "expected"), [
    ("date,arm,source,entered\n2026-03-02,control,caf\u00e9,10\n".encode("latin-1"),
     "line 2 is not UTF-8 (byte 0xE9 in '2026-03-02,control,café,10'): the file looks like "
     "Latin-1"),
    (b"date,arm,source,entered\n2026-03-02,control,organic,1,234\n",
     "line 2: the row has 5 fields, the header has 4: 1,234 looks like a number written "
     "with a thousands separator"),
    (b'date,arm,source,entered\n2026-03-02,control,organic,"1,234"\n',
     "line 2: entered: '1,234' is not a whole number >= 0: drop the thousands separator "
     "(1234)"),
    (b"date;arm;source;entered;hikes.n;hikes.sum;hikes.sum_sq\n"
     b"2026-03-02;control;organic;10;10;2,5;7\n",
     "hikes.sum: '2,5' is not a number"),
    (b"date,arm,source,entered,hikes_n,hikes.sum,hikes.sum_sq\n"
     b"2026-03-02,control,organic,10,10,2,7\n",
     "column 'hikes_n' looks like a metric statistic but metrics are written NAME.n, "
     "NAME.sum, NAME.sum_sq: rename it hikes.n"),
    (b"Date,arm,source,entered\n2026-03-02,control,organic,10\n",
     "missing required column 'date': found 'Date', rename it 'date'"),
    (b"date,arm,source,entered\n02/03/2026,control,organic,10\n",
     "date: '02/03/2026' is not a date written YYYY-MM-DD (for 2026-03-02, write it so)"),
])
def test_problems_name_the_value_and_the_fix(tmp_path: Path,
                                             capsys: pytest.CaptureFixture[str],
                                             content: bytes, expected: str) -> None:
    path = tmp_path / "bad.csv"
    path.write_bytes(content)
    status, out, err = _run(capsys, "analyze", str(path), "--arms", ARMS)
    assert status == 2 and out == ""
    assert expected in " ".join(err.split())


def test_a_file_without_sources_or_with_gaps_is_analysed_with_notes(
        tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    path = tmp_path / "plain.csv"
    path.write_text("date,arm,entered,country\n2026-03-02,control,100,fr\n"
                    "2026-03-02,variant,104,fr\n2026-03-04,control,99,fr\n"
                    "2026-03-04,variant,101,fr\n")
    status, out, err = _run(capsys, "analyze", str(path), "--arms", ARMS)
    text = " ".join(err.split())
    assert status == 0, err
    assert "no source column: every row counts as 'unattributed'" in text
    assert "no rows for 1 day (2026-03-03)" in text
    assert "column 'country' is not used: columns are date, arm, source" in text
    assert "unattributed" in out


def test_unknown_metric_and_sources_suggest_the_close_name(
        capsys: pytest.CaptureFixture[str]) -> None:
    status, _, err = _run(capsys, "reweight", str(scenario.CSV_PATH), "--arms",
                          "control,cards", "--metric", "route_saved",
                          "--exclude-sources", "Newsletter")
    text = " ".join(err.split())
    assert status == 2
    assert "--exclude-sources: unknown source 'Newsletter' (did you mean 'newsletter'?)" \
        in text or "--metric: unknown metric 'route_saved' (did you mean 'routes_saved'?)" \
        in text
    status, _, err = _run(capsys, "reweight", str(scenario.CSV_PATH), "--arms",
                          "control,cards", "--metric", "route_saved")
    assert "--metric: unknown metric 'route_saved' (did you mean 'routes_saved'?)" \
        in " ".join(err.split())
