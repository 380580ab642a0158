"""households: bounds for whole-number attributes

Revision ID: 0002
Revises: 0001
"""

from collections.abc import Sequence

import sqlalchemy as sa
from alembic import op

import server.db  # noqa: F401

revision: str = "0002"
down_revision: str | None = "0001"
branch_labels: str | Sequence[str] | None = None
depends_on: str | Sequence[str] | None = None


def upgrade() -> None:
    with op.batch_alter_table("attribute_definition", schema=None) as batch_op:
        batch_op.add_column(sa.Column("min_value", sa.Integer(), nullable=True))
        batch_op.add_column(sa.Column("max_value", sa.Integer(), nullable=True))


def downgrade() -> None:
    with op.batch_alter_table("attribute_definition", schema=None) as batch_op:
        batch_op.drop_column("max_value")
        batch_op.drop_column("min_value")
