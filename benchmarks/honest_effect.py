"""Coverage of the honest effect estimate and its trimming bounds under contamination.

Each repetition simulates the reference experiment (50/50, about 10,000 units a day, 28 days,
four entry sources whose effects differ) with extra units, 20% of one arm's daily traffic, sent
into one arm on three consecutive days; those units are less engaged (40% of their host source's
mean). Placements: through a source of their own (``own_source``), mixed into a source shared
with regular traffic (``shared_source``: newsletter), mixed into ``organic``, into the control
arm through a shared source (``control_shared_source``), and into the control arm through a
source only control receives (``control_only_source``).

The truth is the within-population effect on the regular units: each source's true mean
difference, weighted by the source's regular units over every day and arm. Scored against it:

* ``honest``: :func:`detectors.honest.honest_effect`'s 95% interval (the service's default);
* ``bounds``: the Imbens-Manski 95% interval of its trimming bounds;
* ``previous_default``: the previous default (post-stratified by source to the reference arm's
  mix, :func:`detectors.reweight.reweight` without options); a 422-style undefined estimate
  counts as not covering;
* ``naive``: the plain difference of arm means.

The contaminated cells come from the simulation's truth (which days, sources and arm got how
many extra units) and, separately, from the detector (the diagnosis document's incidents,
with each incident's impact measured by ``incident_impact``, read by
:func:`detectors.contamination.cells_from_document`).
Coverage carries a Wilson 95% interval. ``python -m benchmarks.honest_effect [--reps N]``
rewrites its own section of RESULTS.md and its entry in results.json.

The same module times :func:`detectors.contamination.incident_impact` (it runs on every upload).
"""

from __future__ import annotations

import argparse
import json
import multiprocessing
import time
import zlib
from dataclasses import replace
from pathlib import Path
from typing import Any

import numpy as np

from detectors import diagnose
from detectors.contamination import (
    DEFAULT_MATERIALITY,
    ContaminatedCell,
    cells_from_document,
    impact_function,
    incident_impact,
)
from detectors.errors import InputError
from detectors.honest import honest_effect
from detectors.reweight import reweight

from .detection import BASE_SEED, wilson
from .sections import write_section
from .simulate import Inflow, Simulation, many_sources, reference_scenario, simulate

HERE = Path(__file__).resolve().parent
START, END = "<!-- honest_effect:start -->", "<!-- honest_effect:end -->"
METRIC = "routes_saved"
PLACEMENTS: dict[str, dict[str, Any]] = {
    "own_source": {"arm": 1, "label": "reactivation_email", "host": "organic"},
    "shared_source": {"arm": 1, "label": None, "host": "newsletter"},
    "organic": {"arm": 1, "label": None, "host": "organic"},
    "control_shared_source": {"arm": 0, "label": None, "host": "newsletter"},
    "control_only_source": {"arm": 0, "label": "winback_sms", "host": "push"},
}
ESTIMATORS = ("honest", "bounds", "previous_default", "naive")


def scenario_for(placement: str, rng: np.random.Generator) -> Any:
    base = reference_scenario(0.0)
    start = int(rng.integers(3, base.n_days - 3))
    inflow = Inflow(start=start, length=3, size=0.2, engagement=0.4, **PLACEMENTS[placement])
    return replace(base, inflows=(inflow,))


def regular_truth(sim: Simulation, arm: int = 1) -> float:
    """Effect on the regular units: per-source truth weighted by regular units (all arms)."""
    weights = sim.baseline_entered.sum(axis=(0, 1)).astype(float)
    effects = sim.cohort_effects[METRIC]
    return float((weights / weights.sum()) @ (effects[arm] - effects[0]))


def truth_cells(sim: Simulation) -> tuple[ContaminatedCell, ...]:
    extra = sim.table.entered - sim.baseline_entered
    days, arms, sources = np.nonzero(extra)
    dates = sim.table.date_list()
    return tuple(ContaminatedCell(dates[d], sim.table.sources[s], sim.table.arms[a],
                                  float(extra[d, a, s]))
                 for d, a, s in zip(days, arms, sources, strict=True))


