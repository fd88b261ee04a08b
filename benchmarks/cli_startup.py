"""Start-up time of the command line: ``inrush --help``, an argument error, and the analysis
of the demo's 28-day file, each in a fresh interpreter (what an analyst waits for).

Goals: help and argument errors well under a second (below 0.5 s), a 28-day file analysed in
under 1.5 s. Each command runs ``--repeat`` times; the median and the fastest run are recorded
with the machine's load average, since the benchmark machine is shared and a busy machine
slows every figure. The import time of the analysis's modules is measured apart (``python -X
importtime``), which says where the start-up of ``analyze`` goes.

``python -m benchmarks.cli_startup`` rewrites its section of RESULTS.md and the
``cli_startup`` figures in results.json.
"""

from __future__ import annotations

import argparse
import json
import os
import re
import resource
import statistics
import subprocess
import sys
import time
from collections.abc import Sequence
from pathlib import Path
from typing import Any

from .sections import write_section

HERE = Path(__file__).parent
ROOT = HERE.parent
DEMO_CSV = ROOT / "service" / "demo" / "larkspur_route_cards.csv"
START, END = "<!-- cli_startup:start -->", "<!-- cli_startup:end -->"
GOALS = {"help": 0.5, "argument_error": 0.5, "analyze_28_days": 1.5}

COMMANDS: dict[str, list[str]] = {
    "help": ["--help"],
    "argument_error": ["analyze", str(DEMO_CSV)],  # --arms missing
    "analyze_28_days": ["analyze", str(DEMO_CSV), "--arms", "control,cards"],
}



def time_command(argv: Sequence[str], repeat: int) -> tuple[list[float], list[float]]:
    """Wall-clock and CPU (user + system) seconds of each run."""
    walls, cpus = [], []
    for _ in range(repeat):
        before = resource.getrusage(resource.RUSAGE_CHILDREN)
        began = time.perf_counter()
        subprocess.run([sys.executable, "-m", "service.cli", *argv], cwd=ROOT,
                       capture_output=True, check=False)
        walls.append(time.perf_counter() - began)
        after = resource.getrusage(resource.RUSAGE_CHILDREN)
        cpus.append(after.ru_utime - before.ru_utime + after.ru_stime - before.ru_stime)
    return walls, cpus


# Where the start-up of ``analyze`` goes; each figure includes what the package imports
# first. The analysis needs scipy.special and scipy.optimize only: scipy.stats and ruptures
# (which loads scipy.stats, scipy.signal and scipy.spatial) stay out, checked by
# tests/unit/test_cli_startup.py.
IMPORTS_OF_INTEREST = ("numpy", "pandas", "scipy.special", "scipy.optimize", "detectors",
                       "service.cli.offline_run")


def import_seconds() -> dict[str, float]:
    """Cumulative import time of the packages ``analyze`` loads (one cold run)."""
    result = subprocess.run(
        [sys.executable, "-X", "importtime", "-c", "import service.cli.offline_run"],
        cwd=ROOT, capture_output=True, text=True, check=True)
    seconds: dict[str, float] = {}
    for line in result.stderr.splitlines():
        match = re.match(r"import time:\s+\d+ \|\s+(\d+) \| \s*(\S+)$", line)
        if match and match[2] in IMPORTS_OF_INTEREST:
            seconds[match[2]] = round(int(match[1]) / 1e6, 3)
    return seconds


_IN_PROCESS = """
import contextlib, io, statistics, sys, time
from service.cli import main
argv, times = sys.argv[2:], []
for _ in range(int(sys.argv[1]) + 1):
    began = time.perf_counter()
    with contextlib.redirect_stdout(io.StringIO()):
        main(argv)
    times.append(time.perf_counter() - began)
print(statistics.median(times[1:]))
"""


