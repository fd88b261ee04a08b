"""Honest effect estimate, trimming bounds and incident impact.

Checks against computations outside the code under test:

* Lee (2009) trimming on unit-level simulated data: the actual units of each contaminated cell
  are sorted and the excess trimmed from the top or the bottom (brute force);
* the mean-variance bound on a trimmed mean against an explicit extremal (two-point)
  distribution and against a linear programme solved by ``scipy.optimize.linprog``;
* the Imbens & Manski (2004) critical value against its defining equation solved by
  ``scipy.optimize.brentq`` with ``scipy.stats.norm``;
* the honest estimate against pandas group means and ``var(ddof=1)`` on the units.

No published worked example of Lee bounds with its unit-level data ships with a registry
package we could find (Lee's Job Corps data is not shipped), so none is used here.
"""

from __future__ import annotations

import datetime as dt
import json
from typing import Any

import numpy as np
import pandas as pd
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st
from scipy import optimize, stats

from detectors.allocation import AllocationSchedule
from detectors.bounds import identified_set, imbens_manski_c, trimmed_mean_bounds
from detectors.contamination import (
    DEFAULT_MATERIALITY,
    ContaminatedCell,
    cells_from_document,
    cells_from_episodes,
    incident_impact,
)
from detectors.data import ObservationTable
from detectors.episodes import Episode, EpisodeCell, EpisodeDay
from detectors.errors import InputError
from detectors.honest import (
    CAVEAT_BINARY,
    CAVEAT_MOMENTS,
    CAVEAT_RAMP,
    CAVEAT_SHORTFALL,
    attach_bounds,
    bounds_parts,
    honest_effect,
    layout,
)
from detectors.reweight import reweight

ARMS = ["control", "cards"]
METRIC = "m"
START = dt.date(2026, 3, 2)


def day(index: int) -> dt.date:
    return START + dt.timedelta(days=index)


def frame_of(units: pd.DataFrame) -> pd.DataFrame:
    """Per-unit values ``(day, arm, source, value)`` summed into the data contract's rows."""
    grouped = units.assign(sq=units["value"] ** 2).groupby(["day", "arm", "source"])
    frame = pd.DataFrame({f"{METRIC}.n": grouped["value"].count(),
                          f"{METRIC}.sum": grouped["value"].sum(),
                          f"{METRIC}.sum_sq": grouped["sq"].sum()}).reset_index()
    frame["date"] = [day(int(d)).isoformat() for d in frame["day"]]
    frame["entered"] = frame[f"{METRIC}.n"]
    return frame.drop(columns="day")


def simulate_units(seed: int, *, binary: bool = False, inflow_arm: str = "cards",
                   inflow: dict[tuple[int, str], int] | None = None) -> pd.DataFrame:
    """Four days, two sources; ``inflow`` adds less-engaged units to ``inflow_arm``'s cells.

    Column ``regular`` marks the units that are not part of the inflow.
    """
    rng = np.random.default_rng(seed)
    inflow = {(1, "organic"): 150, (2, "newsletter"): 90} if inflow is None else inflow
    means = {"organic": 2.0, "newsletter": 1.4}
    blocks = []
    for d in range(4):
        for source, size in (("organic", 300), ("newsletter", 120)):
            for arm in ARMS:
                lift = 0.2 if arm == "cards" else 0.0
                mean = means[source] + lift
                count = int(rng.poisson(size))
                values = (rng.random(count) < mean / 4).astype(float) if binary \
                    else rng.gamma(2.0, mean / 2.0, count)
                blocks.append(pd.DataFrame({"day": d, "arm": arm, "source": source,
                                            "value": values, "regular": True}))
            extra = inflow.get((d, source), 0)
            if extra:
                values = (rng.random(extra) < 0.1).astype(float) if binary \
                    else rng.gamma(2.0, 0.3, extra)
                blocks.append(pd.DataFrame({"day": d, "arm": inflow_arm, "source": source,
                                            "value": values, "regular": False}))
    return pd.concat(blocks, ignore_index=True)


def cells_of(units: pd.DataFrame) -> list[ContaminatedCell]:
    extra = units[~units["regular"]].groupby(["day", "arm", "source"]).size()
    return [ContaminatedCell(day(int(d)), source, arm, float(count))
            for (d, arm, source), count in extra.items()]


