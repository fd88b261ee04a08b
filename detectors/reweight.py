"""Re-weighting an effect estimate by entry cohort (post-stratification).

Miratrix, Sekhon & Yu, "Adjusting treatment effect estimates by post-stratification in
randomized experiments", JRSS-B 75:369-396 (2013): each arm's mean is re-built as
``sum_c pi_c * mean_{arm,c}`` over cohorts ``c`` with a common target mix ``pi``, so an arm that
received an extra cohort (a campaign's dormant users) is compared on the same mix as the other.
Variances are Welch-type (unequal per arm and cohort, Welch 1947) from the n/sum/sum_sq
sufficient statistics with the target weights held fixed; the relative lift uses the delta
method. The naive gap is split into a composition part and a within-cohort part (Kitagawa 1955,
"Components of a difference between two rates", JASA 50:1168-1194; the same split as
Oaxaca-Blinder), which add up exactly.
"""

from __future__ import annotations

import datetime as dt
from collections.abc import Mapping, Sequence
from dataclasses import dataclass
from typing import Any

import numpy as np
from scipy import stats

from .data import ObservationTable
from .errors import InputError, Problem, UndefinedEstimateError

TARGETS = ("reference_arm", "pooled_unflagged", "custom")
SMALL_COHORT = 30

_CAVEAT_QUESTION = (
    "The re-weighted estimate answers a different question: the effect on the population the "
    "target mix describes. It rests on the cohorts capturing why the inflow differs, and it is "
    "not a randomised estimate.")
_CAVEAT_DESIGN = (
    "When an inflow came from a campaign sent to one arm, the clean remedy is design: send it to "
    "an equal share of every arm, or log who would have received it in every arm and analyse by "
    "intent to treat.")


@dataclass(frozen=True, slots=True)
class Estimate:
    """Arm vs reference mean, their difference and relative lift with confidence intervals."""

    reference_mean: float
    arm_mean: float
    difference: float
    ci_low: float
    ci_high: float
    relative: float | None
    relative_ci_low: float | None
    relative_ci_high: float | None

    def to_dict(self) -> dict[str, float | None]:
        return {k: _json(getattr(self, k)) for k in self.__slots__}


@dataclass(frozen=True, slots=True)
class Comparison:
    arm: str
    naive: Estimate
    adjusted: Estimate
    composition: float
    within: float


@dataclass(frozen=True, slots=True)
class Cohort:
    name: str
    weight: float
    n: dict[str, int]
    mean: dict[str, float | None]


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
        return {
            "metric": self.metric,
            "target": self.target,
            "by": list(self.by),
            "comparisons": [{
                "arm": c.arm, "naive": c.naive.to_dict(), "adjusted": c.adjusted.to_dict(),
                "decomposition": {"composition": _json(c.composition), "within": _json(c.within)},
            } for c in self.comparisons],
            "cohorts": [{"cohort": c.name, "weight": _json(c.weight),
                         "arms": {a: {"n": c.n[a], "mean": _json(c.mean[a])} for a in c.n}}
                        for c in self.cohorts],
            "caveats": list(self.caveats),
        }


