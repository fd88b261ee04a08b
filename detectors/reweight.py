"""Re-weighting an effect estimate by entry cohort (post-stratification).

When an inflow outside the randomisation (a campaign sent to one arm) puts a different population
into one arm, the plain difference of arm means mixes the treatment effect with the difference in
who entered. Post-stratification compares the arms on one common cohort mix instead.

Methods:

* Post-stratification: Miratrix, Sekhon & Yu, "Adjusting treatment effect estimates by
  post-stratification in randomized experiments", JRSS-B 75(2):369-396 (2013). Each arm's mean
  is rebuilt as ``sum_c pi_c * m_{a,c}`` over cohorts ``c`` with one target mix ``pi`` shared by
  every arm.
* Variance: Welch-type, unequal per arm and cohort (Welch, "The generalization of Student's
  problem when several different population variances are involved", Biometrika 34:28-35,
  1947), ``sum_c pi_c^2 s^2_{a,c} / n_{a,c}`` from the ``n, sum, sum_sq`` sufficient statistics,
  with the target weights held fixed (the extra variance of a mix estimated from the data is not
  counted; Miratrix et al. give it, and it is small when cohorts are large).
* Relative lift ``d / m_r``: the delta method,
  ``Var ~ Var(m_a) / m_r^2 + m_a^2 Var(m_r) / m_r^4`` (arms independent).
* Decomposition of the naive gap into a composition part and a within-cohort part: Kitagawa,
  "Components of a difference between two rates", JASA 50:1168-1194 (1955), the same split as
  the Oaxaca-Blinder decomposition with averaged weights. The two parts add up exactly.

Example (Larkspur Trails demo scenario: a push campaign reached only ``cards``):

    >>> import pandas as pd
    >>> rows = pd.DataFrame({"date": ["2026-03-01"] * 4,
    ...     "arm": ["control", "control", "cards", "cards"],
    ...     "source": ["organic", "push", "organic", "push"], "entered": [900, 100, 900, 500],
    ...     "routes_saved.n": [900, 100, 900, 500],
    ...     "routes_saved.sum": [1800.0, 50, 1980, 275],
    ...     "routes_saved.sum_sq": [4500.0, 40, 5000, 230]})
    >>> table = ObservationTable.from_frame(rows, ["control", "cards"])
    >>> result = reweight(table, "routes_saved")
    >>> cards = result.comparisons[0]
    >>> round(cards.naive.difference, 3), round(cards.adjusted.difference, 3)
    (-0.239, 0.185)
    >>> parts = cards.decomposition
    >>> round(parts.composition, 3), round(parts.within, 3)
    (-0.405, 0.166)
"""

from __future__ import annotations

import datetime as dt
import difflib
import math
from collections.abc import Mapping, Sequence
from dataclasses import dataclass
from typing import Any

import numpy as np
from scipy import special

from .bounds import Bounds
from .data import ObservationTable
from .errors import InputError, Problem, UndefinedEstimateError

TARGETS = ("reference_arm", "pooled_unflagged", "custom")
GROUPINGS = (("source",), ("source", "window"))
WINDOWS = ("unflagged", "flagged")
# Cohorts smaller than this in some arm get a caveat: their variance estimate is rough
# (common practice, no source).
SMALL_COHORT = 30

CAVEAT_QUESTION = (
    "The re-weighted estimate answers a different question: the effect on the population the "
    "target mix describes. It rests on the cohorts capturing why the inflow differs, and it is "
    "not a randomised estimate.")
CAVEAT_DESIGN = (
    "When an inflow came from a campaign sent to one arm, the clean remedy is design: send it to "
    "an equal share of every arm, or log who would have received it in every arm and analyse by "
    "intent to treat.")


@dataclass(frozen=True, slots=True)
class Estimate:
    """An arm's mean against the reference arm's: difference and relative lift with intervals.

    ``relative`` and its interval are ``None`` when the reference mean is 0.
    """

    reference_mean: float
    arm_mean: float
    difference: float
    ci_low: float
    ci_high: float
    relative: float | None
    relative_ci_low: float | None
    relative_ci_high: float | None

    def to_dict(self) -> dict[str, float | None]:
        return {name: _json(getattr(self, name)) for name in self.__slots__}


