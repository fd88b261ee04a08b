"""``inrush analyze --html``: one self-contained file with the status page's content."""

from __future__ import annotations

import base64
import io
import json
import os
import re
import stat
from pathlib import Path

import pandas as pd
import pytest
from apihelpers import two_metric_demo_csv

from service.cli import main
from service.demo import scenario
from service.pages.export import series_csv


@pytest.fixture(scope="module")
def two_metric_csv(tmp_path_factory: pytest.TempPathFactory) -> Path:
    path = tmp_path_factory.mktemp("report") / "route_cards.csv"
    path.write_text(two_metric_demo_csv(), encoding="utf-8")
    return path


@pytest.fixture(scope="module")
def report(two_metric_csv: Path) -> str:
    out = two_metric_csv.with_name("route_cards.html")
    code = main(["analyze", str(two_metric_csv), "--arms", ",".join(scenario.ARMS),
                 "--html", str(out)])
    assert code == 0
    umask = os.umask(0)
    os.umask(umask)
    assert stat.S_IMODE(out.stat().st_mode) == 0o666 & ~umask  # an ordinary new file
    return out.read_text(encoding="utf-8")


def test_report_refers_to_nothing_outside_itself(report: str) -> None:
    targets = re.findall(r'\b(?:src|href|action|xlink:href)\s*=\s*["\']([^"\']*)', report)
    assert targets, "the report has links (the CSV) and SVG references"
    assert all(t.startswith(("data:", "#")) for t in targets), [
        t for t in targets if not t.startswith(("data:", "#"))]
    assert not re.search(r'<link\b(?![^>]*href="data:)', report) and "@import" not in report
    assert not re.search(r"url\(\s*['\"]?(?!data:|#)", report)
    # The charting library and the page script travel inside the file.
    assert report.count("<script>") == 2 and "uPlot" in report
    # uPlot's MIT licence notice goes with the copy of the library.
    assert "Copyright (c) 2022 Leon Sorokin" in report
    assert "Permission is hereby granted" in report


def test_report_carries_the_charts_the_data_and_every_metric(report: str) -> None:
    block = re.search(r'<script type="application/json" id="inrush-data">(.*?)</script>',
                      report, re.S)
    assert block is not None
    data = json.loads(block.group(1))
    assert data["mode"] == "report" and data["series"]["metrics"] == ["routes_saved",
                                                                      "trail_minutes"]
    # The server-drawn charts as the fallback: shares, entrants, engagement per metric.
    assert report.count("<noscript data-svg") == 4
    for title in ("Arm shares against the plan", "Entrants per source and arm",
                  "Entrant engagement per arm: routes_saved",
                  "Entrant engagement per arm: trail_minutes"):
        assert title in report
    # One effect section per metric, all shown without JavaScript (the script shows the
    # picked one only), and the picker, which needs the script in a file, hidden without it.
    assert 'data-metric-section="routes_saved">' in report
    assert 'data-metric-section="trail_minutes">' in report
    assert '<form id="metric-picker" method="get" class="js-only">' in report
    assert "naive, honest estimate and bounds" in report
    # The CSV link holds the series of the data block, which adds up to the input file.
    link = re.search(r'href="data:text/csv;charset=utf-8;base64,([^"]+)"', report)
    assert link is not None
    text = base64.b64decode(link.group(1)).decode("utf-8")
    assert text == series_csv(data["series"])
    table = pd.read_csv(io.StringIO(text))
    source = pd.read_csv(scenario.CSV_PATH)
    expected = source.groupby(["date", "arm"])["entered"].sum()
    got = table.set_index(["date", "arm"])["entered"]
    assert got.sort_index().equals(expected.sort_index())
    per_source = table.filter(like="entered_").sum(axis=1)
    assert (per_source.to_numpy() == table["entered"].to_numpy()).all()


def test_an_unwritable_report_path_is_named_without_a_traceback(
        two_metric_csv: Path, capsys: pytest.CaptureFixture[str]) -> None:
    target = two_metric_csv.parent / "no-such-folder" / "report.html"
    code = main(["analyze", str(two_metric_csv), "--arms", ",".join(scenario.ARMS),
                 "--html", str(target)])
    err = capsys.readouterr().err
    assert code == 2 and "cannot write the HTML report" in err and str(target) in err
    assert "Traceback" not in err and not target.parent.exists()
