"""Diagnosis input versions: a counter per experiment bumped by every write that changes what
the diagnosis reads, and on each snapshot the version it was computed from.

Revision ID: 0005
Revises: 0004
Create Date: 2026-12-02
"""

from __future__ import annotations

from collections.abc import Sequence

import sqlalchemy as sa
from alembic import op

revision: str = "0005"
down_revision: str | None = "0004"
branch_labels: str | Sequence[str] | None = None
depends_on: str | Sequence[str] | None = None


def upgrade() -> None:
    with op.batch_alter_table("experiments") as batch:
        batch.add_column(sa.Column("data_version", sa.Integer(), nullable=False,
                                   server_default="0"))
    with op.batch_alter_table("diagnosis_snapshots") as batch:
        batch.add_column(sa.Column("data_version", sa.Integer(), nullable=True))
    # Snapshots stored before were computed under the write lock: current for version 0.
    op.execute("UPDATE diagnosis_snapshots SET data_version = 0")


def downgrade() -> None:
    with op.batch_alter_table("diagnosis_snapshots") as batch:
        batch.drop_column("data_version")
    with op.batch_alter_table("experiments") as batch:
        batch.drop_column("data_version")