def reweight(table: ObservationTable, metric: str, *, target: str = "reference_arm",
             weights: Mapping[str, float] | None = None, by: Sequence[str] = ("source",),
             exclude_sources: Sequence[str] = (), exclude_dates: Sequence[dt.date] = (),
             flagged_dates: Sequence[dt.date] = (), confidence: float = 0.95) -> Reweighting:
    """Post-stratified effect of each arm against the reference arm (the table's first arm).

    Cohorts are entry sources (``by=("source",)``) or sources split into flagged and unflagged
    days (``by=("source", "window")``, cohort names ``"SOURCE|flagged"``). ``target`` picks the
    cohort mix: the reference arm's, all arms pooled over unflagged days, or ``custom`` weights.

    Example:
        >>> import pandas as pd
        >>> rows = pd.DataFrame({"date": ["2026-03-01"] * 4, "arm": ["a", "a", "b", "b"],
        ...     "source": ["organic", "email", "organic", "email"], "entered": [900, 100, 900, 500],
        ...     "m.n": [900, 100, 900, 500], "m.sum": [1800.0, 50, 1980, 275],
        ...     "m.sum_sq": [4500.0, 40, 5000, 230]})
        >>> r = reweight(ObservationTable.from_frame(rows, ["a", "b"]), "m")
        >>> c = r.comparisons[0]
        >>> round(c.naive.difference, 3), round(c.adjusted.difference, 3)
        (-0.239, 0.185)
    """
    if metric not in table.metrics:
        raise InputError([Problem("metric", f"unknown metric {metric!r}; the data has "
                                  f"{sorted(table.metrics) or 'no metrics'}")])
    if target not in TARGETS:
        raise InputError([Problem("target", f"must be one of {list(TARGETS)}")])
    by = tuple(by)
    if by not in (("source",), ("source", "window")):
        raise InputError([Problem("by", 'must be ["source"] or ["source", "window"]')])
    if not 0 < confidence < 1:
        raise InputError([Problem("confidence", "must be between 0 and 1")])
    unknown_sources = sorted(set(exclude_sources) - set(table.sources))
    if unknown_sources:
        raise InputError([Problem("exclude_sources", f"unknown source(s) {unknown_sources}")])
    day_numbers = table.dates.astype("datetime64[D]")
    excluded_days = np.array([np.datetime64(d, "D") for d in exclude_dates],
                             dtype="datetime64[D]")
    outside = [d.isoformat() for d, x in zip(exclude_dates, excluded_days, strict=True)
               if x not in day_numbers]
    if outside:
        raise InputError([Problem("exclude_dates", f"date(s) without data {outside}")])
    caveats: list[str] = [_CAVEAT_QUESTION, _CAVEAT_DESIGN]

    flagged = np.isin(day_numbers, np.array([np.datetime64(d, "D") for d in flagged_dates],
                                            dtype="datetime64[D]"))
    keep_day = ~np.isin(day_numbers, excluded_days)
    keep_source = np.array([s not in set(exclude_sources) for s in table.sources])
    if not keep_day.any() or not keep_source.any():
        raise InputError([Problem("exclude_dates" if not keep_day.any() else "exclude_sources",
                                  "the exclusions leave no data")])
    cube = table.metrics[metric][keep_day][:, :, keep_source]       # (days, arms, sources, 3)
    window = flagged[keep_day]
    sources = [s for s, k in zip(table.sources, keep_source, strict=True) if k]
    if by == ("source",):
        cells = cube.sum(axis=0)                                     # (arms, sources, 3)
        names = sources
        pooled_mask = None
    else:
        flagged_cells = cube[window].sum(axis=0)
        unflagged_cells = cube[~window].sum(axis=0)
        cells = np.concatenate([unflagged_cells, flagged_cells], axis=1)
        names = [f"{s}|unflagged" for s in sources] + [f"{s}|flagged" for s in sources]
        pooled_mask = np.array([False] * len(sources) + [True] * len(sources))
    present = cells[:, :, 0].sum(axis=0) > 0
    cells, names = cells[:, present], [n for n, p in zip(names, present, strict=True) if p]
    if pooled_mask is not None:
        pooled_mask = pooled_mask[present]
    if not names:
        raise InputError([Problem("metric", f"no measured units of {metric!r} in the data")])

    n, total, total_sq = cells[..., 0], cells[..., 1], cells[..., 2]  # (arms, cohorts)
    arms = table.arms
    if (n.sum(axis=1) == 0).any():
        empty = [a for a, k in zip(arms, n.sum(axis=1), strict=True) if k == 0]
        raise InputError([Problem("metric", f"arm(s) {empty} have no measured units of "
                                  f"{metric!r}")])
    with np.errstate(divide="ignore", invalid="ignore"):
        means = np.where(n > 0, total / n, np.nan)
        variances = np.where(n > 1, (total_sq - total**2 / np.where(n > 0, n, 1))
                             / np.where(n > 1, n - 1, 1), 0.0)
    variances = np.clip(variances, 0.0, None)

    pi = _target_weights(target, weights, names, n, flagged_days_given=bool(len(flagged_dates)),
                         window_cohorts=pooled_mask, table_flagged=cube, window=window,
                         by=by, caveats=caveats)
    missing = (pi[None, :] > 0) & (n == 0)
    if missing.any():
        arm_index, cohort_index = np.argwhere(missing)[0]
        cohort, arm = names[cohort_index], arms[arm_index]
        raise UndefinedEstimateError(
            f"cohort {cohort!r} has weight {pi[cohort_index]:.3g} in the {target} mix but no "
            f"measured units in arm {arm!r}, so the re-weighted estimate is undefined; exclude "
            "the cohort or choose another target", cohort=cohort, arm=arm)

    z = float(stats.norm.ppf(0.5 + confidence / 2))
    arm_n = n.sum(axis=1)
    naive_mean = total.sum(axis=1) / arm_n
    naive_var = np.where(arm_n > 1, (total_sq.sum(axis=1) - total.sum(axis=1) ** 2 / arm_n)
                         / np.maximum(arm_n - 1, 1), 0.0) / arm_n
    filled = np.where(n > 0, means, 0.0)
    adjusted_mean = (pi[None, :] * filled).sum(axis=1)
    with np.errstate(divide="ignore", invalid="ignore"):
        adjusted_var = (pi[None, :] ** 2 * np.where(n > 0, variances / np.where(n > 0, n, 1),
                                                    0.0)).sum(axis=1)
    shares = n / arm_n[:, None]

    comparisons = []
    for a in range(1, len(arms)):
        naive = _estimate(naive_mean[0], naive_mean[a], naive_var[0], naive_var[a], z)
        adjusted = _estimate(adjusted_mean[0], adjusted_mean[a], adjusted_var[0],
                             adjusted_var[a], z)
        composition, within = _kitagawa(shares[a], shares[0], means[a], means[0])
        comparisons.append(Comparison(arms[a], naive, adjusted, composition, within))
        if np.sign(naive.difference) != np.sign(adjusted.difference) and naive.difference:
            caveats.append(f"For {arms[a]} the naive and re-weighted differences have opposite "
                           "signs: the cohort mix, not the treatment, drives the naive reading.")
    small = [names[c] for c in range(len(names)) if pi[c] > 0 and (n[:, c] < SMALL_COHORT).any()]
    if small:
        caveats.append(f"Cohorts with fewer than {SMALL_COHORT} measured units in some arm carry "
                       f"weight ({', '.join(small[:5])}): their variance estimates are rough.")
    caveats.append("Intervals treat the target weights as fixed and use the normal "
                   f"approximation at {100 * confidence:g}%.")
    cohorts = tuple(Cohort(name, float(pi[c]), {arm: int(n[i, c]) for i, arm in enumerate(arms)},
                           {arm: _json(means[i, c]) for i, arm in enumerate(arms)})
                    for c, name in enumerate(names))
    return Reweighting(metric, target, by, tuple(comparisons), cohorts, tuple(caveats))


