"""session generations of staff accounts; background backtest jobs shared by web workers

``app_user.session_generation`` is signed into every session token and bumped on logout, role
change, enabling or disabling and password change, so that older session cookies are refused.
Sessions issued before this revision carry no generation and are refused: everyone signs in
once more after the upgrade.

``backtest_job`` holds the state, progress and result figures of the backtests started from the
Policies page, so that any web worker answers a progress poll.

Revision ID: 0004
Revises: 0003
Create Date: 2026-12-02 10:00:00
"""

from __future__ import annotations

import sqlalchemy as sa
from alembic import op

import server.store.types

revision = "0004"
down_revision = "0003"
branch_labels = None
depends_on = None


def upgrade() -> None:
    with op.batch_alter_table("app_user", schema=None) as batch_op:
        batch_op.add_column(
            sa.Column("session_generation", sa.Integer(), server_default="0", nullable=False)
        )
    op.create_table(
        "backtest_job",
        sa.Column("id", sa.String(length=32), nullable=False),
        sa.Column("ruleset_id", sa.Integer(), nullable=False),
        sa.Column("compare_id", sa.Integer(), nullable=True),
        sa.Column("as_known", sa.Boolean(), nullable=False),
        sa.Column("user_name", sa.String(length=100), nullable=False),
        sa.Column("created_at", server.store.types.UTCDateTime(timezone=True), nullable=False),
        sa.Column("state", sa.String(length=16), nullable=False),
        sa.Column("done", sa.Integer(), nullable=False),
        sa.Column("total", sa.Integer(), nullable=False),
        sa.Column("error", sa.Text(), nullable=True),
        sa.Column("worker", sa.String(length=200), nullable=False),
        sa.Column("heartbeat_at", server.store.types.UTCDateTime(timezone=True), nullable=False),
        sa.Column("finished_at", server.store.types.UTCDateTime(timezone=True), nullable=True),
        sa.Column("results", sa.LargeBinary(), nullable=True),
        sa.ForeignKeyConstraint(["compare_id"], ["ruleset.id"]),
        sa.ForeignKeyConstraint(["ruleset_id"], ["ruleset.id"]),
        sa.PrimaryKeyConstraint("id"),
    )
    with op.batch_alter_table("backtest_job", schema=None) as batch_op:
        batch_op.create_index(
            batch_op.f("ix_backtest_job_created_at"), ["created_at"], unique=False
        )


def downgrade() -> None:
    with op.batch_alter_table("backtest_job", schema=None) as batch_op:
        batch_op.drop_index(batch_op.f("ix_backtest_job_created_at"))
    op.drop_table("backtest_job")
    with op.batch_alter_table("app_user", schema=None) as batch_op:
        batch_op.drop_column("session_generation")
