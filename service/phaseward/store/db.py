"""Engine and sessions built from the settings object, and migrations applied on start."""

from __future__ import annotations

import json
import time
from collections.abc import Iterator
from contextlib import contextmanager
from pathlib import Path
from typing import Any

import orjson
from alembic import command
from alembic.config import Config
from sqlalchemy import Connection, Engine, create_engine, event, text
from sqlalchemy.engine.url import make_url
from sqlalchemy.orm import Session, sessionmaker

from phaseward.settings import Settings

MIGRATIONS_DIR = Path(__file__).parent / "migrations"


def dumps(value: Any) -> str:
    """JSON text of a document column, by orjson: a live state is rewritten with every monitor
    pass, and the standard library took 1.1 ms for a whole 12-phase state (0.08 ms here). A
    non-finite float becomes null (PostgreSQL refuses NaN in JSON, so no document holds one);
    what orjson cannot write (an integer beyond 64 bits) goes to the standard library."""
    try:
        return orjson.dumps(value, option=orjson.OPT_NON_STR_KEYS).decode()
    except TypeError:
        return json.dumps(value)


def loads(text: str | bytes) -> Any:
    """A document column's JSON; the standard library reads what orjson refuses (a NaN token
    an older SQLite database may hold)."""
    try:
        return orjson.loads(text)
    except orjson.JSONDecodeError:
        return json.loads(text)


def build_engine(settings: Settings) -> Engine:
    url = make_url(settings.database_url)
    codec: dict[str, Any] = {"json_serializer": dumps, "json_deserializer": loads}
    if url.get_backend_name() != "sqlite":
        return create_engine(url, pool_pre_ping=True, **codec)
    # A URI filename ("file:...?mode=ro&uri=true", e.g. a read-only database) is SQLite's to
    # open as given: taken as a path it would create a directory named "file:" here.
    if url.database and url.database != ":memory:" and not url.query.get("uri"):
        Path(url.database).parent.mkdir(parents=True, exist_ok=True)
    engine = create_engine(
        url, connect_args={"check_same_thread": False, "isolation_level": None}, **codec
    )
    _configure_sqlite(engine, settings)
    return engine


def _configure_sqlite(engine: Engine, settings: Settings) -> None:
    """WAL, foreign keys, a busy timeout, and BEGIN IMMEDIATE for every writing transaction.

    pysqlite's own transaction handling is switched off (isolation_level=None) so that we
    emit BEGIN ourselves: IMMEDIATE takes the write lock at the start, so two writers queue
    on the busy timeout instead of one failing on lock upgrade in the middle of a request.
    Read-only sessions begin DEFERRED and take no lock.
    """

    @event.listens_for(engine, "connect")
    def _on_connect(dbapi_conn: Any, _record: Any) -> None:
        cur = dbapi_conn.cursor()
        cur.execute("PRAGMA journal_mode=WAL")
        cur.execute(f"PRAGMA synchronous={settings.sqlite_synchronous}")
        cur.execute("PRAGMA foreign_keys=ON")
        cur.execute(f"PRAGMA busy_timeout={int(settings.sqlite_busy_timeout_ms)}")
        cur.close()

    @event.listens_for(engine, "begin")
    def _on_begin(conn: Any) -> None:
        # Readers take no lock: in WAL mode they see the last commit while a writer works.
        read_only = conn.get_execution_options().get(READ_ONLY, False)
        conn.exec_driver_sql("BEGIN DEFERRED" if read_only else "BEGIN IMMEDIATE")


def close_engine(engine: Engine, grace_s: float = 5.0) -> None:
    """Dispose of the pool once requests still running in worker threads have returned their
    connections (or ``grace_s`` has passed): a connection checked out across ``dispose`` is
    orphaned and only closed by the garbage collector, which the PostgreSQL driver warns of."""
    deadline = time.monotonic() + grace_s
    while _checked_out(engine) and time.monotonic() < deadline:
        time.sleep(0.01)
    engine.dispose()


def _checked_out(engine: Engine) -> int:
    checkedout = getattr(engine.pool, "checkedout", None)  # QueuePool has it, others may not
    return int(checkedout()) if callable(checkedout) else 0


def build_sessionmaker(engine: Engine, *, read_only: bool = False) -> sessionmaker[Session]:
    """Sessions for units of work; ``read_only`` ones never write, so on SQLite they begin
    without the write lock and never queue behind ingest."""
    bind = engine.execution_options(**{READ_ONLY: True}) if read_only else engine
    return sessionmaker(bind, expire_on_commit=False, autoflush=False)


READ_ONLY = "phaseward_read_only"  # an execution option of ours, seen by the begin hook


def migrate(engine: Engine) -> None:
    """Bring the schema to the newest migration (idempotent; runs on every start)."""
    cfg = Config()
    cfg.set_main_option("script_location", str(MIGRATIONS_DIR))
    with engine.connect() as conn, conn.begin():
        if conn.dialect.name == "postgresql":
            # Replicas starting together on a fresh database would each create the tables, and
            # all but one fail on duplicate keys: the first to take this lock migrates, the
            # others wait for its commit and then find the schema at head.
            conn.execute(text("SELECT pg_advisory_xact_lock(:key)"), {"key": MIGRATION_LOCK})
        cfg.attributes["connection"] = conn
        command.upgrade(cfg, "head")


MIGRATION_LOCK = int.from_bytes(b"phasewar", "big")  # the advisory lock key, a bigint of ours


@contextmanager
def transaction(sessions: sessionmaker[Session]) -> Iterator[Session]:
    """One unit of work: commit on success, roll back on any error."""
    with sessions() as session, session.begin():
        yield session


def is_migrated(conn: Connection) -> bool:
    """Whether the database holds the newest migration."""
    from alembic.runtime.migration import MigrationContext
    from alembic.script import ScriptDirectory

    cfg = Config()
    cfg.set_main_option("script_location", str(MIGRATIONS_DIR))
    heads = set(ScriptDirectory.from_config(cfg).get_heads())
    return set(MigrationContext.configure(conn).get_current_heads()) == heads
