"""Cooling drift: false alarms per day of the drift test on healthy rails.

Two measurements at the default setting (k 0.25, h 35 in innovation standard deviations),
one raise counted per channel episode:

* the whole chain on invented healthy days: the four-phase rail of tests/drift_sim.py at
  1 Hz, the load stepping every 20 minutes, the true temperatures solved mode by mode with
  noise, filtered by the junction Kalman filter and tested a day per call; the same
  innovations are also tested at lower thresholds, where alarms are frequent enough to count,
  to check that their rate follows Siegmund's approximation (then the default's prediction,
  too small to count, stands on it);
* the test alone on many days of i.i.d. N(0, 1) innovations (what the filter's are when its
  model holds; tests/reference/test_ref_drift.py checks that they are).

The baseline is Siegmund's approximation of the in-control run length (D. Siegmund,
*Sequential Analysis*, 1985, from memory), per channel: n_phases + 1 channels a rail. With a
count seen in N days, the rate is bounded above at 95 % by the Poisson chi-square quantile
(3 / N a day when none is seen, the "rule of three").
``python -m bench.drift_false_alarms`` measures this alone and replaces its section in
bench/RESULTS.md; ``python -m bench`` includes it.
"""

from __future__ import annotations

import time
from dataclasses import dataclass
from pathlib import Path

import numpy as np
from scipy import stats
from tests.drift_sim import simulate, watch

from bench.common import Row, machine, now_text, print_rows, table, write_section
from phaseward.physics.drift import DriftCarry, InnovationScale, drift_watch

REFERENCE, THRESHOLD = 0.25, 35.0  # the definition's defaults (api/schemas/rails.py)
LOWER = (10.0, 12.0, 15.0)  # thresholds where false alarms are frequent enough to count
PHASES = 4
DAY = 86400
FILTER_DAYS = 14
IID_DAYS = 1000
TARGET_PER_DAY = 1.0 / 30  # at most one false alarm a month on a rail (common practice)
RESULTS = Path(__file__).with_name("RESULTS.md")
HEADING = "## Cooling drift: false alarms on healthy rails"


def siegmund_per_day(k: float, h: float, channels: int = PHASES + 1) -> float:
    """Predicted false alarms a day at 1 Hz: channels x 86400 / ARL0."""
    b = h + 1.166
    arl = (np.exp(2 * k * b) - 2 * k * b - 1) / (2 * k * k)
    return float(channels * DAY / arl)


def upper_rate(count: int, days: float) -> float:
    """95 % upper bound of a Poisson rate a day from ``count`` events in ``days`` (the chi-square
    quantile, scipy.stats; 3 / days when nothing was seen, the "rule of three")."""
    return float(stats.chi2.ppf(0.95, 2 * count + 2) / 2.0 / days)


@dataclass(frozen=True)
class Report:
    filter_raises: dict[float, int]  # threshold -> raises over FILTER_DAYS
    iid_raises: int
    filter_days: int
    iid_days: int
    z_mean: float
    z_std: float
    seconds: float


def _count(z: np.ndarray, scale: InnovationScale, threshold: float, days: int) -> int:
    carry, raises = DriftCarry.fresh(PHASES + 1), 0
    power = np.full((DAY, PHASES), 2.0)
    t_s = np.arange(DAY, dtype=np.float64)
    for d in range(days):
        run = drift_watch(z[d * DAY : (d + 1) * DAY], scale, power, t_s, carry,
                          reference=REFERENCE, threshold=threshold)  # fmt: skip
        raises += sum(on for _, _, on in run.changes)
        carry = run.carry
    return raises