def table_of(units: pd.DataFrame) -> ObservationTable:
    return ObservationTable.from_frame(frame_of(units), ARMS)


def lee_by_brute_force(units: pd.DataFrame) -> tuple[float, float, float]:
    """Sharp Lee bounds of the cohort-weighted difference, trimming the actual units.

    Cohort = source; weights = regular units per source over both arms; within each
    contaminated (day, source) cell of ``cards`` the excess is trimmed from the top (lower
    bound) or bottom (upper bound). Also returns the truth: the regular units' difference.
    """
    regular = units[units["regular"]]
    weights = regular.groupby("source").size()
    weights = weights / weights.sum()
    low = high = truth = 0.0
    for source, weight in weights.items():
        control = units[(units["arm"] == "control") & (units["source"] == source)]["value"]
        cards = units[(units["arm"] == "cards") & (units["source"] == source)]
        kept_low, kept_high = [], []
        for _, cell in cards.groupby("day"):
            trim = int((~cell["regular"]).sum())
            ordered = np.sort(cell["value"].to_numpy())
            kept_low.append(ordered[:len(ordered) - trim])
            kept_high.append(ordered[trim:])
        low += weight * (np.concatenate(kept_low).mean() - control.mean())
        high += weight * (np.concatenate(kept_high).mean() - control.mean())
        truth += weight * (cards[cards["regular"]]["value"].mean() - control.mean())
    return low, high, truth


@pytest.mark.parametrize("seed", range(5))
def test_binary_bounds_equal_lee_by_trimming_the_actual_units(seed: int) -> None:
    units = simulate_units(seed, binary=True)
    result = honest_effect(table_of(units), METRIC, cells_of(units))
    (cards,) = result.comparisons
    low, high, truth = lee_by_brute_force(units)
    assert cards.bounds.low == pytest.approx(low, abs=1e-12)
    assert cards.bounds.high == pytest.approx(high, abs=1e-12)
    assert low <= truth <= high
    assert CAVEAT_BINARY in result.caveats


@pytest.mark.parametrize("seed", range(5))
def test_continuous_bounds_contain_lee_and_the_truth_on_the_actual_units(seed: int) -> None:
    units = simulate_units(seed)
    result = honest_effect(table_of(units), METRIC, cells_of(units))
    (cards,) = result.comparisons
    low, high, truth = lee_by_brute_force(units)
    # The moment bound holds for every set of numbers with these moments, so it contains the
    # sharp bound of these particular units (and hence their true regular-units difference).
    assert cards.bounds.low <= low + 1e-12 and high <= cards.bounds.high + 1e-12
    assert cards.bounds.low <= truth <= cards.bounds.high
    assert cards.bounds.ci_low < cards.bounds.low and cards.bounds.ci_high > cards.bounds.high
    assert CAVEAT_MOMENTS in result.caveats


@pytest.mark.parametrize(("mean", "sd", "q"), [(2.0, 1.0, 0.2), (0.0, 3.0, 0.5),
                                               (-1.0, 0.5, 0.05), (5.0, 2.0, 0.9)])
def test_moment_bound_is_attained_by_a_two_point_distribution(mean: float, sd: float,
                                                              q: float) -> None:
    n = 1000.0
    low, high = trimmed_mean_bounds(np.array([n]), np.array([n * mean]),
                                    np.array([n * (sd**2 + mean**2)]), np.array([q * n]))
    # Extremal distribution: the kept share (1 - q) at a, the trimmed share q at b.
    a = mean + sd * np.sqrt(q / (1 - q))
    b = mean - sd * np.sqrt((1 - q) / q)
    values, probabilities = np.array([a, b]), np.array([1 - q, q])
    assert probabilities @ values == pytest.approx(mean)
    assert probabilities @ (values - mean) ** 2 == pytest.approx(sd**2)
    assert high[0] == pytest.approx(a) and low[0] == pytest.approx(2 * mean - a)


