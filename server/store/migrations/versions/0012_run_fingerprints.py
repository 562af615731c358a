"""fingerprints of the newest evaluation run per ruleset, for the next run's comparison

``evaluation_run.fingerprints`` holds, for the newest run of each ruleset only, the packed
per-region-day fingerprints of the engine's state (``server/services/run_fingerprints.py``):
the next run builds explanations and hashes only where they differ. Nullable: older runs and
older databases have none (their next run builds every row, as before).

Revision ID: 0011_run_fingerprints
Revises: 0010_testing_change_review
Create Date: 2026-12-04 23:40:00
"""

from __future__ import annotations

import sqlalchemy as sa
from alembic import op

revision = "0011_run_fingerprints"
down_revision = "0010_testing_change_review"
branch_labels = None
depends_on = None


def upgrade() -> None:
    with op.batch_alter_table("evaluation_run") as batch:
        batch.add_column(sa.Column("fingerprints", sa.LargeBinary(), nullable=True))


def downgrade() -> None:
    with op.batch_alter_table("evaluation_run") as batch:
        batch.drop_column("fingerprints")
