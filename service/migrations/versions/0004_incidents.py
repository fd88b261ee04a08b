"""Incidents: one stored episode per imbalance event, with the findings as its evidence.

Creates ``incidents`` and ``incident_events``, links findings (``alerts.incident_id``) and
notifications (``notify_outbox.incident_id``; ``alert_id`` becomes optional) to incidents,
adds the served tag of diagnosis snapshots, and carries the stored findings over: each
experiment's active findings are grouped into incidents (see :func:`_group`).

Revision ID: 0004
Revises: 0003
Create Date: 2026-12-02
"""

from __future__ import annotations

import datetime as dt
from collections import Counter
from collections.abc import Sequence
from typing import Any

import sqlalchemy as sa
from alembic import op
from sqlalchemy.dialects import postgresql

revision: str = "0004"
down_revision: str | None = "0003"
branch_labels: str | Sequence[str] | None = None
depends_on: str | Sequence[str] | None = None

JSON = sa.JSON().with_variant(postgresql.JSONB(), "postgresql")
BIG_ID = sa.BigInteger().with_variant(sa.Integer(), "sqlite")
SYSTEM_ACTOR = "inrush"
CARRIED = "carried over from the findings stored before incidents were kept"


def _when() -> sa.DateTime:
    return sa.DateTime(timezone=True)


def upgrade() -> None:
    op.create_table(
        "incidents",
        sa.Column("id", BIG_ID, autoincrement=True, nullable=False),
        sa.Column("experiment_id", sa.String(64), nullable=False),
        sa.Column("shape", sa.String(24), nullable=False),
        sa.Column("arm", sa.String(64), nullable=False),
        sa.Column("start_date", sa.Date(), nullable=False),
        sa.Column("end_date", sa.Date(), nullable=False),
        sa.Column("units", sa.Float(), nullable=False),
        sa.Column("severity", sa.String(16), nullable=False),
        sa.Column("material", sa.Boolean(), nullable=False),
        sa.Column("status", sa.String(16), nullable=False),
        sa.Column("active", sa.Boolean(), nullable=False),
        sa.Column("episode", JSON, nullable=False),
        sa.Column("diagnosis_version", sa.Integer(), nullable=True),
        sa.Column("position", sa.Integer(), nullable=True),
        sa.Column("opened_at", _when(), nullable=False),
        sa.Column("last_seen_at", _when(), nullable=False),
        sa.Column("acknowledged_at", _when(), nullable=True),
        sa.Column("acknowledged_by", sa.String(100), nullable=True),
        sa.Column("resolved_at", _when(), nullable=True),
        sa.Column("resolved_by", sa.String(100), nullable=True),
        sa.Column("resolution", sa.Text(), nullable=True),
        sa.Column("updated_at", _when(), nullable=False),
        sa.ForeignKeyConstraint(["experiment_id"], ["experiments.id"], ondelete="CASCADE",
                                name="fk_incidents_experiment_id_experiments"),
        sa.PrimaryKeyConstraint("id", name="pk_incidents"),
    )
    op.create_index("ix_incidents_experiment_id", "incidents", ["experiment_id"])
    op.create_index("ix_incidents_status_opened_at", "incidents", ["status", "opened_at"])
    op.create_table(
        "incident_events",
        sa.Column("id", BIG_ID, autoincrement=True, nullable=False),
        sa.Column("incident_id", BIG_ID, nullable=False),
        sa.Column("at", _when(), nullable=False),
        sa.Column("action", sa.String(16), nullable=False),
        sa.Column("from_status", sa.String(16), nullable=True),
        sa.Column("to_status", sa.String(16), nullable=False),
        sa.Column("actor", sa.String(100), nullable=False),
        sa.Column("note", sa.Text(), nullable=True),
        sa.Column("changes", JSON, nullable=True),
        sa.Column("diagnosis_version", sa.Integer(), nullable=True),
        sa.ForeignKeyConstraint(["incident_id"], ["incidents.id"], ondelete="CASCADE",
                                name="fk_incident_events_incident_id_incidents"),
        sa.PrimaryKeyConstraint("id", name="pk_incident_events"),
    )
    op.create_index("ix_incident_events_incident_id", "incident_events", ["incident_id"])

    sqlite = op.get_bind().dialect.name == "sqlite"
    op.add_column("diagnosis_snapshots", sa.Column("served_etag", sa.String(64), nullable=True))
    if sqlite:
        # SQLite adds a column with a foreign key in place; rebuilding ``alerts`` instead would
        # delete its events (the drop of a parent table cascades while foreign keys are on).
        op.execute("ALTER TABLE alerts ADD COLUMN incident_id INTEGER CONSTRAINT "
                   "fk_alerts_incident_id_incidents REFERENCES incidents (id)")
    else:
        op.add_column("alerts", sa.Column("incident_id", BIG_ID, nullable=True))
        op.create_foreign_key("fk_alerts_incident_id_incidents", "alerts", "incidents",
                              ["incident_id"], ["id"])
    op.create_index("ix_alerts_incident_id", "alerts", ["incident_id"])
    _outbox_per_incident(sqlite)
    _carry_over()