def test_moment_bound_matches_a_linear_programme_over_distributions() -> None:
    # Maximise the kept part's mean over all distributions on a fine grid with the given mean
    # and variance: variables p (mass) and w (kept mass, w <= p, sum w = 1 - q).
    mean, sd, q = 1.0, 0.8, 0.3
    grid = np.linspace(-6, 8, 1401)
    k = grid.size
    objective = np.r_[np.zeros(k), -grid / (1 - q)]
    equalities = np.zeros((4, 2 * k))
    equalities[0, :k] = 1
    equalities[1, :k] = grid
    equalities[2, :k] = grid**2
    equalities[3, k:] = 1
    rhs = [1.0, mean, sd**2 + mean**2, 1 - q]
    inequalities = np.hstack([-np.eye(k), np.eye(k)])            # w - p <= 0
    solution = optimize.linprog(objective, A_ub=inequalities, b_ub=np.zeros(k),
                                A_eq=equalities, b_eq=rhs, bounds=(0, None), method="highs")
    assert solution.status == 0
    best = -solution.fun
    _, high = trimmed_mean_bounds(np.array([100.0]), np.array([100 * mean]),
                                  np.array([100 * (sd**2 + mean**2)]), np.array([100 * q]))
    assert best <= high[0] + 1e-9
    assert best == pytest.approx(high[0], abs=0.01)   # the grid's spacing limits attainment


def test_imbens_manski_critical_value_solves_its_equation() -> None:
    for width, se in ((0.0, 1.0), (0.5, 1.0), (2.0, 0.5), (50.0, 1.0)):
        c = imbens_manski_c(width, se, se)
        if width == 0:
            assert c == pytest.approx(stats.norm.ppf(0.975))
            continue
        ratio = width / se
        direct = optimize.brentq(
            lambda x, r=ratio: stats.norm.cdf(x + r) - stats.norm.cdf(-x) - 0.95, 0, 5)
        assert c == pytest.approx(max(direct, stats.norm.ppf(0.95)), abs=1e-6)
    bounds = identified_set(0.1, 0.3, 0.05, 0.02)
    c = imbens_manski_c(0.2, 0.05, 0.02)
    assert bounds.ci_low == pytest.approx(0.1 - c * 0.05)
    assert bounds.ci_high == pytest.approx(0.3 + c * 0.02)


def test_honest_estimate_matches_pandas_on_the_clean_units() -> None:
    units = simulate_units(11)
    cells = cells_of(units)
    result = honest_effect(table_of(units), METRIC, cells)
    (cards,) = result.comparisons
    touched = {(d, s) for d, s in units[~units["regular"]][["day", "source"]]
               .itertuples(index=False)}
    clean = units[[(d, s) not in touched for d, s in zip(units["day"], units["source"],
                                                          strict=True)]]
    weights = units[units["regular"]].groupby("source").size()
    weights = weights / weights.sum()
    groups = clean.groupby(["arm", "source"])["value"]
    means, variances, sizes = groups.mean(), groups.var(ddof=1), groups.count()
    estimate = sum(w * (means["cards", s] - means["control", s]) for s, w in weights.items())
    variance = sum(w**2 * (variances[a, s] / sizes[a, s]) for s, w in weights.items()
                   for a in ARMS)
    assert cards.adjusted.difference == pytest.approx(estimate, rel=1e-9)
    half = (cards.adjusted.ci_high - cards.adjusted.ci_low) / 2
    assert half == pytest.approx(stats.norm.ppf(0.975) * np.sqrt(variance), rel=1e-9)
    assert result.target == "uncontaminated" and result.by == ("source",)
    # Naive is untouched: every unit counted.
    assert cards.naive.difference == pytest.approx(
        units[units["arm"] == "cards"]["value"].mean()
        - units[units["arm"] == "control"]["value"].mean(), rel=1e-9)


def test_inflow_into_the_reference_arm_trims_the_reference_arm() -> None:
    units = simulate_units(3, binary=True, inflow_arm="control")
    (cards,) = honest_effect(table_of(units), METRIC, cells_of(units)).comparisons
    # Brute force with the arms' roles swapped: trimming control's cells.
    swapped = units.assign(arm=units["arm"].map({"control": "cards", "cards": "control"}))
    low, high, _ = lee_by_brute_force(swapped)
    assert cards.bounds.low == pytest.approx(-high, abs=1e-12)
    assert cards.bounds.high == pytest.approx(-low, abs=1e-12)


