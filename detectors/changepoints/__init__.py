"""Changepoint detection (PELT) on arm shares and entrant engagement.

Example:
    >>> import numpy as np
    >>> dates = np.arange("2026-03-01", "2026-03-08", dtype="datetime64[D]")
    >>> share_changepoints(np.full((7, 2), 500), np.full((7, 2), 0.5), dates, ["control", "cards"])
    ()
"""

from .base import (
    ChangepointConfig,
    EngagementChangepoint,
    SegmentCost,
    ShareChangepoint,
    information_penalty,
)
from .costs import GaussianGapCost, GaussianMeanCost, MultinomialShareCost, engagement_gap
from .detect import engagement_changepoints, share_changepoints
from .pelt import VectorisedPelt, breakpoints

__all__ = [
    "ChangepointConfig",
    "EngagementChangepoint",
    "GaussianGapCost",
    "GaussianMeanCost",
    "MultinomialShareCost",
    "SegmentCost",
    "ShareChangepoint",
    "VectorisedPelt",
    "breakpoints",
    "engagement_changepoints",
    "engagement_gap",
    "information_penalty",
    "share_changepoints",
]
