"""Entry-source stratification: which sources carry the mismatch, and how much of the excess.

Per source, a chi-square goodness of fit against the plan (Holm across sources); across
sources, the source x arm chi-square test of independence (as ``scipy.stats.chi2_contingency``);
per day and arm, the excess ``observed - expected`` split exactly by source.
"""

from __future__ import annotations

from collections.abc import Sequence
from dataclasses import dataclass

import numpy as np
from scipy import special

from .multiplicity import holm_adjust
from .sequential import DEFAULT_CONCENTRATION, sequential_srm
from .srm import chisquare_rows


@dataclass(frozen=True, slots=True)
class SourceFit:
    """Goodness of fit of one source's arm counts against the plan."""

    source: str
    observed: np.ndarray
    expected: np.ndarray
    statistic: float
    p_value: float
    adjusted_p_value: float
    sequential_p_value: float
    adjusted_sequential_p_value: float
    skewed: bool


@dataclass(frozen=True, slots=True)
class IndependenceTest:
    """Source x arm chi-square test of independence (NaN when fewer than two sources)."""

    statistic: float
    p_value: float
    dof: int


@dataclass(frozen=True, slots=True)
class SourceShare:
    """A source's part of an arm's excess units over some days."""

    source: str
    excess: float
    share_of_excess: float


def expected_by_source(entered: np.ndarray, planned: np.ndarray) -> np.ndarray:
    """Expected units per (day, arm, source): each source's daily total split by the plan."""
    return entered.sum(axis=1, keepdims=True) * planned[:, :, None]


def excess_by_source(entered: np.ndarray, planned: np.ndarray) -> np.ndarray:
    """Observed minus expected units per (day, arm, source); sums over sources to the day's
    excess per arm exactly."""
    return entered - expected_by_source(entered, planned)


def source_fits(entered: np.ndarray, planned: np.ndarray, sources: Sequence[str], *,
                alpha: float = 0.0005, concentration: float = DEFAULT_CONCENTRATION
                ) -> tuple[SourceFit, ...]:
    """Per-source goodness of fit over the whole period, Holm-adjusted across sources.

    Two p-values per source: the Pearson chi-square of the period's counts (shown), and the
    anytime-valid Dirichlet-multinomial p-value of Lindon & Malek (2022) over the source's daily
    counts, which decides ``skewed``: a source is re-tested every day, and only the anytime-valid
    test keeps its false alarm rate under that repeated reading.

    Example:
        >>> entered = np.array([[[500, 100], [500, 260]]])      # 1 day, 2 arms, 2 sources
        >>> fits = source_fits(entered, np.full((1, 2), 0.5), ["organic", "push"])
        >>> [(f.source, f.skewed) for f in fits]
        [('organic', False), ('push', True)]
    """
    observed = entered.sum(axis=0).T.astype(float)                  # (sources, arms)
    expected = expected_by_source(entered, planned).sum(axis=0).T   # (sources, arms)
    statistic, p_value = chisquare_rows(observed, expected)
    adjusted = holm_adjust(p_value)
    sequential = np.array([  # one short pass per source (sources are few)
        sequential_srm(entered[:, :, i], planned, concentration).final_p_value
        if observed[i].sum() > 0 else np.nan for i in range(len(sources))])
    adjusted_sequential = np.nan_to_num(holm_adjust(sequential), nan=1.0)
    return tuple(
        SourceFit(source, observed[i], expected[i], float(statistic[i]),
                  float(np.nan_to_num(p_value[i], nan=1.0)),
                  float(np.nan_to_num(adjusted[i], nan=1.0)),
                  float(np.nan_to_num(sequential[i], nan=1.0)),
                  float(adjusted_sequential[i]),
                  bool(adjusted_sequential[i] < alpha))
        for i, source in enumerate(sources))


def independence_test(entered: np.ndarray) -> IndependenceTest:
    """Source x arm test of independence on the whole period's counts.

    Pearson chi-square, as ``scipy.stats.chi2_contingency`` without continuity correction. Only
    meaningful when the allocation is constant; under a ramp, sources whose traffic is timed
    differently legitimately differ in arm mix.

    Example:
        >>> t = independence_test(np.array([[[90, 10], [110, 30]]]))
        >>> t.dof
        1
    """
    table = entered.sum(axis=0).T                     # (sources, arms)
    table = table[table.sum(axis=1) > 0]
    table = table[:, table.sum(axis=0) > 0]
    if table.shape[0] < 2 or table.shape[1] < 2:
        return IndependenceTest(float("nan"), float("nan"), 0)
    table = table.astype(float)
    expected = np.outer(table.sum(axis=1), table.sum(axis=0)) / table.sum()
    statistic = float(((table - expected) ** 2 / expected).sum())
    dof = (table.shape[0] - 1) * (table.shape[1] - 1)
    return IndependenceTest(statistic, float(special.chdtrc(dof, statistic)), dof)


def attribute_excess(excess: np.ndarray, arm: int, sources: Sequence[str]
                     ) -> tuple[SourceShare, ...]:
    """Split one arm's excess over the given days (``excess``: days x arms x sources) by source.

    Shares are over the sources that add units (positive excess) and sum to 1; sources that
    fell short of plan are left out. Sorted by share, largest first.

    Example:
        >>> ex = np.array([[[-5.0, 5.0], [2.0, 198.0]]])
        >>> [(s.source, round(s.share_of_excess, 2)) for s in attribute_excess(ex, 1, ["o", "p"])]
        [('p', 0.99), ('o', 0.01)]
    """
    per_source = excess[:, arm, :].sum(axis=0)
    positive = np.clip(per_source, 0.0, None)
    total = positive.sum()
    if total <= 0:
        return ()
    order = np.argsort(-positive, kind="stable")
    return tuple(SourceShare(sources[i], float(per_source[i]), float(positive[i] / total))
                 for i in order if positive[i] > 0)
