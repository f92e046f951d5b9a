"""study epoch length, night management, version counters, import profiles

Upgrades a 0001 database in place, keeping every row:

- ``studies.epoch_seconds`` (existing studies: 30 s);
- ``nights.end_utc`` (computed from ``start_utc``, ``n_epochs`` and ``epoch_seconds``),
  ``nights.source_epoch_seconds`` (NULL: stored as posted) and ``nights.excluded`` (false), and
  an index on ``nights.content_hash`` (the study-wide duplicate check);
- ``model_versions.trained_on_deleted_nights`` (NULL: none deleted);
- ``version_counters``, started at the highest stored version number of each numbering key;
- ``import_profiles`` (empty).

Downgrade drops what the upgrade added (exclusion flags, counters and profiles are lost; nights
aggregated at ingest stay aggregated).

Revision ID: 0002
Revises: 0001
Create Date: 2027-01-12 09:00:00
"""

from collections.abc import Sequence
from datetime import timedelta

import sqlalchemy as sa
from alembic import op

revision: str = '0002'
down_revision: str | Sequence[str] | None = '0001'
branch_labels: str | Sequence[str] | None = None
depends_on: str | Sequence[str] | None = None

_NIGHTS = sa.table('nights', sa.column('pk', sa.Integer()), sa.column('start_utc', sa.DateTime()),
                   sa.column('end_utc', sa.DateTime()), sa.column('epoch_seconds', sa.Integer()),
                   sa.column('n_epochs', sa.Integer()))
_VERSIONS = sa.table('model_versions', sa.column('study_pk', sa.Integer()), sa.column('participant_pk', sa.Integer()),
                     sa.column('version', sa.Integer()))
_PARTICIPANTS = sa.table('participants', sa.column('pk', sa.Integer()), sa.column('participant_id', sa.String()))
_BATCH = 1000


def _fill_night_ends(conn: sa.Connection) -> None:
    rows = conn.execute(sa.select(_NIGHTS.c.pk, _NIGHTS.c.start_utc, _NIGHTS.c.epoch_seconds,
                                  _NIGHTS.c.n_epochs)).all()
    update = (sa.update(_NIGHTS).where(_NIGHTS.c.pk == sa.bindparam('night_pk'))
              .values(end_utc=sa.bindparam('night_end')))
    values = [{'night_pk': pk, 'night_end': start + timedelta(seconds=int(epoch_s) * int(n))}
              for pk, start, epoch_s, n in rows]
    for first in range(0, len(values), _BATCH):
        conn.execute(update, values[first:first + _BATCH])


def _start_counters(conn: sa.Connection, counters: sa.Table) -> None:
    pooled = conn.execute(sa.select(_VERSIONS.c.study_pk, sa.func.max(_VERSIONS.c.version))
                          .where(_VERSIONS.c.participant_pk.is_(None)).group_by(_VERSIONS.c.study_pk)).all()
    personal = conn.execute(
        sa.select(_VERSIONS.c.study_pk, _PARTICIPANTS.c.participant_id, sa.func.max(_VERSIONS.c.version))
        .join(_PARTICIPANTS, _PARTICIPANTS.c.pk == _VERSIONS.c.participant_pk)
        .group_by(_VERSIONS.c.study_pk, _PARTICIPANTS.c.participant_id)).all()
    rows = [{'study_pk': s, 'key': 'pooled', 'last_version': int(v)} for s, v in pooled]
    rows += [{'study_pk': s, 'key': f'personal:{pid}', 'last_version': int(v)} for s, pid, v in personal]
    if rows:
        conn.execute(sa.insert(counters), rows)


def upgrade() -> None:
    with op.batch_alter_table('studies', schema=None) as batch_op:
        batch_op.add_column(sa.Column('epoch_seconds', sa.Integer(), server_default=sa.text('30'), nullable=False))

    with op.batch_alter_table('nights', schema=None) as batch_op:
        batch_op.add_column(sa.Column('end_utc', sa.DateTime(), nullable=True))
        batch_op.add_column(sa.Column('source_epoch_seconds', sa.Integer(), nullable=True))
        batch_op.add_column(sa.Column('excluded', sa.Boolean(), server_default=sa.false(), nullable=False))
    _fill_night_ends(op.get_bind())
    with op.batch_alter_table('nights', schema=None) as batch_op:
        batch_op.alter_column('end_utc', existing_type=sa.DateTime(), nullable=False)
        batch_op.create_index('ix_nights_content_hash', ['content_hash'], unique=False)

    with op.batch_alter_table('model_versions', schema=None) as batch_op:
        batch_op.add_column(sa.Column('trained_on_deleted_nights', sa.JSON(), nullable=True))

    counters = op.create_table('version_counters',
    sa.Column('pk', sa.Integer(), nullable=False),
    sa.Column('study_pk', sa.Integer(), nullable=False),
    sa.Column('key', sa.String(length=80), nullable=False),
    sa.Column('last_version', sa.Integer(), nullable=False),
    sa.ForeignKeyConstraint(['study_pk'], ['studies.pk'], ondelete='CASCADE'),
    sa.PrimaryKeyConstraint('pk'),
    sa.UniqueConstraint('study_pk', 'key', name='uq_version_counter')
    )
    _start_counters(op.get_bind(), counters)

    op.create_table('import_profiles',
    sa.Column('pk', sa.Integer(), nullable=False),
    sa.Column('study_pk', sa.Integer(), nullable=False),
    sa.Column('name', sa.String(length=64), nullable=False),
    sa.Column('body', sa.JSON(), nullable=False),
    sa.Column('created_at', sa.DateTime(), nullable=False),
    sa.Column('created_by', sa.String(length=64), nullable=False),
    sa.ForeignKeyConstraint(['study_pk'], ['studies.pk'], ondelete='CASCADE'),
    sa.PrimaryKeyConstraint('pk'),
    sa.UniqueConstraint('study_pk', 'name', name='uq_import_profile')
    )


def downgrade() -> None:
    op.drop_table('import_profiles')
    op.drop_table('version_counters')
    with op.batch_alter_table('model_versions', schema=None) as batch_op:
        batch_op.drop_column('trained_on_deleted_nights')
    with op.batch_alter_table('nights', schema=None) as batch_op:
        batch_op.drop_index('ix_nights_content_hash')
        batch_op.drop_column('excluded')
        batch_op.drop_column('source_epoch_seconds')
        batch_op.drop_column('end_utc')
    with op.batch_alter_table('studies', schema=None) as batch_op:
        batch_op.drop_column('epoch_seconds')
