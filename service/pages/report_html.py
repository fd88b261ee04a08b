"""``inrush analyze --html FILE``: the status page's content as one self-contained HTML file.

The file holds everything it shows: styles, the charting library and ``status.js`` inline, the
series as a JSON block, the server-drawn SVG charts as the fallback without JavaScript, and the
series CSV as a ``data:`` link. It refers to nothing outside itself, so it can be attached to a
review and opened anywhere, offline.
"""

from __future__ import annotations

import base64
import datetime as dt
import os
import tempfile
from collections.abc import Mapping, Sequence
from importlib.metadata import PackageNotFoundError, version
from pathlib import Path
from typing import TYPE_CHECKING, Any

from markupsafe import Markup

from .assets import SCRIPTS, STYLESHEETS, asset
from .export import series_csv
from .render import environment, experiment_context

if TYPE_CHECKING:
    from detectors import AllocationSchedule, Diagnosis, ObservationTable

LICENCES = {"uPlot.iife.min.js": "uPlot.LICENSE"}
EffectAnswers = Mapping[str, tuple[Mapping[str, Any] | None, str | None]]


def render_report(*, experiment: Mapping[str, Any], diagnosis: Mapping[str, Any],
                  series: Mapping[str, Any], effects: EffectAnswers,
                  sensitivity: Mapping[str, Any] | None = None,
                  campaigns: Sequence[Mapping[str, Any]] = (),
                  source_name: str = "", written_at: dt.datetime | None = None) -> str:
    """The report's HTML. ``effects``: per metric, a reweight answer or why there is none."""
    written_at = written_at or dt.datetime.now(dt.UTC)
    context = experiment_context(
        experiment=experiment, diagnosis=diagnosis, series=series, alerts=(),
        effects=effects, campaigns=campaigns, sensitivity=sensitivity, metric=None,
        refreshed_at=written_at.isoformat(), diagnosis_version=None, mode="report")
    csv_bytes = series_csv(series).encode("utf-8")
    context.update(
        csv_href="data:text/csv;charset=utf-8;base64," + base64.b64encode(csv_bytes).decode(),
        # Shipped files, not user text: inlined as they are.
        inline_css=Markup("\n".join(asset(name).text for name in STYLESHEETS)),
        inline_scripts=[_inline_script(_with_licence(name)) for name in SCRIPTS],
        written_at=written_at.isoformat(), source_name=source_name,
        version_text=_version(), links={})
    return environment().get_template("report.html").render(**context)


def analysis_report(table: ObservationTable, schedule: AllocationSchedule, result: Diagnosis,
                    document: Mapping[str, Any], *, name: str) -> str:
    """The report of an offline analysis: the series and, per metric, the honest default
    effect with its bounds (as the status page shows it)."""
    from detectors import InputError, daily_series
    from detectors.contamination import cells_from_document
    from detectors.errors import UndefinedEstimateError
    from detectors.honest import default_effect

    from ..http import json_safe

    series = json_safe(daily_series(table, schedule, result))
    effects: dict[str, tuple[dict[str, Any] | None, str | None]] = {}
    for metric in table.metrics:
        try:
            answer = default_effect(table, metric, cells_from_document(document), schedule,
                                    incidents=len(document.get("incidents") or ()))
            effects[metric] = (json_safe(answer), None)
        except (UndefinedEstimateError, InputError) as error:
            effects[metric] = (None, f"The re-weighted estimate is undefined: {error}")
    dates = series.get("dates") or [None]
    experiment = {"id": name, "title": name, "arms": list(table.arms),
                  "start_date": dates[0] or "–"}
    return render_report(experiment=experiment, diagnosis=document, series=series,
                         effects=effects, sensitivity=document.get("sensitivity"),
                         source_name=name)


def write_report(path: Path, html: str) -> None:
    """Write ``html`` to ``path`` whole or not at all (a temporary file, then a rename)."""
    directory = path.resolve().parent
    handle, temporary = tempfile.mkstemp(prefix=".inrush-report-", suffix=".html",
                                         dir=directory)
    try:
        with os.fdopen(handle, "w", encoding="utf-8") as file:
            file.write(html)
        umask = os.umask(0)
        os.umask(umask)
        os.chmod(temporary, 0o666 & ~umask)  # as an ordinary new file, not mkstemp's 0600
        os.replace(temporary, path)
    except BaseException:
        Path(temporary).unlink(missing_ok=True)
        raise


def _with_licence(name: str) -> str:
    """A shipped script; the vendored library with its licence notice, as MIT asks."""
    licence = LICENCES.get(name)
    if licence is None:
        return asset(name).text
    return f"/*! {asset(licence).text.strip()} */\n{asset(name).text}"


def _inline_script(code: str) -> Markup:
    # "</script" would end the element early; neither shipped file contains it.
    if "</script" in code.lower():
        raise ValueError("a script to inline contains '</script'")
    return Markup(code)


def _version() -> str:
    try:
        return version("inrush")
    except PackageNotFoundError:
        return "(development)"
