"""The body of an alert notification, built from the alert and the latest diagnosis document.

Shape (Standard Webhooks' recommended envelope ``{type, timestamp, data}``)::

    {"type": "alert.opened" | "alert.resolved", "id": EVENT_ID, "timestamp": ISO-8601,
     "data": {"experiment": {"id", "title"},
              "alert": {"id", "kind", "key", "status", "severity", "title", "opened_at",
                        "resolved_at", "resolved_by", "resolution_reason"},
              "flagged": sentence, "days": [ISO dates], "inflow_arm": arm | null,
              "excess": {arm: units}, "sources": [{"source", "excess", "share_of_excess"}],
              "diagnosis": {"version", "status", "as_of", "srm_p_value",
                            "sequential_p_value"} | null,
              "advice": [text], "cautions": [text],
              "links": {"diagnosis", "alert", "status_page"}}}

The event id is fixed when the event is queued, so every retry carries the same id (and the
same ``webhook-id`` header) and receivers can drop duplicates.
"""

from __future__ import annotations

from collections.abc import Mapping, Sequence
from typing import Any

OPENED, RESOLVED = "alert.opened", "alert.resolved"
EVENT_TYPES = (OPENED, RESOLVED)

SHIFT_CAUTION = (
    "A shift of the arm ratio means something outside the randomisation moved units into one "
    "arm; comparisons of the arms over the affected days are not randomised comparisons. "
    "Re-weighting by entry cohort (POST .../reweight) answers a different question and is not "
    "a randomised estimate.")


def event_id(alert_id: int, transition_id: int) -> str:
    """The id of the notification of one alert transition (stable across retries)."""
    return f"inrush-alert-{alert_id}-t{transition_id}"


def links(experiment_id: str, alert_id: int, public_url: str | None) -> dict[str, str]:
    """Links back to the API and the status page (absolute when ``public_url`` is set)."""
    base = (public_url or "").rstrip("/")
    return {"diagnosis": f"{base}/v1/experiments/{experiment_id}/diagnosis",
            "alert": f"{base}/v1/alerts/{alert_id}",
            "status_page": f"{base}/experiments/{experiment_id}"}


def affected_days(alert: Mapping[str, Any], document: Mapping[str, Any] | None
                  ) -> list[dict[str, Any]]:
    """The flagged-day entries that the alert is about.

    A skewed day: that day (from the document, else from the alert's own detail). The overall
    mismatch: every alert-level day. A skewed source: the alert-level days whose excess that
    source helps explain. A changepoint: no flagged day, its date is in ``days`` instead.
    """
    flagged = list((document or {}).get("flagged_days", []))
    kind, key = alert.get("kind"), alert.get("key")
    if kind == "skewed_day":
        found = [d for d in flagged if d.get("date") == key]
        if found:
            return found
        detail = alert.get("detail") or {}
        return [dict(detail)] if detail.get("date") else []
    alert_level = [d for d in flagged if d.get("severity") == "alert"]
    if kind == "srm":
        return alert_level
    if kind == "skewed_source":
        return [d for d in alert_level
                if any(s.get("source") == key for s in d.get("sources", []))]
    return []


