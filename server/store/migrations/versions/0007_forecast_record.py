"""stored forecasts for the forecast record (quantiles per region and run)

``forecast_run`` holds one forecast of a target under a scenario at a data cutoff; its regions'
quantiles are ``forecast_quantiles`` rows (float64 blobs of horizons x levels) with the naive
baseline of each region. Written by server/services/forecast_record.py.

Revision ID: 0007
Revises: 0006
Create Date: 2026-12-04 20:00:00
"""

from __future__ import annotations

import sqlalchemy as sa
from alembic import op

import server.store.types

revision = "0007"
down_revision = "0006"
branch_labels = None
depends_on = None


def upgrade() -> None:
    op.create_table(
        "forecast_run",
        sa.Column("id", sa.BigInteger().with_variant(sa.Integer(), "sqlite"), nullable=False),
        sa.Column("target", sa.String(length=64), nullable=False),
        sa.Column("scenario", sa.String(length=64), nullable=False),
        sa.Column("data_cutoff", server.store.types.UTCDateTime(), nullable=False),
        sa.Column("origin", sa.Date(), nullable=False),
        sa.Column("forecaster", sa.String(length=100), nullable=False),
        sa.Column("horizons", sa.JSON(), nullable=False),
        sa.Column("levels", sa.JSON(), nullable=False),
        sa.Column("created_at", server.store.types.UTCDateTime(), nullable=False),
        sa.PrimaryKeyConstraint("id"),
        sa.UniqueConstraint("target", "scenario", "data_cutoff"),
    )
    op.create_index("ix_forecast_run_target_origin", "forecast_run",
                    ["target", "scenario", "origin"], unique=False)
    op.create_table(
        "forecast_quantiles",
        sa.Column("run_id", sa.BigInteger().with_variant(sa.Integer(), "sqlite"), nullable=False),
        sa.Column("region_id", sa.Integer(), nullable=False),
        sa.Column("baseline", sa.Float(), nullable=True),
        sa.Column("quantiles", sa.LargeBinary(), nullable=False),
        sa.ForeignKeyConstraint(["run_id"], ["forecast_run.id"], ondelete="CASCADE"),
        sa.PrimaryKeyConstraint("run_id", "region_id"),
    )
    op.create_index("ix_forecast_quantiles_region", "forecast_quantiles",
                    ["region_id", "run_id"], unique=False)


def downgrade() -> None:
    op.drop_index("ix_forecast_quantiles_region", table_name="forecast_quantiles")
    op.drop_table("forecast_quantiles")
    op.drop_index("ix_forecast_run_target_origin", table_name="forecast_run")
    op.drop_table("forecast_run")
