"""Every benchmark in one run: ``python -m bench``. Prints each row (measured, baseline,
ratio, target) and writes the table to bench/RESULTS.md with the machine and versions."""

from __future__ import annotations

from pathlib import Path

from bench import (
    analyses_latency,
    history_growth,
    load_ingest,
    rehearsal_sweep,
    thermal_capacity,
)
from bench.common import machine, now_text, print_rows, write_results


def main() -> None:
    started, host = now_text(), machine()
    print(f"{started} on {host}")
    rows = []
    for module in (
        thermal_capacity,
        rehearsal_sweep,
        analyses_latency,
        load_ingest,
        history_growth,
    ):
        found = module.rows()
        print_rows(found)
        rows += found
    write_results(rows, Path(__file__).with_name("RESULTS.md"), started=started, host=host)
    print("written to bench/RESULTS.md")


if __name__ == "__main__":
    main()
