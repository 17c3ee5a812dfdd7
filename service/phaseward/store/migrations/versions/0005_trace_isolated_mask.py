"""trace isolated mask

Revision ID: 0005
Revises: 0004
"""

import sqlalchemy as sa
from alembic import op

revision = "0005"
down_revision = "0004"
branch_labels = None
depends_on = None


def upgrade() -> None:
    with op.batch_alter_table("traces") as batch:
        batch.add_column(sa.Column("isolated", sa.LargeBinary(), nullable=True))


def downgrade() -> None:
    with op.batch_alter_table("traces") as batch:
        batch.drop_column("isolated")
