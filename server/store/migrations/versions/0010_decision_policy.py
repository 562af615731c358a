"""decisions carry their policy: several policies are active at once, each with its own tiers

``decision.policy`` names the policy (the ruleset ``name``) a decision belongs to; the official
tier of a district under a policy is its latest decision of that policy. Existing decisions are
filled from the ruleset of the assessment they answered; decisions that answered none (kind
``recorded``, imported) from the active ruleset's name, else the newest stored ruleset's, else
``""`` (a database with decisions but no ruleset). An index over (policy, region, effective
date) serves the official-tier reads.

Revision ID: 0010_decision_policy
Revises: 0007_recorded_events
Create Date: 2026-12-04 22:40:00
"""

from __future__ import annotations

import sqlalchemy as sa
from alembic import op

revision = "0010_decision_policy"
down_revision = "0007_recorded_events"
branch_labels = None
depends_on = None


def upgrade() -> None:
    op.add_column("decision", sa.Column("policy", sa.String(length=100), nullable=True))
    op.execute(
        "UPDATE decision SET policy = (SELECT ruleset.name FROM assessment JOIN ruleset "
        "ON ruleset.id = assessment.ruleset_id WHERE assessment.id = decision.assessment_id) "
        "WHERE assessment_id IS NOT NULL"
    )
    fallback = op.get_bind().execute(sa.text(
        "SELECT name FROM ruleset ORDER BY CASE WHEN status = 'active' THEN 0 ELSE 1 END, "
        "id DESC LIMIT 1"
    )).scalar()
    op.get_bind().execute(sa.text("UPDATE decision SET policy = :name WHERE policy IS NULL"),
                          {"name": fallback or ""})
    with op.batch_alter_table("decision") as batch:
        batch.alter_column("policy", existing_type=sa.String(length=100), nullable=False)
    op.create_index("ix_decision_policy_region_day", "decision",
                    ["policy", "region_id", "effective_date"], unique=False)


def downgrade() -> None:
    op.drop_index("ix_decision_policy_region_day", table_name="decision")
    # SQLite (3.35+) and PostgreSQL both drop a column in place
    op.execute("ALTER TABLE decision DROP COLUMN policy")
