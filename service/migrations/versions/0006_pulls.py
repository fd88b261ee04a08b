"""Scheduled pulls: configs and runs.

Revision ID: 0006
Revises: 0005
Create Date: 2026-12-02
"""

from __future__ import annotations

from collections.abc import Sequence

import sqlalchemy as sa
from alembic import op
from sqlalchemy.dialects import postgresql

revision: str = "0006"
down_revision: str | None = "0005"
branch_labels: str | Sequence[str] | None = None
depends_on: str | Sequence[str] | None = None

JSON = sa.JSON().with_variant(postgresql.JSONB(), "postgresql")
BIG_ID = sa.BigInteger().with_variant(sa.Integer(), "sqlite")


def upgrade() -> None:
    op.create_table(
        "pull_schedules",
        sa.Column("experiment_id", sa.String(64), nullable=False),
        sa.Column("config", JSON, nullable=False),
        sa.Column("updated_at", sa.DateTime(timezone=True), nullable=False),
        sa.ForeignKeyConstraint(["experiment_id"], ["experiments.id"], ondelete="CASCADE",
                                name="fk_pull_schedules_experiment_id_experiments"),
        sa.PrimaryKeyConstraint("experiment_id", name="pk_pull_schedules"),
    )
    op.create_table(
        "pull_runs",
        sa.Column("id", BIG_ID, autoincrement=True, nullable=False),
        sa.Column("experiment_id", sa.String(64), nullable=False),
        sa.Column("as_of", sa.Date(), nullable=False),
        sa.Column("state", sa.String(16), nullable=False),
        sa.Column("started_at", sa.DateTime(timezone=True), nullable=False),
        sa.Column("finished_at", sa.DateTime(timezone=True), nullable=True),
        sa.Column("written", sa.Integer(), nullable=True),
        sa.Column("report", JSON, nullable=True),
        sa.Column("error", sa.Text(), nullable=True),
        sa.ForeignKeyConstraint(["experiment_id"], ["experiments.id"], ondelete="CASCADE",
                                name="fk_pull_runs_experiment_id_experiments"),
        sa.PrimaryKeyConstraint("id", name="pk_pull_runs"),
        sa.UniqueConstraint("experiment_id", "as_of", name="uq_pull_runs_experiment_id_as_of"),
    )


def downgrade() -> None:
    op.drop_table("pull_runs")
    op.drop_table("pull_schedules")
