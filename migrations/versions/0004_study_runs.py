"""Study runs: the policy study a calibration run belongs to (never approved or served).

Revision ID: 0004
Revises: 0003
Create Date: 2026-12-02
"""

from __future__ import annotations

import sqlalchemy as sa
from alembic import op

revision = "0004"
down_revision = "0003"
branch_labels = None
depends_on = None


def upgrade() -> None:
    with op.batch_alter_table("calibration_runs") as batch:
        batch.add_column(sa.Column("study", sa.String(length=64), nullable=True))


def downgrade() -> None:
    with op.batch_alter_table("calibration_runs") as batch:
        batch.drop_column("study")