@dataclass(frozen=True, slots=True)
class Decomposition:
    """Naive difference = ``composition`` (cohort mix) + ``within`` (within-cohort gaps)."""

    composition: float
    within: float

    def to_dict(self) -> dict[str, float | None]:
        return {"composition": _json(self.composition), "within": _json(self.within)}


@dataclass(frozen=True, slots=True)
class Comparison:
    """One non-reference arm against the reference arm.

    ``bounds`` and ``relative_bounds``: trimming bounds on the difference and on the relative
    lift (:mod:`detectors.honest`); ``None`` until they are attached.
    """

    arm: str
    naive: Estimate
    adjusted: Estimate
    decomposition: Decomposition
    bounds: Bounds | None = None
    relative_bounds: Bounds | None = None

    def to_dict(self) -> dict[str, Any]:
        empty = {"low": None, "high": None, "ci_low": None, "ci_high": None}
        return {"arm": self.arm, "naive": self.naive.to_dict(),
                "adjusted": self.adjusted.to_dict(),
                "decomposition": self.decomposition.to_dict(),
                "bounds": self.bounds.to_dict() if self.bounds else empty,
                "relative_bounds": (self.relative_bounds.to_dict() if self.relative_bounds
                                    else empty)}


@dataclass(frozen=True, slots=True)
class Cohort:
    """A cohort's target weight and, per arm, its measured units and mean (``None`` if none)."""

    name: str
    weight: float
    n: Mapping[str, int]
    mean: Mapping[str, float | None]

    def to_dict(self) -> dict[str, Any]:
        return {"cohort": self.name, "weight": _json(self.weight),
                "arms": {arm: {"n": self.n[arm], "mean": _json(self.mean[arm])}
                         for arm in self.n}}


@dataclass(frozen=True, slots=True)
class Reweighting:
    """Naive and post-stratified comparisons of every arm with the reference arm."""

    metric: str
    target: str
    by: tuple[str, ...]
    comparisons: tuple[Comparison, ...]
    cohorts: tuple[Cohort, ...]
    caveats: tuple[str, ...]

    def to_dict(self) -> dict[str, Any]:
        """The re-weighting answer of the HTTP contract; floats are finite or ``None``."""
        return {"metric": self.metric, "target": self.target, "by": list(self.by),
                "comparisons": [c.to_dict() for c in self.comparisons],
                "cohorts": [c.to_dict() for c in self.cohorts],
                "caveats": list(self.caveats)}


@dataclass(frozen=True, slots=True)
class _Cells:
    """Sufficient statistics per arm and cohort, each ``(arms, cohorts)``."""

    names: tuple[str, ...]
    n: np.ndarray
    total: np.ndarray
    total_sq: np.ndarray


