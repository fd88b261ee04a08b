"""Speed of one full diagnosis, and of a straightforward pandas/scipy loop doing the same tests.

The workload: 180 days x 4 arms x 12 entry sources x 3 metrics, with one 2-day inflow. The
:class:`~detectors.ObservationTable` is built once; only ``diagnose`` is timed (every detector,
changepoints included). The comparison loop starts from the same rows as a DataFrame, as an
analyst's notebook would, and runs ``scipy.stats.chisquare`` overall, per day, per window of
1-7 days (Holm over windows) and per source (Holm over sources), plus
``scipy.stats.chi2_contingency`` on the source x arm table and the per-day, per-source excess.
It does not run the anytime-valid test or the changepoints, so the speed-up is conservative.
Both must agree on the p-values; the benchmark checks that before reporting.
"""

from __future__ import annotations

import cProfile
import io
import pstats
import statistics
import time
from dataclasses import replace
from typing import Any

import numpy as np
import pandas as pd
from scipy import special, stats

from detectors import diagnose
from detectors.srm import daily_srm, scan_windows

from .simulate import Inflow, Scenario, Simulation, many_sources, simulate

SPEED_ARMS = ("control", "cards", "map_first", "photo_grid")
SPEED_METRICS = ("routes_saved", "minutes_on_route", "photos_shared")


def speed_simulation(seed: int = 7) -> Simulation:
    scenario = Scenario(
        n_days=180, arms=SPEED_ARMS, allocation=((0, (0.25, 0.25, 0.25, 0.25)),),
        daily_units=40_000.0, sources=many_sources(12), metrics=SPEED_METRICS,
        lifts=(0.0, 0.05, 0.02, -0.01))
    scenario = replace(scenario, inflows=(Inflow(arm=2, start=120, length=2, size=0.08,
                                                 label=None),))
    return simulate(scenario, np.random.default_rng(seed))


def time_diagnosis(sim: Simulation, repeats: int) -> list[float]:
    diagnose(sim.table, sim.schedule)  # warm-up (imports, caches)
    timings = []
    for _ in range(repeats):
        start = time.perf_counter()
        diagnose(sim.table, sim.schedule)
        timings.append((time.perf_counter() - start) * 1000.0)
    return timings


def _holm(p: np.ndarray) -> np.ndarray:
    order = np.argsort(p)
    m = len(p)
    adjusted = np.empty(m)
    running = 0.0
    for rank, i in enumerate(order):
        running = max(running, min(1.0, (m - rank) * p[i]))
        adjusted[i] = running
    return adjusted


def baseline_loop(frame: pd.DataFrame, arms: tuple[str, ...], weights: np.ndarray,
                  max_window: int = 7) -> dict[str, Any]:
    """The same chi-square tests written as a plain loop over days, windows and sources."""
    daily = frame.pivot_table(index="date", columns="arm", values="entered", aggfunc="sum",
                              fill_value=0)[list(arms)].sort_index()
    days = list(daily.index)
    overall_obs = daily.sum().to_numpy(float)
    overall = stats.chisquare(overall_obs, overall_obs.sum() * weights)
    daily_p = []
    for day in days:
        observed = daily.loc[day].to_numpy(float)
        daily_p.append(stats.chisquare(observed, observed.sum() * weights).pvalue)
    # Each window's p-value adjusted by the scan's lifetime spending: a window ending on day t
    # (1-based) is tested at alpha * gamma(t) / min(max_window, t), with
    # gamma(t) = (t + 6)^-1.5 / zeta(1.5, 7) (detectors.srm's module docstring).
    normaliser = float(special.zeta(1.5, 7))
    window_adjusted = []
    for length in range(1, max_window + 1):
        for start in range(len(days) - length + 1):
            observed = daily.iloc[start:start + length].sum().to_numpy(float)
            p_value = stats.chisquare(observed, observed.sum() * weights).pvalue
            end = start + length
            share = (end + 6) ** -1.5 / normaliser
            window_adjusted.append(min(1.0, p_value * min(max_window, end) / share))
    source_p = {}
    for source, rows in frame.groupby("source"):
        observed = rows.groupby("arm")["entered"].sum().reindex(list(arms), fill_value=0)
        observed = observed.to_numpy(float)
        source_p[source] = stats.chisquare(observed, observed.sum() * weights).pvalue
    source_adjusted = dict(zip(source_p, _holm(np.array(list(source_p.values()))), strict=True))
    table = frame.pivot_table(index="source", columns="arm", values="entered", aggfunc="sum",
                              fill_value=0)[list(arms)]
    independence = stats.chi2_contingency(table.to_numpy(), correction=False)
    excess = {}
    for (day, source), rows in frame.groupby(["date", "source"]):
        observed = rows.set_index("arm")["entered"].reindex(list(arms), fill_value=0)
        excess[(day, source)] = observed.to_numpy(float) - observed.sum() * weights
    return {"overall_p": overall.pvalue, "daily_p": np.array(daily_p),
            "min_window_adjusted": float(min(window_adjusted)),
            "source_adjusted": source_adjusted, "independence_p": independence.pvalue,
            "excess_cells": len(excess)}