def measure(filter_days: int = FILTER_DAYS, iid_days: int = IID_DAYS) -> Report:
    start = time.perf_counter()
    rng = np.random.default_rng(2026)
    n = filter_days * DAY
    power = np.repeat(rng.uniform(1.0, 3.5, (n // 1200, PHASES)), 1200, axis=0)
    _, readings = simulate(power, 1.0, 25.0, rng, chunk=DAY)
    result = watch(power, readings, 1.0, 25.0, reference=REFERENCE, threshold=THRESHOLD,
                   pieces=filter_days)  # fmt: skip
    z = result.z
    # Scale is irrelevant to when the test raises (it only converts to kelvin).
    unit = InnovationScale(np.ones(PHASES), np.ones(PHASES), np.ones(PHASES))
    raises = {THRESHOLD: sum(on for _, _, on in result.run.changes)}
    for h in LOWER:
        raises[h] = _count(z, unit, h, filter_days)
    iid = 0
    carry = DriftCarry.fresh(PHASES + 1)
    t_s = np.arange(DAY, dtype=np.float64)
    power_day = np.full((DAY, PHASES), 2.0)
    for _ in range(iid_days):
        run = drift_watch(rng.standard_normal((DAY, PHASES)), unit, power_day, t_s, carry,
                          reference=REFERENCE, threshold=THRESHOLD)  # fmt: skip
        iid += sum(on for _, _, on in run.changes)
        carry = run.carry
    return Report(raises, iid, filter_days, iid_days, float(np.nanmean(z)),
                  float(np.nanstd(z)), time.perf_counter() - start)  # fmt: skip


def rows(report: Report) -> list[Row]:
    out = []
    for label, count, days in (
        ("Kalman filter on simulated healthy days", report.filter_raises[THRESHOLD],
         report.filter_days),
        ("i.i.d. N(0, 1) innovations", report.iid_raises, report.iid_days),
    ):  # fmt: skip
        out.append(
            Row(
                name=f"drift false alarms a day, default k {REFERENCE:g} h {THRESHOLD:g}, "
                f"{PHASES} phases at 1 Hz, {label}",
                measured=f"{count} in {days} days (below {upper_rate(count, days):.2g}/day "
                "at 95 %)",
                baseline=f"Siegmund {siegmund_per_day(REFERENCE, THRESHOLD):.2g}/day",
                ratio=count / days,
                target=TARGET_PER_DAY,
                at_least=False,
                note="ratio: false alarms seen a day; the measured column gives the 95 % upper "
                "bound the number of days allows (3 / days when none was seen)",
            )
        )
    for h in LOWER:
        count = report.filter_raises[h]
        predicted = siegmund_per_day(REFERENCE, h)
        out.append(
            Row(
                name=f"drift false alarms at h {h:g} (Kalman filter, healthy days) vs Siegmund",
                measured=f"{count / report.filter_days:.3g}/day ({count} in "
                f"{report.filter_days} days)",
                baseline=f"{predicted:.3g}/day predicted",
                ratio=count / report.filter_days / predicted,
                target=1.5,
                at_least=False,
                note="a ratio near 1: the filter's innovations behave as the test assumes",
            )
        )
    return out


def section(report: Report) -> str:
    return "\n".join(
        [
            HEADING,
            "",
            table(rows(report)),
            "",
            f"Measured {now_text()} on {machine()} in {report.seconds:.0f} s "
            "(`python -m bench.drift_false_alarms`). The four-phase rail of "
            "tests/drift_sim.py at 1 Hz, the load stepping every 20 minutes between 1 and "
            "3.5 W a phase; readings with 0.5 K noise; the filter and the test as the monitor "
            f"runs them, a day per call. The filter's normalised innovations over "
            f"{report.filter_days} days: mean {report.z_mean:.4f}, std {report.z_std:.4f}. "
            "One false alarm is one raise of a thermal.drift episode on any of the rail's "
            f"{PHASES + 1} channels (phases and board).",
            "",
            "| threshold h | raises (filter) | days | per day | Siegmund per day |",
            "|---|---|---|---|---|",
            *(
                f"| {h:g} | {report.filter_raises[h]} | {report.filter_days} | "
                f"{report.filter_raises[h] / report.filter_days:.3g} | "
                f"{siegmund_per_day(REFERENCE, h):.3g} |"
                for h in (*LOWER, THRESHOLD)
            ),
            f"| {THRESHOLD:g} (i.i.d. N(0, 1)) | {report.iid_raises} | {report.iid_days} | "
            f"{report.iid_raises / report.iid_days:.3g} | "
            f"{siegmund_per_day(REFERENCE, THRESHOLD):.3g} |",
            "",
        ]
    )


def main() -> None:
    report = measure()
    print_rows(rows(report))
    text = section(report)
    print(text)
    write_section(text, HEADING, RESULTS)
    print("section written to bench/RESULTS.md")


if __name__ == "__main__":
    main()
