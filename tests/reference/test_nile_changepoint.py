"""PELT with a Gaussian mean-shift cost on the annual Nile flow at Aswan, 1871-1970.

Source: the data set ships with statsmodels (``statsmodels.datasets.nile``); Cobb (1978), "The
problem of the Nile: conditional solution to a changepoint problem", Biometrika 65:243-251,
places the change in mean flow at 1898.
"""

from __future__ import annotations

import numpy as np
import ruptures as rpt
from statsmodels.datasets import nile

from detectors.changepoints import GaussianMeanCost, breakpoints, information_penalty


def _flow() -> tuple[np.ndarray, np.ndarray]:
    data = nile.load_pandas().data
    return data["year"].to_numpy(int), data["volume"].to_numpy(float)


def test_nile_change_is_found_within_a_year_of_1898() -> None:
    years, volume = _flow()
    assert (years[0], years[-1], len(years)) == (1871, 1970, 100)
    # BIC on n = number of years, one parameter (the mean) per segment.
    ends = breakpoints(GaussianMeanCost(), volume, information_penalty(1, len(volume)))
    assert len(ends) == 2  # one change, then the end of the series
    first_year_after = int(years[ends[0]])
    # Cobb (1978): change at 1898; the first year of the new regime is then 1898 or 1899.
    assert abs(first_year_after - 1898) <= 1


def test_nile_agrees_with_ruptures_own_least_squares_cost() -> None:
    # Reference: ruptures' CostL2 with the penalty rescaled by the same robust variance.
    _, volume = _flow()
    cost = GaussianMeanCost()
    penalty = information_penalty(1, len(volume))
    ours = breakpoints(cost, volume, penalty)
    stock = rpt.Pelt(model="l2", min_size=1, jump=1).fit(volume).predict(
        pen=penalty * cost.sigma**2)
    assert ours == stock
