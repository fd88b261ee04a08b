"""Post-stratified re-weighting by entry cohort: estimates, targets, cohorts, errors, caveats.

Reference computations are done independently on per-unit values: pandas group means and
``var(ddof=1)`` for the post-stratified estimator (Miratrix, Sekhon & Yu 2013, with the target
weights held fixed), and statsmodels ``CompareMeans`` for the naive Welch comparison.
"""

from __future__ import annotations

import datetime as dt
import json
import math
from collections.abc import Sequence
from typing import Any

import numpy as np
import pandas as pd
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st
from scipy import stats
from statsmodels.stats.weightstats import CompareMeans, DescrStatsW

from detectors.data import ObservationTable
from detectors.errors import InputError, UndefinedEstimateError
from detectors.reweight import CAVEAT_DESIGN, CAVEAT_QUESTION, reweight

ARMS = ("control", "cards")
METRIC = "routes_saved"
START = dt.date(2026, 3, 2)
EST_KEYS = {"reference_mean", "arm_mean", "difference", "ci_low", "ci_high", "relative",
            "relative_ci_low", "relative_ci_high"}


def day(index: int) -> dt.date:
    return START + dt.timedelta(days=index)


def cell_frame(cells: Sequence[tuple[int, str, str, int, float, float]]) -> pd.DataFrame:
    """Rows from ``(day, arm, source, n, mean, sd)``: sufficient statistics of such units."""
    rows = []
    for index, arm, source, n, mean, sd in cells:
        rows.append({"date": day(index).isoformat(), "arm": arm, "source": source,
                     "entered": n, f"{METRIC}.n": n, f"{METRIC}.sum": n * mean,
                     f"{METRIC}.sum_sq": n * (sd**2 + mean**2)})
    return pd.DataFrame(rows)


def units_to_frame(units: pd.DataFrame) -> pd.DataFrame:
    """Per-unit values ``(date, arm, source, value)`` summed into the data contract's rows."""
    grouped = units.assign(sq=units["value"] ** 2).groupby(["date", "arm", "source"])
    frame = pd.DataFrame({f"{METRIC}.n": grouped["value"].count(),
                          f"{METRIC}.sum": grouped["value"].sum(),
                          f"{METRIC}.sum_sq": grouped["sq"].sum()}).reset_index()
    frame["entered"] = frame[f"{METRIC}.n"]
    return frame


def simulated_units(rng: np.random.Generator, sizes: dict[tuple[int, str, str], int],
                    means: dict[str, float], lift: dict[str, float]) -> pd.DataFrame:
    """Skewed per-unit values (gamma), one block per (day, arm, source)."""
    blocks = []
    for (index, arm, source), size in sizes.items():
        mean = means[source] + (lift[source] if arm != "control" else 0.0)
        values = rng.gamma(2.0, mean / 2.0, size)
        blocks.append(pd.DataFrame({"date": day(index).isoformat(), "arm": arm,
                                    "source": source, "value": values}))
    return pd.concat(blocks, ignore_index=True)


def table_of(frame: pd.DataFrame, arms: Sequence[str] = ARMS) -> ObservationTable:
    return ObservationTable.from_frame(frame, list(arms))


@pytest.fixture(scope="module")
def units() -> pd.DataFrame:
    """Two days; on day 1 a newsletter inflow reaches only cards."""
    rng = np.random.default_rng(7)
    sizes = {(0, "control", "organic"): 800, (0, "cards", "organic"): 790,
             (0, "control", "push"): 210, (0, "cards", "push"): 230,
             (1, "control", "organic"): 760, (1, "cards", "organic"): 770,
             (1, "control", "push"): 190, (1, "cards", "push"): 205,
             (1, "cards", "newsletter"): 600, (1, "control", "newsletter"): 40}
    return simulated_units(rng, sizes, {"organic": 3.0, "push": 2.0, "newsletter": 0.6},
                           {"organic": 0.2, "push": 0.1, "newsletter": 0.0})


def comparison(result: Any, arm: str = "cards") -> Any:
    return next(c for c in result.comparisons if c.arm == arm)


def standard_error(estimate: Any, confidence: float = 0.95) -> float:
    return (estimate.ci_high - estimate.ci_low) / (2 * stats.norm.ppf(0.5 + confidence / 2))


