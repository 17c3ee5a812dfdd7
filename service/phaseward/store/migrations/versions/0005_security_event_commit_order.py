"""security: events record their writing transaction (commit-ordered stream) and the name
of the key that acknowledged them; job leases

Revision ID: 0005_security
Revises: 0004
"""

import sqlalchemy as sa
from alembic import op

revision = "0005_security"
down_revision = "0004"
branch_labels = None
depends_on = None


def upgrade() -> None:
    # Rows stored before this revision are final long since: they sort first (txid 0).
    with op.batch_alter_table("events") as batch:
        batch.add_column(sa.Column("txid", sa.BigInteger(), nullable=False, server_default="0"))
        batch.add_column(sa.Column("acked_key", sa.String(length=120), nullable=True))
    if op.get_bind().dialect.name == "postgresql":
        # Each new event records the id of the transaction that wrote it (see store.events).
        op.execute("ALTER TABLE events ALTER COLUMN txid SET DEFAULT txid_current()")
    op.create_index("ix_events_txid_id", "events", ["txid", "id"])
    # Job leases: the server running a job (or holding it queued) and until when it holds it.
    with op.batch_alter_table("jobs") as batch:
        batch.add_column(sa.Column("lease_owner", sa.String(length=64), nullable=True))
        batch.add_column(sa.Column("lease_until_s", sa.Float(), nullable=True))


def downgrade() -> None:
    with op.batch_alter_table("jobs") as batch:
        batch.drop_column("lease_until_s")
        batch.drop_column("lease_owner")
    op.drop_index("ix_events_txid_id", table_name="events")
    with op.batch_alter_table("events") as batch:
        batch.drop_column("acked_key")
        batch.drop_column("txid")