def summarise_excess(days: Sequence[Mapping[str, Any]]) -> dict[str, Any]:
    """Excess units per arm summed over ``days``, the inflow arm, and the sources behind it.

    A source's share is its part of the summed excess of the inflow arm (its units are added
    over the days, so a large day weighs more than a small one).
    """
    excess: dict[str, float] = {}
    by_source: dict[str, float] = {}
    arms: dict[str, int] = {}
    for day in days:
        for arm, units in (day.get("excess") or {}).items():
            excess[arm] = excess.get(arm, 0.0) + float(units or 0.0)
        if day.get("inflow_arm"):
            arms[day["inflow_arm"]] = arms.get(day["inflow_arm"], 0) + 1
        for source in day.get("sources", []):
            units = source.get("excess")
            if units is None:  # older documents carry only the share
                units = float(source.get("share_of_excess") or 0.0) * float(
                    (day.get("excess") or {}).get(day.get("inflow_arm"), 0.0))
            by_source[source["source"]] = by_source.get(source["source"], 0.0) + float(units)
    inflow_arm = max(arms, key=lambda a: (arms[a], excess.get(a, 0.0))) if arms else None
    total = sum(by_source.values())
    sources = [{"source": name, "excess": round(units, 1),
                "share_of_excess": round(units / total, 4) if total > 0 else None}
               for name, units in sorted(by_source.items(), key=lambda kv: -kv[1])]
    return {"inflow_arm": inflow_arm, "excess": {a: round(u, 1) for a, u in excess.items()},
            "sources": sources}


def describe(event_type: str, alert: Mapping[str, Any], summary: Mapping[str, Any],
             days: Sequence[str]) -> str:
    """One sentence for a human reading the notification."""
    title = str(alert.get("title") or f"{alert.get('kind')} {alert.get('key')}")
    if event_type == RESOLVED:
        reason = alert.get("resolution_reason")
        return f"Resolved: {title}" + (f" ({reason})" if reason else "")
    text = title
    arm = summary.get("inflow_arm")
    if arm and days:
        units = (summary.get("excess") or {}).get(arm)
        top = summary.get("sources") or []
        span = days[0] if len(days) == 1 else f"{len(days)} days from {days[0]} to {days[-1]}"
        text += f". Over {span}, {arm} got {units:+.0f} units over plan"
        if top and top[0].get("share_of_excess") is not None:
            text += (f"; {top[0]['source']} explains {100 * top[0]['share_of_excess']:.0f}% "
                     "of the excess")
    return text + "."


def build_payload(*, event_type: str, event_id: str, occurred_at: str,
                  experiment: Mapping[str, Any], alert: Mapping[str, Any],
                  document: Mapping[str, Any] | None, diagnosis_version: int | None,
                  public_url: str | None) -> dict[str, Any]:
    """The notification body (JSON-safe).

    ``alert`` needs ``id, kind, key, status, severity, title, detail`` and the lifecycle times;
    ``document`` is the latest diagnosis document (``None`` before any unit entered).
    """
    if event_type not in EVENT_TYPES:
        raise ValueError(f"unknown event type {event_type!r}; use {', '.join(EVENT_TYPES)}")
    days = affected_days(alert, document)
    summary = summarise_excess(days)
    dates = sorted(str(d["date"]) for d in days if d.get("date"))
    if not dates and alert.get("kind") in ("share_changepoint", "engagement_changepoint"):
        when = (alert.get("detail") or {}).get("date")
        dates = [str(when)] if when else []
    srm = (document or {}).get("srm") or {}
    diagnosis = None if document is None else {
        "version": diagnosis_version, "status": document.get("status"),
        "as_of": document.get("as_of"), "srm_p_value": srm.get("p_value"),
        "sequential_p_value": srm.get("sequential_p_value")}
    alert_part = {name: alert.get(name) for name in (
        "id", "kind", "key", "status", "severity", "title", "opened_at", "resolved_at",
        "resolved_by", "resolution_reason")}
    return {
        "type": event_type,
        "id": event_id,
        "timestamp": occurred_at,
        "data": {
            "experiment": {"id": experiment["id"], "title": experiment.get("title")},
            "alert": alert_part,
            "flagged": describe(event_type, alert, summary, dates),
            "days": dates,
            "inflow_arm": summary["inflow_arm"],
            "excess": summary["excess"],
            "sources": summary["sources"],
            "diagnosis": diagnosis,
            "advice": list((document or {}).get("advice", [])),
            "cautions": [SHIFT_CAUTION] if event_type == OPENED else [],
            "links": links(str(experiment["id"]), int(alert["id"]), public_url),
        },
    }