# --- estimates against independent computations -------------------------------------------


def test_naive_estimate_matches_statsmodels_welch_z_interval(units: pd.DataFrame) -> None:
    result = reweight(table_of(units_to_frame(units)), METRIC)
    naive = comparison(result).naive
    cards = units.loc[units["arm"] == "cards", "value"].to_numpy()
    control = units.loc[units["arm"] == "control", "value"].to_numpy()
    # Reference: statsmodels CompareMeans with separate (Welch) variances, normal interval.
    compare = CompareMeans(DescrStatsW(cards), DescrStatsW(control))
    low, high = compare.zconfint_diff(alpha=0.05, usevar="unequal")
    assert naive.difference == pytest.approx(cards.mean() - control.mean(), rel=1e-9)
    assert naive.ci_low == pytest.approx(low, rel=1e-7)
    assert naive.ci_high == pytest.approx(high, rel=1e-7)
    assert standard_error(naive) == pytest.approx(compare.std_meandiff_separatevar, rel=1e-7)


@pytest.mark.parametrize("by", [("source",), ("source", "window")])
def test_adjusted_estimate_matches_direct_post_stratification(units: pd.DataFrame,
                                                              by: tuple[str, ...]) -> None:
    flagged = [day(1)]
    result = reweight(table_of(units_to_frame(units)), METRIC, by=by, flagged_dates=flagged)
    frame = units.copy()
    window = np.where(frame["date"] == day(1).isoformat(), "flagged", "unflagged")
    frame["cohort"] = frame["source"] if by == ("source",) else frame["source"] + "|" + window
    # Post-stratified mean sum_c pi_c m_{a,c} with pi = control's mix, by pandas groupby.
    cells = frame.groupby(["arm", "cohort"])["value"].agg(["count", "mean", "var"])
    control = cells.loc["control"]
    pi = control["count"] / control["count"].sum()
    means = {arm: (pi * cells.loc[arm]["mean"]).sum() for arm in ARMS}
    variances = {arm: (pi**2 * cells.loc[arm]["var"] / cells.loc[arm]["count"]).sum()
                 for arm in ARMS}
    adjusted = comparison(result).adjusted
    assert adjusted.reference_mean == pytest.approx(means["control"], rel=1e-9)
    assert adjusted.arm_mean == pytest.approx(means["cards"], rel=1e-9)
    assert adjusted.difference == pytest.approx(means["cards"] - means["control"], rel=1e-9)
    se = math.sqrt(variances["cards"] + variances["control"])
    assert standard_error(adjusted) == pytest.approx(se, rel=1e-7)
    # Delta method for the ratio mu_a / mu_r - 1 (arms independent).
    mu_a, mu_r = means["cards"], means["control"]
    rel_se = math.sqrt(variances["cards"] / mu_r**2 + mu_a**2 * variances["control"] / mu_r**4)
    assert adjusted.relative == pytest.approx(mu_a / mu_r - 1, rel=1e-9)
    assert adjusted.relative_ci_high - adjusted.relative_ci_low == pytest.approx(
        2 * stats.norm.ppf(0.975) * rel_se, rel=1e-7)
    assert {c.name: c.weight for c in result.cohorts} == pytest.approx(pi.to_dict(), rel=1e-12)


def test_reference_arm_target_keeps_the_reference_mean(units: pd.DataFrame) -> None:
    # Re-weighting the reference arm to its own mix is the identity on its mean.
    cards = comparison(reweight(table_of(units_to_frame(units)), METRIC))
    assert cards.adjusted.reference_mean == pytest.approx(cards.naive.reference_mean, rel=1e-12)


def test_the_low_engagement_inflow_pulls_the_naive_estimate_down(units: pd.DataFrame) -> None:
    cards = comparison(reweight(table_of(units_to_frame(units)), METRIC))
    assert cards.naive.difference < 0 < cards.adjusted.difference
    parts = cards.decomposition
    assert parts.composition < 0 < parts.within
    assert parts.composition + parts.within == pytest.approx(cards.naive.difference, rel=1e-9)


