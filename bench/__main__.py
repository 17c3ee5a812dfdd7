"""Every benchmark in one run: ``python -m bench``. Prints each row (measured, baseline,
ratio, target) and writes the table to bench/RESULTS.md with the machine and versions."""

from __future__ import annotations

from pathlib import Path

from bench import (
    analyses_latency,
    drift_false_alarms,
    estimator_batch,
    fault_classes,
    fleet,
    history_growth,
    ingest_http,
    ratings_latency,
    rehearsal_sweep,
    status_under_load,
    thermal_capacity,
)
from bench.common import machine, now_text, print_rows, write_results

GAPS = Path(__file__).with_name("gaps.md")  # why a target is not met and what would close it


def main() -> None:
    started, host = now_text(), machine()
    print(f"{started} on {host}")
    rows = []
    for module in (
        thermal_capacity,
        estimator_batch,
        rehearsal_sweep,
        analyses_latency,
        ratings_latency,
        ingest_http,
        status_under_load,
        history_growth,
        fleet,
    ):
        found = module.rows()
        print_rows(found)
        rows += found
    report = fault_classes.measure()
    found = fault_classes.rows(report)
    print_rows(found)
    rows += found
    drift = drift_false_alarms.measure()
    found = drift_false_alarms.rows(drift)
    print_rows(found)
    rows += found
    path = Path(__file__).with_name("RESULTS.md")
    appendix = "\n".join(
        [fault_classes.section(report), drift_false_alarms.section(drift), GAPS.read_text()]
    )
    write_results(rows, path, started=started, host=host, appendix=appendix)
    print("written to bench/RESULTS.md")


if __name__ == "__main__":
    main()
