"""devices: record when a device's reported firmware changes

Revision ID: 0005
Revises: 0004
"""
from collections.abc import Sequence

import sqlalchemy as sa
from alembic import op

import server.db

revision: str = "0005"
down_revision: str | None = "0004"
branch_labels: str | Sequence[str] | None = None
depends_on: str | Sequence[str] | None = None


def upgrade() -> None:
    op.create_table(
        "firmware_change",
        sa.Column("id", sa.Integer(), nullable=False),
        sa.Column("device_id", sa.Integer(), nullable=False),
        sa.Column("at", server.db.UTCDateTime(timezone=True), nullable=False),
        sa.Column("firmware", sa.String(length=64), nullable=False),
        sa.ForeignKeyConstraint(
            ["device_id"], ["device.id"], name=op.f("fk_firmware_change_device_id_device"), ondelete="CASCADE"
        ),
        sa.PrimaryKeyConstraint("id", name=op.f("pk_firmware_change")),
    )
    op.create_index("ix_firmware_change_device_at", "firmware_change", ["device_id", "at"], unique=False)
    # What is known so far: each device has run its current firmware since it was registered (its
    # monitored time was credited to that firmware before this table existed).
    op.execute(
        "INSERT INTO firmware_change (device_id, at, firmware) "
        "SELECT id, created_at, firmware FROM device WHERE firmware IS NOT NULL"
    )


def downgrade() -> None:
    op.drop_index("ix_firmware_change_device_at", table_name="firmware_change")
    op.drop_table("firmware_change")
