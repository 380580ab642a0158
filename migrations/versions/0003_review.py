"""review: index on the alert's claim holder, for the review queue

Revision ID: 0003
Revises: 0002
"""
from collections.abc import Sequence

import sqlalchemy as sa  # noqa: F401
from alembic import op

import server.db  # noqa: F401

revision: str = "0003"
down_revision: str | None = "0002"
branch_labels: str | Sequence[str] | None = None
depends_on: str | Sequence[str] | None = None


def upgrade() -> None:
    with op.batch_alter_table("alert", schema=None) as batch_op:
        batch_op.create_index("ix_alert_claimed_by_id", ["claimed_by_id"], unique=False)


def downgrade() -> None:
    with op.batch_alter_table("alert", schema=None) as batch_op:
        batch_op.drop_index("ix_alert_claimed_by_id")
