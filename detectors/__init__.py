"""Inrush's statistics: pure functions and frozen results, no I/O.

The main entry points are :func:`diagnose` (everything at once), :func:`reweight`
(post-stratified effect estimates) and :func:`daily_series` (what a dashboard plots).
"""

from .allocation import AllocationSchedule
from .data import UNATTRIBUTED, ObservationTable
from .diagnose import Diagnosis, DiagnosisConfig, Finding, FlaggedDay, diagnose
from .errors import InputError, Problem, UndefinedEstimateError
from .reweight import reweight
from .series import daily_series

__all__ = [
    "UNATTRIBUTED",
    "AllocationSchedule",
    "Diagnosis",
    "DiagnosisConfig",
    "Finding",
    "FlaggedDay",
    "InputError",
    "ObservationTable",
    "Problem",
    "UndefinedEstimateError",
    "daily_series",
    "diagnose",
    "reweight",
]
