"""``inrush analyze`` and ``inrush reweight``: the detectors on a CSV file, no server.

This module only builds the parser; the work is in :mod:`service.cli.offline_run`, imported
when a command runs, so that ``inrush --help`` does not load the statistics stack.
"""

from __future__ import annotations

import argparse
from pathlib import Path


def register(subparsers: argparse._SubParsersAction) -> None:  # type: ignore[type-arg]
    analyze = subparsers.add_parser(
        "analyze", help="diagnose a CSV of daily per-arm, per-source entries",
        description="Run the SRM, window scan, source and changepoint tests on a CSV file.")
    _common(analyze)
    analyze.add_argument("--html", type=Path, metavar="FILE",
                         help="also write a self-contained HTML report with charts to FILE")
    analyze.set_defaults(handler=run_analyze)

    rew = subparsers.add_parser(
        "reweight", help="naive and cohort re-weighted effect estimates from a CSV",
        description="Post-stratify a metric over entry cohorts and compare with the naive gap.")
    _common(rew)
    rew.add_argument("--metric", required=True, help="metric name (columns NAME.n, .sum, .sum_sq)")
    rew.add_argument("--target", default=None,
                     choices=["reference_arm", "pooled_unflagged", "uncontaminated"],
                     help="cohort mix to re-weight to (default: the honest estimate, "
                     "'uncontaminated', without the flagged cells)")
    rew.add_argument("--cohort-weights", type=Path, metavar="FILE.json",
                     help='custom target: a JSON object {"cohort": weight, ...} (cohort names '
                     "as in the output, e.g. organic or organic|flagged with --by source,window)")
    rew.add_argument("--by", default=None, choices=["source", "source,window"],
                     help="cohorts: entry source, or source x flagged/unflagged days")
    rew.add_argument("--exclude-sources", default="", help="comma-separated sources to drop")
    rew.add_argument("--exclude-dates", default="", help="comma-separated ISO dates to drop")
    rew.set_defaults(handler=run_reweight)


def _common(parser: argparse.ArgumentParser) -> None:
    parser.add_argument("file", type=Path,
                        help="CSV (comma, semicolon or tab separated, UTF-8): "
                             "date,arm,source,entered[,NAME.n,NAME.sum,NAME.sum_sq...]")
    parser.add_argument("--arms", required=True,
                        help="comma-separated arm names, reference arm first")
    parser.add_argument("--weights", metavar="W1,W2,...",
                        help="planned weights in --arms order for the whole period "
                             "(default: equal)")
    parser.add_argument("--allocation", action="append", metavar="DATE:W1,W2,...",
                        help="weights in --arms order in force from DATE on; repeat it for "
                             "each ramp step (e.g. --allocation 2026-03-01:0.1,0.9 "
                             "--allocation 2026-03-08:0.5,0.5)")
    parser.add_argument("--start", metavar="DATE",
                        help="first day of the experiment: earlier rows are left out "
                             "(default: the first date in the file)")
    parser.add_argument("--end", metavar="DATE",
                        help="last day to analyse: later rows are left out")
    parser.add_argument("--json", action="store_true",
                        help="print the JSON document (errors as an RFC 9457 problem document)")


def run_analyze(args: argparse.Namespace) -> int:
    from .offline_run import analyze

    return analyze(args)


def run_reweight(args: argparse.Namespace) -> int:
    from .offline_run import reweight_file

    return reweight_file(args)