def analysis_seconds(repeat: int) -> float:
    """The analysis alone, modules loaded (the first run is left out): median seconds."""
    result = subprocess.run([sys.executable, "-c", _IN_PROCESS, str(repeat),
                             *COMMANDS["analyze_28_days"]],
                            cwd=ROOT, capture_output=True, text=True, check=True)
    return float(result.stdout.strip().splitlines()[-1])


def run(repeat: int) -> dict[str, Any]:
    load_before = os.getloadavg()[0]
    figures: dict[str, Any] = {}
    for name, argv in COMMANDS.items():
        times, cpu = time_command(argv, repeat)
        figures[name] = {"median_s": round(statistics.median(times), 3),
                         "fastest_s": round(min(times), 3),
                         "median_cpu_s": round(statistics.median(cpu), 3),
                         "goal_s": GOALS[name], "met": statistics.median(times) < GOALS[name]}
    figures["analysis_in_process_s"] = round(analysis_seconds(repeat), 3)
    figures["imports_s"] = import_seconds()
    figures["load_average"] = [round(load_before, 2), round(os.getloadavg()[0], 2)]
    figures["cores"] = os.cpu_count()
    figures["repeat"] = repeat
    return figures


def write(figures: dict[str, Any]) -> None:
    labels = {"help": "`inrush --help`",
              "argument_error": "`inrush analyze FILE` (argument error: no --arms)",
              "analyze_28_days": "`inrush analyze` of the demo's 28-day file"}
    lines = [START, "## Command-line start-up", "",
             "Command: `python -m benchmarks.cli_startup`. Each command in a fresh interpreter "
             f"(`python -m service.cli ...`), {figures['repeat']} runs; "
             f"{figures['cores']} cores, load average {figures['load_average'][0]} before and "
             f"{figures['load_average'][1]} after (the machine is shared: a busy machine "
             "slows every figure).", "",
             "| command | median | fastest | median CPU time | goal | met |",
             "|---|---|---|---|---|---|"]
    for name, label in labels.items():
        row = figures[name]
        lines.append(f"| {label} | {row['median_s']:.2f} s | {row['fastest_s']:.2f} s | "
                     f"{row['median_cpu_s']:.2f} s | < {row['goal_s']} s | "
                     f"{'yes' if row['met'] else 'no'} |")
    imports = ", ".join(f"{name} {seconds:.2f} s" for name, seconds in
                        figures["imports_s"].items())
    lines += ["", f"The analysis itself, modules loaded: {figures['analysis_in_process_s']:.2f} "
              f"s. Import time of the analysis's modules (cumulative, one cold run; each "
              "includes what it imports first): "
              f"{imports}. Help and argument errors load none of them (checked by "
              "tests/unit/test_cli_startup.py)."]
    analyze = figures["analyze_28_days"]
    if not analyze["met"]:
        lines += ["", f"`analyze` misses its goal: of its {analyze['median_cpu_s']:.2f} s of CPU "
                  f"time the analysis takes {figures['analysis_in_process_s']:.2f} s and the "
                  "rest is loading numpy, pandas and scipy (see the import times above). "
                  "The command line loads nothing else (no web framework, no database "
                  "layer, no scipy.stats, no ruptures)."]
    else:
        lines += ["", "The analysis path loads numpy, pandas, scipy.special and "
                  "scipy.optimize only: the PELT recursion of `detectors.changepoints.pelt` "
                  "no longer subclasses ruptures' estimator (whose package loads "
                  "scipy.stats and scipy.signal), and the chi-square and "
                  "normal distribution functions come from scipy.special. The tests keep "
                  "ruptures' PELT and scipy.stats as the references."]
    lines.append(END)
    write_section(START, END, lines, {"cli_startup": figures})


def main(argv: Sequence[str] | None = None) -> int:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--repeat", type=int, default=7)
    parser.add_argument("--no-write", action="store_true", help="print only")
    args = parser.parse_args(argv)
    figures = run(args.repeat)
    print(json.dumps(figures, indent=2))
    if not args.no_write:
        write(figures)
    return 0


if __name__ == "__main__":
    sys.exit(main())
