"""Rolling re-estimation: the series table, each estimate's series and covariance.

Revision ID: 0003
Revises: 0002
Create Date: 2026-12-02
"""

from __future__ import annotations

import sqlalchemy as sa
from alembic import op

revision = "0003"
down_revision = "0002"
branch_labels = None
depends_on = None


def upgrade() -> None:
    op.create_table(
        "rolling_series",
        sa.Column("id", sa.Integer(), nullable=False),
        sa.Column("commodity_id", sa.Integer(), nullable=False),
        sa.Column("created_at", sa.DateTime(timezone=True), nullable=False),
        sa.Column("created_by", sa.String(length=128), nullable=False),
        sa.Column("window_length", sa.String(length=16), nullable=False),
        sa.Column("step", sa.String(length=16), nullable=False),
        sa.Column("first_end", sa.Date(), nullable=False),
        sa.Column("last_end", sa.Date(), nullable=False),
        sa.Column("settings", sa.JSON(), nullable=False),
        sa.Column("settings_sha256", sa.String(length=64), nullable=False),
        sa.ForeignKeyConstraint(
            ["commodity_id"],
            ["commodities.id"],
            name=op.f("fk_rolling_series_commodity_id_commodities"),
        ),
        sa.PrimaryKeyConstraint("id", name=op.f("pk_rolling_series")),
        sa.UniqueConstraint(
            "commodity_id", "settings_sha256", name=op.f("uq_rolling_series_commodity_id")
        ),
    )
    with op.batch_alter_table("historical_estimates") as batch:
        batch.add_column(sa.Column("series_id", sa.Integer(), nullable=True))
        batch.add_column(sa.Column("covariance", sa.JSON(), nullable=True))
        batch.create_foreign_key(
            op.f("fk_historical_estimates_series_id_rolling_series"),
            "rolling_series",
            ["series_id"],
            ["id"],
        )
        batch.create_index(op.f("ix_historical_estimates_series_id"), ["series_id"])


def downgrade() -> None:
    with op.batch_alter_table("historical_estimates") as batch:
        batch.drop_index(op.f("ix_historical_estimates_series_id"))
        batch.drop_constraint(
            op.f("fk_historical_estimates_series_id_rolling_series"), type_="foreignkey"
        )
        batch.drop_column("covariance")
        batch.drop_column("series_id")
    op.drop_table("rolling_series")
