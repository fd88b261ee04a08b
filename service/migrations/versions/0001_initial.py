"""Initial schema: experiments, observations, diagnosis snapshots, alerts, tokens.

Revision ID: 0001
Revises:
Create Date: 2026-03-01
"""

from __future__ import annotations

from collections.abc import Sequence

import sqlalchemy as sa
from alembic import op
from sqlalchemy.dialects import postgresql

revision: str = "0001"
down_revision: str | None = None
branch_labels: str | Sequence[str] | None = None
depends_on: str | Sequence[str] | None = None

JSON = sa.JSON().with_variant(postgresql.JSONB(), "postgresql")
BIG_ID = sa.BigInteger().with_variant(sa.Integer(), "sqlite")


def _when() -> sa.DateTime:
    return sa.DateTime(timezone=True)


def upgrade() -> None:
    op.create_table(
        "experiments",
        sa.Column("id", sa.String(64), nullable=False),
        sa.Column("title", sa.String(200), nullable=False),
        sa.Column("start_date", sa.Date(), nullable=False),
        sa.Column("arms", JSON, nullable=False),
        sa.Column("allocation", JSON, nullable=False),
        sa.Column("webhook_url", sa.String(2048), nullable=True),
        sa.Column("webhook_secret", sa.String(256), nullable=True),
        sa.Column("created_at", _when(), nullable=False),
        sa.Column("updated_at", _when(), nullable=False),
        sa.PrimaryKeyConstraint("id", name="pk_experiments"),
    )
    op.create_table(
        "observations",
        sa.Column("experiment_id", sa.String(64), nullable=False),
        sa.Column("date", sa.Date(), nullable=False),
        sa.Column("arm", sa.String(64), nullable=False),
        sa.Column("source", sa.String(128), nullable=False),
        sa.Column("entered", sa.BigInteger(), nullable=False),
        sa.Column("metrics", JSON, nullable=False),
        sa.Column("updated_at", _when(), nullable=False),
        sa.ForeignKeyConstraint(["experiment_id"], ["experiments.id"], ondelete="CASCADE",
                                name="fk_observations_experiment_id_experiments"),
        sa.PrimaryKeyConstraint("experiment_id", "date", "arm", "source",
                                name="pk_observations"),
    )
    op.create_table(
        "diagnosis_snapshots",
        sa.Column("id", BIG_ID, autoincrement=True, nullable=False),
        sa.Column("experiment_id", sa.String(64), nullable=False),
        sa.Column("version", sa.Integer(), nullable=False),
        sa.Column("as_of", sa.Date(), nullable=True),
        sa.Column("status", sa.String(16), nullable=False),
        sa.Column("document", JSON, nullable=True),
        sa.Column("series", JSON, nullable=True),
        sa.Column("etag", sa.String(64), nullable=False),
        sa.Column("series_etag", sa.String(64), nullable=False),
        sa.Column("created_at", _when(), nullable=False),
        sa.ForeignKeyConstraint(["experiment_id"], ["experiments.id"], ondelete="CASCADE",
                                name="fk_diagnosis_snapshots_experiment_id_experiments"),
        sa.PrimaryKeyConstraint("id", name="pk_diagnosis_snapshots"),
        sa.UniqueConstraint("experiment_id", "version",
                            name="uq_diagnosis_snapshots_experiment_id_version"),
    )
    op.create_index("ix_diagnosis_snapshots_experiment_id", "diagnosis_snapshots",
                    ["experiment_id"])
    op.create_table(
        "alerts",
        sa.Column("id", BIG_ID, autoincrement=True, nullable=False),
        sa.Column("experiment_id", sa.String(64), nullable=False),
        sa.Column("kind", sa.String(32), nullable=False),
        sa.Column("key", sa.String(200), nullable=False),
        sa.Column("status", sa.String(16), nullable=False),
        sa.Column("severity", sa.String(16), nullable=False),
        sa.Column("title", sa.String(500), nullable=False),
        sa.Column("detail", JSON, nullable=False),
        sa.Column("active", sa.Boolean(), nullable=False),
        sa.Column("opened_at", _when(), nullable=False),
        sa.Column("last_seen_at", _when(), nullable=False),
        sa.Column("acknowledged_at", _when(), nullable=True),
        sa.Column("acknowledged_by", sa.String(100), nullable=True),
        sa.Column("resolved_at", _when(), nullable=True),
        sa.Column("resolved_by", sa.String(100), nullable=True),
        sa.Column("resolution_reason", sa.Text(), nullable=True),
        sa.Column("updated_at", _when(), nullable=False),
        sa.ForeignKeyConstraint(["experiment_id"], ["experiments.id"], ondelete="CASCADE",
                                name="fk_alerts_experiment_id_experiments"),
        sa.PrimaryKeyConstraint("id", name="pk_alerts"),
        sa.UniqueConstraint("experiment_id", "kind", "key",
                            name="uq_alerts_experiment_id_kind_key"),
    )
    op.create_index("ix_alerts_experiment_id", "alerts", ["experiment_id"])
    op.create_index("ix_alerts_status_opened_at", "alerts", ["status", "opened_at"])
    op.create_table(
        "alert_events",
        sa.Column("id", BIG_ID, autoincrement=True, nullable=False),
        sa.Column("alert_id", BIG_ID, nullable=False),
        sa.Column("at", _when(), nullable=False),
        sa.Column("action", sa.String(16), nullable=False),
        sa.Column("from_status", sa.String(16), nullable=True),
        sa.Column("to_status", sa.String(16), nullable=False),
        sa.Column("actor", sa.String(100), nullable=False),
        sa.Column("note", sa.Text(), nullable=True),
        sa.Column("diagnosis_version", sa.Integer(), nullable=True),
        sa.ForeignKeyConstraint(["alert_id"], ["alerts.id"], ondelete="CASCADE",
                                name="fk_alert_events_alert_id_alerts"),
        sa.PrimaryKeyConstraint("id", name="pk_alert_events"),
    )
    op.create_index("ix_alert_events_alert_id", "alert_events", ["alert_id"])
    op.create_table(
        "api_tokens",
        sa.Column("id", sa.Integer(), autoincrement=True, nullable=False),
        sa.Column("name", sa.String(100), nullable=False),
        sa.Column("scope", sa.String(16), nullable=False),
        sa.Column("token_hash", sa.String(64), nullable=False),
        sa.Column("created_at", _when(), nullable=False),
        sa.Column("revoked_at", _when(), nullable=True),
        sa.PrimaryKeyConstraint("id", name="pk_api_tokens"),
        sa.UniqueConstraint("name", name="uq_api_tokens_name"),
        sa.UniqueConstraint("token_hash", name="uq_api_tokens_token_hash"),
    )


def downgrade() -> None:
    op.drop_table("api_tokens")
    op.drop_index("ix_alert_events_alert_id", table_name="alert_events")
    op.drop_table("alert_events")
    op.drop_index("ix_alerts_status_opened_at", table_name="alerts")
    op.drop_index("ix_alerts_experiment_id", table_name="alerts")
    op.drop_table("alerts")
    op.drop_index("ix_diagnosis_snapshots_experiment_id", table_name="diagnosis_snapshots")
    op.drop_table("diagnosis_snapshots")
    op.drop_table("observations")
    op.drop_table("experiments")
