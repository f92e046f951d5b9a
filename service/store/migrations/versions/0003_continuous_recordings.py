"""continuous recordings, and nights that are views of them

Upgrades a 0002 database in place, keeping every row:

- ``recordings`` (empty): a participant's continuous recording with compressed counts and
  markers, its diary, non-wear intervals, sleep periods and PSG references;
- ``nights.recording_pk`` and ``nights.first_epoch`` (NULL: a night posted on its own).

Downgrade removes the recordings and the nights that are views of them (with their cached
scorings and features).

Revision ID: 0003
Revises: 0002
Create Date: 2027-02-02 09:00:00
"""

from collections.abc import Sequence

import sqlalchemy as sa
from alembic import op

revision: str = '0003'
down_revision: str | Sequence[str] | None = '0002'
branch_labels: str | Sequence[str] | None = None
depends_on: str | Sequence[str] | None = None


def upgrade() -> None:
    op.create_table('recordings',
    sa.Column('pk', sa.Integer(), nullable=False),
    sa.Column('participant_pk', sa.Integer(), nullable=False),
    sa.Column('recording_id', sa.String(length=32), nullable=False),
    sa.Column('content_hash', sa.String(length=64), nullable=False),
    sa.Column('start', sa.String(length=40), nullable=False),
    sa.Column('tz', sa.String(length=64), nullable=True),
    sa.Column('start_utc', sa.DateTime(), nullable=False),
    sa.Column('end_utc', sa.DateTime(), nullable=False),
    sa.Column('epoch_seconds', sa.Integer(), nullable=False),
    sa.Column('source_epoch_seconds', sa.Integer(), nullable=True),
    sa.Column('n_epochs', sa.Integer(), nullable=False),
    sa.Column('counts', sa.LargeBinary(), nullable=False),
    sa.Column('markers', sa.LargeBinary(), nullable=False),
    sa.Column('source_format', sa.String(length=16), nullable=False),
    sa.Column('source_name', sa.String(length=200), nullable=True),
    sa.Column('diary', sa.JSON(none_as_null=True), nullable=True),
    sa.Column('nonwear', sa.JSON(), nullable=False),
    sa.Column('periods', sa.JSON(), nullable=False),
    sa.Column('references', sa.JSON(), nullable=False),
    sa.Column('created_at', sa.DateTime(), nullable=False),
    sa.ForeignKeyConstraint(['participant_pk'], ['participants.pk'], ondelete='CASCADE'),
    sa.PrimaryKeyConstraint('pk'),
    sa.UniqueConstraint('participant_pk', 'content_hash', name='uq_recording_content'),
    sa.UniqueConstraint('participant_pk', 'recording_id', name='uq_recording_id')
    )
    op.create_index('ix_recordings_participant_start', 'recordings', ['participant_pk', 'start_utc'], unique=False)
    with op.batch_alter_table('nights', schema=None) as batch_op:
        batch_op.add_column(sa.Column('recording_pk', sa.Integer(), nullable=True))
        batch_op.add_column(sa.Column('first_epoch', sa.Integer(), nullable=True))
        batch_op.create_index('ix_nights_recording_pk', ['recording_pk'], unique=False)
        batch_op.create_foreign_key('fk_nights_recording', 'recordings', ['recording_pk'], ['pk'],
                                    ondelete='CASCADE')


def downgrade() -> None:
    nights = sa.table('nights', sa.column('pk', sa.Integer()), sa.column('recording_pk', sa.Integer()))
    views = sa.select(nights.c.pk).where(nights.c.recording_pk.is_not(None))
    for name in ('scorings', 'night_features'):  # foreign keys are not enforced during migrations on SQLite
        derived = sa.table(name, sa.column('night_pk', sa.Integer()))
        op.execute(sa.delete(derived).where(derived.c.night_pk.in_(views)))
    op.execute(sa.delete(nights).where(nights.c.recording_pk.is_not(None)))
    with op.batch_alter_table('nights', schema=None) as batch_op:
        batch_op.drop_constraint('fk_nights_recording', type_='foreignkey')
        batch_op.drop_index('ix_nights_recording_pk')
        batch_op.drop_column('first_epoch')
        batch_op.drop_column('recording_pk')
    op.drop_index('ix_recordings_participant_start', table_name='recordings')
    op.drop_table('recordings')
