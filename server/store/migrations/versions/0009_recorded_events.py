"""staff-recorded events (measures, school holidays, testing changes) for before/after estimates

``recorded_event`` holds dated events of a district, an area or the county, with a note and who
recorded them. Published tier changes stay in ``decision`` and are read as events from there.

Revision ID: 0007_recorded_events
Revises: 0007_pathogen
Create Date: 2026-12-04 20:15:00
"""

from __future__ import annotations

import sqlalchemy as sa
from alembic import op

import server.store.types

revision = "0007_recorded_events"
down_revision = "0007_pathogen"
branch_labels = None
depends_on = None


def upgrade() -> None:
    op.create_table(
        "recorded_event",
        sa.Column("id", sa.BigInteger().with_variant(sa.Integer(), "sqlite"), nullable=False),
        sa.Column("region_id", sa.Integer(), nullable=False),
        sa.Column("day", sa.Date(), nullable=False),
        sa.Column("kind", sa.String(length=32), nullable=False),
        sa.Column("note", sa.Text(), nullable=False),
        sa.Column("recorded_by", sa.Integer(), nullable=True),
        sa.Column("recorded_at", server.store.types.UTCDateTime(), nullable=False),
        sa.ForeignKeyConstraint(["recorded_by"], ["app_user.id"]),
        sa.ForeignKeyConstraint(["region_id"], ["region.id"]),
        sa.PrimaryKeyConstraint("id"),
    )
    op.create_index(op.f("ix_recorded_event_day"), "recorded_event", ["day"], unique=False)
    op.create_index(op.f("ix_recorded_event_region_id"), "recorded_event", ["region_id"],
                    unique=False)


def downgrade() -> None:
    op.drop_index(op.f("ix_recorded_event_region_id"), table_name="recorded_event")
    op.drop_index(op.f("ix_recorded_event_day"), table_name="recorded_event")
    op.drop_table("recorded_event")