def _outbox_per_incident(sqlite: bool) -> None:
    """``notify_outbox.alert_id`` optional and ``incident_id`` added. SQLite rebuilds the table,
    whose drop would take the delivery attempts with it: they are kept aside and put back."""
    if sqlite:
        op.execute("CREATE TEMPORARY TABLE kept_attempts AS "
                   "SELECT * FROM notify_delivery_attempts")
    with op.batch_alter_table("notify_outbox") as batch:
        batch.alter_column("alert_id", existing_type=BIG_ID, nullable=True)
        batch.add_column(sa.Column("incident_id", BIG_ID, nullable=True))
        batch.create_foreign_key("fk_notify_outbox_incident_id_incidents", "incidents",
                                 ["incident_id"], ["id"], ondelete="CASCADE")
        batch.create_index("ix_notify_outbox_incident_id", ["incident_id"])
    if sqlite:
        op.execute("INSERT INTO notify_delivery_attempts SELECT * FROM kept_attempts "
                   "WHERE id NOT IN (SELECT id FROM notify_delivery_attempts)")
        op.execute("DROP TABLE kept_attempts")


_alerts = sa.table(
    "alerts", sa.column("id", BIG_ID), sa.column("experiment_id", sa.String),
    sa.column("incident_id", BIG_ID), sa.column("kind", sa.String), sa.column("key", sa.String),
    sa.column("status", sa.String), sa.column("severity", sa.String),
    sa.column("title", sa.String), sa.column("detail", JSON), sa.column("active", sa.Boolean),
    sa.column("opened_at", _when()), sa.column("last_seen_at", _when()),
    sa.column("acknowledged_at", _when()), sa.column("acknowledged_by", sa.String),
    sa.column("resolved_at", _when()), sa.column("resolved_by", sa.String),
    sa.column("resolution_reason", sa.Text))
_incidents = sa.table(
    "incidents", sa.column("id", BIG_ID), sa.column("experiment_id", sa.String),
    sa.column("shape", sa.String), sa.column("arm", sa.String),
    sa.column("start_date", sa.Date), sa.column("end_date", sa.Date),
    sa.column("units", sa.Float), sa.column("severity", sa.String),
    sa.column("material", sa.Boolean), sa.column("status", sa.String),
    sa.column("active", sa.Boolean), sa.column("episode", JSON),
    sa.column("diagnosis_version", sa.Integer), sa.column("position", sa.Integer),
    sa.column("opened_at", _when()), sa.column("last_seen_at", _when()),
    sa.column("acknowledged_at", _when()), sa.column("acknowledged_by", sa.String),
    sa.column("resolved_at", _when()), sa.column("resolved_by", sa.String),
    sa.column("resolution", sa.Text), sa.column("updated_at", _when()))
_events = sa.table(
    "incident_events", sa.column("incident_id", BIG_ID), sa.column("at", _when()),
    sa.column("action", sa.String), sa.column("from_status", sa.String),
    sa.column("to_status", sa.String), sa.column("actor", sa.String),
    sa.column("note", sa.Text), sa.column("diagnosis_version", sa.Integer))
