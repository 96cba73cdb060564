"""Exercise style: each option quote's, and each commodity's default.

Revision ID: 0005
Revises: 0004
Create Date: 2026-12-02
"""

from __future__ import annotations

import sqlalchemy as sa
from alembic import op

revision = "0005"
down_revision = "0004"
branch_labels = None
depends_on = None

_STYLE_CHECK = "exercise IN ('european', 'american')"


def upgrade() -> None:
    for table in ("option_quotes", "commodities"):
        with op.batch_alter_table(table) as batch:
            batch.add_column(
                sa.Column(
                    "exercise",
                    sa.String(length=8),
                    server_default="european",
                    nullable=False,
                )
            )
            batch.create_check_constraint(op.f(f"ck_{table}_exercise"), _STYLE_CHECK)


def downgrade() -> None:
    for table in ("commodities", "option_quotes"):
        with op.batch_alter_table(table) as batch:
            batch.drop_constraint(op.f(f"ck_{table}_exercise"), type_="check")
            batch.drop_column("exercise")
