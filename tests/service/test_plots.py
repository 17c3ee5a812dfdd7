"""The Pareto plot's axes: false trips are counts, so their ticks are whole numbers."""

from __future__ import annotations

import re

import pytest

from phaseward.api.plots import HEIGHT, PAD, pareto_svg


def x_ticks(svg: str) -> list[str]:
    return re.findall(rf'y="{HEIGHT - PAD + 16}" text-anchor="middle">([^<]*)</text>', svg)


@pytest.mark.parametrize(
    ("false_trips", "expected"),
    [
        ([0, 1, 3], ["0", "1", "2", "3"]),
        ([0, 0], ["0", "1"]),
        ([2, 7, 12], ["0", "3", "6", "9", "12"]),
        ([0, 40], ["0", "8", "16", "24", "32", "40"]),
    ],
)
def test_false_trip_ticks_are_whole_numbers(false_trips: list[int], expected: list[str]) -> None:
    points = [(float(x), 0.01 * k) for k, x in enumerate(false_trips)]
    assert x_ticks(pareto_svg(points, [0], title="front")) == expected