_experiments = sa.table("experiments", sa.column("id", sa.String),
                        sa.column("start_date", sa.Date))
_snapshots = sa.table("diagnosis_snapshots", sa.column("experiment_id", sa.String),
                      sa.column("version", sa.Integer), sa.column("as_of", sa.Date))


def _carry_over() -> None:
    """Group each experiment's active findings into incidents and link them."""
    bind = op.get_bind()
    rows = [dict(r._mapping) for r in bind.execute(
        sa.select(_alerts).where(_alerts.c.active.is_(True)).order_by(_alerts.c.id))]
    by_experiment: dict[str, list[dict[str, Any]]] = {}
    for row in rows:
        by_experiment.setdefault(row["experiment_id"], []).append(row)
    for experiment_id, alerts in by_experiment.items():
        start = bind.execute(sa.select(_experiments.c.start_date)
                             .where(_experiments.c.id == experiment_id)).scalar_one()
        latest = bind.execute(
            sa.select(_snapshots.c.version, _snapshots.c.as_of)
            .where(_snapshots.c.experiment_id == experiment_id)
            .order_by(_snapshots.c.version.desc()).limit(1)).first()
        version, as_of = (latest[0], latest[1]) if latest else (None, None)
        for group in _group(alerts, start, as_of):
            _store(bind, experiment_id, group, version)


def _date(text: Any) -> dt.date | None:
    try:
        return dt.date.fromisoformat(str(text)[:10])
    except ValueError:
        return None


def _group(alerts: list[dict[str, Any]], start: dt.date, as_of: dt.date | None
           ) -> list[dict[str, Any]]:
    """Incidents from one experiment's active findings.

    Skewed days on contiguous dates (a one-day gap allowed, as incidents are matched) form one
    ``inflow`` incident each; a share changepoint or an outcome changepoint joins the run whose
    days it touches; a skewed source joins the run it contributed most units to; the
    whole-period SRM joins the largest run. Without skewed days, the SRM, source and share
    findings form one ``persistent`` incident from the first day. An outcome changepoint that
    touches no run stays without an incident (context, never an incident on its own).
    """
    days = sorted((a for a in alerts if a["kind"] == "skewed_day" and _date(a["key"])),
                  key=lambda a: a["key"])
    runs: list[dict[str, Any]] = []
    for alert in days:
        day = _date(alert["key"])
        assert day is not None
        if runs and (day - runs[-1]["end"]).days <= 2:
            runs[-1]["end"] = day
            runs[-1]["members"].append(alert)
        else:
            runs.append({"shape": "inflow", "start": day, "end": day, "members": [alert]})
    for run in runs:
        details = [m["detail"] or {} for m in run["members"]]
        arms = Counter(d.get("inflow_arm") for d in details if d.get("inflow_arm"))
        run["arm"] = arms.most_common(1)[0][0] if arms else ""
        run["daily"] = [{"date": m["key"], "units": round(float(
            ((m["detail"] or {}).get("excess") or {}).get(run["arm"], 0.0)), 1)}
            for m in run["members"]]
        run["units"] = round(sum(d["units"] for d in run["daily"]), 1)
        by_source: dict[str, float] = {}
        campaigns: list[str] = []
        for detail in details:
            for source in detail.get("sources") or []:
                by_source[source["source"]] = (by_source.get(source["source"], 0.0)
                                               + float(source.get("excess") or 0.0))
            campaigns += [c for c in detail.get("campaigns") or [] if c not in campaigns]
        run["by_source"], run["campaigns"] = by_source, campaigns

    rest: list[dict[str, Any]] = []
    for alert in alerts:
        kind = alert["kind"]
        if kind == "skewed_day":
            continue
        target: dict[str, Any] | None = None
        if kind in ("share_changepoint", "engagement_changepoint"):
            when = _date((alert["detail"] or {}).get("date") or alert["key"].rsplit(":", 1)[-1])
            target = next((r for r in runs if when and r["start"] - dt.timedelta(days=1)
                           <= when <= r["end"] + dt.timedelta(days=1)), None)
            if target is None and kind == "engagement_changepoint":
                continue
        elif kind == "skewed_source" and runs:
            target = max(runs, key=lambda r: r["by_source"].get(alert["key"], 0.0))
            if target["by_source"].get(alert["key"], 0.0) <= 0:
                target = None
        if target is None and runs:
            target = max(runs, key=lambda r: abs(r["units"]))
        if target is None:
            rest.append(alert)
        else:
            target["members"].append(alert)
    if rest:
        runs.append(_persistent(rest, start, as_of))
    return runs


