"""evaluation runs; assessments stored only when they change

Every evaluation records an ``evaluation_run`` (ruleset, data cutoff, first and last day, rows
written) and stores an assessment row only for the region-days whose result differs from the
newest earlier row; ``content_sha256`` makes that comparison cheap. Readers take, for each
region and day, the row with the greatest cutoff not after the run's.

Databases evaluated before this revision get one run per stored (ruleset, cutoff), rebuilt from
their assessments; their rows keep ``content_sha256`` NULL, so the first run after the upgrade
stores its rows once more and later runs compare against those.

Revision ID: 0003
Revises: 0002
Create Date: 2026-12-02 09:00:00
"""

from __future__ import annotations

import sqlalchemy as sa
from alembic import op

import server.store.types

revision = "0003"
down_revision = "0002"
branch_labels = None
depends_on = None


def upgrade() -> None:
    op.create_table(
        "evaluation_run",
        sa.Column("id", sa.BigInteger().with_variant(sa.Integer(), "sqlite"), nullable=False),
        sa.Column("ruleset_id", sa.Integer(), nullable=False),
        sa.Column("data_cutoff", server.store.types.UTCDateTime(timezone=True), nullable=False),
        sa.Column("first_day", sa.Date(), nullable=False),
        sa.Column("last_day", sa.Date(), nullable=False),
        sa.Column("rows_written", sa.Integer(), nullable=False),
        sa.Column("created_at", server.store.types.UTCDateTime(timezone=True), nullable=False),
        sa.ForeignKeyConstraint(["ruleset_id"], ["ruleset.id"]),
        sa.PrimaryKeyConstraint("id"),
        sa.UniqueConstraint("ruleset_id", "data_cutoff"),
    )
    with op.batch_alter_table("assessment", schema=None) as batch_op:
        batch_op.add_column(sa.Column("content_sha256", sa.String(length=64), nullable=True))
        batch_op.create_index(
            "ix_assessment_ruleset_day",
            ["ruleset_id", "ref_date", "region_id", "data_cutoff"],
            unique=False,
        )
    # Runs stored before this revision wrote every row under their own cutoff.
    op.execute(
        "INSERT INTO evaluation_run"
        " (ruleset_id, data_cutoff, first_day, last_day, rows_written, created_at)"
        " SELECT ruleset_id, data_cutoff, MIN(ref_date), MAX(ref_date), COUNT(*),"
        " MAX(created_at) FROM assessment GROUP BY ruleset_id, data_cutoff"
    )


def downgrade() -> None:
    with op.batch_alter_table("assessment", schema=None) as batch_op:
        batch_op.drop_index("ix_assessment_ruleset_day")
        batch_op.drop_column("content_sha256")

    op.drop_table("evaluation_run")
