"""analysts' verdicts on detected testing changes (confirmed or dismissed)

``testing_change_review`` holds, append-only, each verdict on a district's detected testing
change with its note, who gave it, when, and the office's day from which it counts.

Revision ID: 0010_testing_change_review
Revises: 0010_decision_policy
Create Date: 2026-12-04 22:40:00
"""

from __future__ import annotations

import sqlalchemy as sa
from alembic import op

import server.store.types

revision = "0010_testing_change_review"
down_revision = "0010_decision_policy"
branch_labels = None
depends_on = None


def upgrade() -> None:
    op.create_table(
        "testing_change_review",
        sa.Column("id", sa.BigInteger().with_variant(sa.Integer(), "sqlite"), nullable=False),
        sa.Column("region_id", sa.Integer(), nullable=False),
        sa.Column("change_day", sa.Date(), nullable=False),
        sa.Column("verdict", sa.String(length=16), nullable=False),
        sa.Column("note", sa.Text(), nullable=False),
        sa.Column("office_day", sa.Date(), nullable=False),
        sa.Column("reviewed_by", sa.Integer(), nullable=True),
        sa.Column("reviewed_at", server.store.types.UTCDateTime(), nullable=False),
        sa.ForeignKeyConstraint(["reviewed_by"], ["app_user.id"]),
        sa.ForeignKeyConstraint(["region_id"], ["region.id"]),
        sa.PrimaryKeyConstraint("id"),
    )
    op.create_index(op.f("ix_testing_change_review_region_id"), "testing_change_review",
                    ["region_id"], unique=False)
    op.create_index(op.f("ix_testing_change_review_reviewed_at"), "testing_change_review",
                    ["reviewed_at"], unique=False)


def downgrade() -> None:
    op.drop_index(op.f("ix_testing_change_review_reviewed_at"),
                  table_name="testing_change_review")
    op.drop_index(op.f("ix_testing_change_review_region_id"), table_name="testing_change_review")
    op.drop_table("testing_change_review")