def test_confidence_level_scales_the_interval(units: pd.DataFrame) -> None:
    table = table_of(units_to_frame(units))
    wide = comparison(reweight(table, METRIC, confidence=0.95)).adjusted
    narrow = comparison(reweight(table, METRIC, confidence=0.80)).adjusted
    ratio = (narrow.ci_high - narrow.ci_low) / (wide.ci_high - wide.ci_low)
    assert ratio == pytest.approx(stats.norm.ppf(0.90) / stats.norm.ppf(0.975), rel=1e-12)


def test_every_non_reference_arm_is_compared_with_the_reference() -> None:
    arms = ("control", "cards", "map")
    cells = [(0, arm, source, 100, mean + shift, 1.0)
             for arm, shift in zip(arms, (0.0, 0.3, -0.2), strict=True)
             for source, mean in (("organic", 2.0), ("push", 1.0))]
    result = reweight(table_of(cell_frame(cells), arms), METRIC)
    assert [c.arm for c in result.comparisons] == ["cards", "map"]
    assert comparison(result, "cards").adjusted.difference == pytest.approx(0.3, rel=1e-9)
    assert comparison(result, "map").adjusted.difference == pytest.approx(-0.2, rel=1e-9)
    assert set(result.cohorts[0].n) == set(arms)


# --- targets ---------------------------------------------------------------------------------


def test_custom_weights_are_normalised_and_used_as_given() -> None:
    cells = [(0, "control", "organic", 400, 3.0, 1.0), (0, "control", "push", 100, 1.0, 1.0),
             (0, "cards", "organic", 300, 3.5, 1.0), (0, "cards", "push", 300, 1.2, 1.0),
             (0, "cards", "newsletter", 200, 0.4, 0.5)]
    result = reweight(table_of(cell_frame(cells)), METRIC, target="custom",
                      weights={"organic": 3, "push": 1})
    assert {c.name: c.weight for c in result.cohorts} == {
        "newsletter": 0.0, "organic": 0.75, "push": 0.25}
    adjusted = comparison(result).adjusted
    assert adjusted.reference_mean == pytest.approx(0.75 * 3.0 + 0.25 * 1.0, rel=1e-12)
    assert adjusted.arm_mean == pytest.approx(0.75 * 3.5 + 0.25 * 1.2, rel=1e-12)
    # Unit sd 1 in every cell; n/(n-1) makes it the unbiased variance: s^2/n = 1/(n-1).
    variance = 0.75**2 * (1 / 399 + 1 / 299) + 0.25**2 * (1 / 99 + 1 / 299)
    assert standard_error(adjusted) == pytest.approx(math.sqrt(variance), rel=1e-9)
    assert any("no weight to newsletter" in c for c in result.caveats)


@pytest.mark.parametrize(("weights", "needle"), [
    ({"organic": -1.0, "push": 2.0}, "organic"),
    ({"organic": 0.0, "push": 0.0}, "weight > 0"),
    ({"organic": float("nan")}, "finite"),
    ({"organic": "heavy"}, "finite"),
    ({"organic": 1.0, "paid_search": 1.0}, "paid_search"),
    ({"organic|flagged": 1.0}, "organic|flagged"),
])
def test_bad_custom_weights_name_the_weights_field(weights: dict[str, Any], needle: str) -> None:
    cells = [(0, arm, source, 50, 1.0, 1.0) for arm in ARMS for source in ("organic", "push")]
    with pytest.raises(InputError) as caught:
        reweight(table_of(cell_frame(cells)), METRIC, target="custom", weights=weights)
    assert not isinstance(caught.value, UndefinedEstimateError)
    assert [p.field for p in caught.value.problems] == ["weights"] * len(caught.value.problems)
    assert needle in str(caught.value)


def test_weights_belong_to_the_custom_target_only() -> None:
    cells = [(0, arm, "organic", 50, 1.0, 1.0) for arm in ARMS]
    table = table_of(cell_frame(cells))
    for target, weights in (("custom", None), ("custom", {}), ("reference_arm", {"organic": 1})):
        with pytest.raises(InputError) as caught:
            reweight(table, METRIC, target=target, weights=weights)
        assert caught.value.problems[0].field == "weights"


