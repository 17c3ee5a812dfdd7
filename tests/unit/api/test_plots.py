"""The Pareto plot's geometry: integer ticks for counts, the legend clear of every marker, the
tick labels clear of the axis titles, tied combinations drawn once with their count.
(Checked by eye too: rendered to PNG with chromium --headless --screenshot.)"""

import xml.etree.ElementTree as ET

import pytest

from phaseward.api.plots import LEFT, TOP, pareto_svg

NS = {"s": "http://www.w3.org/2000/svg"}
CHAR_PX = 7.0  # generous width of one 12 px sans-serif character


@pytest.mark.parametrize("max_false", [1, 3, 7, 40, 1234])
def test_count_ticks_are_integers(max_false: int) -> None:
    points = [(float(k), 0.001 * (k + 1)) for k in range(max_false + 1)]
    root = ET.fromstring(pareto_svg(points, [[0]], title="t"))
    ticks = [t.text or "" for t in root.iterfind("s:text[@class='xtick']", NS)]
    assert len(ticks) >= 2
    assert all(t.isdigit() for t in ticks), ticks
    assert int(ticks[-1]) >= max_false


def test_legend_and_labels_do_not_overlap_the_plot() -> None:
    points = [(0.0, 0.5), (0.0, 0.5), (1.0, 0.2), (2.0, None), (5.0, 123.456)]
    root = ET.fromstring(pareto_svg(points, [[0, 1], [2]], title="t"))
    legend = root.find("s:g[@class='legend']", NS)
    assert legend is not None
    legend_bottom = max(float(e.get("y", e.get("cy", "0"))) for e in legend) + 5
    markers = [*root.iterfind("s:circle", NS), *root.iterfind("s:rect[@class='front']", NS)]
    assert markers
    tops = [float(m.get("cy", m.get("y", "0"))) - 5 for m in markers]
    assert legend_bottom < TOP <= min(tops)
    # y tick labels end at LEFT - 8; the rotated axis title occupies x in [10, 22]
    widths = [len(t.text or "") * CHAR_PX for t in root.iterfind("s:text[@class='ytick']", NS)]
    assert LEFT - 8 - max(widths) > 22
    # tied rows: one square with its count
    assert len(list(root.iterfind("s:rect[@class='front']", NS))) == 2
    assert any((t.text or "") == "x 2" for t in root.iterfind("s:text", NS))
