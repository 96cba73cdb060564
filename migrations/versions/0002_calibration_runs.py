"""Historical estimates, calibration runs, their residuals and approval events.

Revision ID: 0002
Revises: 0001
Create Date: 2026-12-02
"""

from __future__ import annotations

import sqlalchemy as sa
from alembic import op

revision = "0002"
down_revision = "0001"
branch_labels = None
depends_on = None

PARAMS = ("mu", "kappa", "alpha", "lam", "sigma_spot", "sigma_yield", "rho")


def _fk(table: str, column: str, target: str) -> sa.ForeignKeyConstraint:
    return sa.ForeignKeyConstraint(
        [column], [f"{target}.id"], name=op.f(f"fk_{table}_{column}_{target}")
    )


def _params(nullable: bool) -> list[sa.Column[float]]:
    return [sa.Column(name, sa.Float(), nullable=nullable) for name in PARAMS]


def upgrade() -> None:
    op.create_table(
        "historical_estimates",
        sa.Column("id", sa.Integer(), nullable=False),
        sa.Column("commodity_id", sa.Integer(), nullable=False),
        sa.Column("created_at", sa.DateTime(timezone=True), nullable=False),
        sa.Column("created_by", sa.String(length=128), nullable=False),
        sa.Column("source", sa.String(length=16), nullable=False),
        sa.Column("window_start", sa.Date(), nullable=False),
        sa.Column("window_end", sa.Date(), nullable=False),
        sa.Column("n_contracts", sa.Integer(), nullable=True),
        sa.Column("n_days", sa.Integer(), nullable=True),
        sa.Column("n_obs", sa.Integer(), nullable=True),
        sa.Column("loglik", sa.Float(), nullable=True),
        sa.Column("rate", sa.Float(), nullable=True),
        sa.Column("converged", sa.Boolean(), nullable=False),
        sa.Column("message", sa.Text(), nullable=False),
        *_params(nullable=False),
        sa.Column("std_errors", sa.JSON(), nullable=False),
        sa.Column("noise_sd", sa.JSON(), nullable=False),
        sa.Column("inputs", sa.JSON(), nullable=False),
        sa.Column("inputs_sha256", sa.String(length=64), nullable=False),
        sa.Column("settings", sa.JSON(), nullable=False),
        sa.Column("code_version", sa.String(length=64), nullable=False),
        sa.CheckConstraint(
            "source IN ('kalman', 'imported')", name=op.f("ck_historical_estimates_source")
        ),
        _fk("historical_estimates", "commodity_id", "commodities"),
        sa.PrimaryKeyConstraint("id", name=op.f("pk_historical_estimates")),
    )
    op.create_index(
        op.f("ix_historical_estimates_commodity_id"),
        "historical_estimates",
        ["commodity_id", "converged", "id"],
    )

    op.create_table(
        "estimate_states",
        sa.Column("estimate_id", sa.Integer(), nullable=False),
        sa.Column("trade_date", sa.Date(), nullable=False),
        sa.Column("log_spot_filtered", sa.Float(), nullable=False),
        sa.Column("yield_filtered", sa.Float(), nullable=False),
        sa.Column("log_spot_smoothed", sa.Float(), nullable=False),
        sa.Column("yield_smoothed", sa.Float(), nullable=False),
        _fk("estimate_states", "estimate_id", "historical_estimates"),
        sa.PrimaryKeyConstraint("estimate_id", "trade_date", name=op.f("pk_estimate_states")),
    )

    op.create_table(
        "calibration_runs",
        sa.Column("id", sa.Integer(), nullable=False),
        sa.Column("commodity_id", sa.Integer(), nullable=False),
        sa.Column("trade_date", sa.Date(), nullable=False),
        sa.Column("created_at", sa.DateTime(timezone=True), nullable=False),
        sa.Column("created_by", sa.String(length=128), nullable=False),
        sa.Column("estimate_id", sa.Integer(), nullable=False),
        sa.Column("mode", sa.String(length=16), nullable=False),
        sa.Column("settings", sa.JSON(), nullable=False),
        sa.Column("inputs", sa.JSON(), nullable=False),
        sa.Column("inputs_sha256", sa.String(length=64), nullable=False),
        sa.Column("outcome", sa.String(length=16), nullable=False),
        sa.Column("failure_reason", sa.Text(), nullable=True),
        *_params(nullable=True),
        sa.Column("buckets", sa.JSON(), nullable=True),
        sa.Column("diagnostics", sa.JSON(), nullable=False),
        sa.Column("code_version", sa.String(length=64), nullable=False),
        sa.CheckConstraint(
            "outcome IN ('fitted', 'failed')", name=op.f("ck_calibration_runs_outcome")
        ),
        sa.CheckConstraint(
            "outcome = 'failed' OR (" + " AND ".join(f"{c} IS NOT NULL" for c in PARAMS) + ")",
            name=op.f("ck_calibration_runs_params_when_fitted"),
        ),
        sa.CheckConstraint(
            "outcome = 'fitted' OR failure_reason IS NOT NULL",
            name=op.f("ck_calibration_runs_reason_when_failed"),
        ),
        _fk("calibration_runs", "commodity_id", "commodities"),
        _fk("calibration_runs", "estimate_id", "historical_estimates"),
        sa.PrimaryKeyConstraint("id", name=op.f("pk_calibration_runs")),
    )
    op.create_index(
        op.f("ix_calibration_runs_commodity_id"),
        "calibration_runs",
        ["commodity_id", "trade_date"],
    )

    op.create_table(
        "run_residuals",
        sa.Column("run_id", sa.Integer(), nullable=False),
        sa.Column("quote_id", sa.Integer(), nullable=False),
        sa.Column("market_price", sa.Float(), nullable=False),
        sa.Column("model_price", sa.Float(), nullable=False),
        sa.Column("market_vol", sa.Float(), nullable=False),
        sa.Column("model_vol", sa.Float(), nullable=False),
        sa.Column("price_residual", sa.Float(), nullable=False),
        sa.Column("vol_residual", sa.Float(), nullable=False),
        sa.Column("weight", sa.Float(), nullable=False),
        _fk("run_residuals", "run_id", "calibration_runs"),
        _fk("run_residuals", "quote_id", "option_quotes"),
        sa.PrimaryKeyConstraint("run_id", "quote_id", name=op.f("pk_run_residuals")),
    )

    op.create_table(
        "run_events",
        sa.Column("id", sa.Integer(), nullable=False),
        sa.Column("run_id", sa.Integer(), nullable=False),
        sa.Column("commodity_id", sa.Integer(), nullable=False),
        sa.Column("to_status", sa.String(length=16), nullable=False),
        sa.Column("at", sa.DateTime(timezone=True), nullable=False),
        sa.Column("actor", sa.String(length=128), nullable=False),
        sa.Column("note", sa.Text(), nullable=False),
        sa.CheckConstraint(
            "to_status IN ('candidate', 'approved', 'rejected', 'superseded')",
            name=op.f("ck_run_events_to_status"),
        ),
        _fk("run_events", "run_id", "calibration_runs"),
        _fk("run_events", "commodity_id", "commodities"),
        sa.PrimaryKeyConstraint("id", name=op.f("pk_run_events")),
        sa.UniqueConstraint("run_id", "to_status", name=op.f("uq_run_events_run_id")),
    )
    op.create_index(
        op.f("ix_run_events_commodity_id"),
        "run_events",
        ["commodity_id", "to_status", "at", "id"],
    )


def downgrade() -> None:
    op.drop_index(op.f("ix_run_events_commodity_id"), table_name="run_events")
    op.drop_table("run_events")
    op.drop_table("run_residuals")
    op.drop_index(op.f("ix_calibration_runs_commodity_id"), table_name="calibration_runs")
    op.drop_table("calibration_runs")
    op.drop_table("estimate_states")
    op.drop_index(op.f("ix_historical_estimates_commodity_id"), table_name="historical_estimates")
    op.drop_table("historical_estimates")
