"""Quote store: commodities, ingest batches, futures, options, rates, quarantine.

Revision ID: 0001
Revises:
Create Date: 2026-12-01
"""

from __future__ import annotations

import sqlalchemy as sa
from alembic import op

revision = "0001"
down_revision = None
branch_labels = None
depends_on = None


def _id() -> sa.Column[int]:
    return sa.Column("id", sa.Integer(), nullable=False)


def _batch_fk(table: str) -> sa.ForeignKeyConstraint:
    return sa.ForeignKeyConstraint(
        ["batch_id"], ["ingest_batches.id"], name=op.f(f"fk_{table}_batch_id_ingest_batches")
    )


def _commodity_fk(table: str) -> sa.ForeignKeyConstraint:
    return sa.ForeignKeyConstraint(
        ["commodity_id"], ["commodities.id"], name=op.f(f"fk_{table}_commodity_id_commodities")
    )


def upgrade() -> None:
    op.create_table(
        "commodities",
        _id(),
        sa.Column("code", sa.String(length=32), nullable=False),
        sa.Column("name", sa.String(length=200), nullable=False),
        sa.Column("unit", sa.String(length=32), nullable=False),
        sa.Column("currency", sa.String(length=8), nullable=False),
        sa.Column("calendar_rule", sa.Text(), nullable=False),
        sa.PrimaryKeyConstraint("id", name=op.f("pk_commodities")),
        sa.UniqueConstraint("code", name=op.f("uq_commodities_code")),
    )
    op.create_table(
        "ingest_batches",
        _id(),
        sa.Column("kind", sa.String(length=16), nullable=False),
        sa.Column("status", sa.String(length=16), nullable=False),
        sa.Column("file_name", sa.Text(), nullable=False),
        sa.Column("sha256", sa.String(length=64), nullable=False),
        sa.Column("rows_read", sa.Integer(), nullable=False),
        sa.Column("rows_accepted", sa.Integer(), nullable=False),
        sa.Column("rows_rejected", sa.Integer(), nullable=False),
        sa.Column("received_at", sa.DateTime(timezone=True), nullable=False),
        sa.Column("received_by", sa.String(length=128), nullable=False),
        sa.CheckConstraint(
            "kind IN ('futures', 'options', 'rates')", name=op.f("ck_ingest_batches_kind")
        ),
        sa.CheckConstraint("status IN ('loaded', 'rejected')", name=op.f("ck_ingest_batches_status")),
        sa.CheckConstraint(
            "rows_read = rows_accepted + rows_rejected", name=op.f("ck_ingest_batches_row_counts")
        ),
        sa.PrimaryKeyConstraint("id", name=op.f("pk_ingest_batches")),
    )
    op.create_index(op.f("ix_ingest_batches_received_at"), "ingest_batches", ["received_at"])
    op.create_index(op.f("ix_ingest_batches_sha256"), "ingest_batches", ["sha256"])

    op.create_table(
        "futures_settlements",
        _id(),
        sa.Column("batch_id", sa.Integer(), nullable=False),
        sa.Column("commodity_id", sa.Integer(), nullable=False),
        sa.Column("trade_date", sa.Date(), nullable=False),
        sa.Column("delivery", sa.Date(), nullable=False),
        sa.Column("settle", sa.Float(), nullable=False),
        sa.Column("line", sa.Integer(), nullable=False),
        _batch_fk("futures_settlements"),
        _commodity_fk("futures_settlements"),
        sa.PrimaryKeyConstraint("id", name=op.f("pk_futures_settlements")),
        sa.UniqueConstraint(
            "commodity_id",
            "trade_date",
            "delivery",
            "batch_id",
            name=op.f("uq_futures_settlements_commodity_id"),
        ),
    )
    op.create_index(op.f("ix_futures_settlements_batch_id"), "futures_settlements", ["batch_id"])

    op.create_table(
        "option_quotes",
        _id(),
        sa.Column("batch_id", sa.Integer(), nullable=False),
        sa.Column("commodity_id", sa.Integer(), nullable=False),
        sa.Column("trade_date", sa.Date(), nullable=False),
        sa.Column("delivery", sa.Date(), nullable=False),
        sa.Column("expiry", sa.Date(), nullable=False),
        sa.Column("is_call", sa.Boolean(), nullable=False),
        sa.Column("strike", sa.Float(), nullable=False),
        sa.Column("premium", sa.Float(), nullable=True),
        sa.Column("implied_vol", sa.Float(), nullable=True),
        sa.Column("bid", sa.Float(), nullable=True),
        sa.Column("ask", sa.Float(), nullable=True),
        sa.Column("line", sa.Integer(), nullable=False),
        sa.CheckConstraint(
            "premium IS NOT NULL OR implied_vol IS NOT NULL",
            name=op.f("ck_option_quotes_price_given"),
        ),
        _batch_fk("option_quotes"),
        _commodity_fk("option_quotes"),
        sa.PrimaryKeyConstraint("id", name=op.f("pk_option_quotes")),
        sa.UniqueConstraint(
            "commodity_id",
            "trade_date",
            "delivery",
            "expiry",
            "is_call",
            "strike",
            "batch_id",
            name=op.f("uq_option_quotes_commodity_id"),
        ),
    )
    op.create_index(op.f("ix_option_quotes_batch_id"), "option_quotes", ["batch_id"])

    op.create_table(
        "rate_quotes",
        _id(),
        sa.Column("batch_id", sa.Integer(), nullable=False),
        sa.Column("trade_date", sa.Date(), nullable=False),
        sa.Column("maturity", sa.Date(), nullable=False),
        sa.Column("zero_rate", sa.Float(), nullable=False),
        sa.Column("line", sa.Integer(), nullable=False),
        _batch_fk("rate_quotes"),
        sa.PrimaryKeyConstraint("id", name=op.f("pk_rate_quotes")),
        sa.UniqueConstraint(
            "trade_date", "maturity", "batch_id", name=op.f("uq_rate_quotes_trade_date")
        ),
    )
    op.create_index(op.f("ix_rate_quotes_batch_id"), "rate_quotes", ["batch_id"])

    op.create_table(
        "quarantined_rows",
        _id(),
        sa.Column("batch_id", sa.Integer(), nullable=False),
        sa.Column("line", sa.Integer(), nullable=False),
        sa.Column("field", sa.String(length=64), nullable=False),
        sa.Column("reason", sa.Text(), nullable=False),
        sa.Column("raw", sa.Text(), nullable=False),
        _batch_fk("quarantined_rows"),
        sa.PrimaryKeyConstraint("id", name=op.f("pk_quarantined_rows")),
    )
    op.create_index(op.f("ix_quarantined_rows_batch_id"), "quarantined_rows", ["batch_id"])


def downgrade() -> None:
    for table in ("quarantined_rows", "rate_quotes", "option_quotes", "futures_settlements"):
        op.drop_index(op.f(f"ix_{table}_batch_id"), table_name=table)
        op.drop_table(table)
    op.drop_index(op.f("ix_ingest_batches_sha256"), table_name="ingest_batches")
    op.drop_index(op.f("ix_ingest_batches_received_at"), table_name="ingest_batches")
    op.drop_table("ingest_batches")
    op.drop_table("commodities")
