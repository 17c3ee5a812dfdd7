"""Benchmark: the time-limited rating table of a 12-phase rail (the rail as it is and its 12
single losses, each for 1 min, 10 min, 1 h and indefinitely) against an empty endpoint, over
HTTP to a real server on loopback in the same run.

Run: ``python -m bench.ratings_latency`` (``python -m bench`` runs every benchmark).
Prints the median, the baseline, the ratio and the target; asserts nothing about speed.
"""

from __future__ import annotations

from bench.common import Row, empty_endpoint_s, latency_row, median_time, print_rows
from bench.common import twelve_phase_server as served

REPEATS = 15
TARGET = 100.0  # issue 13: the full table at most 100x an empty endpoint


def rows() -> list[Row]:
    with served(8491) as c:
        table = c.get("/v1/rails/bench-12/ratings").raise_for_status().json()
        assert (len(table["cases"]), len(table["durations_s"])) == (13, 4)
        empty = empty_endpoint_s(c, REPEATS)
        seconds = median_time(
            lambda: c.get("/v1/rails/bench-12/ratings").raise_for_status(), REPEATS
        )
    name = "ratings of a 12-phase rail, 13 cases x 4 durations, vs an empty endpoint"
    return [latency_row(name, seconds, empty, TARGET)]


if __name__ == "__main__":
    print_rows(rows())
