"""study protocols

Adds ``study_protocols``: one row per study that set its own protocol (the JSON form of
:class:`models.StudyProtocol`, its fingerprint, the study's model floor, when and by whom); a
study without a row uses the default protocol, so existing studies keep the parameter
definitions they had. Downgrade drops the table (set protocols are lost; studies fall back to the
default).

Revision ID: 0004
Revises: 0003
Create Date: 2027-02-02 09:00:00
"""

from collections.abc import Sequence

import sqlalchemy as sa
from alembic import op

revision: str = '0004'
down_revision: str | Sequence[str] | None = '0003'
branch_labels: str | Sequence[str] | None = None
depends_on: str | Sequence[str] | None = None


def upgrade() -> None:
    op.create_table('study_protocols',
    sa.Column('pk', sa.Integer(), nullable=False),
    sa.Column('study_pk', sa.Integer(), nullable=False),
    sa.Column('body', sa.JSON(), nullable=False),
    sa.Column('fingerprint', sa.String(length=32), nullable=False),
    sa.Column('model_floor', sa.Float(), nullable=True),
    sa.Column('updated_at', sa.DateTime(), nullable=False),
    sa.Column('updated_by', sa.String(length=64), nullable=False),
    sa.ForeignKeyConstraint(['study_pk'], ['studies.pk'], ondelete='CASCADE'),
    sa.PrimaryKeyConstraint('pk'),
    sa.UniqueConstraint('study_pk')
    )


def downgrade() -> None:
    op.drop_table('study_protocols')
