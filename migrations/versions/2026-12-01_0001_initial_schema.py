"""initial schema

Revision ID: 0001
Revises: 
Create Date: 2026-12-01 22:37:57.114492
"""
from collections.abc import Sequence

import sqlalchemy as sa
from alembic import op

import server.db


revision: str = '0001'
down_revision: str | None = None
branch_labels: str | Sequence[str] | None = None
depends_on: str | Sequence[str] | None = None


def upgrade() -> None:
    
    op.create_table('clip',
    sa.Column('id', sa.Integer(), nullable=False),
    sa.Column('sha256', sa.String(length=64), nullable=False),
    sa.Column('storage_key', sa.String(length=200), nullable=False),
    sa.Column('format', sa.String(length=16), nullable=False),
    sa.Column('subtype', sa.String(length=16), nullable=False),
    sa.Column('sample_rate_hz', sa.Integer(), nullable=False),
    sa.Column('channels', sa.Integer(), nullable=False),
    sa.Column('frames', sa.Integer(), nullable=False),
    sa.Column('duration_s', sa.Float(), nullable=False),
    sa.Column('peak_dbfs', sa.Float(), nullable=False),
    sa.Column('rms_dbfs', sa.Float(), nullable=False),
    sa.Column('clipped_fraction', sa.Float(), nullable=False),
    sa.Column('size_bytes', sa.Integer(), nullable=False),
    sa.Column('created_at', server.db.UTCDateTime(timezone=True), nullable=False),
    sa.Column('erased_at', server.db.UTCDateTime(timezone=True), nullable=True),
    sa.Column('erased_reason', sa.String(length=40), nullable=True),
    sa.PrimaryKeyConstraint('id', name=op.f('pk_clip')),
    sa.UniqueConstraint('sha256', name=op.f('uq_clip_sha256'))
    )
    op.create_table('trial',
    sa.Column('id', sa.Integer(), nullable=False),
    sa.Column('code', sa.String(length=40), nullable=False),
    sa.Column('name', sa.String(length=200), nullable=False),
    sa.Column('starts_on', sa.Date(), nullable=False),
    sa.Column('ends_on', sa.Date(), nullable=True),
    sa.Column('sound_classes', sa.JSON(), nullable=False),
    sa.Column('fa_target_per_home_month', sa.Float(), nullable=False),
    sa.Column('timezone', sa.String(length=64), nullable=False),
    sa.Column('causes', sa.JSON(), nullable=False),
    sa.Column('second_review_share', sa.Float(), nullable=False),
    sa.Column('quota_states', sa.JSON(), nullable=False),
    sa.Column('created_at', server.db.UTCDateTime(timezone=True), nullable=False),
    sa.PrimaryKeyConstraint('id', name=op.f('pk_trial')),
    sa.UniqueConstraint('code', name=op.f('uq_trial_code'))
    )
    op.create_table('user_account',
    sa.Column('id', sa.Integer(), nullable=False),
    sa.Column('email', sa.String(length=254), nullable=False),
    sa.Column('name', sa.String(length=200), nullable=False),
    sa.Column('role', sa.String(length=20), nullable=False),
    sa.Column('password_hash', sa.String(length=255), nullable=False),
    sa.Column('is_adjudicator', sa.Boolean(), nullable=False),
    sa.Column('active', sa.Boolean(), nullable=False),
    sa.Column('created_at', server.db.UTCDateTime(timezone=True), nullable=False),
    sa.Column('last_login_at', server.db.UTCDateTime(timezone=True), nullable=True),
    sa.PrimaryKeyConstraint('id', name=op.f('pk_user_account')),
    sa.UniqueConstraint('email', name=op.f('uq_user_account_email'))
    )
    op.create_table('api_token',
    sa.Column('id', sa.Integer(), nullable=False),
    sa.Column('user_id', sa.Integer(), nullable=False),
    sa.Column('label', sa.String(length=100), nullable=False),
    sa.Column('token_hash', sa.String(length=64), nullable=False),
    sa.Column('created_at', server.db.UTCDateTime(timezone=True), nullable=False),
    sa.Column('last_used_at', server.db.UTCDateTime(timezone=True), nullable=True),
    sa.Column('revoked', sa.Boolean(), nullable=False),
    sa.ForeignKeyConstraint(['user_id'], ['user_account.id'], name=op.f('fk_api_token_user_id_user_account'), ondelete='CASCADE'),
    sa.PrimaryKeyConstraint('id', name=op.f('pk_api_token')),
    sa.UniqueConstraint('token_hash', name=op.f('uq_api_token_token_hash'))
    )
    with op.batch_alter_table('api_token', schema=None) as batch_op:
        batch_op.create_index(batch_op.f('ix_api_token_user_id'), ['user_id'], unique=False)

    op.create_table('attribute_definition',
    sa.Column('id', sa.Integer(), nullable=False),
    sa.Column('trial_id', sa.Integer(), nullable=False),
    sa.Column('key', sa.String(length=60), nullable=False),
    sa.Column('label', sa.String(length=200), nullable=False),
    sa.Column('kind', sa.String(length=20), nullable=False),
    sa.Column('options', sa.JSON(), nullable=False),
    sa.Column('position', sa.Integer(), nullable=False),
    sa.ForeignKeyConstraint(['trial_id'], ['trial.id'], name=op.f('fk_attribute_definition_trial_id_trial'), ondelete='CASCADE'),
    sa.PrimaryKeyConstraint('id', name=op.f('pk_attribute_definition')),
    sa.UniqueConstraint('trial_id', 'key', name='uq_attribute_definition_trial_key')
    )
    op.create_table('audit_event',
    sa.Column('id', sa.Integer(), nullable=False),
    sa.Column('at', server.db.UTCDateTime(timezone=True), nullable=False),
    sa.Column('actor_id', sa.Integer(), nullable=True),
    sa.Column('actor_label', sa.String(length=120), nullable=False),
    sa.Column('action', sa.String(length=80), nullable=False),
    sa.Column('object_type', sa.String(length=40), nullable=False),
    sa.Column('object_id', sa.String(length=80), nullable=True),
    sa.Column('detail', sa.JSON(), nullable=False),
    sa.ForeignKeyConstraint(['actor_id'], ['user_account.id'], name=op.f('fk_audit_event_actor_id_user_account'), ondelete='SET NULL'),
    sa.PrimaryKeyConstraint('id', name=op.f('pk_audit_event'))
    )
    with op.batch_alter_table('audit_event', schema=None) as batch_op:
        batch_op.create_index(batch_op.f('ix_audit_event_action'), ['action'], unique=False)
        batch_op.create_index(batch_op.f('ix_audit_event_at'), ['at'], unique=False)

    op.create_table('device',
    sa.Column('id', sa.Integer(), nullable=False),
    sa.Column('trial_id', sa.Integer(), nullable=False),
    sa.Column('serial', sa.String(length=64), nullable=False),
    sa.Column('hardware_model', sa.String(length=64), nullable=False),
    sa.Column('firmware', sa.String(length=64), nullable=True),
    sa.Column('token_hash', sa.String(length=64), nullable=False),
    sa.Column('revoked', sa.Boolean(), nullable=False),
    sa.Column('revoked_at', server.db.UTCDateTime(timezone=True), nullable=True),
    sa.Column('heartbeat_interval_s', sa.Integer(), nullable=False),
    sa.Column('last_seen_at', server.db.UTCDateTime(timezone=True), nullable=True),
    sa.Column('clock_skew_s', sa.Float(), nullable=True),
    sa.Column('created_at', server.db.UTCDateTime(timezone=True), nullable=False),
    sa.ForeignKeyConstraint(['trial_id'], ['trial.id'], name=op.f('fk_device_trial_id_trial')),
    sa.PrimaryKeyConstraint('id', name=op.f('pk_device')),
    sa.UniqueConstraint('serial', name=op.f('uq_device_serial')),
    sa.UniqueConstraint('token_hash', name=op.f('uq_device_token_hash'))
    )
    with op.batch_alter_table('device', schema=None) as batch_op:
        batch_op.create_index(batch_op.f('ix_device_trial_id'), ['trial_id'], unique=False)

    op.create_table('home',
    sa.Column('id', sa.Integer(), nullable=False),
    sa.Column('trial_id', sa.Integer(), nullable=False),
    sa.Column('code', sa.String(length=16), nullable=False),
    sa.Column('state', sa.String(length=20), nullable=False),
    sa.Column('state_changed_at', server.db.UTCDateTime(timezone=True), nullable=False),
    sa.Column('attributes', sa.JSON(), nullable=False),
    sa.Column('created_at', server.db.UTCDateTime(timezone=True), nullable=False),
    sa.Column('erased_at', server.db.UTCDateTime(timezone=True), nullable=True),
    sa.ForeignKeyConstraint(['trial_id'], ['trial.id'], name=op.f('fk_home_trial_id_trial')),
    sa.PrimaryKeyConstraint('id', name=op.f('pk_home')),
    sa.UniqueConstraint('code', name=op.f('uq_home_code'))
    )
    with op.batch_alter_table('home', schema=None) as batch_op:
        batch_op.create_index(batch_op.f('ix_home_trial_id'), ['trial_id'], unique=False)

    op.create_table('quota_target',
    sa.Column('id', sa.Integer(), nullable=False),
    sa.Column('trial_id', sa.Integer(), nullable=False),
    sa.Column('label', sa.String(length=200), nullable=False),
    sa.Column('attribute_key', sa.String(length=60), nullable=True),
    sa.Column('value', sa.JSON(), nullable=True),
    sa.Column('min_count', sa.Integer(), nullable=True),
    sa.Column('max_count', sa.Integer(), nullable=True),
    sa.Column('position', sa.Integer(), nullable=False),
    sa.ForeignKeyConstraint(['trial_id'], ['trial.id'], name=op.f('fk_quota_target_trial_id_trial'), ondelete='CASCADE'),
    sa.PrimaryKeyConstraint('id', name=op.f('pk_quota_target'))
    )
    with op.batch_alter_table('quota_target', schema=None) as batch_op:
        batch_op.create_index(batch_op.f('ix_quota_target_trial_id'), ['trial_id'], unique=False)

    op.create_table('consent',
    sa.Column('id', sa.Integer(), nullable=False),
    sa.Column('home_id', sa.Integer(), nullable=False),
    sa.Column('form_version', sa.String(length=40), nullable=False),
    sa.Column('consented_on', sa.Date(), nullable=False),
    sa.Column('staff_may_listen', sa.Boolean(), nullable=False),
    sa.Column('retention_days', sa.Integer(), nullable=False),
    sa.Column('recorded_by_id', sa.Integer(), nullable=True),
    sa.Column('recorded_at', server.db.UTCDateTime(timezone=True), nullable=False),
    sa.ForeignKeyConstraint(['home_id'], ['home.id'], name=op.f('fk_consent_home_id_home'), ondelete='CASCADE'),
    sa.ForeignKeyConstraint(['recorded_by_id'], ['user_account.id'], name=op.f('fk_consent_recorded_by_id_user_account'), ondelete='SET NULL'),
    sa.PrimaryKeyConstraint('id', name=op.f('pk_consent'))
    )
    with op.batch_alter_table('consent', schema=None) as batch_op:
        batch_op.create_index(batch_op.f('ix_consent_home_id'), ['home_id'], unique=False)

    op.create_table('home_contact',
    sa.Column('id', sa.Integer(), nullable=False),
    sa.Column('home_id', sa.Integer(), nullable=False),
    sa.Column('names', sa.String(length=300), nullable=False),
    sa.Column('address', sa.Text(), nullable=False),
    sa.Column('phone', sa.String(length=60), nullable=False),
    sa.Column('email', sa.String(length=254), nullable=False),
    sa.Column('access_notes', sa.Text(), nullable=False),
    sa.Column('updated_at', server.db.UTCDateTime(timezone=True), nullable=False),
    sa.ForeignKeyConstraint(['home_id'], ['home.id'], name=op.f('fk_home_contact_home_id_home'), ondelete='CASCADE'),
    sa.PrimaryKeyConstraint('id', name=op.f('pk_home_contact')),
    sa.UniqueConstraint('home_id', name=op.f('uq_home_contact_home_id'))
    )
    op.create_table('home_state_change',
    sa.Column('id', sa.Integer(), nullable=False),
    sa.Column('home_id', sa.Integer(), nullable=False),
    sa.Column('from_state', sa.String(length=20), nullable=True),
    sa.Column('to_state', sa.String(length=20), nullable=False),
    sa.Column('at', server.db.UTCDateTime(timezone=True), nullable=False),
    sa.Column('by_id', sa.Integer(), nullable=True),
    sa.Column('note', sa.Text(), nullable=True),
    sa.Column('listening', sa.Boolean(), nullable=False),
    sa.ForeignKeyConstraint(['by_id'], ['user_account.id'], name=op.f('fk_home_state_change_by_id_user_account'), ondelete='SET NULL'),
    sa.ForeignKeyConstraint(['home_id'], ['home.id'], name=op.f('fk_home_state_change_home_id_home'), ondelete='CASCADE'),
    sa.PrimaryKeyConstraint('id', name=op.f('pk_home_state_change'))
    )
    with op.batch_alter_table('home_state_change', schema=None) as batch_op:
        batch_op.create_index(batch_op.f('ix_home_state_change_home_id'), ['home_id'], unique=False)

    op.create_table('installation',
    sa.Column('id', sa.Integer(), nullable=False),
    sa.Column('device_id', sa.Integer(), nullable=False),
    sa.Column('home_id', sa.Integer(), nullable=False),
    sa.Column('room', sa.String(length=20), nullable=False),
    sa.Column('installed_at', server.db.UTCDateTime(timezone=True), nullable=False),
    sa.Column('removed_at', server.db.UTCDateTime(timezone=True), nullable=True),
    sa.Column('created_at', server.db.UTCDateTime(timezone=True), nullable=False),
    sa.ForeignKeyConstraint(['device_id'], ['device.id'], name=op.f('fk_installation_device_id_device')),
    sa.ForeignKeyConstraint(['home_id'], ['home.id'], name=op.f('fk_installation_home_id_home')),
    sa.PrimaryKeyConstraint('id', name=op.f('pk_installation'))
    )
    with op.batch_alter_table('installation', schema=None) as batch_op:
        batch_op.create_index('ix_installation_device_from', ['device_id', 'installed_at'], unique=False)
        batch_op.create_index(batch_op.f('ix_installation_home_id'), ['home_id'], unique=False)

    op.create_table('listening_segment',
    sa.Column('id', sa.Integer(), nullable=False),
    sa.Column('device_id', sa.Integer(), nullable=False),
    sa.Column('started_at', server.db.UTCDateTime(timezone=True), nullable=False),
    sa.Column('ended_at', server.db.UTCDateTime(timezone=True), nullable=False),
    sa.Column('is_open', sa.Boolean(), nullable=False),
    sa.Column('heartbeats', sa.Integer(), nullable=False),
    sa.ForeignKeyConstraint(['device_id'], ['device.id'], name=op.f('fk_listening_segment_device_id_device'), ondelete='CASCADE'),
    sa.PrimaryKeyConstraint('id', name=op.f('pk_listening_segment'))
    )
    with op.batch_alter_table('listening_segment', schema=None) as batch_op:
        batch_op.create_index('ix_listening_segment_device_start', ['device_id', 'started_at'], unique=False)
        batch_op.create_index(batch_op.f('ix_listening_segment_ended_at'), ['ended_at'], unique=False)

    op.create_table('staged_event',
    sa.Column('id', sa.Integer(), nullable=False),
    sa.Column('trial_id', sa.Integer(), nullable=False),
    sa.Column('home_id', sa.Integer(), nullable=False),
    sa.Column('sound_class', sa.String(length=64), nullable=False),
    sa.Column('started_at', server.db.UTCDateTime(timezone=True), nullable=False),
    sa.Column('ended_at', server.db.UTCDateTime(timezone=True), nullable=False),
    sa.Column('source', sa.Text(), nullable=False),
    sa.Column('level_db', sa.Float(), nullable=True),
    sa.Column('created_by_id', sa.Integer(), nullable=True),
    sa.Column('created_at', server.db.UTCDateTime(timezone=True), nullable=False),
    sa.ForeignKeyConstraint(['created_by_id'], ['user_account.id'], name=op.f('fk_staged_event_created_by_id_user_account'), ondelete='SET NULL'),
    sa.ForeignKeyConstraint(['home_id'], ['home.id'], name=op.f('fk_staged_event_home_id_home')),
    sa.ForeignKeyConstraint(['trial_id'], ['trial.id'], name=op.f('fk_staged_event_trial_id_trial')),
    sa.PrimaryKeyConstraint('id', name=op.f('pk_staged_event'))
    )
    with op.batch_alter_table('staged_event', schema=None) as batch_op:
        batch_op.create_index(batch_op.f('ix_staged_event_home_id'), ['home_id'], unique=False)
        batch_op.create_index(batch_op.f('ix_staged_event_trial_id'), ['trial_id'], unique=False)

    op.create_table('alert',
    sa.Column('id', sa.Integer(), nullable=False),
    sa.Column('device_id', sa.Integer(), nullable=False),
    sa.Column('trial_id', sa.Integer(), nullable=False),
    sa.Column('home_id', sa.Integer(), nullable=True),
    sa.Column('installation_id', sa.Integer(), nullable=True),
    sa.Column('event_id', sa.String(length=128), nullable=False),
    sa.Column('sound_class', sa.String(length=64), nullable=False),
    sa.Column('score', sa.Float(), nullable=False),
    sa.Column('detected_at', server.db.UTCDateTime(timezone=True), nullable=False),
    sa.Column('detected_at_text', sa.String(length=64), nullable=False),
    sa.Column('clock_skew_s', sa.Float(), nullable=True),
    sa.Column('received_at', server.db.UTCDateTime(timezone=True), nullable=False),
    sa.Column('firmware', sa.String(length=64), nullable=False),
    sa.Column('clip_id', sa.Integer(), nullable=False),
    sa.Column('clip_offset_s', sa.Float(), nullable=False),
    sa.Column('state', sa.String(length=20), nullable=False),
    sa.Column('needs_second_review', sa.Boolean(), nullable=False),
    sa.Column('claimed_by_id', sa.Integer(), nullable=True),
    sa.Column('claim_expires_at', server.db.UTCDateTime(timezone=True), nullable=True),
    sa.Column('final_label', sa.String(length=20), nullable=True),
    sa.Column('final_cause', sa.String(length=40), nullable=True),
    sa.Column('final_resemblance', sa.String(length=20), nullable=True),
    sa.Column('final_method', sa.String(length=20), nullable=True),
    sa.Column('finalized_at', server.db.UTCDateTime(timezone=True), nullable=True),
    sa.Column('private_flag', sa.Boolean(), nullable=False),
    sa.Column('private_flagged_by_id', sa.Integer(), nullable=True),
    sa.ForeignKeyConstraint(['claimed_by_id'], ['user_account.id'], name=op.f('fk_alert_claimed_by_id_user_account'), ondelete='SET NULL'),
    sa.ForeignKeyConstraint(['clip_id'], ['clip.id'], name=op.f('fk_alert_clip_id_clip')),
    sa.ForeignKeyConstraint(['device_id'], ['device.id'], name=op.f('fk_alert_device_id_device')),
    sa.ForeignKeyConstraint(['home_id'], ['home.id'], name=op.f('fk_alert_home_id_home')),
    sa.ForeignKeyConstraint(['installation_id'], ['installation.id'], name=op.f('fk_alert_installation_id_installation')),
    sa.ForeignKeyConstraint(['private_flagged_by_id'], ['user_account.id'], name=op.f('fk_alert_private_flagged_by_id_user_account'), ondelete='SET NULL'),
    sa.ForeignKeyConstraint(['trial_id'], ['trial.id'], name=op.f('fk_alert_trial_id_trial')),
    sa.PrimaryKeyConstraint('id', name=op.f('pk_alert')),
    sa.UniqueConstraint('device_id', 'event_id', name='uq_alert_device_event')
    )
    with op.batch_alter_table('alert', schema=None) as batch_op:
        batch_op.create_index(batch_op.f('ix_alert_clip_id'), ['clip_id'], unique=False)
        batch_op.create_index(batch_op.f('ix_alert_device_id'), ['device_id'], unique=False)
        batch_op.create_index('ix_alert_home_detected', ['home_id', 'detected_at'], unique=False)
        batch_op.create_index(batch_op.f('ix_alert_installation_id'), ['installation_id'], unique=False)
        batch_op.create_index('ix_alert_state_received', ['state', 'received_at'], unique=False)
        batch_op.create_index('ix_alert_trial_detected', ['trial_id', 'detected_at'], unique=False)

    op.create_table('gold_check',
    sa.Column('id', sa.Integer(), nullable=False),
    sa.Column('alert_id', sa.Integer(), nullable=False),
    sa.Column('expected_label', sa.String(length=20), nullable=False),
    sa.Column('expected_cause', sa.String(length=40), nullable=True),
    sa.Column('created_by_id', sa.Integer(), nullable=True),
    sa.Column('created_at', server.db.UTCDateTime(timezone=True), nullable=False),
    sa.ForeignKeyConstraint(['alert_id'], ['alert.id'], name=op.f('fk_gold_check_alert_id_alert'), ondelete='CASCADE'),
    sa.ForeignKeyConstraint(['created_by_id'], ['user_account.id'], name=op.f('fk_gold_check_created_by_id_user_account'), ondelete='SET NULL'),
    sa.PrimaryKeyConstraint('id', name=op.f('pk_gold_check')),
    sa.UniqueConstraint('alert_id', name=op.f('uq_gold_check_alert_id'))
    )
    op.create_table('verdict',
    sa.Column('id', sa.Integer(), nullable=False),
    sa.Column('alert_id', sa.Integer(), nullable=False),
    sa.Column('reviewer_id', sa.Integer(), nullable=False),
    sa.Column('round', sa.Integer(), nullable=False),
    sa.Column('label', sa.String(length=20), nullable=False),
    sa.Column('cause', sa.String(length=40), nullable=True),
    sa.Column('resemblance', sa.String(length=20), nullable=True),
    sa.Column('note', sa.Text(), nullable=True),
    sa.Column('created_at', server.db.UTCDateTime(timezone=True), nullable=False),
    sa.ForeignKeyConstraint(['alert_id'], ['alert.id'], name=op.f('fk_verdict_alert_id_alert'), ondelete='CASCADE'),
    sa.ForeignKeyConstraint(['reviewer_id'], ['user_account.id'], name=op.f('fk_verdict_reviewer_id_user_account')),
    sa.PrimaryKeyConstraint('id', name=op.f('pk_verdict')),
    sa.UniqueConstraint('alert_id', 'round', name='uq_verdict_alert_round')
    )
    with op.batch_alter_table('verdict', schema=None) as batch_op:
        batch_op.create_index(batch_op.f('ix_verdict_alert_id'), ['alert_id'], unique=False)
        batch_op.create_index(batch_op.f('ix_verdict_reviewer_id'), ['reviewer_id'], unique=False)

    op.create_table('gold_answer',
    sa.Column('id', sa.Integer(), nullable=False),
    sa.Column('gold_check_id', sa.Integer(), nullable=False),
    sa.Column('reviewer_id', sa.Integer(), nullable=False),
    sa.Column('label', sa.String(length=20), nullable=False),
    sa.Column('cause', sa.String(length=40), nullable=True),
    sa.Column('correct', sa.Boolean(), nullable=False),
    sa.Column('created_at', server.db.UTCDateTime(timezone=True), nullable=False),
    sa.ForeignKeyConstraint(['gold_check_id'], ['gold_check.id'], name=op.f('fk_gold_answer_gold_check_id_gold_check'), ondelete='CASCADE'),
    sa.ForeignKeyConstraint(['reviewer_id'], ['user_account.id'], name=op.f('fk_gold_answer_reviewer_id_user_account')),
    sa.PrimaryKeyConstraint('id', name=op.f('pk_gold_answer')),
    sa.UniqueConstraint('gold_check_id', 'reviewer_id', name='uq_gold_answer_check_reviewer')
    )
    with op.batch_alter_table('gold_answer', schema=None) as batch_op:
        batch_op.create_index(batch_op.f('ix_gold_answer_reviewer_id'), ['reviewer_id'], unique=False)

    


