"""fault captures attached to isolation events; input current on samples (issue 14)

Revision ID: 0006_fault_captures
Revises: 0005_security
"""

import sqlalchemy as sa
from alembic import op

revision = "0006_fault_captures"
down_revision = "0005_security"
branch_labels = None
depends_on = None


def upgrade() -> None:
    op.create_table(
        "fault_captures",
        sa.Column("id", sa.BigInteger().with_variant(sa.Integer(), "sqlite"), nullable=False),
        sa.Column("rail_id", sa.String(length=64), nullable=False),
        sa.Column("event_id", sa.BigInteger().with_variant(sa.Integer(), "sqlite"), nullable=False),
        sa.Column("created_s", sa.Float(), nullable=False),
        sa.Column("source_format", sa.String(length=8), nullable=False),
        sa.Column("n_samples", sa.Integer(), nullable=False),
        sa.Column("n_phases", sa.Integer(), nullable=False),
        sa.Column("t_s", sa.LargeBinary(), nullable=False),
        sa.Column("vin_v", sa.LargeBinary(), nullable=False),
        sa.Column("vout_v", sa.LargeBinary(), nullable=False),
        sa.Column("iin_a", sa.LargeBinary(), nullable=True),
        sa.Column("current_a", sa.LargeBinary(), nullable=False),
        sa.Column("switch_v", sa.LargeBinary(), nullable=True),
        sa.Column("gate_v", sa.LargeBinary(), nullable=True),
        sa.ForeignKeyConstraint(
            ["event_id"], ["events.id"], name=op.f("fk_fault_captures_event_id_events"),
            ondelete="CASCADE",
        ),
        sa.ForeignKeyConstraint(
            ["rail_id"], ["rails.id"], name=op.f("fk_fault_captures_rail_id_rails"),
            ondelete="CASCADE",
        ),
        sa.PrimaryKeyConstraint("id", name=op.f("pk_fault_captures")),
        sa.UniqueConstraint("event_id", name=op.f("uq_fault_captures_event_id")),
    )  # fmt: skip
    with op.batch_alter_table("samples") as batch:
        batch.add_column(sa.Column("iin_a", sa.Float(), nullable=True))


def downgrade() -> None:
    with op.batch_alter_table("samples") as batch:
        batch.drop_column("iin_a")
    op.drop_table("fault_captures")
