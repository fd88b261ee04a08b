"""Notification outbox and delivery attempts.

Revision ID: 0002
Revises: 0001
Create Date: 2026-03-02
"""

from __future__ import annotations

from collections.abc import Sequence

import sqlalchemy as sa
from alembic import op
from sqlalchemy.dialects import postgresql

revision: str = "0002"
down_revision: str | None = "0001"
branch_labels: str | Sequence[str] | None = None
depends_on: str | Sequence[str] | None = None

JSON = sa.JSON().with_variant(postgresql.JSONB(), "postgresql")
BIG_ID = sa.BigInteger().with_variant(sa.Integer(), "sqlite")


def _when() -> sa.DateTime:
    return sa.DateTime(timezone=True)


def upgrade() -> None:
    op.create_table(
        "notify_outbox",
        sa.Column("id", BIG_ID, autoincrement=True, nullable=False),
        sa.Column("alert_id", BIG_ID, nullable=False),
        sa.Column("experiment_id", sa.String(64), nullable=False),
        sa.Column("event_type", sa.String(32), nullable=False),
        sa.Column("event_id", sa.String(100), nullable=False),
        sa.Column("payload", JSON, nullable=False),
        sa.Column("status", sa.String(16), nullable=False),
        sa.Column("attempts", sa.Integer(), nullable=False),
        sa.Column("next_attempt_at", _when(), nullable=True),
        sa.Column("claimed_by", sa.String(100), nullable=True),
        sa.Column("claimed_until", _when(), nullable=True),
        sa.Column("created_at", _when(), nullable=False),
        sa.Column("delivered_at", _when(), nullable=True),
        sa.ForeignKeyConstraint(["alert_id"], ["alerts.id"], ondelete="CASCADE",
                                name="fk_notify_outbox_alert_id_alerts"),
        sa.ForeignKeyConstraint(["experiment_id"], ["experiments.id"], ondelete="CASCADE",
                                name="fk_notify_outbox_experiment_id_experiments"),
        sa.PrimaryKeyConstraint("id", name="pk_notify_outbox"),
        sa.UniqueConstraint("event_id", name="uq_notify_outbox_event_id"),
    )
    op.create_index("ix_notify_outbox_alert_id", "notify_outbox", ["alert_id"])
    op.create_index("ix_notify_outbox_experiment_id", "notify_outbox", ["experiment_id"])
    op.create_index("ix_notify_outbox_status_next_attempt_at", "notify_outbox",
                    ["status", "next_attempt_at"])
    op.create_table(
        "notify_delivery_attempts",
        sa.Column("id", BIG_ID, autoincrement=True, nullable=False),
        sa.Column("outbox_id", BIG_ID, nullable=False),
        sa.Column("attempt", sa.Integer(), nullable=False),
        sa.Column("started_at", _when(), nullable=False),
        sa.Column("duration_ms", sa.Integer(), nullable=True),
        sa.Column("status_code", sa.Integer(), nullable=True),
        sa.Column("error", sa.Text(), nullable=True),
        sa.Column("response_excerpt", sa.Text(), nullable=True),
        sa.ForeignKeyConstraint(["outbox_id"], ["notify_outbox.id"], ondelete="CASCADE",
                                name="fk_notify_delivery_attempts_outbox_id_notify_outbox"),
        sa.PrimaryKeyConstraint("id", name="pk_notify_delivery_attempts"),
    )
    op.create_index("ix_notify_delivery_attempts_outbox_id", "notify_delivery_attempts",
                    ["outbox_id"])


def downgrade() -> None:
    op.drop_index("ix_notify_delivery_attempts_outbox_id",
                  table_name="notify_delivery_attempts")
    op.drop_table("notify_delivery_attempts")
    op.drop_index("ix_notify_outbox_status_next_attempt_at", table_name="notify_outbox")
    op.drop_index("ix_notify_outbox_experiment_id", table_name="notify_outbox")
    op.drop_index("ix_notify_outbox_alert_id", table_name="notify_outbox")
    op.drop_table("notify_outbox")
