"""PostgreSQL: samples partitioned by time (daily RANGE partitions on t_s plus a default one)

Existing rows are copied into the partitions of the days they fall in; the service then rolls
partitions ahead on start and on a schedule (store/partitions.py). SQLite keeps its plain table.

Revision ID: 0008_pg_partitioned_samples
Revises: 0007_trace_isolated_mask
"""

from alembic import op
from sqlalchemy import text

from phaseward.store import partitions

revision = "0008_pg_partitioned_samples"
down_revision = "0007_trace_isolated_mask"
branch_labels = None
depends_on = None

COLUMNS = (
    "id, rail_id, seq, t_s, version, vin_v, vout_v, iout_a, ambient_c, current_a, temp_c, "
    "flags, iin_a"
)
DEFINITION = """(
    id BIGINT NOT NULL DEFAULT nextval('samples_id_seq'),
    rail_id VARCHAR(64) NOT NULL, seq BIGINT NOT NULL, t_s DOUBLE PRECISION NOT NULL,
    version INTEGER NOT NULL, vin_v DOUBLE PRECISION NOT NULL, vout_v DOUBLE PRECISION NOT NULL,
    iout_a DOUBLE PRECISION, ambient_c DOUBLE PRECISION, current_a BYTEA NOT NULL,
    temp_c BYTEA NOT NULL, flags BYTEA NOT NULL, iin_a DOUBLE PRECISION
)"""
FK = (
    "CONSTRAINT fk_samples_rail_version FOREIGN KEY (rail_id, version) "
    "REFERENCES rail_versions (rail_id, version) ON DELETE CASCADE"
)


def upgrade() -> None:
    conn = op.get_bind()
    if conn.dialect.name != "postgresql":
        return
    # The id sequence outlives the old table; the copy keeps every id, so no id repeats.
    conn.execute(text("ALTER SEQUENCE samples_id_seq OWNED BY NONE"))
    conn.execute(text(f"CREATE TABLE samples_by_time {DEFINITION} PARTITION BY RANGE (t_s)"))
    days = conn.execute(text("SELECT DISTINCT floor(t_s / 86400) FROM samples")).scalars()
    for k in sorted(int(d) for d in days):
        lo, hi = k * partitions.DAY_S, (k + 1) * partitions.DAY_S
        conn.execute(
            text(
                f"CREATE TABLE {partitions.name_for(lo)} PARTITION OF samples_by_time "
                f"FOR VALUES FROM ({lo!r}) TO ({hi!r})"
            )
        )
    conn.execute(text(f"CREATE TABLE {partitions.DEFAULT} PARTITION OF samples_by_time DEFAULT"))
    conn.execute(text(f"INSERT INTO samples_by_time ({COLUMNS}) SELECT {COLUMNS} FROM samples"))
    conn.execute(text("DROP TABLE samples"))
    conn.execute(text("ALTER TABLE samples_by_time RENAME TO samples"))
    conn.execute(text("ALTER SEQUENCE samples_id_seq OWNED BY samples.id"))
    # (rail_id, seq) alone cannot be unique here (the partition key must be part of it); the
    # key serves seq look-ups and the per-rail row lock keeps a seq to one row.
    conn.execute(
        text("ALTER TABLE samples ADD CONSTRAINT pk_samples PRIMARY KEY (rail_id, seq, t_s)")
    )
    conn.execute(text("CREATE INDEX ix_samples_rail_time ON samples (rail_id, t_s)"))
    conn.execute(text(f"ALTER TABLE samples ADD {FK}"))


def downgrade() -> None:
    conn = op.get_bind()
    if conn.dialect.name != "postgresql":
        return
    conn.execute(text("ALTER SEQUENCE samples_id_seq OWNED BY NONE"))
    conn.execute(text(f"CREATE TABLE samples_plain {DEFINITION}"))
    conn.execute(text(f"INSERT INTO samples_plain ({COLUMNS}) SELECT {COLUMNS} FROM samples"))
    conn.execute(text("DROP TABLE samples CASCADE"))  # with every partition
    conn.execute(text("ALTER TABLE samples_plain RENAME TO samples"))
    conn.execute(text("ALTER SEQUENCE samples_id_seq OWNED BY samples.id"))
    conn.execute(text("ALTER TABLE samples ADD CONSTRAINT pk_samples PRIMARY KEY (id)"))
    conn.execute(
        text("ALTER TABLE samples ADD CONSTRAINT uq_samples_rail_seq UNIQUE (rail_id, seq)")
    )
    conn.execute(text("CREATE INDEX ix_samples_rail_time ON samples (rail_id, t_s)"))
    conn.execute(text(f"ALTER TABLE samples ADD {FK}"))
