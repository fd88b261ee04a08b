"""The demo scenario's documents, computed once per test process: the diagnosis, the daily
series and the re-weighted effect, JSON-safe as the service stores them (no database)."""

from __future__ import annotations

import functools
from dataclasses import dataclass
from typing import Any

import pandas as pd

from detectors import AllocationSchedule, ObservationTable, daily_series, diagnose, reweight
from service.demo import scenario
from service.http import json_safe


@dataclass(frozen=True)
class DemoDocuments:
    diagnosis: dict[str, Any]
    series: dict[str, Any]
    effect: dict[str, Any]


@functools.cache
def demo_documents() -> DemoDocuments:
    frame = pd.read_csv(scenario.CSV_PATH)
    table = ObservationTable.from_frame(frame, list(scenario.ARMS))
    schedule = AllocationSchedule.constant(list(scenario.ARMS))
    diagnosis = diagnose(table, schedule, experiment=scenario.EXPERIMENT_ID)
    effect = reweight(table, "routes_saved", target="reference_arm", by=("source", "window"),
                      flagged_dates=list(diagnosis.alert_days))
    return DemoDocuments(json_safe(diagnosis.to_dict()),
                         json_safe(daily_series(table, schedule, diagnosis)),
                         json_safe(effect.to_dict()))