def reweight(table: ObservationTable, metric: str, *, target: str = "reference_arm",
             weights: Mapping[str, float] | None = None, by: Sequence[str] = ("source",),
             exclude_sources: Sequence[str] = (), exclude_dates: Sequence[dt.date] = (),
             flagged_dates: Sequence[dt.date] = (), confidence: float = 0.95) -> Reweighting:
    """Naive and post-stratified effect of each arm against the reference arm (the first arm).

    Args:
        table: the experiment's observations; ``metric`` must be one of its metrics.
        target: the cohort mix every arm is re-weighted to: ``reference_arm`` (the reference
            arm's share of measured units per cohort), ``pooled_unflagged`` (all arms pooled
            over the days not in ``flagged_dates``; every day when none is flagged) or
            ``custom`` (``weights``, normalised to sum to 1).
        weights: ``{cohort: weight >= 0}`` for ``target="custom"``; unnamed cohorts weigh 0.
        by: ``("source",)`` (cohort = entry source) or ``("source", "window")`` (cohort =
            ``"SOURCE|flagged"`` or ``"SOURCE|unflagged"`` by whether the day is flagged).
        exclude_sources, exclude_dates: removed before anything else.
        flagged_dates: the inflow window (the diagnosis's alert days).
        confidence: level of the normal intervals.

    Raises:
        InputError: naming the field (``metric``, ``target``, ``weights``, ``by``,
            ``exclude_sources``, ``exclude_dates``, ``flagged_dates``, ``confidence``).
        UndefinedEstimateError: a cohort with positive target weight has no measured units in
            some arm.

    A cohort absent from one arm of a comparison enters the decomposition with the other arm's
    mean: its within part is 0 and the composition part carries its whole contribution.
    """
    by = _check_request(table, metric, target, weights, by, confidence)
    keep_day, keep_source = _exclusions(table, exclude_sources, exclude_dates)
    flagged = _day_mask(table, flagged_dates, "flagged_dates")[keep_day]
    cube = table.metrics[metric][keep_day][:, :, keep_source]         # (days, arms, sources, 3)
    sources = tuple(s for s, keep in zip(table.sources, keep_source, strict=True) if keep)
    cells = _cohort_cells(cube, flagged, sources, by)
    present = cells.n.sum(axis=0) > 0
    if not present.any():
        raise InputError([Problem("metric", f"no measured units of {metric!r} remain after the "
                                  "exclusions")])
    cells = _Cells(tuple(name for name, p in zip(cells.names, present, strict=True) if p),
                   cells.n[:, present], cells.total[:, present], cells.total_sq[:, present])
    arms = table.arms
    arm_n = cells.n.sum(axis=1)
    if (arm_n == 0).any():
        empty = [arm for arm, k in zip(arms, arm_n, strict=True) if k == 0]
        raise InputError([Problem("metric", f"arm(s) {empty} have no measured units of "
                                  f"{metric!r}; there is nothing to compare")])

    caveats = [CAVEAT_QUESTION, CAVEAT_DESIGN]
    if target == "reference_arm":
        pi = cells.n[0] / cells.n[0].sum()
    elif target == "pooled_unflagged":
        if not flagged.any():
            caveats.append("No included day is flagged, so the pooled mix covers every "
                           "included day.")
        pooled = _cohort_cells(cube[~flagged], flagged[~flagged], sources, by)
        mix = pooled.n.sum(axis=0)[present]
        if mix.sum() <= 0:
            raise InputError([Problem("target", "pooled_unflagged needs measured units on "
                                      "unflagged days, and every included day is flagged")])
        pi = mix / mix.sum()
    else:
        pi = _custom_weights(weights or {}, cells.names, _cohort_names(table.sources, by))
    _require_defined(pi, cells, arms, target)

    with np.errstate(divide="ignore", invalid="ignore"):
        means = np.where(cells.n > 0, cells.total / cells.n, np.nan)     # (arms, cohorts)
    variance_of_mean = np.where(cells.n > 0, _unit_variance(cells.n, cells.total,
                                                            cells.total_sq)
                                / np.maximum(cells.n, 1), 0.0)
    z = float(special.ndtri(0.5 + confidence / 2))  # the normal quantile

    naive_mean = cells.total.sum(axis=1) / arm_n
    naive_var = _unit_variance(arm_n, cells.total.sum(axis=1), cells.total_sq.sum(axis=1)) / arm_n
    adjusted_mean = (pi * np.nan_to_num(means)).sum(axis=1)
    adjusted_var = (pi**2 * variance_of_mean).sum(axis=1)
    naive = _estimates(naive_mean, naive_var, z)
    adjusted = _estimates(adjusted_mean, adjusted_var, z)
    composition, within = kitagawa(cells.n, means)

    comparisons = tuple(Comparison(arms[a], naive[a - 1], adjusted[a - 1],
                                   Decomposition(float(composition[a - 1]),
                                                 float(within[a - 1])))
                        for a in range(1, len(arms)))
    caveats += _caveats(comparisons, pi, cells, confidence)
    cohorts = tuple(Cohort(name, float(pi[c]),
                           {arm: int(cells.n[a, c]) for a, arm in enumerate(arms)},
                           {arm: _json(means[a, c]) for a, arm in enumerate(arms)})
                    for c, name in enumerate(cells.names))
    return Reweighting(metric, target, by, comparisons, cohorts, tuple(caveats))


