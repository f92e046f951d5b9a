"""night reviews and adjudicated corrections

Adds, keeping every row:

- ``night_reviews`` (empty): one reviewer's sleep/wake judgement of a night (labels as compact
  bytes, the submitted intervals, note, the scoring shown, when);
- ``night_corrections`` (empty): a night's adjudicated corrected labels with their provenance;
- ``study_protocols.correction_weight`` (NULL: the default weight 0.5).

Downgrade drops both tables (reviews and corrections are lost) and the column.

Revision ID: 0007
Revises: 0006
Create Date: 2027-02-09 09:00:00
"""

from collections.abc import Sequence

import sqlalchemy as sa
from alembic import op

revision: str = '0007'
down_revision: str | Sequence[str] | None = '0006'
branch_labels: str | Sequence[str] | None = None
depends_on: str | Sequence[str] | None = None


def upgrade() -> None:
    op.create_table('night_reviews',
    sa.Column('pk', sa.Integer(), nullable=False),
    sa.Column('review_id', sa.String(length=32), nullable=False),
    sa.Column('night_pk', sa.Integer(), nullable=False),
    sa.Column('reviewer', sa.String(length=64), nullable=False),
    sa.Column('token_id', sa.String(length=16), nullable=False),
    sa.Column('labels', sa.LargeBinary(), nullable=False),
    sa.Column('intervals', sa.JSON(), nullable=False),
    sa.Column('note', sa.Text(), nullable=True),
    sa.Column('model_version_shown', sa.String(length=64), nullable=False),
    sa.Column('submitted_at', sa.DateTime(), nullable=False),
    sa.ForeignKeyConstraint(['night_pk'], ['nights.pk'], ondelete='CASCADE'),
    sa.PrimaryKeyConstraint('pk'),
    sa.UniqueConstraint('review_id'),
    sa.UniqueConstraint('night_pk', 'reviewer', name='uq_night_review_reviewer'),
    sa.UniqueConstraint('night_pk', 'token_id', name='uq_night_review_token')
    )
    with op.batch_alter_table('night_reviews', schema=None) as batch_op:
        batch_op.create_index(batch_op.f('ix_night_reviews_night_pk'), ['night_pk'], unique=False)
    op.create_table('night_corrections',
    sa.Column('pk', sa.Integer(), nullable=False),
    sa.Column('night_pk', sa.Integer(), nullable=False),
    sa.Column('labels', sa.LargeBinary(), nullable=False),
    sa.Column('reviewers', sa.JSON(), nullable=False),
    sa.Column('review_ids', sa.JSON(), nullable=False),
    sa.Column('accepted_review_id', sa.String(length=32), nullable=True),
    sa.Column('adjudicator', sa.String(length=64), nullable=False),
    sa.Column('adjudicator_token_id', sa.String(length=16), nullable=False),
    sa.Column('note', sa.Text(), nullable=True),
    sa.Column('model_version_shown', sa.String(length=64), nullable=False),
    sa.Column('adjudicated_at', sa.DateTime(), nullable=False),
    sa.ForeignKeyConstraint(['night_pk'], ['nights.pk'], ondelete='CASCADE'),
    sa.PrimaryKeyConstraint('pk'),
    sa.UniqueConstraint('night_pk')
    )
    with op.batch_alter_table('study_protocols', schema=None) as batch_op:
        batch_op.add_column(sa.Column('correction_weight', sa.Float(), nullable=True))


def downgrade() -> None:
    with op.batch_alter_table('study_protocols', schema=None) as batch_op:
        batch_op.drop_column('correction_weight')
    op.drop_table('night_corrections')
    with op.batch_alter_table('night_reviews', schema=None) as batch_op:
        batch_op.drop_index(batch_op.f('ix_night_reviews_night_pk'))
    op.drop_table('night_reviews')