def time_baseline(sim: Simulation, repeats: int) -> tuple[list[float], dict[str, Any]]:
    frame = sim.to_frame()
    weights = np.asarray(sim.scenario.allocation[0][1], dtype=float)
    result = baseline_loop(frame, sim.table.arms, weights)
    timings = []
    for _ in range(repeats):
        start = time.perf_counter()
        result = baseline_loop(frame, sim.table.arms, weights)
        timings.append((time.perf_counter() - start) * 1000.0)
    return timings, result


def check_agreement(sim: Simulation, baseline: dict[str, Any]) -> dict[str, bool]:
    """Both implementations give the same p-values (the loop is a fair comparison)."""
    d = diagnose(sim.table, sim.schedule)
    planned = sim.schedule.weights_on(sim.table.dates)
    scan = scan_windows(sim.table.daily_totals, planned, max_window=d.config.max_window)
    source_adjusted = {s.source: s.adjusted_p_value for s in d.sources}

    def close(a: float, b: float) -> bool:
        return bool(np.isclose(a, b, rtol=1e-6, atol=1e-300))

    daily = daily_srm(sim.table.daily_totals, planned).p_value
    return {
        "overall_p": close(d.srm.p_value, baseline["overall_p"]),
        "daily_p": bool(np.allclose(daily, baseline["daily_p"], rtol=1e-6, atol=1e-300)),
        "min_window_adjusted_p": close(scan.min_adjusted_p_value,
                                       baseline["min_window_adjusted"]),
        "source_adjusted_p": all(close(source_adjusted[s], p)
                                 for s, p in baseline["source_adjusted"].items()),
        "independence_p": close(d.independence.p_value, baseline["independence_p"]),
    }


def profile_diagnosis(sim: Simulation, top: int = 12) -> list[str]:
    """Top functions by cumulative time in ``diagnose`` (cProfile), for finding hot spots."""
    profiler = cProfile.Profile()
    profiler.enable()
    for _ in range(5):
        diagnose(sim.table, sim.schedule)
    profiler.disable()
    out = io.StringIO()
    pstats.Stats(profiler, stream=out).sort_stats("cumulative").print_stats(top)
    lines = [line.rstrip() for line in out.getvalue().splitlines() if line.strip()]
    start = next((i for i, line in enumerate(lines) if "ncalls" in line), 0)
    return lines[start:start + top + 1]


def run(full: bool) -> dict[str, Any]:
    sim = speed_simulation()
    repeats = 40 if full else 5
    inrush = time_diagnosis(sim, repeats)
    baseline, result = time_baseline(sim, 5 if full else 1)
    agreement = check_agreement(sim, result)
    median = statistics.median(inrush)
    baseline_median = statistics.median(baseline)
    figures = {
        "speed.diagnosis_ms_median": median,
        "speed.speedup_vs_baseline": baseline_median / median,
    }
    details = {
        "workload": {"days": sim.table.n_days, "arms": len(sim.table.arms),
                     "sources": len(sim.table.sources), "metrics": len(sim.table.metrics),
                     "units": int(sim.table.entered.sum())},
        "diagnosis_ms": {"median": median, "p90": float(np.percentile(inrush, 90)),
                         "min": min(inrush), "repeats": repeats},
        "baseline_ms": {"median": baseline_median, "min": min(baseline),
                        "repeats": len(baseline)},
        "baseline_agrees": agreement,
    }
    if median > 50.0 or full:
        details["diagnosis_profile"] = profile_diagnosis(sim)
    return {"figures": figures, "details": details}
