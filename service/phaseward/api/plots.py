"""Small SVG plots drawn by hand: no plotting library, no fonts or scripts from elsewhere."""

from __future__ import annotations

import math
from collections.abc import Sequence
from html import escape

WIDTH, HEIGHT = 640, 440
LEFT, RIGHT, TOP, BOTTOM = 78, 24, 78, 64  # plot margins, px
MISS_BAND = 26  # px at the top of the plot for combinations that miss a fault


def _nice_step(span: float, *, ticks: int, integer: bool) -> float:
    """A 1-2-5 tick step giving at most ``ticks`` intervals over ``span`` (>= 1 for counts)."""
    raw = max(span, 1e-12) / ticks
    power = 10.0 ** math.floor(math.log10(raw))
    step = next(m * power for m in (1, 2, 5, 10) if m * power >= raw)
    return max(1.0, math.ceil(step)) if integer else step


def pareto_svg(
    points: Sequence[tuple[float, float | None]],
    front: Sequence[Sequence[int]],
    *,
    title: str,
) -> str:
    """False trips (x, a count: integer ticks) against the worst detection latency (y, s: the
    largest latency over the labelled faults) for every combination. ``front``: the Pareto
    front as groups of tied combinations; each group is one square with its size beside it
    (x N) and the front is joined by a line. Combinations that miss a labelled fault (their
    worst latency is infinite) sit in the band marked "missed" at the top of the plot. The
    legend sits between the title and the plot, clear of every marker."""
    xs = [float(p[0]) for p in points]
    ys = [p[1] for p in points if p[1] is not None]
    x_step = _nice_step(max(xs, default=1.0), ticks=6, integer=True)
    x_top = x_step * max(1, math.ceil(max(xs, default=1.0) / x_step))
    y_step = _nice_step(max(ys, default=1.0) or 1.0, ticks=5, integer=False)
    y_top = y_step * max(1, math.ceil((max(ys, default=1.0) or 1.0) / y_step))
    x0, x1 = LEFT, WIDTH - RIGHT
    y_axis, y_miss = HEIGHT - BOTTOM, TOP + MISS_BAND / 2
    y_plot_top = TOP + MISS_BAND + 8  # latencies start below the miss band

    def sx(x: float) -> float:
        return x0 + 10 + (x1 - x0 - 20) * x / x_top

    def sy(y: float | None) -> float:
        return y_miss if y is None else y_axis - (y_axis - y_plot_top) * y / y_top

    out = [
        f'<svg xmlns="http://www.w3.org/2000/svg" width="{WIDTH}" height="{HEIGHT}" '
        f'viewBox="0 0 {WIDTH} {HEIGHT}" font-family="sans-serif" font-size="12">',
        f"<title>{escape(title)}</title>",
        f'<rect width="{WIDTH}" height="{HEIGHT}" fill="#fbfaf6"/>',
        f'<text x="{LEFT}" y="24" font-size="15" font-weight="bold">{escape(title)}</text>',
        # legend, in its own row between the title and the plot
        f'<g class="legend"><rect x="{LEFT}" y="40" width="9" height="9" fill="#1f4e79"/>'
        f'<text x="{LEFT + 14}" y="49">Pareto front (x N: N tied combinations)</text>'
        f'<circle cx="{LEFT + 290}" cy="45" r="3" fill="#8a8a8a"/>'
        f'<text x="{LEFT + 298}" y="49">other combinations</text>'
        f'<text x="{LEFT + 430}" y="49" fill="#8a8a8a">x</text>'
        f'<text x="{LEFT + 442}" y="49">misses a fault</text></g>',
        f'<rect x="{x0}" y="{TOP}" width="{x1 - x0}" height="{MISS_BAND}" fill="#f0ebe0"/>',
        f'<text x="{x0 - 8}" y="{y_miss + 4:.1f}" text-anchor="end">missed</text>',
        f'<line x1="{x0}" y1="{y_axis}" x2="{x1}" y2="{y_axis}" stroke="#333"/>',
        f'<line x1="{x0}" y1="{TOP}" x2="{x0}" y2="{y_axis}" stroke="#333"/>',
        f'<text x="{(x0 + x1) / 2}" y="{HEIGHT - 14}" text-anchor="middle">'
        "false trips (count)</text>",
        f'<text x="16" y="{(y_plot_top + y_axis) / 2}" text-anchor="middle" '
        f'transform="rotate(-90 16 {(y_plot_top + y_axis) / 2})">'
        "worst detection latency, s</text>",
    ]
    for k in range(round(x_top / x_step) + 1):
        xv = k * x_step
        out.append(
            f'<text class="xtick" x="{sx(xv):.1f}" y="{y_axis + 17}" text-anchor="middle">'
            f"{xv:.0f}</text>"
        )
    for k in range(round(y_top / y_step) + 1):
        yv = k * y_step
        out.append(
            f'<text class="ytick" x="{x0 - 8}" y="{sy(yv) + 4:.1f}" text-anchor="end">'
            f"{yv:.4g}</text>"
        )
    on_front = {i for group in front for i in group}
    for i, (x, y) in enumerate(points):
        if i in on_front:
            continue
        if y is None:
            out.append(
                f'<text x="{sx(x):.1f}" y="{sy(None) + 4:.1f}" text-anchor="middle" '
                'fill="#8a8a8a">x</text>'
            )
        else:
            out.append(f'<circle cx="{sx(x):.1f}" cy="{sy(y):.1f}" r="2.5" fill="#8a8a8a"/>')
    heads = [points[group[0]] for group in front if group]
    line = " ".join(f"{sx(x):.1f},{sy(y):.1f}" for x, y in heads if y is not None)
    if line:
        out.append(f'<polyline points="{line}" fill="none" stroke="#1f4e79" stroke-width="1.5"/>')
    for group in front:
        if not group:
            continue
        x, y = points[group[0]]
        rows = ", ".join(str(i) for i in group[:20]) + (" ..." if len(group) > 20 else "")
        who = (
            f"combination {rows}" if len(group) == 1 else f"{len(group)} tied combinations ({rows})"
        )
        out.append(
            f'<rect class="front" x="{sx(x) - 4:.1f}" y="{sy(y) - 4:.1f}" width="8" height="8" '
            f'fill="#1f4e79"><title>{who}: {x:g} false trips, '
            f"{'a fault missed' if y is None else f'worst latency {y:.4g} s'}</title></rect>"
        )
        if len(group) > 1:
            out.append(
                f'<text x="{sx(x) + 7:.1f}" y="{sy(y) - 6:.1f}" fill="#1f4e79">'
                f"x {len(group)}</text>"
            )
    out.append("</svg>")
    return "\n".join(out)