def _persistent(members: list[dict[str, Any]], start: dt.date, as_of: dt.date | None
                ) -> dict[str, Any]:
    """One ``persistent`` incident from whole-period findings: the arm furthest over or under
    its planned count, over plan on a tie (SRM detail first, else the sum over skewed
    sources); its units are moved into that arm from the others."""
    gap: dict[str, float] = {}
    srm = next((m for m in members if m["kind"] == "srm"), None)
    sources = [m for m in members if m["kind"] == "skewed_source"]
    for member in ([srm] if srm else sources):
        detail = member["detail"] or {}
        for arm, count in (detail.get("observed") or {}).items():
            gap[arm] = gap.get(arm, 0.0) + float(count) - float(
                (detail.get("expected") or {}).get(arm, count))
    # Two arms are off by the same amount in opposite directions: name the one over plan.
    arm = max(gap, key=lambda a: (abs(round(gap[a], 6)), gap[a])) if gap else ""
    dates = [d for d in (_date((m["detail"] or {}).get("date")) for m in members) if d]
    end = as_of or max(dates, default=start)
    return {"shape": "persistent", "start": start, "end": max(end, start), "members": members,
            "arm": arm, "daily": [], "units": round(gap.get(arm, 0.0), 1), "by_source": {},
            "campaigns": []}