def kitagawa(n: np.ndarray, means: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Composition and within-cohort parts of each arm's naive gap to arm 0 (Kitagawa 1955).

    ``n`` and ``means`` are ``(arms, cohorts)``; ``means`` is NaN where ``n`` is 0. With
    ``p`` the cohort shares of an arm's measured units, for arm ``a`` against reference ``r``:
    ``composition = sum_c (p_a - p_r)(m_a + m_r)/2`` and
    ``within = sum_c (m_a - m_r)(p_a + p_r)/2``, which add up to
    ``sum_c p_a m_a - sum_c p_r m_r``, the naive difference. A cohort missing from one of the two
    arms takes the other arm's mean, so its within part is 0.

    Example:
        >>> comp, within = kitagawa(np.array([[50, 50], [20, 80]]),
        ...                         np.array([[2.0, 1.0], [2.5, 1.5]]))
        >>> round(float(comp[0]), 6), round(float(within[0]), 6)
        (-0.3, 0.5)
    """
    shares = n / n.sum(axis=1, keepdims=True)
    p_arm, p_ref = shares[1:], shares[:1]
    m_arm, m_ref = means[1:], np.broadcast_to(means[:1], means[1:].shape)
    m_arm, m_ref = np.where(np.isnan(m_arm), m_ref, m_arm), np.where(np.isnan(m_ref), m_arm, m_ref)
    m_arm, m_ref = np.nan_to_num(m_arm), np.nan_to_num(m_ref)   # absent from both: p = 0 there
    composition = ((p_arm - p_ref) * (m_arm + m_ref) / 2).sum(axis=1)
    within = ((m_arm - m_ref) * (p_arm + p_ref) / 2).sum(axis=1)
    return composition, within


def _check_request(table: ObservationTable, metric: str, target: str,
                   weights: Mapping[str, float] | None, by: Sequence[str],
                   confidence: float) -> tuple[str, ...]:
    problems: list[Problem] = []
    if metric not in table.metrics:
        known = sorted(table.metrics)
        problems.append(Problem("metric", f"unknown metric {metric!r}"
                                + _did_you_mean(metric, known)
                                + f"; the data has {', '.join(known) or 'no metrics'}"))
    if target not in TARGETS:
        problems.append(Problem("target", f"unknown target {target!r}; must be one of "
                                f"{list(TARGETS)}"))
    elif target == "custom" and not weights:
        problems.append(Problem("weights", "target 'custom' needs weights {cohort: weight}"))
    elif target != "custom" and weights is not None:
        problems.append(Problem("weights", "weights are only used with target 'custom'"))
    grouping = (by,) if isinstance(by, str) else tuple(by)
    if grouping not in GROUPINGS:
        problems.append(Problem("by", f"{list(grouping)} is not a grouping; must be "
                                '["source"] or ["source", "window"]'))
    if isinstance(confidence, bool) or not isinstance(confidence, int | float) \
            or not 0 < confidence < 1:
        problems.append(Problem("confidence", "must be a number strictly between 0 and 1"))
    if problems:
        raise InputError(problems)
    return grouping


def _did_you_mean(name: str, known: Sequence[str]) -> str:
    """`` (did you mean 'x'?)`` for the known name closest to ``name``, if one is close."""
    folded = {k.casefold(): k for k in known}
    close = folded.get(name.casefold()) or next(
        iter(difflib.get_close_matches(name, list(known), n=1, cutoff=0.6)), None)
    return f" (did you mean {close!r}?)" if close else ""


def _day_mask(table: ObservationTable, dates: Sequence[dt.date], field: str) -> np.ndarray:
    """Which days of the table are in ``dates``; a date outside the table is an InputError."""
    try:
        wanted = np.array([np.datetime64(d, "D") for d in dates], dtype="datetime64[D]")
    except (TypeError, ValueError):
        raise InputError([Problem(field, "must be calendar dates (YYYY-MM-DD)")]) from None
    days = table.dates.astype("datetime64[D]")
    outside = sorted({str(d) for d in wanted[~np.isin(wanted, days)]})
    if outside:
        span = f"{days[0]} to {days[-1]}" if len(days) else "no days"
        raise InputError([Problem(field, f"date(s) {outside} are outside the data ({span})")])
    return np.isin(days, wanted)


def _exclusions(table: ObservationTable, exclude_sources: Sequence[str],
                exclude_dates: Sequence[dt.date]) -> tuple[np.ndarray, np.ndarray]:
    """Masks of the days and sources kept."""
    if isinstance(exclude_sources, str):
        exclude_sources = (exclude_sources,)
    unknown = sorted(set(exclude_sources) - set(table.sources))
    if unknown:
        raise InputError([Problem("exclude_sources", "; ".join(
            f"unknown source {name!r}{_did_you_mean(name, table.sources)}" for name in unknown)
            + f"; the data has {', '.join(table.sources)}")])
    keep_day = ~_day_mask(table, exclude_dates, "exclude_dates")
    keep_source = ~np.isin(np.array(table.sources, dtype=object),
                           np.array(list(exclude_sources), dtype=object))
    if not keep_day.any():
        raise InputError([Problem("exclude_dates", "the exclusions leave no day")])
    if not keep_source.any():
        raise InputError([Problem("exclude_sources", "the exclusions leave no source")])
    return keep_day, keep_source


def _cohort_cells(cube: np.ndarray, flagged: np.ndarray, sources: tuple[str, ...],
                  by: tuple[str, ...]) -> _Cells:
    """Sum a ``(days, arms, sources, 3)`` cube into ``(arms, cohorts)`` sufficient statistics."""
    if by == ("source",):
        cells = cube.sum(axis=0)                                          # (arms, sources, 3)
    else:
        # Interleaved per source, in the order of _cohort_names.
        split = np.stack([cube[~flagged].sum(axis=0), cube[flagged].sum(axis=0)], axis=2)
        cells = split.reshape(split.shape[0], -1, 3)
    return _Cells(_cohort_names(sources, by), cells[..., 0], cells[..., 1], cells[..., 2])


def _cohort_names(sources: Sequence[str], by: tuple[str, ...]) -> tuple[str, ...]:
    if by == ("source",):
        return tuple(sources)
    return tuple(f"{source}|{window}" for source in sources for window in WINDOWS)


def _custom_weights(weights: Mapping[str, float], names: tuple[str, ...],
                    all_names: tuple[str, ...]) -> np.ndarray:
    """Normalised custom weights over the cohorts with measured units."""
    problems: list[Problem] = []
    for cohort in sorted(set(weights) - set(names)):
        why = ("is excluded or has no measured units" if cohort in all_names
               else "is not a cohort of this data and grouping")
        problems.append(Problem("weights", f"cohort {cohort!r} {why}; cohorts are "
                                f"{list(names)}"))
    values = np.zeros(len(names))
    for index, cohort in enumerate(names):
        raw = weights.get(cohort, 0.0)
        value = (math.nan if isinstance(raw, bool) or not isinstance(raw, int | float)
                 else float(raw))
        if not math.isfinite(value) or value < 0:
            problems.append(Problem("weights", f"weight of {cohort!r} must be a finite number "
                                    f">= 0, got {raw!r}"))
        values[index] = value
    if not problems and values.sum() <= 0:
        problems.append(Problem("weights", "at least one cohort needs a weight > 0"))
    if problems:
        raise InputError(problems)
    return values / values.sum()


def _require_defined(pi: np.ndarray, cells: _Cells, arms: tuple[str, ...], target: str) -> None:
    missing = (pi > 0) & (cells.n == 0)                                   # (arms, cohorts)
    if not missing.any():
        return
    cohort_index, arm_index = np.argwhere(missing.T)[0]                   # first cohort, arm
    cohort, arm = cells.names[cohort_index], arms[arm_index]
    others = int(missing.sum()) - 1
    more = f" ({others} more cohort/arm pair(s) like it)" if others else ""
    raise UndefinedEstimateError(
        f"cohort {cohort!r} has weight {pi[cohort_index]:.3g} in the {target} mix but no "
        f"measured units in arm {arm!r}{more}, so the re-weighted estimate is undefined; "
        "exclude that cohort's source or days, or choose another target (custom weights "
        "without it)", cohort=cohort, arm=arm)


def _unit_variance(n: np.ndarray, total: np.ndarray, total_sq: np.ndarray) -> np.ndarray:
    """Unbiased per-unit variance ``(sum_sq - sum^2/n)/(n - 1)``; 0 where ``n < 2``."""
    with np.errstate(divide="ignore", invalid="ignore"):
        variance = (total_sq - total**2 / n) / (n - 1)
    # Clip the tiny negatives that rounding of sum_sq - sum^2/n can give.
    return np.where(n > 1, np.clip(variance, 0.0, None), 0.0)


def _estimates(mean: np.ndarray, variance: np.ndarray, z: float) -> list[Estimate]:
    """Each arm against arm 0: Welch-type SE of the difference, delta-method relative lift."""
    ref_mean, ref_var = mean[0], variance[0]
    arm_mean, arm_var = mean[1:], variance[1:]
    difference = arm_mean - ref_mean
    se = np.sqrt(arm_var + ref_var)
    if ref_mean != 0:
        # (1/m_r^2) Var(m_a) + (m_a^2/m_r^4) Var(m_r), arranged so that m_r^4 cannot underflow.
        with np.errstate(over="ignore", divide="ignore", invalid="ignore"):
            relative = difference / ref_mean
            rel_se = np.sqrt(arm_var + (arm_mean / ref_mean) ** 2 * ref_var) / abs(ref_mean)
            rel_low, rel_high = relative - z * rel_se, relative + z * rel_se
    else:
        relative = rel_low = rel_high = np.full(difference.shape, np.nan)
    out = []
    for i in range(difference.shape[0]):
        estimate = Estimate(float(ref_mean), float(arm_mean[i]), float(difference[i]),
                            float(difference[i] - z * se[i]), float(difference[i] + z * se[i]),
                            _json(relative[i]), _json(rel_low[i]), _json(rel_high[i]))
        out.append(estimate)
    return out


def _caveats(comparisons: tuple[Comparison, ...], pi: np.ndarray, cells: _Cells,
             confidence: float) -> list[str]:
    caveats = [f"Intervals are normal approximations at {100 * confidence:g}% with Welch-type "
               "variances; they treat the target weights as fixed."]
    weighted = pi > 0
    single = weighted & (cells.n == 1).any(axis=0)
    if single.any():
        caveats.append("Cohorts with a single measured unit in some arm count as having no "
                       f"variance there, so the interval is too narrow: {_names(cells, single)}.")
    small = weighted & (cells.n < SMALL_COHORT).any(axis=0)
    if small.any():
        caveats.append(f"Cohorts with fewer than {SMALL_COHORT} measured units in some arm carry "
                       f"target weight; their means and variances are rough: "
                       f"{_names(cells, small)}.")
    left_out = ~weighted & (cells.n > 0).any(axis=0)
    if left_out.any():
        units = int(cells.n[:, left_out].sum())
        caveats.append(f"The target mix gives no weight to {_names(cells, left_out)} "
                       f"({units:,} measured units): the re-weighted estimate says nothing "
                       "about how the treatment worked on them.")
    for comparison in comparisons:
        naive, adjusted = comparison.naive.difference, comparison.adjusted.difference
        if naive * adjusted < 0:
            caveats.append(f"For {comparison.arm} the naive and re-weighted differences have "
                           "opposite signs: the cohort mix, not only the treatment, drives the "
                           "naive reading.")
        parts = comparison.decomposition
        if naive != 0 and abs(parts.composition) > abs(parts.within):
            caveats.append(f"For {comparison.arm} most of the naive difference comes from a "
                           f"different cohort mix (composition {parts.composition:+.4g}) rather "
                           f"than from differences within cohorts ({parts.within:+.4g}).")
    if any(c.naive.relative is None or c.adjusted.relative is None for c in comparisons):
        caveats.append("The reference arm's mean is 0 (or too close to 0), so a relative lift "
                       "is undefined (reported as null).")
    return caveats


def _names(cells: _Cells, mask: np.ndarray, limit: int = 5) -> str:
    chosen = [name for name, pick in zip(cells.names, mask, strict=True) if pick]
    more = f" and {len(chosen) - limit} more" if len(chosen) > limit else ""
    return ", ".join(chosen[:limit]) + more


def _json(value: float | None) -> float | None:
    """A finite float, or ``None`` for a missing or non-finite value (JSON has no NaN)."""
    if value is None:
        return None
    value = float(value)
    return value if math.isfinite(value) else None