def test_pooled_unflagged_mix_is_all_arms_on_unflagged_days() -> None:
    cells = [(0, "control", "organic", 300, 3.0, 1.0), (0, "cards", "organic", 340, 3.2, 1.0),
             (0, "control", "push", 100, 1.0, 1.0), (0, "cards", "push", 60, 1.1, 1.0),
             (1, "control", "organic", 300, 3.0, 1.0), (1, "cards", "organic", 300, 3.2, 1.0),
             (1, "control", "push", 100, 1.0, 1.0), (1, "cards", "push", 900, 0.6, 1.0)]
    table = table_of(cell_frame(cells))
    result = reweight(table, METRIC, target="pooled_unflagged", flagged_dates=[day(1)])
    # Day 0 only: organic 640, push 160 of 800 measured units.
    assert {c.name: c.weight for c in result.cohorts} == pytest.approx(
        {"organic": 0.8, "push": 0.2}, rel=1e-12)
    assert not any("No included day is flagged" in c for c in result.caveats)
    unflagged_all = reweight(table, METRIC, target="pooled_unflagged")
    assert {c.name: c.weight for c in unflagged_all.cohorts} == pytest.approx(
        {"organic": 1240 / 2400, "push": 1160 / 2400}, rel=1e-12)
    assert any("No included day is flagged" in c for c in unflagged_all.caveats)
    with pytest.raises(InputError) as caught:
        reweight(table, METRIC, target="pooled_unflagged", flagged_dates=[day(0), day(1)])
    assert caught.value.problems[0].field == "target"


def test_source_by_window_cohorts_split_flagged_days() -> None:
    cells = [(0, arm, "organic", 200, 3.0, 1.0) for arm in ARMS] + \
            [(0, arm, "push", 50, 1.5, 1.0) for arm in ARMS] + \
            [(1, arm, "organic", 210, 3.0, 1.0) for arm in ARMS] + \
            [(1, "cards", "push", 400, 0.5, 0.5), (1, "control", "push", 45, 1.5, 1.0)]
    table = table_of(cell_frame(cells))
    result = reweight(table, METRIC, by=["source", "window"], flagged_dates=[day(1)])
    assert result.by == ("source", "window")
    sizes = {c.name: dict(c.n) for c in result.cohorts}
    assert sizes == {"organic|unflagged": {"control": 200, "cards": 200},
                     "organic|flagged": {"control": 210, "cards": 210},
                     "push|unflagged": {"control": 50, "cards": 50},
                     "push|flagged": {"control": 45, "cards": 400}}
    assert result.cohorts[3].mean["cards"] == pytest.approx(0.5)
    pooled = reweight(table, METRIC, target="pooled_unflagged", by=("source", "window"),
                      flagged_dates=[day(1)])
    weights = {c.name: c.weight for c in pooled.cohorts}
    assert weights["organic|flagged"] == weights["push|flagged"] == 0.0
    assert weights["organic|unflagged"] == pytest.approx(0.8)
    # Without flagged days there are only unflagged cohorts.
    plain = reweight(table, METRIC, by=("source", "window"))
    assert [c.name for c in plain.cohorts] == ["organic|unflagged", "push|unflagged"]
    custom = reweight(table, METRIC, target="custom", by=("source", "window"),
                      flagged_dates=[day(1)], weights={"push|unflagged": 1.0})
    assert comparison(custom).adjusted.difference == pytest.approx(0.0, abs=1e-12)


@pytest.mark.parametrize("by", [("window",), ("source", "source"), ("day",), (), "window",
                                ("window", "source")])
def test_bad_grouping_names_the_by_field(by: Any) -> None:
    table = table_of(cell_frame([(0, arm, "organic", 50, 1.0, 1.0) for arm in ARMS]))
    with pytest.raises(InputError) as caught:
        reweight(table, METRIC, by=by)
    assert [p.field for p in caught.value.problems] == ["by"]


def test_a_single_source_string_is_the_source_grouping() -> None:
    table = table_of(cell_frame([(0, arm, "organic", 50, 1.0, 1.0) for arm in ARMS]))
    assert reweight(table, METRIC, by="source").by == ("source",)


# --- exclusions and input errors -------------------------------------------------------------


