"""Typed SQLAlchemy 2 models.

Sample layout: one row per sample, with the per-phase columns (current, temperature, flags)
packed as little-endian arrays in binary columns. A sample of a 12-phase rail is then one
INSERT instead of twelve, the (rail, seq) key finds resends, and a time window reads
back with one indexed range scan into ``np.frombuffer`` without pivoting per-phase rows.
Per-phase history queries across many samples are rarer than windows, so this trade fits.
On PostgreSQL the table is partitioned by time instead (migration 0008, store/partitions.py):
its key is (rail, seq, time) and the rail's row lock keeps a seq to one row.
"""

from __future__ import annotations

from typing import Any

from sqlalchemy import (
    JSON,
    BigInteger,
    FetchedValue,
    Float,
    ForeignKey,
    ForeignKeyConstraint,
    Index,
    Integer,
    LargeBinary,
    MetaData,
    String,
    Text,
    UniqueConstraint,
)
from sqlalchemy.orm import DeclarativeBase, Mapped, mapped_column, relationship

NAMING_CONVENTION = {
    "ix": "ix_%(column_0_label)s",
    "uq": "uq_%(table_name)s_%(column_0_name)s",
    "ck": "ck_%(table_name)s_%(constraint_name)s",
    "fk": "fk_%(table_name)s_%(column_0_name)s_%(referred_table_name)s",
    "pk": "pk_%(table_name)s",
}


class Base(DeclarativeBase):
    metadata = MetaData(naming_convention=NAMING_CONVENTION)


class Rail(Base):
    __tablename__ = "rails"

    id: Mapped[str] = mapped_column(String(64), primary_key=True)
    version: Mapped[int] = mapped_column(Integer)
    created_s: Mapped[float] = mapped_column(Float)
    updated_s: Mapped[float] = mapped_column(Float)

    versions: Mapped[list[RailVersion]] = relationship(
        back_populates="rail", lazy="raise", cascade="all, delete-orphan", passive_deletes=True
    )


class RailVersion(Base):
    """Definitions are never edited in place: samples and events name the version they used."""

    __tablename__ = "rail_versions"

    rail_id: Mapped[str] = mapped_column(
        ForeignKey("rails.id", ondelete="CASCADE"), primary_key=True
    )
    version: Mapped[int] = mapped_column(Integer, primary_key=True)
    spec: Mapped[dict[str, Any]] = mapped_column(JSON)
    created_s: Mapped[float] = mapped_column(Float)

    rail: Mapped[Rail] = relationship(back_populates="versions", lazy="raise")


class Sample(Base):
    __tablename__ = "samples"
    __table_args__ = (
        UniqueConstraint("rail_id", "seq", name="uq_samples_rail_seq"),
        Index("ix_samples_rail_time", "rail_id", "t_s"),
        ForeignKeyConstraint(
            ["rail_id", "version"],
            ["rail_versions.rail_id", "rail_versions.version"],
            ondelete="CASCADE",
            name="fk_samples_rail_version",
        ),
    )

    id: Mapped[int] = mapped_column(
        BigInteger().with_variant(Integer, "sqlite"), primary_key=True, autoincrement=True
    )
    rail_id: Mapped[str] = mapped_column(String(64))
    seq: Mapped[int] = mapped_column(BigInteger)
    t_s: Mapped[float] = mapped_column(Float)
    version: Mapped[int] = mapped_column(Integer)
    vin_v: Mapped[float] = mapped_column(Float)
    vout_v: Mapped[float] = mapped_column(Float)
    iout_a: Mapped[float | None] = mapped_column(Float)
    ambient_c: Mapped[float | None] = mapped_column(Float)
    iin_a: Mapped[float | None] = mapped_column(Float)  # input current, A
    current_a: Mapped[bytes] = mapped_column(LargeBinary)  # float64 LE, NaN = not reported
    temp_c: Mapped[bytes] = mapped_column(LargeBinary)  # float64 LE, NaN = not reported
    flags: Mapped[bytes] = mapped_column(LargeBinary)  # uint8 bit set per phase, see monitor