def _scored(low: float | None, high: float | None, truth: float,
            point: float | None = None) -> dict[str, Any]:
    covers = low is not None and high is not None and low <= truth <= high
    return {"covers": bool(covers), "low": low, "high": high, "point": point}


def one_rep(task: tuple[str, int]) -> dict[str, Any]:
    placement, rep = task
    rng = np.random.default_rng([BASE_SEED, zlib.crc32(b"honest_effect"),
                                 zlib.crc32(placement.encode()), rep])
    sim = simulate(scenario_for(placement, rng), rng)
    truth = regular_truth(sim)
    out: dict[str, Any] = {"placement": placement, "rep": rep, "truth": truth}
    try:
        previous = reweight(sim.table, METRIC)
        (comparison,) = previous.comparisons
        out["previous_default"] = _scored(comparison.adjusted.ci_low,
                                          comparison.adjusted.ci_high, truth,
                                          comparison.adjusted.difference)
    except InputError as error:   # undefined: a cohort without units in some arm
        out["previous_default"] = {"covers": False, "error": str(error)[:120]}
    impact = incident_impact(sim.table, sim.schedule, METRIC, truth_cells(sim))
    out["impact_in_se"] = impact.in_se
    document = diagnose(sim.table, sim.schedule, impact=impact_function).to_dict()
    for source, cells in (("truth", truth_cells(sim)), ("detector", cells_from_document(document))):
        try:
            honest = honest_effect(sim.table, METRIC, cells, sim.schedule)
        except InputError as error:
            out[f"{source}.honest"] = {"covers": False, "error": str(error)[:120]}
            out[f"{source}.bounds"] = {"covers": False, "error": "not computed"}
            continue
        (comparison,) = honest.comparisons
        if source == "truth":      # the plain difference of arm means, the same in every path
            out["naive"] = _scored(comparison.naive.ci_low, comparison.naive.ci_high, truth,
                                   comparison.naive.difference)
        se = (comparison.adjusted.ci_high - comparison.adjusted.ci_low) / (2 * 1.959964)
        out[f"{source}.honest"] = _scored(comparison.adjusted.ci_low,
                                          comparison.adjusted.ci_high, truth,
                                          comparison.adjusted.difference) | {"se": se}
        bounds = comparison.bounds
        assert bounds is not None
        out[f"{source}.bounds"] = _scored(bounds.ci_low, bounds.ci_high, truth) | {
            "width_over_se": (bounds.high - bounds.low) / se if bounds.width is not None
            else None}
        out[f"{source}.cells"] = len(cells)
    return out


def summarise(reps: list[dict[str, Any]]) -> dict[str, Any]:
    rows: dict[str, Any] = {}
    missing = {"covers": False, "error": "not computed"}
    reps = [{key: r.get(key, missing) for key in (*r, "naive")} for r in reps]
    for placement in PLACEMENTS:
        mine = [r for r in reps if r["placement"] == placement]
        row: dict[str, Any] = {"runs": len(mine)}
        keys = ["truth.honest", "truth.bounds", "detector.honest", "detector.bounds",
                "previous_default", "naive"]
        for key in keys:
            covers = [bool(r[key]["covers"]) for r in mine]
            hits = int(sum(covers))
            row[key] = {"coverage": hits / len(mine) if mine else None,
                        "wilson95": wilson(hits, len(mine)),
                        "errors": sum("error" in r[key] for r in mine)}
            points = [r[key]["point"] - r["truth"] for r in mine
                      if r[key].get("point") is not None]
            if points:
                row[key]["mean_bias"] = float(np.mean(points))
        in_se = [r["impact_in_se"] for r in mine if r.get("impact_in_se") is not None]
        row["impact"] = {"median_in_se": float(np.median(in_se)) if in_se else None,
                         "material_share": (float(np.mean([v >= DEFAULT_MATERIALITY
                                                           for v in in_se])) if in_se
                                            else None)}
        for source in ("truth", "detector"):
            widths = [r[f"{source}.bounds"].get("width_over_se") for r in mine]
            widths = [w for w in widths if w is not None]
            row[f"{source}.bounds"]["median_width_over_se"] = (
                float(np.median(widths)) if widths else None)
            ses = [r[f"{source}.honest"].get("se") for r in mine]
            ses = [s for s in ses if s is not None]
            if ses and "mean_bias" in row[f"{source}.honest"]:
                row[f"{source}.honest"]["abs_bias_over_se"] = (
                    abs(row[f"{source}.honest"]["mean_bias"]) / float(np.mean(ses)))
        rows[placement] = row
    return rows


