"""trace isolated mask

Revision ID: 0007_trace_isolated_mask
Revises: 0006_fault_captures
"""

import sqlalchemy as sa
from alembic import op

revision = "0007_trace_isolated_mask"
down_revision = "0006_fault_captures"
branch_labels = None
depends_on = None


def upgrade() -> None:
    with op.batch_alter_table("traces") as batch:
        batch.add_column(sa.Column("isolated", sa.LargeBinary(), nullable=True))


def downgrade() -> None:
    with op.batch_alter_table("traces") as batch:
        batch.drop_column("isolated")
