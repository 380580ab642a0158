"""auth: server-side staff sessions, sign-in strikes, token expiry, must-change-password

Revision ID: 0009
Revises: 0008
"""
import datetime as dt
from collections.abc import Sequence

import sqlalchemy as sa
from alembic import op

import server.db

revision: str = "0009"
down_revision: str | None = "0008"
branch_labels: str | Sequence[str] | None = None
depends_on: str | Sequence[str] | None = None

# Tokens made before expiry existed get the default lifetime from their creation, and at least two
# weeks from the upgrade, so that scripts keep working long enough to be given a new token.
_DEFAULT_DAYS = 90
_GRACE_DAYS = 14


def upgrade() -> None:
    op.create_table(
        "staff_session",
        sa.Column("id", sa.Integer(), nullable=False),
        sa.Column("token_hash", sa.String(length=64), nullable=False),
        sa.Column("user_id", sa.Integer(), nullable=False),
        sa.Column("csrf_token", sa.String(length=64), nullable=False),
        sa.Column("created_at", server.db.UTCDateTime(timezone=True), nullable=False),
        sa.Column("last_seen_at", server.db.UTCDateTime(timezone=True), nullable=False),
        sa.Column("revoked_at", server.db.UTCDateTime(timezone=True), nullable=True),
        sa.Column("end_reason", sa.String(length=40), nullable=True),
        sa.Column("user_agent", sa.String(length=200), nullable=True),
        sa.Column("client_addr", sa.String(length=64), nullable=True),
        sa.ForeignKeyConstraint(["user_id"], ["user_account.id"],
                                name=op.f("fk_staff_session_user_id_user_account"), ondelete="CASCADE"),
        sa.PrimaryKeyConstraint("id", name=op.f("pk_staff_session")),
        sa.UniqueConstraint("token_hash", name=op.f("uq_staff_session_token_hash")),
    )
    with op.batch_alter_table("staff_session", schema=None) as batch_op:
        batch_op.create_index(batch_op.f("ix_staff_session_user_id"), ["user_id"], unique=False)

    op.create_table(
        "sign_in_strikes",
        sa.Column("id", sa.Integer(), nullable=False),
        sa.Column("kind", sa.String(length=10), nullable=False),
        sa.Column("key_digest", sa.String(length=64), nullable=False),
        sa.Column("failures", sa.Integer(), nullable=False),
        sa.Column("first_failed_at", server.db.UTCDateTime(timezone=True), nullable=False),
        sa.Column("last_failed_at", server.db.UTCDateTime(timezone=True), nullable=False),
        sa.Column("blocked_until", server.db.UTCDateTime(timezone=True), nullable=True),
        sa.PrimaryKeyConstraint("id", name=op.f("pk_sign_in_strikes")),
        sa.UniqueConstraint("kind", "key_digest", name=op.f("uq_sign_in_strikes_kind_key_digest")),
    )
    op.create_index("ix_sign_in_strikes_last", "sign_in_strikes", ["last_failed_at"], unique=False)

    with op.batch_alter_table("user_account", schema=None) as batch_op:
        batch_op.add_column(sa.Column("must_change_password", sa.Boolean(), nullable=False,
                                      server_default=sa.false()))
    with op.batch_alter_table("user_account", schema=None) as batch_op:
        batch_op.alter_column("must_change_password", server_default=None)

    with op.batch_alter_table("api_token", schema=None) as batch_op:
        batch_op.add_column(sa.Column("expires_at", server.db.UTCDateTime(timezone=True), nullable=True))
        batch_op.add_column(sa.Column("revoked_at", server.db.UTCDateTime(timezone=True), nullable=True))
    bind = op.get_bind()
    token = sa.table("api_token", sa.column("id", sa.Integer()),
                     sa.column("created_at", server.db.UTCDateTime(timezone=True)),
                     sa.column("expires_at", server.db.UTCDateTime(timezone=True)))
    floor = dt.datetime.now(dt.UTC) + dt.timedelta(days=_GRACE_DAYS)
    for row in bind.execute(sa.select(token.c.id, token.c.created_at)).all():
        created = row.created_at or floor
        expires = max(created + dt.timedelta(days=_DEFAULT_DAYS), floor)
        bind.execute(token.update().where(token.c.id == row.id).values(expires_at=expires))
    with op.batch_alter_table("api_token", schema=None) as batch_op:
        batch_op.alter_column("expires_at", existing_type=server.db.UTCDateTime(timezone=True), nullable=False)


def downgrade() -> None:
    with op.batch_alter_table("api_token", schema=None) as batch_op:
        batch_op.drop_column("revoked_at")
        batch_op.drop_column("expires_at")
    with op.batch_alter_table("user_account", schema=None) as batch_op:
        batch_op.drop_column("must_change_password")
    op.drop_index("ix_sign_in_strikes_last", table_name="sign_in_strikes")
    op.drop_table("sign_in_strikes")
    with op.batch_alter_table("staff_session", schema=None) as batch_op:
        batch_op.drop_index(batch_op.f("ix_staff_session_user_id"))
    op.drop_table("staff_session")
