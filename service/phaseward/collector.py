"""The cyclic garbage collector's schedule in a long-running process (the server, its workers,
its judging helper)."""

from __future__ import annotations

import gc

# Full collections: at most one per this many young-generation (gen 1) collections. CPython's
# default is 10, and a full collection walks every tracked object; see quiet_collector.
FULL_COLLECTION_EVERY = 1000


def quiet_collector() -> None:
    """Keep the cyclic garbage collector's full passes out of a long-running process's way.

    What exists now (libraries, schemas, the app) lives as long as the process, so it is frozen
    out of the collector's sight. What a fleet keeps afterwards (a live state, a model and a
    status view per rail) lives for seconds, long enough to reach the oldest generation, and is
    then freed by reference counting, which does not lower the collector's count of what is new
    there: by CPython's defaults (a full pass once 10 gen-1 passes have run and a quarter of the
    old generation is new) a 1,000-rail fleet ran a full pass about every 2 s, each holding the
    interpreter 100-200 ms (bench/gaps.md). The state documents are acyclic, so the garbage a
    full pass finds is rare (a few dozen objects a minute); one full pass per
    ``FULL_COLLECTION_EVERY`` gen-1 passes (a few minutes at a fleet's rate) still finds it. The
    young generations keep their defaults: their passes are short."""
    gc.freeze()
    young, middle, _ = gc.get_threshold()
    gc.set_threshold(young, middle, FULL_COLLECTION_EVERY)
