"""trials: the window within which one home's alerts of one sound class are one disturbance

Revision ID: 0007
Revises: 0006
"""
from collections.abc import Sequence

import sqlalchemy as sa
from alembic import op

revision: str = "0007"
down_revision: str | None = "0006"
branch_labels: str | Sequence[str] | None = None
depends_on: str | Sequence[str] | None = None


def upgrade() -> None:
    with op.batch_alter_table("trial", schema=None) as batch_op:
        batch_op.add_column(sa.Column("disturbance_window_s", sa.Float(), nullable=False, server_default="60"))


def downgrade() -> None:
    with op.batch_alter_table("trial", schema=None) as batch_op:
        batch_op.drop_column("disturbance_window_s")
