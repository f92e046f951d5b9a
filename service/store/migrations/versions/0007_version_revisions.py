"""model version revisions

Adds ``model_versions.revision`` (0 for every stored row): raised each time a stored version's
records are rewritten after it was stored (a participant rename carried into its records, or a
deleted night's held-out predictions removed), so per-process caches of the version's metadata
and model (keyed by ``uid`` and ``revision``) read the new records. Downgrade drops the column.

Revision ID: 0007
Revises: 0006
Create Date: 2027-03-20 09:00:00
"""

from collections.abc import Sequence

import sqlalchemy as sa
from alembic import op

revision: str = '0007'
down_revision: str | Sequence[str] | None = '0006'
branch_labels: str | Sequence[str] | None = None
depends_on: str | Sequence[str] | None = None


def upgrade() -> None:
    with op.batch_alter_table('model_versions', schema=None) as batch_op:
        batch_op.add_column(sa.Column('revision', sa.Integer(), nullable=False, server_default='0'))


def downgrade() -> None:
    with op.batch_alter_table('model_versions', schema=None) as batch_op:
        batch_op.drop_column('revision')
