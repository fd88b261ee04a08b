"""``inrush --help`` and argument errors answer without loading the statistics or web stack:
the command modules import numpy, scipy, pandas, FastAPI and SQLAlchemy only when a command
runs. Checked on the modules a fresh interpreter has loaded, not on a timing (the timing is
in benchmarks/cli_startup.py)."""

from __future__ import annotations

import json
import subprocess
import sys

import pytest

HEAVY = ("numpy", "scipy", "pandas", "fastapi", "starlette", "sqlalchemy", "pydantic",
         "ruptures", "httpx", "detectors")

_PROBE = """
import json, sys
from service.cli import main
try:
    status = main(sys.argv[1:])
except SystemExit as exit:
    status = exit.code
heavy = sorted({name.split(".")[0] for name in sys.modules} & set(json.loads(%r)))
slow = sorted(set(sys.modules) & {"scipy.stats", "scipy.signal", "ruptures"})
print(json.dumps({"status": status, "heavy": heavy, "slow": slow}), file=sys.__stderr__)
"""


@pytest.mark.parametrize("argv", [
    ["--help"],
    ["analyze", "--help"],
    ["analyze", "data.csv"],  # --arms missing: an argument error
    ["demo", "--port", "eighty"],
    ["no-such-command"],
])
def test_help_and_argument_errors_load_no_heavy_package(argv: list[str]) -> None:
    result = subprocess.run([sys.executable, "-c", _PROBE % json.dumps(HEAVY), *argv],
                            capture_output=True, text=True, timeout=120, check=False)
    report = json.loads(result.stderr.strip().splitlines()[-1])
    assert report["heavy"] == [], report
    assert report["status"] in (0, 2)


def test_the_statistics_stack_does_load_for_a_command_that_needs_it() -> None:
    # The probe itself can see heavy imports: an analysis loads them.
    from service.demo import scenario

    argv = ["analyze", str(scenario.CSV_PATH), "--arms", "control,cards", "--json"]
    result = subprocess.run([sys.executable, "-c", _PROBE % json.dumps(HEAVY), *argv],
                            capture_output=True, text=True, timeout=300, check=False)
    report = json.loads(result.stderr.strip().splitlines()[-1])
    assert report["status"] == 0 and {"numpy", "scipy", "detectors"} <= set(report["heavy"])
    assert "fastapi" not in report["heavy"] and "sqlalchemy" not in report["heavy"]
    # The analysis takes its distribution functions from scipy.special and runs its own PELT:
    # scipy.stats and ruptures (with scipy.signal) cost most of a second of
    # start-up and are left to the tests as references.
    assert report["slow"] == [], report
