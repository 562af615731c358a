"""observation WITHOUT ROWID on SQLite

On SQLite the observation table becomes ``WITHOUT ROWID``: its primary key (measure_id,
region_id, ref_date, vintage_id) is the table's own B-tree, so a bulk insert writes one B-tree
instead of a rowid table plus the key's index. SQLite cannot change this option in place, so the
table is rebuilt: a new table is created, every row is copied in one statement, the old table is
dropped, the new one renamed, and the indexes the old table had (other than its key) are created
again. All of it runs in the migration's transaction, so a failure leaves the old table as it was.
PostgreSQL has no rowid; nothing changes there.

Revision ID: 0005
Revises: 0004
Create Date: 2026-12-03 10:00:00
"""

from __future__ import annotations

import sqlalchemy as sa
from alembic import op

revision = "0005"
down_revision = "0004"
branch_labels = None
depends_on = None

_COLUMNS = "measure_id, region_id, ref_date, vintage_id, value"
_SCRATCH = "_observation_rebuild"


def upgrade() -> None:
    _rebuild(with_rowid=False)


def downgrade() -> None:
    _rebuild(with_rowid=True)


def _rebuild(*, with_rowid: bool) -> None:
    """Rebuild ``observation`` on SQLite with or without a rowid, keeping every row."""
    bind = op.get_bind()
    if bind.dialect.name != "sqlite":
        return
    # pysqlite opens a transaction only before DML; begin one explicitly so that the CREATE
    # TABLE below belongs to the same transaction as the copy, the DROP and the RENAME.
    if not bind.connection.driver_connection.in_transaction:  # type: ignore[union-attr]
        bind.exec_driver_sql("BEGIN")
    indexes = [
        sql for (sql,) in bind.exec_driver_sql(
            "SELECT sql FROM sqlite_master WHERE type = 'index' AND tbl_name = 'observation' "
            "AND sql IS NOT NULL ORDER BY name"
        )
    ]
    op.create_table(
        _SCRATCH,
        sa.Column("measure_id", sa.Integer(), nullable=False),
        sa.Column("region_id", sa.Integer(), nullable=False),
        sa.Column("ref_date", sa.Date(), nullable=False),
        sa.Column(
            "vintage_id", sa.BigInteger().with_variant(sa.Integer(), "sqlite"), nullable=False
        ),
        sa.Column("value", sa.Float(), nullable=False),
        sa.PrimaryKeyConstraint("measure_id", "region_id", "ref_date", "vintage_id"),
        sqlite_with_rowid=with_rowid,
    )
    # In key order, so that the new B-tree is filled by appending.
    op.execute(
        f"INSERT INTO {_SCRATCH} ({_COLUMNS}) SELECT {_COLUMNS} FROM observation "
        "ORDER BY measure_id, region_id, ref_date, vintage_id"
    )
    op.drop_table("observation")
    op.rename_table(_SCRATCH, "observation")
    for sql in indexes:
        op.execute(sql)