def test_shortfall_trims_the_other_arm_by_the_missing_share() -> None:
    # A 0/1 metric, one cell; cards lost 50 of its units: control's 200 units are trimmed by
    # the missing share 50 / (150 + 50) = 1/4 (Lee's trimming of the arm without losses).
    rows = pd.DataFrame({"date": [day(0).isoformat()] * 2, "arm": ARMS, "source": "organic",
                         "entered": [200, 150], "m.n": [200, 150], "m.sum": [80.0, 75.0],
                         "m.sum_sq": [80.0, 75.0]})
    table = ObservationTable.from_frame(rows, ARMS)
    cells = [ContaminatedCell(day(0), "organic", "cards", -50.0)]
    base = reweight(table, METRIC)
    (cards,) = attach_bounds(base, table, cells).comparisons
    control = np.r_[np.ones(80), np.zeros(120)]
    ordered = np.sort(control)
    kept = 150
    control_low, control_high = ordered[:kept].mean(), ordered[-kept:].mean()
    assert cards.bounds.low == pytest.approx(0.5 - control_high, abs=1e-12)
    assert cards.bounds.high == pytest.approx(0.5 - control_low, abs=1e-12)
    assert CAVEAT_SHORTFALL in attach_bounds(base, table, cells).caveats


def test_ramp_estimates_within_periods_and_says_so() -> None:
    # Units are more engaged in the second period; cards gets 10% then 50% of the traffic.
    # Pooling would credit cards with the later, more engaged units (Simpson's paradox).
    rows = []
    for d in range(6):
        late = d >= 3
        for arm, share in zip(ARMS, (0.5, 0.5) if late else (0.9, 0.1), strict=True):
            n = int(1000 * share)
            mean = (3.0 if late else 1.0) + (0.1 if arm == "cards" else 0.0)
            rows.append({"date": day(d).isoformat(), "arm": arm, "source": "organic",
                         "entered": n, "m.n": n, "m.sum": n * mean,
                         "m.sum_sq": n * (mean**2 + 1.0)})
    table = ObservationTable.from_frame(pd.DataFrame(rows), ARMS)
    schedule = AllocationSchedule.from_steps(ARMS, [
        {"from": day(0).isoformat(), "weights": [0.9, 0.1]},
        {"from": day(3).isoformat(), "weights": [0.5, 0.5]}])
    result = honest_effect(table, METRIC, [], schedule)
    (cards,) = result.comparisons
    assert cards.adjusted.difference == pytest.approx(0.1, abs=1e-9)
    assert cards.naive.difference > 0.5               # pooled across the ramp: misleading
    assert result.by == ("period", "source")
    assert [c.name for c in result.cohorts] == [f"from {day(0)}|organic",
                                                f"from {day(3)}|organic"]
    assert CAVEAT_RAMP in result.caveats
    assert cards.bounds.low == pytest.approx(0.1) == cards.bounds.high


def test_no_clean_cohort_is_an_input_error_naming_the_metric() -> None:
    rows = pd.DataFrame({"date": [day(0).isoformat()] * 2, "arm": ARMS, "source": "organic",
                         "entered": [100, 150], "m.n": [100, 150], "m.sum": [100.0, 120.0],
                         "m.sum_sq": [200.0, 200.0]})
    table = ObservationTable.from_frame(rows, ARMS)
    with pytest.raises(InputError) as caught:
        honest_effect(table, METRIC, [ContaminatedCell(day(0), "organic", "cards", 50.0)])
    assert caught.value.problems[0].field == "metric"


