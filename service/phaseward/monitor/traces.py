"""Recorded traces kept for rehearsals."""

from __future__ import annotations

import time

from sqlalchemy.orm import Session, sessionmaker

from phaseward.errors import NotFound
from phaseward.store import traces
from phaseward.store.db import transaction
from phaseward.store.traces import TraceArrays


def keep(sessions: sessionmaker[Session], trace: TraceArrays) -> int:
    with transaction(sessions) as session:
        return traces.add(session, trace, now_s=time.time())


def load(session: Session, trace_id: int) -> TraceArrays:
    trace = traces.get(session, trace_id)
    if trace is None:
        raise NotFound(f"no trace {trace_id}", field="trace_id")
    return trace