def _store(bind: sa.Connection, experiment_id: str, group: dict[str, Any],
           version: int | None) -> None:
    members = group["members"]
    severity = "alert" if any(m["severity"] == "alert" for m in members) else "watch"
    statuses = {m["status"] for m in members}
    status = ("open" if "open" in statuses else "acknowledged" if "acknowledged" in statuses
              else "resolved")
    opened_at = min(m["opened_at"] for m in members)
    last_seen = max(m["last_seen_at"] for m in members)
    # An incident is only as far along as its least advanced finding.
    acknowledged = None if status == "open" else max(
        (m for m in members if m["acknowledged_at"] is not None),
        key=lambda m: m["acknowledged_at"], default=None)
    resolved = max((m for m in members if m["resolved_at"] is not None),
                   key=lambda m: m["resolved_at"], default=None)
    total = sum(u for u in group["by_source"].values() if u > 0)
    sources = [{"source": s, "share": round(u / total, 4) if total > 0 else None,
                "units": round(u, 1)}
               for s, u in sorted(group["by_source"].items(), key=lambda kv: -kv[1])]
    arm, units = group["arm"], group["units"]
    summary = (f"{arm or 'An arm'} {'got' if units >= 0 else 'lacked'} {abs(units):.0f} units "
               f"{'over' if units >= 0 else 'under'} plan from {group['start'].isoformat()} to "
               f"{group['end'].isoformat()} ({CARRIED}).")
    episode = {
        "shape": group["shape"], "arm": arm, "start": group["start"].isoformat(),
        "end": group["end"].isoformat(), "ongoing": False, "units": units,
        "units_meaning": "Units over (+) or under (-) plan as the stored findings counted them.",
        "daily": group["daily"], "cells": [], "sources": sources,
        "campaigns": group["campaigns"], "severity": severity,
        "material": severity == "alert", "p_value": None,
        "detected_by": sorted({m["kind"] for m in members}), "summary": summary,
        "impact": {}, "observed_weights": None, "planned_weights": None, "context": [],
        "advice": [], "carried_over": True,
        "evidence": [{"kind": m["kind"], "key": m["key"], "severity": m["severity"],
                      "title": m["title"], "detail": m["detail"] or {}} for m in members]}
    values = {
        "experiment_id": experiment_id, "shape": group["shape"], "arm": arm,
        "start_date": group["start"], "end_date": group["end"], "units": float(units),
        "severity": severity, "material": severity == "alert", "status": status,
        "active": True, "episode": episode, "diagnosis_version": version, "position": None,
        "opened_at": opened_at, "last_seen_at": last_seen,
        "acknowledged_at": acknowledged["acknowledged_at"] if acknowledged else None,
        "acknowledged_by": acknowledged["acknowledged_by"] if acknowledged else None,
        "resolved_at": resolved["resolved_at"] if status == "resolved" and resolved else None,
        "resolved_by": resolved["resolved_by"] if status == "resolved" and resolved else None,
        "resolution": (f"every finding behind it had been resolved ({CARRIED}); last: "
                       f"{resolved['resolution_reason']}"
                       if status == "resolved" and resolved else None),
        "updated_at": last_seen}
    incident_id = bind.execute(sa.insert(_incidents).values(**values)
                               .returning(_incidents.c.id)).scalar_one()
    history = [{"at": opened_at, "action": "opened", "from_status": None, "to_status": "open",
                "actor": SYSTEM_ACTOR, "note": CARRIED}]
    if acknowledged is not None:
        history.append({"at": acknowledged["acknowledged_at"], "action": "acknowledged",
                        "from_status": "open", "to_status": "acknowledged",
                        "actor": acknowledged["acknowledged_by"] or SYSTEM_ACTOR,
                        "note": CARRIED})
    if status == "resolved" and resolved is not None:
        history.append({"at": resolved["resolved_at"], "action": "resolved",
                        "from_status": "acknowledged" if acknowledged else "open",
                        "to_status": "resolved",
                        "actor": resolved["resolved_by"] or SYSTEM_ACTOR,
                        "note": values["resolution"]})
    bind.execute(sa.insert(_events), [{**h, "incident_id": incident_id,
                                       "diagnosis_version": version} for h in history])
    bind.execute(sa.update(_alerts).where(_alerts.c.id.in_([m["id"] for m in members]))
                 .values(incident_id=incident_id))


def downgrade() -> None:
    sqlite = op.get_bind().dialect.name == "sqlite"
    # Notifications of incidents have no alert to point to.
    op.execute("DELETE FROM notify_outbox WHERE alert_id IS NULL")
    if sqlite:
        op.execute("CREATE TEMPORARY TABLE kept_attempts AS "
                   "SELECT * FROM notify_delivery_attempts")
    with op.batch_alter_table("notify_outbox") as batch:
        batch.drop_index("ix_notify_outbox_incident_id")
        batch.drop_constraint("fk_notify_outbox_incident_id_incidents", type_="foreignkey")
        batch.drop_column("incident_id")
        batch.alter_column("alert_id", existing_type=BIG_ID, nullable=False)
    if sqlite:
        op.execute("INSERT INTO notify_delivery_attempts SELECT * FROM kept_attempts "
                   "WHERE id NOT IN (SELECT id FROM notify_delivery_attempts)")
        op.execute("DROP TABLE kept_attempts")
    op.drop_index("ix_alerts_incident_id", table_name="alerts")
    if sqlite:
        op.execute("ALTER TABLE alerts DROP COLUMN incident_id")
    else:
        op.drop_constraint("fk_alerts_incident_id_incidents", "alerts", type_="foreignkey")
        op.drop_column("alerts", "incident_id")
    op.drop_column("diagnosis_snapshots", "served_etag")
    op.drop_index("ix_incident_events_incident_id", table_name="incident_events")
    op.drop_table("incident_events")
    op.drop_index("ix_incidents_status_opened_at", table_name="incidents")
    op.drop_index("ix_incidents_experiment_id", table_name="incidents")
    op.drop_table("incidents")
