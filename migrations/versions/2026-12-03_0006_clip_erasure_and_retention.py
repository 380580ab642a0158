"""clips: one live row per SHA-256 (erased rows keep theirs); retention for clips with no home

Revision ID: 0006
Revises: 0005
"""
from collections.abc import Sequence

import sqlalchemy as sa
from alembic import op

revision: str = "0006"
down_revision: str | None = "0005"
branch_labels: str | Sequence[str] | None = None
depends_on: str | Sequence[str] | None = None

LIVE = sa.text("erased_at IS NULL")


def upgrade() -> None:
    with op.batch_alter_table("clip", schema=None) as batch_op:
        batch_op.drop_constraint("uq_clip_sha256", type_="unique")
        batch_op.create_index("ix_clip_sha256_live", ["sha256"], unique=True,
                              sqlite_where=LIVE, postgresql_where=LIVE)
    with op.batch_alter_table("trial", schema=None) as batch_op:
        batch_op.add_column(sa.Column("unassigned_clip_retention_days", sa.Integer(), nullable=False,
                                      server_default="30"))


def downgrade() -> None:
    with op.batch_alter_table("trial", schema=None) as batch_op:
        batch_op.drop_column("unassigned_clip_retention_days")
    # Erased rows that share a SHA-256 with another row cannot stay under a plain unique constraint:
    # they keep their row (their alerts point at it) under a placeholder naming the row instead.
    op.execute(
        "UPDATE clip SET sha256 = 'erased-' || CAST(id AS VARCHAR(20)) "
        "WHERE erased_at IS NOT NULL AND sha256 IN "
        "(SELECT sha256 FROM clip GROUP BY sha256 HAVING COUNT(*) > 1)"
    )
    with op.batch_alter_table("clip", schema=None) as batch_op:
        batch_op.drop_index("ix_clip_sha256_live")
        batch_op.create_unique_constraint("uq_clip_sha256", ["sha256"])
