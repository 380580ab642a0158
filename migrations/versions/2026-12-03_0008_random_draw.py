"""review: record on each first verdict whether the random draw sent its alert to a second review

Revision ID: 0008
Revises: 0007

Back-fill: a first verdict other than "unsure" reached a second review only through the draw, so
for those the alert's recorded routing (``alert.needs_second_review``) is the answer. "Unsure"
verdicts went to a second reviewer either way; for them the keyed draw is recomputed with the
application's routing key and each trial's current second-review share.
"""

import hashlib
import hmac
from collections.abc import Callable, Sequence

import sqlalchemy as sa
from alembic import context, op

revision: str = "0008"
down_revision: str | None = "0007"
branch_labels: str | Sequence[str] | None = None
depends_on: str | Sequence[str] | None = None

DEFAULT_SHARE = 0.10

verdict = sa.table(
    "verdict",
    sa.column("id", sa.Integer),
    sa.column("alert_id", sa.Integer),
    sa.column("round", sa.Integer),
    sa.column("label", sa.String),
    sa.column("random_draw", sa.Boolean),
)
alert = sa.table(
    "alert",
    sa.column("id", sa.Integer),
    sa.column("trial_id", sa.Integer),
    sa.column("needs_second_review", sa.Boolean),
)
trial = sa.table("trial", sa.column("id", sa.Integer), sa.column("second_review_share", sa.Float))


def _routing_key() -> bytes:
    # The rule as it stood at this revision (server/review/queue.py: routing_key), kept here so
    # that later changes to the queue cannot change what this step wrote. A caller may hand in
    # the key; otherwise it comes from the application's secret.
    key = context.config.attributes.get("review_routing_key")
    if key is None:
        from server.settings import Settings

        secret = Settings().resolved_secret_key()
        key = hmac.new(secret.encode(), b"trialhouse review routing", hashlib.sha256).digest()
    return bytes(key)


def _drawn(key: bytes, alert_id: int, share: float) -> bool:
    digest = hmac.new(key, f"second:{alert_id}".encode(), hashlib.sha256).digest()
    return int.from_bytes(digest[:8], "big") / 2.0**64 < share


def upgrade() -> None:
    with op.batch_alter_table("verdict", schema=None) as batch_op:
        batch_op.add_column(sa.Column("random_draw", sa.Boolean(), nullable=True))

    back_fill(op.get_bind(), _routing_key)


def back_fill(bind: sa.Connection, routing_key: Callable[[], bytes]) -> None:
    """Write ``random_draw`` on every first verdict (see the module docstring)."""
    routed = sa.select(alert.c.needs_second_review).where(alert.c.id == verdict.c.alert_id).scalar_subquery()
    bind.execute(
        sa.update(verdict).where(verdict.c.round == 1, verdict.c.label != "unsure").values(random_draw=routed)
    )
    unsure = bind.execute(
        sa.select(verdict.c.id, alert.c.id, alert.c.needs_second_review, trial.c.second_review_share)
        .join(alert, alert.c.id == verdict.c.alert_id)
        .join(trial, trial.c.id == alert.c.trial_id)
        .where(verdict.c.round == 1, verdict.c.label == "unsure")
    ).all()
    if not unsure:
        return
    key = routing_key()  # only now: a database without unsure verdicts needs no secret
    # A private clip skipped the second review (needs_second_review false): never drawn.
    values = [
        {
            "v_id": vid,
            "v_drawn": bool(routed_on) and _drawn(key, aid, DEFAULT_SHARE if share is None else float(share)),
        }
        for vid, aid, routed_on, share in unsure
    ]
    bind.execute(
        sa.update(verdict)
        .where(verdict.c.id == sa.bindparam("v_id"))
        .values(random_draw=sa.bindparam("v_drawn")),
        values,
    )


def downgrade() -> None:
    with op.batch_alter_table("verdict", schema=None) as batch_op:
        batch_op.drop_column("random_draw")