class Event(Base):
    __tablename__ = "events"
    __table_args__ = (
        Index("ix_events_rail_id_desc", "rail_id", "id"),
        Index("ix_events_kind", "kind"),
        Index("ix_events_txid_id", "txid", "id"),
    )

    id: Mapped[int] = mapped_column(
        BigInteger().with_variant(Integer, "sqlite"), primary_key=True, autoincrement=True
    )
    rail_id: Mapped[str] = mapped_column(ForeignKey("rails.id", ondelete="CASCADE"))
    version: Mapped[int] = mapped_column(Integer)
    t_s: Mapped[float] = mapped_column(Float)
    kind: Mapped[str] = mapped_column(String(40))
    severity: Mapped[str] = mapped_column(String(16))
    phase: Mapped[int | None] = mapped_column(Integer)
    message: Mapped[str] = mapped_column(Text)
    details: Mapped[dict[str, Any]] = mapped_column(JSON)
    acked_by: Mapped[str | None] = mapped_column(String(120))
    ack_note: Mapped[str | None] = mapped_column(Text)
    acked_s: Mapped[float | None] = mapped_column(Float)
    acked_key: Mapped[str | None] = mapped_column(String(120))  # the name of the key used
    # The writing transaction's id on PostgreSQL (a column default), 0 on SQLite: orders the
    # live stream by commit (store.events.stream_after).
    txid: Mapped[int] = mapped_column(BigInteger, server_default=FetchedValue())


class RailState(Base):
    """The live state of a rail after the newest sample; one row, updated under a lock."""

    __tablename__ = "rail_state"

    rail_id: Mapped[str] = mapped_column(
        ForeignKey("rails.id", ondelete="CASCADE"), primary_key=True
    )
    version: Mapped[int] = mapped_column(Integer)
    last_seq: Mapped[int | None] = mapped_column(BigInteger)
    last_t_s: Mapped[float | None] = mapped_column(Float)
    state: Mapped[dict[str, Any]] = mapped_column(JSON)  # without the estimate's covariance
    updated_s: Mapped[float] = mapped_column(Float)
    # A random token of the last write: a process whose copy in memory carries the same stamp
    # holds the state as stored, without re-reading it (monitor/resident.py).
    stamp: Mapped[int] = mapped_column(BigInteger, server_default="0")
    # What was judged since the checkpoint: [seq] or [seq, [phases whose current came from a
    # sense voltage]] per sample, in the order judged; replayed over the checkpoint to restore
    # the covariance (None: the checkpoint is this very state).
    replay: Mapped[list[Any] | None] = mapped_column(JSON)


class RailCheckpoint(Base):
    """A rail's whole live state, covariance included, as of a sample: written every
    ``state_checkpoint_samples`` judged samples instead of on every one (the covariance is
    most of the state's size)."""

    __tablename__ = "rail_checkpoints"

    rail_id: Mapped[str] = mapped_column(
        ForeignKey("rails.id", ondelete="CASCADE"), primary_key=True
    )
    version: Mapped[int] = mapped_column(Integer)
    seq: Mapped[int | None] = mapped_column(BigInteger)
    state: Mapped[dict[str, Any]] = mapped_column(JSON)


class Trace(Base):
    """An uploaded recording for rehearsals, packed like samples: one row per trace, whole
    arrays in binary columns (a trace is always read whole)."""

    __tablename__ = "traces"

    id: Mapped[int] = mapped_column(
        BigInteger().with_variant(Integer, "sqlite"), primary_key=True, autoincrement=True
    )
    name: Mapped[str] = mapped_column(String(200))
    n_samples: Mapped[int] = mapped_column(Integer)
    n_phases: Mapped[int] = mapped_column(Integer)
    t_s: Mapped[bytes] = mapped_column(LargeBinary)  # float64 LE (n,)
    vin_v: Mapped[bytes] = mapped_column(LargeBinary)  # float64 LE (n,)
    current_a: Mapped[bytes] = mapped_column(LargeBinary)  # float64 LE (n, phases)
    temp_c: Mapped[bytes] = mapped_column(LargeBinary)  # float64 LE (n, phases), NaN = none
    isolated: Mapped[bytes | None] = mapped_column(LargeBinary)  # uint8 (n, phases), 1 = isolated
    created_s: Mapped[float] = mapped_column(Float)


