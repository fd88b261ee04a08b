"""The body of an incident notification: the incident first, then the detail.

Shape (Standard Webhooks' recommended envelope ``{type, timestamp, data}``)::

    {"type": "incident.opened" | "incident.updated" | "incident.resolved", "id": EVENT_ID,
     "timestamp": ISO-8601,
     "data": {"headline": sentence,
              "incident": {"id", "experiment", "status", "shape", "arm", "start", "end",
                           "days": [ISO dates], "units", "units_meaning",
                           "sources": [{"source", "share", "units"}], "campaigns": [name],
                           "explained_by": sentence | null, "advice": [text],
                           "severity", "material", "summary", "opened_at",
                           "acknowledged_at", "resolved_at", "resolution"},
              "changes": {field: [before, after]} | null,   (incident.updated only)
              "experiment": {"id", "title"},
              "detail": {"daily": [{"date", "units"}], "p_value", "detected_by", "impact",
                         "observed_weights", "planned_weights", "context",
                         "evidence": [{"kind", "key", "severity", "title"}]},
              "diagnosis": {"version", "status", "as_of", "srm_p_value",
                            "sequential_p_value"} | null,
              "cautions": [text],
              "links": {"diagnosis", "incident", "status_page"}}}

One notification per incident transition, never one per finding. The event id is fixed when
the event is queued, so every retry carries the same id (and the same ``webhook-id`` header)
and receivers can drop duplicates.
"""

from __future__ import annotations

from collections.abc import Mapping
from typing import Any

OPENED, UPDATED, RESOLVED = "incident.opened", "incident.updated", "incident.resolved"
EVENT_TYPES = (OPENED, UPDATED, RESOLVED)

SHIFT_CAUTION = (
    "A shift of the arm ratio means something outside the randomisation moved units into or "
    "out of one arm; comparisons of the arms over the affected days are not randomised "
    "comparisons. Re-weighting by entry cohort (POST .../reweight) answers a different "
    "question and is not a randomised estimate.")

# The incident's leading fields, in the order a reader needs them.
LEAD = ("id", "experiment", "status", "shape", "arm", "start", "end", "days", "units",
        "units_meaning", "sources", "campaigns", "explained_by", "advice", "severity",
        "material", "summary", "opened_at", "acknowledged_at", "resolved_at", "resolution")
DETAIL = ("daily", "p_value", "detected_by", "impact", "observed_weights", "planned_weights",
          "context")


def event_id(incident_id: int, transition_id: int) -> str:
    """The id of the notification of one incident transition (stable across retries)."""
    return f"inrush-incident-{incident_id}-t{transition_id}"


def links(experiment_id: str, incident_id: int, public_url: str | None) -> dict[str, str]:
    """Links back to the API and the status page (absolute when ``public_url`` is set)."""
    base = (public_url or "").rstrip("/")
    return {"diagnosis": f"{base}/v1/experiments/{experiment_id}/diagnosis",
            "incident": f"{base}/v1/incidents/{incident_id}",
            "status_page": f"{base}/experiments/{experiment_id}"}


def _span(incident: Mapping[str, Any]) -> str:
    start, end = incident.get("start"), incident.get("end")
    return str(start) if start == end else f"{start} to {end}"


def headline(event_type: str, incident: Mapping[str, Any],
             changes: Mapping[str, Any] | None = None) -> str:
    """One sentence for a human reading the notification, built from the incident's figure."""
    shape = str(incident.get("shape") or "imbalance").replace("_", " ")
    units = float(incident.get("units") or 0.0)
    text = (f"{shape.capitalize()} in {incident.get('arm')} on {_span(incident)}: "
            f"{abs(units):.0f} units {'over' if units >= 0 else 'under'} plan")
    sources = [s for s in incident.get("sources") or [] if s.get("share") is not None]
    if sources:
        text += f", {100 * float(sources[0]['share']):.0f}% via {sources[0]['source']}"
    if incident.get("campaigns"):
        text += f" (campaign: {', '.join(incident['campaigns'])})"
    if event_type == RESOLVED:
        return f"Resolved: {text}. {incident.get('resolution') or ''}".strip()
    if event_type == UPDATED and changes:
        return f"Updated ({', '.join(sorted(changes))}): {text}."
    return text + "."


def build_payload(*, event_type: str, event_id: str, occurred_at: str,
                  experiment: Mapping[str, Any], incident: Mapping[str, Any],
                  changes: Mapping[str, Any] | None, document: Mapping[str, Any] | None,
                  diagnosis_version: int | None, public_url: str | None) -> dict[str, Any]:
    """The notification body (JSON-safe).

    ``incident`` is the INCIDENT document (``service.incidents.incident_document``);
    ``changes`` what an update changed; ``document`` the latest diagnosis document.
    """
    if event_type not in EVENT_TYPES:
        raise ValueError(f"unknown event type {event_type!r}; use {', '.join(EVENT_TYPES)}")
    lead = {name: incident.get(name) for name in LEAD}
    lead["days"] = [str(d.get("date")) for d in incident.get("daily") or []]
    detail = {name: incident.get(name) for name in DETAIL}
    detail["evidence"] = [{name: e.get(name) for name in ("kind", "key", "severity", "title")}
                          for e in incident.get("evidence") or []]
    srm = (document or {}).get("srm") or {}
    diagnosis = None if document is None else {
        "version": diagnosis_version, "status": document.get("status"),
        "as_of": document.get("as_of"), "srm_p_value": srm.get("p_value"),
        "sequential_p_value": srm.get("sequential_p_value")}
    return {
        "type": event_type,
        "id": event_id,
        "timestamp": occurred_at,
        "data": {
            "headline": headline(event_type, incident, changes),
            "incident": lead,
            "changes": dict(changes) if event_type == UPDATED and changes else None,
            "experiment": {"id": experiment["id"], "title": experiment.get("title")},
            "detail": detail,
            "diagnosis": diagnosis,
            "cautions": [SHIFT_CAUTION] if event_type != RESOLVED else [],
            "links": links(str(experiment["id"]), int(incident["id"]), public_url),
        },
    }
