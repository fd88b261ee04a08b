"""The daily series as a CSV file: what the status page and the HTML report offer for download.

One row per day and arm: units entered, planned and observed share, the day's flag, the units
per entry source and the entrants' mean of every metric. Built from the series document the
API serves (``detectors.series.daily_series``), so the file matches the charts exactly.
"""

from __future__ import annotations

import csv
import io
from collections.abc import Mapping
from typing import Any


def series_csv(series: Mapping[str, Any]) -> str:
    """The series document as CSV text (header first, ``\\r\\n`` line ends as RFC 4180 has).

    Example: a day with arms ``a`` and ``b`` and one source gives the header
    ``date,arm,entered,planned_share,observed_share,flag,entered_organic`` and two rows.
    """
    arms = list(series.get("arms", []))
    sources = list(series.get("sources", []))
    metrics = list(series.get("metrics", []))
    buffer = io.StringIO()
    writer = csv.writer(buffer, lineterminator="\r\n")
    writer.writerow(["date", "arm", "entered", "planned_share", "observed_share", "flag",
                     *(f"entered_{s['source']}" for s in sources),
                     *(f"mean_{m}" for m in metrics)])
    for i, day in enumerate(series.get("days", [])):
        for arm in arms:
            cell = day["arms"][arm]
            engagement = cell.get("engagement", {})
            writer.writerow([day["date"], arm, cell["entered"], cell["expected_share"],
                             _blank(cell["observed_share"]),
                             (day.get("severity") or "") if day.get("flagged") else "",
                             *(s["entered"][arm][i] for s in sources),
                             *(_blank(engagement.get(m)) for m in metrics)])
    return buffer.getvalue()


def _blank(value: Any) -> Any:
    return "" if value is None else value