class Job(Base):
    """A long computation run in the background; its result is kept to be fetched again."""

    __tablename__ = "jobs"

    id: Mapped[int] = mapped_column(
        BigInteger().with_variant(Integer, "sqlite"), primary_key=True, autoincrement=True
    )
    kind: Mapped[str] = mapped_column(String(40))
    status: Mapped[str] = mapped_column(String(16))  # queued, running, done, failed
    percent: Mapped[float] = mapped_column(Float)
    request: Mapped[dict[str, Any]] = mapped_column(JSON)
    result: Mapped[dict[str, Any] | None] = mapped_column(JSON)
    error: Mapped[str | None] = mapped_column(Text)
    created_s: Mapped[float] = mapped_column(Float)
    finished_s: Mapped[float | None] = mapped_column(Float)
    # The lease: which server holds the job (queued or running) and until when; a server
    # renews its leases while alive, and an expired lease lets another server take the job.
    lease_owner: Mapped[str | None] = mapped_column(String(64))
    lease_until_s: Mapped[float | None] = mapped_column(Float)


class ApiKey(Base):
    """An access key: stored as its SHA-256 digest (keys are 240 random bits, so a fast hash
    is enough), found by its short public prefix, compared in constant time."""

    __tablename__ = "api_keys"
    __table_args__ = (Index("ix_api_keys_prefix", "prefix"),)

    id: Mapped[int] = mapped_column(
        BigInteger().with_variant(Integer, "sqlite"), primary_key=True, autoincrement=True
    )
    name: Mapped[str] = mapped_column(String(120))
    role: Mapped[str] = mapped_column(String(16))
    prefix: Mapped[str] = mapped_column(String(16))
    digest: Mapped[str] = mapped_column(String(64))
    rails: Mapped[list[str] | None] = mapped_column(JSON)  # None: every rail
    created_s: Mapped[float] = mapped_column(Float)
    revoked_s: Mapped[float | None] = mapped_column(Float)


class SampleSummary(Base):
    """Samples older than the retention age, reduced to one row per rail and interval:
    minimum, maximum and mean of each quantity (per-phase ones packed like samples)."""

    __tablename__ = "sample_summaries"

    rail_id: Mapped[str] = mapped_column(
        ForeignKey("rails.id", ondelete="CASCADE"), primary_key=True
    )
    t_start_s: Mapped[float] = mapped_column(Float, primary_key=True)
    t_end_s: Mapped[float] = mapped_column(Float)
    count: Mapped[int] = mapped_column(Integer)
    # float64 LE arrays: (3,) for vin/vout as min, max, mean; (3, n_phases) for per-phase ones.
    vin_v: Mapped[bytes] = mapped_column(LargeBinary)
    vout_v: Mapped[bytes] = mapped_column(LargeBinary)
    current_a: Mapped[bytes] = mapped_column(LargeBinary)
    temp_c: Mapped[bytes] = mapped_column(LargeBinary)


class FaultCapture(Base):
    """A waveform recorded around a trip, attached to its ``phase.isolated`` event (one per
    event); channels packed like traces, float64 LE, (n,) or (n, n_phases)."""

    __tablename__ = "fault_captures"

    id: Mapped[int] = mapped_column(
        BigInteger().with_variant(Integer, "sqlite"), primary_key=True, autoincrement=True
    )
    rail_id: Mapped[str] = mapped_column(ForeignKey("rails.id", ondelete="CASCADE"))
    event_id: Mapped[int] = mapped_column(ForeignKey("events.id", ondelete="CASCADE"), unique=True)
    created_s: Mapped[float] = mapped_column(Float)
    source_format: Mapped[str] = mapped_column(String(8))  # csv, npy, npz
    n_samples: Mapped[int] = mapped_column(Integer)
    n_phases: Mapped[int] = mapped_column(Integer)
    t_s: Mapped[bytes] = mapped_column(LargeBinary)  # seconds from the trigger
    vin_v: Mapped[bytes] = mapped_column(LargeBinary)
    vout_v: Mapped[bytes] = mapped_column(LargeBinary)
    iin_a: Mapped[bytes | None] = mapped_column(LargeBinary)
    current_a: Mapped[bytes] = mapped_column(LargeBinary)  # (n, n_phases)
    switch_v: Mapped[bytes | None] = mapped_column(LargeBinary)  # (n, n_phases)
    gate_v: Mapped[bytes | None] = mapped_column(LargeBinary)  # (n, n_phases)
