"""Benchmark: screening (all singles and pairs) and a 24 h forecast of a 12-phase rail against
an empty endpoint, all over HTTP to a real server on loopback in the same run.

Run: ``python -m bench.analyses_latency`` (``python -m bench`` runs every benchmark).
Prints medians, the baseline, the ratio and the
target; asserts nothing about speed.
"""

from __future__ import annotations

from bench.common import Row, empty_endpoint_s, latency_row, median_time, print_rows
from bench.common import twelve_phase_server as served

REPEATS = 15
# "A small multiple" of an empty endpoint, taken here as 50: an empty request costs under a
# millisecond on loopback, so 50x keeps both analyses interactive (tens of milliseconds).
TARGET = 50.0


def rows() -> list[Row]:
    with served(8490) as c:
        empty = empty_endpoint_s(c, REPEATS)
        timed = [
            ("screening of a 12-phase rail, singles and pairs, vs an empty endpoint",
             median_time(lambda: c.get("/v1/rails/bench-12/screening",
                                       params={"depth": 2}).raise_for_status(), REPEATS)),
            ("forecast, 24 h, 500 points, vs an empty endpoint",
             median_time(lambda: c.post("/v1/rails/bench-12/forecast",
                                        json={"horizon_s": 86400, "points": 500}
                                        ).raise_for_status(), REPEATS)),
        ]  # fmt: skip
    return [latency_row(name, seconds, empty, TARGET) for name, seconds in timed]


if __name__ == "__main__":
    print_rows(rows())