def test_exclusions_equal_dropping_the_rows(units: pd.DataFrame) -> None:
    frame = units_to_frame(units)
    table = table_of(frame)
    excluded = reweight(table, METRIC, exclude_sources=["newsletter"])
    dropped = reweight(table_of(frame[frame["source"] != "newsletter"]), METRIC)
    assert excluded.to_dict() == dropped.to_dict()
    excluded_day = reweight(table, METRIC, exclude_dates=[day(1)], by=("source", "window"),
                            flagged_dates=[day(1)])
    dropped_day = reweight(table_of(frame[frame["date"] != day(1).isoformat()]), METRIC,
                           by=("source", "window"))
    assert excluded_day.to_dict() == dropped_day.to_dict()
    assert "newsletter" not in {c.name for c in excluded.cohorts}


@pytest.mark.parametrize(("options", "field", "needle"), [
    ({"exclude_sources": ["paid_search"]}, "exclude_sources", "paid_search"),
    ({"exclude_dates": [dt.date(2026, 4, 1)]}, "exclude_dates", "2026-04-01"),
    ({"exclude_dates": ["last tuesday"]}, "exclude_dates", "calendar dates"),
    ({"flagged_dates": [dt.date(2025, 12, 31)]}, "flagged_dates", "2025-12-31"),
    ({"exclude_sources": ["organic", "push", "newsletter"]}, "exclude_sources", "no source"),
    ({"exclude_dates": [day(0), day(1)]}, "exclude_dates", "no day"),
    ({"target": "everyone"}, "target", "everyone"),
    ({"confidence": 1.0}, "confidence", "between"),
    ({"confidence": True}, "confidence", "between"),
])
def test_bad_options_name_field_and_value(units: pd.DataFrame, options: dict[str, Any],
                                          field: str, needle: str) -> None:
    with pytest.raises(InputError) as caught:
        reweight(table_of(units_to_frame(units)), METRIC, **options)
    assert caught.value.problems[0].field == field
    assert needle in caught.value.problems[0].message


def test_unknown_metric_names_the_metric_field(units: pd.DataFrame) -> None:
    with pytest.raises(InputError) as caught:
        reweight(table_of(units_to_frame(units)), "hikes")
    assert caught.value.problems[0].field == "metric"
    assert "hikes" in str(caught.value) and METRIC in str(caught.value)


def test_an_arm_without_measured_units_is_an_input_error() -> None:
    frame = cell_frame([(0, "control", "organic", 50, 1.0, 1.0), (0, "cards", "organic", 0, 0, 0)])
    frame["entered"] = 50
    with pytest.raises(InputError) as caught:
        reweight(table_of(frame), METRIC)
    assert caught.value.problems[0].field == "metric" and "cards" in str(caught.value)


# --- undefined estimates ---------------------------------------------------------------------


def test_weighted_cohort_missing_from_an_arm_is_undefined_and_named() -> None:
    cells = [(0, arm, source, 120, 2.0, 1.0) for arm in ARMS for source in ("organic", "push")]
    cells.append((0, "control", "partner", 40, 1.0, 1.0))
    table = table_of(cell_frame(cells))
    with pytest.raises(UndefinedEstimateError) as caught:
        reweight(table, METRIC)
    error = caught.value
    assert (error.cohort, error.arm) == ("partner", "cards")
    assert "partner" in str(error) and "cards" in str(error)
    assert "exclude" in str(error) and "target" in str(error)
    # Either remedy the message names gives a defined estimate.
    assert reweight(table, METRIC, exclude_sources=["partner"]).comparisons
    assert reweight(table, METRIC, target="custom", weights={"organic": 1, "push": 1}).comparisons
    with pytest.raises(UndefinedEstimateError) as custom:
        reweight(table, METRIC, target="custom", weights={"partner": 1})
    assert custom.value.cohort == "partner"


def test_cohort_missing_from_the_reference_is_undefined_for_a_pooled_mix() -> None:
    cells = [(0, arm, "organic", 120, 2.0, 1.0) for arm in ARMS]
    cells.append((0, "cards", "newsletter", 300, 0.5, 1.0))
    table = table_of(cell_frame(cells))
    with pytest.raises(UndefinedEstimateError) as caught:
        reweight(table, METRIC, target="pooled_unflagged")
    assert (caught.value.cohort, caught.value.arm) == ("newsletter", "control")
    # The reference mix gives the newsletter cohort no weight: defined, with a caveat.
    result = reweight(table, METRIC)
    assert comparison(result).adjusted.difference == pytest.approx(0.0, abs=1e-12)
    assert any("no weight to newsletter" in c and "300" in c for c in result.caveats)


