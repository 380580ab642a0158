"""trials: trial membership per staff member (limits a non-admin to the trials they work on)

Revision ID: 0010
Revises: 0009
"""
from collections.abc import Sequence

import sqlalchemy as sa
from alembic import op

import server.db

revision: str = "0010"
down_revision: str | None = "0009"
branch_labels: str | Sequence[str] | None = None
depends_on: str | Sequence[str] | None = None


def upgrade() -> None:
    op.create_table(
        "trial_membership",
        sa.Column("id", sa.Integer(), nullable=False),
        sa.Column("user_id", sa.Integer(), nullable=False),
        sa.Column("trial_id", sa.Integer(), nullable=False),
        sa.Column("created_at", server.db.UTCDateTime(timezone=True), nullable=False),
        sa.ForeignKeyConstraint(["trial_id"], ["trial.id"],
                                name=op.f("fk_trial_membership_trial_id_trial"), ondelete="CASCADE"),
        sa.ForeignKeyConstraint(["user_id"], ["user_account.id"],
                                name=op.f("fk_trial_membership_user_id_user_account"), ondelete="CASCADE"),
        sa.PrimaryKeyConstraint("id", name=op.f("pk_trial_membership")),
        sa.UniqueConstraint("user_id", "trial_id", name="uq_trial_membership_user_trial"),
    )
    with op.batch_alter_table("trial_membership", schema=None) as batch_op:
        batch_op.create_index(batch_op.f("ix_trial_membership_trial_id"), ["trial_id"], unique=False)
        batch_op.create_index(batch_op.f("ix_trial_membership_user_id"), ["user_id"], unique=False)


def downgrade() -> None:
    with op.batch_alter_table("trial_membership", schema=None) as batch_op:
        batch_op.drop_index(batch_op.f("ix_trial_membership_user_id"))
        batch_op.drop_index(batch_op.f("ix_trial_membership_trial_id"))
    op.drop_table("trial_membership")