def time_impact(days: int, arms: int, sources: int, repeats: int = 30) -> float:
    """Median milliseconds of one ``incident_impact`` call on a simulated experiment."""
    base = reference_scenario(0.0, arms=min(arms, 3))
    names = tuple(f"arm{i}" for i in range(arms))
    scenario = replace(base, n_days=days, arms=names,
                       allocation=((0, tuple([1.0 / arms] * arms)),),
                       lifts=tuple([0.0] + [0.05] * (arms - 1)),
                       sources=many_sources(min(sources, 12)) if sources <= 12
                       else _wide_sources(sources),
                       inflows=(Inflow(arm=1, start=days // 2, length=3, size=0.2),))
    sim = simulate(scenario, np.random.default_rng(5))
    cells = truth_cells(sim)
    times = []
    for _ in range(repeats):
        began = time.perf_counter()
        incident_impact(sim.table, sim.schedule, METRIC, cells)
        times.append(time.perf_counter() - began)
    return 1000 * float(np.median(times))


def _wide_sources(count: int) -> Any:
    from .simulate import SourceProfile
    shares = np.full(count, 1.0 / count)
    return tuple(SourceProfile("organic" if i == 0 else f"src{i:03d}", float(shares[i]),
                               1.0 + (i % 7) * 0.2, 1.5, 1.0 + 0.05 * (i % 5))
                 for i in range(count))


def run(reps: int, jobs: int = 2) -> dict[str, Any]:
    tasks = [(placement, rep) for placement in PLACEMENTS for rep in range(reps)]
    if jobs > 1:
        with multiprocessing.get_context("fork").Pool(jobs) as pool:
            results = pool.map(one_rep, tasks, chunksize=10)
    else:
        results = [one_rep(task) for task in tasks]
    return {"placements": summarise(results),
            "impact_ms": {"28x2x5": time_impact(28, 2, 5), "365x4x100": time_impact(365, 4, 100)},
            "reps_per_placement": reps}


def _cell(entry: dict[str, Any]) -> str:
    if entry["coverage"] is None:
        return "not run"
    low, high = entry["wilson95"]
    errors = f", {entry['errors']} undefined" if entry["errors"] else ""
    return f"{100 * entry['coverage']:.1f}% ({100 * low:.1f}-{100 * high:.1f}){errors}"


def goal_lines(summary: dict[str, Any]) -> list[str]:
    """Which placements meet the goals, and why a point-identified set sits at 95%."""
    misses = []
    for source in ("truth", "detector"):
        for placement, row in summary["placements"].items():
            honest = row[f"{source}.honest"]["coverage"]
            bounds = row[f"{source}.bounds"]
            if not 0.93 <= honest <= 0.97:
                misses.append(f"honest, {placement} ({source} cells): {100 * honest:.1f}%")
            if bounds["coverage"] < 0.95:
                point = (bounds["median_width_over_se"] == 0
                         and bounds["wilson95"][1] >= 0.95)
                misses.append(f"bounds, {placement} ({source} cells): "
                              f"{100 * bounds['coverage']:.1f}%"
                              + (" -- the identified set is a point here (the incident's source "
                                 "has no regular units, so nothing is trimmed that the "
                                 "estimate keeps), and its interval is an ordinary 95% "
                                 "interval; the Wilson interval contains 95%" if point else ""))
    if not misses:
        return ["Goals: met in every placement."]
    return ["Goals missed as measured:", "", *[f"- {miss}" for miss in misses], "",
            "Bounds width is in units of the honest estimate's standard error: the moment "
            "bound is wide where the inflow hides in the largest source (organic), the honest "
            "answer when only n, sum and sum_sq are known."]


def write(summary: dict[str, Any]) -> None:
    reps = summary["reps_per_placement"]
    lines = [START, "## Honest effect: coverage under contamination", "",
             "Command: `python -m benchmarks.honest_effect`. 20% extra, less-engaged units into "
             "one arm on three days of a 28-day 50/50 experiment (about 10,000 units a day, four "
             "sources whose effects differ); truth = the effect on the regular units. Coverage of "
             "95% intervals with Wilson 95% intervals, "
             f"{reps} simulated experiments per placement, all estimators on the same runs. "
             "Goals: honest 93-97%, bounds >= 95%.", "",
             "Contaminated cells from the simulation's truth:", "",
             "| placement | honest (default) | bounds | previous default | naive | "
             "bounds width / SE |", "|---|---|---|---|---|---|"]
    for placement, row in summary["placements"].items():
        width = row["truth.bounds"]["median_width_over_se"]
        lines.append(f"| {placement} | {_cell(row['truth.honest'])} | "
                     f"{_cell(row['truth.bounds'])} | {_cell(row['previous_default'])} | "
                     f"{_cell(row['naive'])} | {width:.2f} |" if width is not None else
                     f"| {placement} | {_cell(row['truth.honest'])} | "
                     f"{_cell(row['truth.bounds'])} | {_cell(row['previous_default'])} | "
                     f"{_cell(row['naive'])} | - |")
    lines += ["", "Contaminated cells from the detector (the diagnosis document's incidents, "
              "their (day, source) cells):", "",
              "| placement | honest (default) | bounds | bounds width / SE |", "|---|---|---|---|"]
    for placement, row in summary["placements"].items():
        width = row["detector.bounds"]["median_width_over_se"]
        lines.append(f"| {placement} | {_cell(row['detector.honest'])} | "
                     f"{_cell(row['detector.bounds'])} | "
                     f"{'-' if width is None else f'{width:.2f}'} |")
    lines += ["", "Impact of the incident (truth cells, `incident_impact`): median worst case in "
              "standard errors of the naive difference, and the share of runs it is material "
              f"(>= {DEFAULT_MATERIALITY} SE):", "", "| placement | median in_se | material |",
              "|---|---|---|"]
    for placement, row in summary["placements"].items():
        impact = row["impact"]
        if impact["median_in_se"] is None:
            lines.append(f"| {placement} | not run | not run |")
        else:
            lines.append(f"| {placement} | {impact['median_in_se']:.2f} | "
                         f"{100 * impact['material_share']:.1f}% |")
    lines += ["", *goal_lines(summary)]
    impact = summary["impact_ms"]
    lines += ["", "`incident_impact` (median of 30 calls, one incident, one metric): "
              f"{impact['28x2x5']:.2f} ms at 28 days x 2 arms x 5 sources (goal: a few ms), "
              f"{impact['365x4x100']:.1f} ms at 365 x 4 x 100 (goal: < 100 ms).", END]
    write_section(START, END, lines, {"honest_effect": summary})


if __name__ == "__main__":
    parser = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    parser.add_argument("--reps", type=int, default=400, help="experiments per placement")
    parser.add_argument("--jobs", type=int, default=2)
    parser.add_argument("--no-write", action="store_true", help="print only")
    arguments = parser.parse_args()
    result = run(arguments.reps, arguments.jobs)
    if not arguments.no_write:
        write(result)
    print(json.dumps(result, indent=1))