def test_cells_from_document_reads_incidents_or_flagged_days() -> None:
    incidents = {"incidents": [
        {"arm": "cards", "shape": "inflow",
         "cells": [{"date": "2026-03-03", "source": "push", "units": 120.4},
                   {"date": "2026-03-03", "source": "organic", "units": -3.0},
                   {"date": "2026-03-04", "source": "push", "units": 0}]},
        {"arm": "control", "shape": "shortfall",
         "cells": [{"date": "2026-03-05", "source": "organic", "units": -40.0}]}],
        "flagged_days": [{"date": "2026-03-09", "severity": "alert"}]}
    assert cells_from_document(incidents) == (
        ContaminatedCell(dt.date(2026, 3, 3), "push", "cards", 120.4),
        ContaminatedCell(dt.date(2026, 3, 5), "organic", "control", -40.0))
    # Without incidents: alert days only; observed-minus-expected excess scaled to units that
    # entered the arm alone (estimated_inflow / arm excess: 1 / (1 - 0.5) at 50/50).
    flagged = {"flagged_days": [
        {"date": "2026-03-03", "severity": "alert", "inflow_arm": "cards",
         "excess": {"control": -100.0, "cards": 100.0}, "estimated_inflow": 200.0,
         "sources": [{"source": "push", "excess": 90.0}, {"source": "organic",
                                                          "excess": 10.0}]},
        {"date": "2026-03-04", "severity": "watch", "inflow_arm": "cards",
         "excess": {"control": -50.0, "cards": 50.0}, "estimated_inflow": 100.0,
         "sources": [{"source": "push", "excess": 50.0}]}]}
    assert cells_from_document(flagged) == (
        ContaminatedCell(dt.date(2026, 3, 3), "push", "cards", 180.0),
        ContaminatedCell(dt.date(2026, 3, 3), "organic", "cards", 20.0))
    assert cells_from_document({}) == ()


def test_cells_from_episodes() -> None:
    episode = Episode(
        shape="inflow", arm="cards", start=day(1), end=day(2), units=300.0,
        daily=(EpisodeDay(day(1), 200.0), EpisodeDay(day(2), 100.0)),
        cells=(EpisodeCell(day(1), "push", 200.0), EpisodeCell(day(2), "push", 100.0),
               EpisodeCell(day(2), "organic", -7.0)),
        sources=(), campaigns=(), severity="alert", material=True, p_value=1e-6,
        detected_by=("scan",), summary="", units_meaning="", advice=(), evidence=())
    assert cells_from_episodes([episode]) == (
        ContaminatedCell(day(1), "push", "cards", 200.0),
        ContaminatedCell(day(2), "push", "cards", 100.0))


def test_incident_impact_figures() -> None:
    units = simulate_units(5)
    table = table_of(units)
    cells = cells_of(units)
    impact = incident_impact(table, None, METRIC, cells)
    result = honest_effect(table, METRIC, cells)
    (cards,) = result.comparisons
    assert impact.estimated_bias == pytest.approx(
        cards.naive.difference - cards.adjusted.difference, rel=1e-9)
    se = (cards.naive.ci_high - cards.naive.ci_low) / (2 * stats.norm.ppf(0.975))
    assert impact.standard_error == pytest.approx(se, rel=1e-6)
    assert impact.worst_case is not None and impact.worst_case > 0
    assert impact.in_se == pytest.approx(impact.worst_case / impact.standard_error)
    # The naive difference lies inside the bounds around it; the worst case is the far end.
    (pooled,) = bounds_parts(layout(table, METRIC, cells), by_source=False)
    assert pooled.difference.low <= cards.naive.difference <= pooled.difference.high
    assert impact.worst_case == pytest.approx(max(
        pooled.difference.high - cards.naive.difference,
        cards.naive.difference - pooled.difference.low), rel=1e-9)
    assert impact.in_se >= DEFAULT_MATERIALITY
    # A tiny incident is immaterial; an empty one moves nothing; unknown metrics give None.
    tiny = [ContaminatedCell(day(1), "organic", "cards", 0.5)]
    assert incident_impact(table, None, METRIC, tiny).in_se < DEFAULT_MATERIALITY
    assert incident_impact(table, None, METRIC, []).worst_case == 0.0
    assert incident_impact(table, None, "nope", cells).in_se is None