# --- caveats and JSON ------------------------------------------------------------------------


def test_caveats_always_state_the_question_and_the_design_remedy(units: pd.DataFrame) -> None:
    result = reweight(table_of(units_to_frame(units)), METRIC)
    assert CAVEAT_QUESTION in result.caveats and CAVEAT_DESIGN in result.caveats
    assert "different question" in CAVEAT_QUESTION and "not a randomised" in CAVEAT_QUESTION
    assert "intent to treat" in CAVEAT_DESIGN
    assert any("target weights as fixed" in c for c in result.caveats)


def test_opposite_signs_and_composition_get_caveats() -> None:
    cells = [(0, "control", "organic", 900, 2.0, 1.0), (0, "control", "push", 100, 0.5, 0.5),
             (0, "cards", "organic", 900, 2.2, 1.0), (0, "cards", "push", 500, 0.55, 0.5)]
    result = reweight(table_of(cell_frame(cells)), METRIC)
    cards = comparison(result)
    assert cards.naive.difference < 0 < cards.adjusted.difference
    assert any("opposite signs" in c for c in result.caveats)
    assert any("different cohort mix" in c for c in result.caveats)
    same = [(0, arm, s, 100, m, 1.0) for arm in ARMS for s, m in (("organic", 2.0), ("push", 1))]
    plain = reweight(table_of(cell_frame(same)), METRIC)
    assert not any("opposite signs" in c or "different cohort mix" in c for c in plain.caveats)


def test_tiny_and_single_unit_cohorts_get_caveats() -> None:
    cells = [(0, arm, "organic", 500, 2.0, 1.0) for arm in ARMS] + \
            [(0, "control", "push", 12, 1.0, 1.0), (0, "cards", "push", 1, 1.0, 0.0)]
    result = reweight(table_of(cell_frame(cells)), METRIC)
    assert any("fewer than 30" in c and "push" in c for c in result.caveats)
    assert any("single measured unit" in c and "push" in c for c in result.caveats)
    big = [(0, arm, s, 500, 2.0, 1.0) for arm in ARMS for s in ("organic", "push")]
    assert not any("fewer than 30" in c for c in reweight(table_of(cell_frame(big)),
                                                            METRIC).caveats)


def test_to_dict_has_the_contract_shape_and_is_strict_json(units: pd.DataFrame) -> None:
    document = reweight(table_of(units_to_frame(units)), METRIC, by=("source", "window"),
                        flagged_dates=[day(1)]).to_dict()
    assert set(document) == {"metric", "target", "by", "comparisons", "cohorts", "caveats"}
    assert document["by"] == ["source", "window"] and document["target"] == "reference_arm"
    (entry,) = document["comparisons"]
    assert set(entry) == {"arm", "naive", "adjusted", "decomposition", "bounds",
                          "relative_bounds"}
    # Bounds are attached by detectors.honest; a bare re-weighting carries empty ones.
    assert entry["bounds"] == {"low": None, "high": None, "ci_low": None, "ci_high": None}
    assert set(entry["naive"]) == set(entry["adjusted"]) == EST_KEYS
    assert set(entry["decomposition"]) == {"composition", "within"}
    cohort = document["cohorts"][0]
    assert set(cohort) == {"cohort", "weight", "arms"}
    assert set(cohort["arms"]["control"]) == {"n", "mean"}
    assert json.loads(json.dumps(document, allow_nan=False)) == document


def test_zero_reference_mean_gives_null_relative_lift_and_absent_cells_null_means() -> None:
    cells = [(0, "control", "organic", 100, 0.0, 0.0), (0, "cards", "organic", 100, 0.2, 0.4),
             (0, "cards", "newsletter", 50, 0.1, 0.3)]
    result = reweight(table_of(cell_frame(cells)), METRIC)
    document = result.to_dict()
    adjusted = document["comparisons"][0]["adjusted"]
    assert adjusted["relative"] is None and adjusted["relative_ci_low"] is None
    assert adjusted["difference"] == pytest.approx(0.2)
    newsletter = next(c for c in document["cohorts"] if c["cohort"] == "newsletter")
    assert newsletter["arms"]["control"] == {"n": 0, "mean": None}
    assert any("relative lift is undefined" in c for c in result.caveats)
    json.dumps(document, allow_nan=False)


