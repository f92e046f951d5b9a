"""pooled fold models

Adds ``pooled_fold_models``: per pooled model version, the model of each leave-participants-out
fold (XGBoost UBJSON bytes and JSON metadata, no pickle) with the participant ids it never saw;
personal trainings start their held-out evaluation from the fold model that left their participant
out. Rows go with their version (``ON DELETE CASCADE``). Versions stored before have no rows: a
personal training with such an active pooled version trains from scratch. Downgrade drops the table.

Revision ID: 0005
Revises: 0004
Create Date: 2027-03-01 09:00:00
"""

from collections.abc import Sequence

import sqlalchemy as sa
from alembic import op

revision: str = '0005'
down_revision: str | Sequence[str] | None = '0004'
branch_labels: str | Sequence[str] | None = None
depends_on: str | Sequence[str] | None = None


def upgrade() -> None:
    op.create_table('pooled_fold_models',
    sa.Column('pk', sa.Integer(), nullable=False),
    sa.Column('version_pk', sa.Integer(), nullable=False),
    sa.Column('fold', sa.Integer(), nullable=False),
    sa.Column('participants', sa.JSON(), nullable=False),
    sa.Column('booster', sa.LargeBinary(), nullable=False),
    sa.Column('model_meta', sa.JSON(), nullable=False),
    sa.ForeignKeyConstraint(['version_pk'], ['model_versions.pk'], ondelete='CASCADE'),
    sa.PrimaryKeyConstraint('pk'),
    sa.UniqueConstraint('version_pk', 'fold', name='uq_pooled_fold_model')
    )
    op.create_index(op.f('ix_pooled_fold_models_version_pk'), 'pooled_fold_models', ['version_pk'], unique=False)


def downgrade() -> None:
    op.drop_index(op.f('ix_pooled_fold_models_version_pk'), table_name='pooled_fold_models')
    op.drop_table('pooled_fold_models')