def _target_weights(target: str, weights: Mapping[str, float] | None, names: list[str],
                    n: np.ndarray, *, flagged_days_given: bool, window_cohorts: np.ndarray | None,
                    table_flagged: np.ndarray, window: np.ndarray, by: tuple[str, ...],
                    caveats: list[str]) -> np.ndarray:
    if target != "custom" and weights:
        raise InputError([Problem("weights", "weights are only given with target 'custom'")])
    if target == "reference_arm":
        return n[0] / n[0].sum()
    if target == "pooled_unflagged":
        if not flagged_days_given:
            caveats.append("No days are flagged, so the pooled mix covers every day.")
        if by == ("source",):
            mix = _pooled_by_source(table_flagged, window)
        else:
            mix = np.where(window_cohorts, 0.0, n.sum(axis=0))
        if mix.sum() <= 0:
            raise InputError([Problem("target", "no measured units on unflagged days")])
        return mix / mix.sum()
    if not weights:
        raise InputError([Problem("weights", "target 'custom' needs weights {cohort: w}")])
    unknown = sorted(set(weights) - set(names))
    if unknown:
        raise InputError([Problem("weights", f"unknown cohort(s) {unknown}; cohorts are {names}")])
    values = np.array([float(weights.get(name, 0.0)) for name in names])
    if not np.isfinite(values).all() or (values < 0).any() or values.sum() <= 0:
        raise InputError([Problem("weights", "weights must be finite, >= 0 and not all 0")])
    return values / values.sum()


def _pooled_by_source(cube: np.ndarray, window: np.ndarray) -> np.ndarray:
    """Measured units per source cohort, all arms pooled, on unflagged days; in cohort order
    (the kept sources that have measured units at all)."""
    per_source = cube[~window].sum(axis=(0, 1))[:, 0]
    present = cube.sum(axis=(0, 1))[:, 0] > 0
    return per_source[present]


def _estimate(ref_mean: float, arm_mean: float, ref_var: float, arm_var: float,
              z: float) -> Estimate:
    difference = arm_mean - ref_mean
    se = float(np.sqrt(ref_var + arm_var))
    if ref_mean != 0:
        relative = difference / ref_mean
        rel_se = float(np.sqrt(arm_var / ref_mean**2 + arm_mean**2 * ref_var / ref_mean**4))
        rel = (relative, relative - z * rel_se, relative + z * rel_se)
    else:
        rel = (None, None, None)
    return Estimate(float(ref_mean), float(arm_mean), float(difference),
                    float(difference - z * se), float(difference + z * se), *rel)


def _kitagawa(p_arm: np.ndarray, p_ref: np.ndarray, m_arm: np.ndarray, m_ref: np.ndarray
              ) -> tuple[float, float]:
    """Composition and within-cohort parts of the naive gap; a cohort absent in one arm takes
    the other arm's mean, so its within part is 0 and its composition part carries it."""
    m_arm = np.where(np.isnan(m_arm), m_ref, m_arm)
    m_ref = np.where(np.isnan(m_ref), m_arm, m_ref)
    m_arm, m_ref = np.nan_to_num(m_arm), np.nan_to_num(m_ref)
    composition = float(((p_arm - p_ref) * (m_arm + m_ref) / 2).sum())
    within = float(((m_arm - m_ref) * (p_arm + p_ref) / 2).sum())
    return composition, within


def _json(value: float | None) -> float | None:
    if value is None:
        return None
    value = float(value)
    return value if np.isfinite(value) else None