# --- properties ------------------------------------------------------------------------------

SOURCES = ("organic", "newsletter", "push", "paid_search")


@st.composite
def cell_sets(draw: st.DrawFn, min_n: int = 0) -> list[tuple[int, str, str, int, float, float]]:
    """Random cells over 2 days, 2-3 arms and 1-4 sources; organic is measured in every arm."""
    arms = ARMS + (("map",) if draw(st.booleans()) else ())
    sources = SOURCES[:draw(st.integers(1, len(SOURCES)))]
    cells = []
    for index in (0, 1):
        for arm in arms:
            for source in sources:
                low = max(min_n, 2 if source == "organic" and index == 0 else 0)
                n = draw(st.integers(low, 80))
                mean = draw(st.floats(-5, 5, allow_nan=False))
                sd = draw(st.floats(0.1, 3))
                cells.append((index, arm, source, n, mean, sd))
    return cells


def arms_of(cells: list[tuple[int, str, str, int, float, float]]) -> tuple[str, ...]:
    return tuple(dict.fromkeys(c[1] for c in cells))


def defined_options(cells: list[tuple[int, str, str, int, float, float]]) -> dict[str, Any]:
    """Custom weights on the cohorts measured in every arm, so the estimate is defined
    (organic on day 0 always is); day 1 is the flagged window."""
    arms = arms_of(cells)
    measured = {(arm, index, source) for index, arm, source, n, _, _ in cells if n > 0}
    cohorts = sorted({(index, source) for index, _, source, _, _, _ in cells})
    weights = {f"{source}|{'flagged' if index else 'unflagged'}": float(1 + k)
               for k, (index, source) in enumerate(cohorts)
               if all((arm, index, source) in measured for arm in arms)}
    return {"target": "custom", "weights": weights, "by": ("source", "window"),
            "flagged_dates": [day(1)]}


@settings(max_examples=60, deadline=None)
@given(cells=cell_sets(), seed=st.integers(0, 2**32 - 1))
def test_row_order_does_not_change_the_answer(cells: list[Any], seed: int) -> None:
    frame = cell_frame(cells)
    shuffled = frame.sample(frac=1.0, random_state=np.random.RandomState(seed))
    options = defined_options(cells)
    first = reweight(table_of(frame, arms_of(cells)), METRIC, **options).to_dict()
    second = reweight(table_of(shuffled, arms_of(cells)), METRIC, **options).to_dict()
    assert first == second


@settings(max_examples=60, deadline=None)
@given(cells=cell_sets(min_n=2), k=st.integers(2, 10))
def test_scaling_all_counts_keeps_means_and_shrinks_se_by_root_k(cells: list[Any],
                                                                 k: int) -> None:
    """Every unit repeated k times: n, sum and sum_sq scale by k."""
    arms = arms_of(cells)
    frame = cell_frame(cells)
    scaled = frame.copy()
    for column in ("entered", f"{METRIC}.n", f"{METRIC}.sum", f"{METRIC}.sum_sq"):
        scaled[column] = scaled[column] * k
    options = defined_options(cells)
    base = reweight(table_of(frame, arms), METRIC, **options)
    more = reweight(table_of(scaled, arms), METRIC, **options)
    # With unbiased variances Var scales by (n-1)/(kn-1) per cell, not exactly 1/k: k times
    # the new variance is a weighted average of k(n-1)/(kn-1) over cells, within [min, 1].
    n_all = frame[f"{METRIC}.n"].to_numpy(float)
    n_all = n_all[n_all >= 2]
    grouped = frame.groupby("arm")[f"{METRIC}.n"].sum().to_numpy(float)
    floor = float(np.min(k * (np.r_[n_all, grouped] - 1) / (k * np.r_[n_all, grouped] - 1)))
    for old, new in zip(base.comparisons, more.comparisons, strict=True):
        for name in ("naive", "adjusted"):
            a, b = getattr(old, name), getattr(new, name)
            assert b.reference_mean == pytest.approx(a.reference_mean, rel=1e-9, abs=1e-9)
            assert b.arm_mean == pytest.approx(a.arm_mean, rel=1e-9, abs=1e-9)
            ratio = standard_error(b) * math.sqrt(k) / standard_error(a)
            assert math.sqrt(floor) - 1e-6 <= ratio <= 1 + 1e-6
        assert new.decomposition.within == pytest.approx(old.decomposition.within, abs=1e-9)