def downgrade() -> None:
    
    with op.batch_alter_table('gold_answer', schema=None) as batch_op:
        batch_op.drop_index(batch_op.f('ix_gold_answer_reviewer_id'))

    op.drop_table('gold_answer')
    with op.batch_alter_table('verdict', schema=None) as batch_op:
        batch_op.drop_index(batch_op.f('ix_verdict_reviewer_id'))
        batch_op.drop_index(batch_op.f('ix_verdict_alert_id'))

    op.drop_table('verdict')
    op.drop_table('gold_check')
    with op.batch_alter_table('alert', schema=None) as batch_op:
        batch_op.drop_index('ix_alert_trial_detected')
        batch_op.drop_index('ix_alert_state_received')
        batch_op.drop_index(batch_op.f('ix_alert_installation_id'))
        batch_op.drop_index('ix_alert_home_detected')
        batch_op.drop_index(batch_op.f('ix_alert_device_id'))
        batch_op.drop_index(batch_op.f('ix_alert_clip_id'))

    op.drop_table('alert')
    with op.batch_alter_table('staged_event', schema=None) as batch_op:
        batch_op.drop_index(batch_op.f('ix_staged_event_trial_id'))
        batch_op.drop_index(batch_op.f('ix_staged_event_home_id'))

    op.drop_table('staged_event')
    with op.batch_alter_table('listening_segment', schema=None) as batch_op:
        batch_op.drop_index(batch_op.f('ix_listening_segment_ended_at'))
        batch_op.drop_index('ix_listening_segment_device_start')

    op.drop_table('listening_segment')
    with op.batch_alter_table('installation', schema=None) as batch_op:
        batch_op.drop_index(batch_op.f('ix_installation_home_id'))
        batch_op.drop_index('ix_installation_device_from')

    op.drop_table('installation')
    with op.batch_alter_table('home_state_change', schema=None) as batch_op:
        batch_op.drop_index(batch_op.f('ix_home_state_change_home_id'))

    op.drop_table('home_state_change')
    op.drop_table('home_contact')
    with op.batch_alter_table('consent', schema=None) as batch_op:
        batch_op.drop_index(batch_op.f('ix_consent_home_id'))

    op.drop_table('consent')
    with op.batch_alter_table('quota_target', schema=None) as batch_op:
        batch_op.drop_index(batch_op.f('ix_quota_target_trial_id'))

    op.drop_table('quota_target')
    with op.batch_alter_table('home', schema=None) as batch_op:
        batch_op.drop_index(batch_op.f('ix_home_trial_id'))

    op.drop_table('home')
    with op.batch_alter_table('device', schema=None) as batch_op:
        batch_op.drop_index(batch_op.f('ix_device_trial_id'))

    op.drop_table('device')
    with op.batch_alter_table('audit_event', schema=None) as batch_op:
        batch_op.drop_index(batch_op.f('ix_audit_event_at'))
        batch_op.drop_index(batch_op.f('ix_audit_event_action'))

    op.drop_table('audit_event')
    op.drop_table('attribute_definition')
    with op.batch_alter_table('api_token', schema=None) as batch_op:
        batch_op.drop_index(batch_op.f('ix_api_token_user_id'))

    op.drop_table('api_token')
    op.drop_table('user_account')
    op.drop_table('trial')
    op.drop_table('clip')
    
