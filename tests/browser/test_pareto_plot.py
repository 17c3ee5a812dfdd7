"""The rehearsal's Pareto plot as a browser draws it: measured text boxes, not estimates.

Issue 18: the count axis has integer ticks, no marker overlaps the legend, no tick label
overlaps an axis title, tied combinations are one marker with their count.
"""

from __future__ import annotations

import time
from pathlib import Path
from typing import TYPE_CHECKING, Any

import httpx
import pytest

if TYPE_CHECKING:
    from playwright.sync_api import Page

pytestmark = [pytest.mark.e2e, pytest.mark.browser]

BOXES = """() => {
  const box = (e) => { const b = e.getBoundingClientRect();
                       return [b.left, b.top, b.right, b.bottom]; };
  const all = (sel) => Array.from(document.querySelectorAll(sel)).map(box);
  const texts = Array.from(document.querySelectorAll('svg > text'));
  const titled = (t) => texts.filter((e) => e.textContent.includes(t)).map(box);
  return {legend: all('g.legend'), markers: all('svg > circle, svg > rect.front'),
          xticks: Array.from(document.querySelectorAll('text.xtick')).map((e) => e.textContent),
          ytickBoxes: all('text.ytick'), xtickBoxes: all('text.xtick'),
          yTitle: titled('worst detection latency'), xTitle: titled('false trips (count)'),
          ties: texts.filter((e) => /^x \\d+$/.test(e.textContent)).length};
}"""


def overlaps(a: list[float], b: list[float]) -> bool:
    return a[0] < b[2] and b[0] < a[2] and a[1] < b[3] and b[1] < a[3]


def test_the_pareto_plot_is_readable(
    page: Page, api: httpx.Client, server: str, artifacts: Path
) -> None:
    rows = ["time_s,vin_v,i0_a,i1_a"] + [
        f"{k},12,{25 if 3 <= k <= 6 else 10},{30 if k in (8, 12, 15) else 10}" for k in range(20)
    ]
    trace = api.post("/v1/traces", content="\n".join(rows), headers={"content-type": "text/csv"})
    body: dict[str, Any] = {
        "trace": {"trace_id": trace.json()["id"]},
        "settings": {"oc_level_a": [15.0, 20.0, 24.0, 28.0], "oc_debounce_s": [0, 1, 2, 3, 4],
                     "ot_level_c": [90.0, 100.0, 110.0]},  # ties: the temperature never trips
        "labels": [{"start_s": 3, "end_s": 6, "phase": 0, "kind": "over_current"}],
    }  # fmt: skip
    job = api.post("/v1/rehearsals", json=body).json()
    deadline = time.monotonic() + 30
    while api.get(f"/v1/rehearsals/{job['id']}").json()["status"] != "done":
        assert time.monotonic() < deadline
        time.sleep(0.1)
    page.goto(f"{server}/v1/rehearsals/{job['id']}/pareto.svg")
    found = page.evaluate(BOXES)
    page.screenshot(path=str(artifacts / "pareto-plot.png"))
    assert all(t.isdigit() for t in found["xticks"]), found["xticks"]
    (legend,) = found["legend"]
    assert found["markers"]
    assert not any(overlaps(legend, m) for m in found["markers"])
    (y_title,), (x_title,) = found["yTitle"], found["xTitle"]
    assert not any(overlaps(y_title, t) for t in found["ytickBoxes"])
    assert not any(overlaps(x_title, t) for t in found["xtickBoxes"])
    assert found["ties"] >= 1