def test_an_inflow_through_its_own_source_moves_the_naive_reading_by_its_whole_bias() -> None:
    # The inflow's source exists only in cards: trimming its excess removes those units, so
    # the bounds around the naive difference shrink to the regular units' naive difference and
    # the worst case is the inflow's whole bias (pandas on the regular units).
    units = simulate_units(8, inflow={})
    rng = np.random.default_rng(8)
    extra = pd.DataFrame({"day": 1, "arm": "cards", "source": "winback", "regular": False,
                          "value": rng.gamma(2.0, 0.3, 400)})
    units = pd.concat([units, extra], ignore_index=True)
    table = table_of(units)
    impact = incident_impact(table, None, METRIC, cells_of(units))
    means = units.groupby("arm")["value"].mean()
    regular = units[units["regular"]].groupby("arm")["value"].mean()
    bias = (means["cards"] - means["control"]) - (regular["cards"] - regular["control"])
    assert impact.worst_case == pytest.approx(abs(bias), rel=1e-9)
    assert impact.in_se >= DEFAULT_MATERIALITY
    assert impact.estimated_bias == pytest.approx(bias, abs=0.2 * abs(bias))


def test_incident_in_the_reference_arm_takes_the_worst_comparison() -> None:
    rows: list[dict[str, Any]] = []
    arms = ["control", "cards", "map"]
    for arm in arms:
        extra = 200 if arm == "control" else 0
        for source in ("organic", "push"):
            n = 500 + (extra if source == "push" else 0)
            rows.append({"date": day(0).isoformat(), "arm": arm, "source": source,
                         "entered": n, "m.n": n, "m.sum": 2.0 * n, "m.sum_sq": 5.0 * n})
            rows.append({"date": day(1).isoformat(), "arm": arm, "source": source,
                         "entered": 500, "m.n": 500, "m.sum": (1.0 if arm == "map" else 2.0)
                         * 500, "m.sum_sq": (2.0 if arm == "map" else 5.0) * 500})
    frame = pd.DataFrame(rows)
    table = ObservationTable.from_frame(frame, arms)
    cells = [ContaminatedCell(day(0), "push", "control", 200.0)]
    impact = incident_impact(table, None, METRIC, cells)
    # Each comparison on its own (a two-arm table of control and that arm).
    per_arm = [incident_impact(ObservationTable.from_frame(
        frame[frame["arm"].isin(["control", other])], ["control", other]), None, METRIC, cells)
        for other in ("cards", "map")]
    assert per_arm[0].in_se != pytest.approx(per_arm[1].in_se)
    assert impact.in_se == pytest.approx(max(i.in_se for i in per_arm))
    pooled = bounds_parts(layout(table, METRIC, cells), by_source=False)
    assert len(pooled) == 2
    worst = max(p.difference.high - p.difference.low for p in pooled)
    assert impact.worst_case is not None and 0 < impact.worst_case <= worst + 1e-12


@settings(max_examples=60, deadline=None)
@given(st.data())
def test_impact_and_honest_effect_never_fail_unexpectedly(data: st.DataObject) -> None:
    # incident_impact runs on every upload: any stored table and any cells give figures or
    # None, never an exception; honest_effect gives an answer or an InputError.
    days, sources = data.draw(st.integers(1, 4)), ["organic", "push", "sms"]
    rows = []
    for d in range(days):
        for arm in ARMS:
            for source in sources[:data.draw(st.integers(1, 3))]:
                n = data.draw(st.integers(0, 40))
                mean = data.draw(st.floats(-5, 5))
                binary = data.draw(st.booleans())
                total = float(round(n * abs(mean) / 5)) if binary else n * mean
                total = min(total, n) if binary else total
                sq = total if binary else n * (mean**2 + data.draw(st.floats(0, 4)))
                rows.append({"date": day(d).isoformat(), "arm": arm, "source": source,
                             "entered": n + data.draw(st.integers(0, 5)), "m.n": n,
                             "m.sum": total, "m.sum_sq": sq})
    table = ObservationTable.from_frame(pd.DataFrame(rows), ARMS)
    cells = [ContaminatedCell(day(data.draw(st.integers(0, 5))),
                              data.draw(st.sampled_from([*sources, "elsewhere"])),
                              data.draw(st.sampled_from([*ARMS, "ghost"])),
                              data.draw(st.floats(-100, 100, allow_nan=False)))
             for _ in range(data.draw(st.integers(0, 4)))]
    impact = incident_impact(table, None, METRIC, cells)
    for value in impact.to_dict().values():
        assert value is None or np.isfinite(value)
    try:
        result = honest_effect(table, METRIC, cells)
    except InputError:
        return
    json.dumps(result.to_dict(), allow_nan=False)
