"""fleet live state: a write stamp and replay list on rail_state, covariance checkpoints

Revision ID: 0009_fleet_state_checkpoints
Revises: 0008_pg_partitioned_samples
"""

import sqlalchemy as sa
from alembic import op

revision = "0009_fleet_state_checkpoints"
down_revision = "0008_pg_partitioned_samples"
branch_labels = None
depends_on = None


def upgrade() -> None:
    with op.batch_alter_table("rail_state") as batch:
        batch.add_column(sa.Column("stamp", sa.BigInteger(), nullable=False, server_default="0"))
        batch.add_column(sa.Column("replay", sa.JSON(), nullable=True))
    op.create_table(
        "rail_checkpoints",
        sa.Column("rail_id", sa.String(length=64), nullable=False),
        sa.Column("version", sa.Integer(), nullable=False),
        sa.Column("seq", sa.BigInteger(), nullable=True),
        sa.Column("state", sa.JSON(), nullable=False),
        sa.ForeignKeyConstraint(
            ["rail_id"], ["rails.id"], name="fk_rail_checkpoints_rail_id_rails", ondelete="CASCADE"
        ),
        sa.PrimaryKeyConstraint("rail_id", name="pk_rail_checkpoints"),
    )


def downgrade() -> None:
    op.drop_table("rail_checkpoints")
    with op.batch_alter_table("rail_state") as batch:
        batch.drop_column("replay")
        batch.drop_column("stamp")
