"""login attempts stored before the password is checked, for a rate limit shared by workers

``login_attempt`` holds each login attempt from the moment it arrives (committed before the slow
password hash runs), so concurrent attempts and several web workers count against one limit.

Revision ID: 0006
Revises: 0005
Create Date: 2026-12-04 17:00:00
"""

from __future__ import annotations

import sqlalchemy as sa
from alembic import op

import server.store.types

revision = "0006"
down_revision = "0005"
branch_labels = None
depends_on = None


def upgrade() -> None:
    op.create_table(
        "login_attempt",
        sa.Column("id", sa.BigInteger().with_variant(sa.Integer(), "sqlite"), nullable=False),
        sa.Column("at", server.store.types.UTCDateTime(), nullable=False),
        sa.Column("client", sa.String(length=100), nullable=False),
        sa.Column("name_key", sa.String(length=100), nullable=False),
        sa.Column("outcome", sa.String(length=8), nullable=False),
        sa.PrimaryKeyConstraint("id"),
    )
    op.create_index("ix_login_attempt_client_at", "login_attempt", ["client", "at"], unique=False)
    op.create_index(op.f("ix_login_attempt_at"), "login_attempt", ["at"], unique=False)


def downgrade() -> None:
    op.drop_index(op.f("ix_login_attempt_at"), table_name="login_attempt")
    op.drop_index("ix_login_attempt_client_at", table_name="login_attempt")
    op.drop_table("login_attempt")
