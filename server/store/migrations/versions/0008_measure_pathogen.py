"""measures carry an optional pathogen (or surveillance stream) and their base measure

``measure.pathogen`` names the pathogen a measure concerns (NULL: unqualified, as every measure
before this revision); ``measure.base`` the measure it qualifies (``cases`` for
``cases.influenza``; the name itself for an unqualified one). Observations, vintages and the
as-of reads are untouched: a pathogen-specific measure is one more row of ``measure``.

Both columns are added in place (no table copy: on SQLite a copy of ``measure`` would have to
drop the table the observations point at); ``base`` is filled from ``name``.

Revision ID: 0007_pathogen
Revises: 0007 (0007_forecast_record)
Create Date: 2026-12-04 19:50:00
"""

from __future__ import annotations

import sqlalchemy as sa
from alembic import op

revision = "0007_pathogen"
down_revision = "0007"
branch_labels = None
depends_on = None


def upgrade() -> None:
    op.add_column("measure", sa.Column("base", sa.String(length=64), nullable=False,
                                       server_default=""))
    op.add_column("measure", sa.Column("pathogen", sa.String(length=40), nullable=True))
    op.execute("UPDATE measure SET base = name")
    op.create_index(op.f("ix_measure_base"), "measure", ["base"], unique=False)


def downgrade() -> None:
    op.drop_index(op.f("ix_measure_base"), table_name="measure")
    # SQLite (3.35+) and PostgreSQL both drop a column in place
    op.execute("ALTER TABLE measure DROP COLUMN pathogen")
    op.execute("ALTER TABLE measure DROP COLUMN base")