@settings(max_examples=100, deadline=None)
@given(cells=cell_sets())
def test_decomposition_adds_up_to_the_naive_difference(cells: list[Any]) -> None:
    result = reweight(table_of(cell_frame(cells), arms_of(cells)), METRIC,
                      **defined_options(cells))
    for entry in result.comparisons:
        parts = entry.decomposition
        scale = max(abs(entry.naive.arm_mean), abs(entry.naive.reference_mean), 1.0)
        assert parts.composition + parts.within == pytest.approx(
            entry.naive.difference, rel=1e-9, abs=1e-12 * scale)


# --- simulation ------------------------------------------------------------------------------


def test_adjusted_interval_covers_the_within_cohort_effect_and_naive_is_biased() -> None:
    """Invented data (a simulation): 400 experiments in which cards also receives a
    newsletter cohort of low engagement; the within-cohort lift differs by source."""
    rng = np.random.default_rng(20260302)
    means = {"organic": 3.0, "push": 1.6, "newsletter": 0.5}
    lift = {"organic": 0.20, "push": 0.05, "newsletter": 0.0}
    custom = {"organic": 0.5, "push": 0.5}
    reps = 400
    covers = {"reference": 0, "custom": 0, "naive": 0}
    naive_error, adjusted_error, naive_se = [], [], []
    for _ in range(reps):
        sizes = {(0, arm, source): int(rng.poisson(size))
                 for arm in ARMS for source, size in (("organic", 600), ("push", 300))}
        sizes[(0, "cards", "newsletter")] = int(rng.poisson(400))
        units = simulated_units(rng, sizes, means, lift)
        table = table_of(units_to_frame(units))
        control_n = {s: sizes[(0, "control", s)] for s in ("organic", "push")}
        # Post-stratification to the reference arm estimates the lift averaged over its
        # realised mix; with fixed custom weights the truth is the fixed average.
        truth_ref = sum(lift[s] * control_n[s] for s in control_n) / sum(control_n.values())
        truth_custom = sum(custom[s] * lift[s] for s in custom)
        by_reference = comparison(reweight(table, METRIC))
        by_custom = comparison(reweight(table, METRIC, target="custom", weights=custom))
        covers["reference"] += by_reference.adjusted.ci_low <= truth_ref <= \
            by_reference.adjusted.ci_high
        covers["custom"] += by_custom.adjusted.ci_low <= truth_custom <= \
            by_custom.adjusted.ci_high
        covers["naive"] += by_reference.naive.ci_low <= truth_ref <= by_reference.naive.ci_high
        naive_error.append(by_reference.naive.difference - truth_ref)
        adjusted_error.append(by_reference.adjusted.difference - truth_ref)
        naive_se.append(standard_error(by_reference.naive))
    assert 0.92 <= covers["reference"] / reps <= 0.98
    assert 0.92 <= covers["custom"] / reps <= 0.98
    assert covers["naive"] / reps < 0.05
    assert np.mean(naive_error) < -5 * np.mean(naive_se)
    assert abs(np.mean(adjusted_error)) < 4 * np.std(adjusted_error) / math.sqrt(reps)


def test_a_cohort_absent_from_one_arm_goes_to_composition_only() -> None:
    # Identical within the shared cohort; the newsletter cohort exists in cards only, so the
    # whole naive gap is composition (Kitagawa 1955: the missing mean takes the other arm's).
    cells = [(0, arm, "organic", 400, 3.0, 1.0) for arm in ARMS]
    cells.append((0, "cards", "newsletter", 100, 0.5, 0.5))
    cards = comparison(reweight(table_of(cell_frame(cells)), METRIC))
    assert cards.naive.difference == pytest.approx((400 * 3.0 + 100 * 0.5) / 500 - 3.0)
    assert cards.decomposition.within == pytest.approx(0.0, abs=1e-12)
    assert cards.decomposition.composition == pytest.approx(cards.naive.difference, rel=1e-12)
