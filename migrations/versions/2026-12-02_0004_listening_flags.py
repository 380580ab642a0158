"""devices: remember which alerts are known to lie inside a listening segment; index a trial's backlog

Revision ID: 0004
Revises: 0003
"""
from collections.abc import Sequence

import sqlalchemy as sa
from alembic import op

import server.db

revision: str = "0004"
down_revision: str | None = "0003"
branch_labels: str | Sequence[str] | None = None
depends_on: str | Sequence[str] | None = None


def upgrade() -> None:
    # Both columns start NULL ("not known yet"): analytics then checks the segments itself, so
    # existing alerts count exactly as before.
    with op.batch_alter_table("alert", schema=None) as batch_op:
        batch_op.add_column(sa.Column("within_listening", sa.Boolean(), nullable=True))
        batch_op.create_index(
            "ix_alert_trial_state_received", ["trial_id", "state", "received_at"], unique=False
        )
    with op.batch_alter_table("device", schema=None) as batch_op:
        batch_op.add_column(
            sa.Column("listening_check_from", server.db.UTCDateTime(timezone=True), nullable=True)
        )


def downgrade() -> None:
    with op.batch_alter_table("device", schema=None) as batch_op:
        batch_op.drop_column("listening_check_from")
    with op.batch_alter_table("alert", schema=None) as batch_op:
        batch_op.drop_index("ix_alert_trial_state_received")
        batch_op.drop_column("within_listening")
