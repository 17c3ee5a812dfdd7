"""Small SVG plots drawn by hand: no plotting library, no fonts or scripts from elsewhere."""

from __future__ import annotations

import math
from collections.abc import Sequence
from html import escape

WIDTH, HEIGHT, PAD = 640, 420, 60


def pareto_svg(
    points: Sequence[tuple[float, float | None]], front: Sequence[int], *, title: str
) -> str:
    """False trips (x) against worst detection latency (y, s) for every combination; the
    Pareto front joined by a line and marked with squares, the rest as small circles.
    Combinations that miss a fault (no latency) sit on a band above the plot, marked x."""
    xs = [float(p[0]) for p in points]
    ys = [p[1] for p in points if p[1] is not None]
    x_max = max(xs, default=1.0) or 1.0
    y_max = max(ys, default=1.0) or 1.0
    plot_w, plot_h = WIDTH - 2 * PAD, HEIGHT - 2 * PAD

    def sx(x: float) -> float:
        return PAD + plot_w * x / (x_max * 1.05)

    def sy(y: float | None) -> float:
        return PAD - 18 if y is None else HEIGHT - PAD - plot_h * y / (y_max * 1.05)

    out = [
        f'<svg xmlns="http://www.w3.org/2000/svg" width="{WIDTH}" height="{HEIGHT}" '
        f'viewBox="0 0 {WIDTH} {HEIGHT}" font-family="sans-serif" font-size="12">',
        f"<title>{escape(title)}</title>",
        f'<rect width="{WIDTH}" height="{HEIGHT}" fill="#fbfaf6"/>',
        f'<text x="{PAD}" y="24" font-size="15" font-weight="bold">{escape(title)}</text>',
        f'<line x1="{PAD}" y1="{HEIGHT - PAD}" x2="{WIDTH - PAD}" y2="{HEIGHT - PAD}" '
        'stroke="#333"/>',
        f'<line x1="{PAD}" y1="{PAD}" x2="{PAD}" y2="{HEIGHT - PAD}" stroke="#333"/>',
        f'<text x="{WIDTH / 2}" y="{HEIGHT - 18}" text-anchor="middle">false trips</text>',
        f'<text x="18" y="{HEIGHT / 2}" text-anchor="middle" '
        f'transform="rotate(-90 18 {HEIGHT / 2})">worst detection latency, s</text>',
        f'<text x="{WIDTH - PAD}" y="{PAD - 14}" text-anchor="end" fill="#555">'
        "x above the axes: misses a labelled fault</text>",
    ]
    # False trips are counts: whole-number ticks, at most five or six of them.
    x_step = max(1, math.ceil(x_max / 5))
    for xv in range(0, int(x_max) + 1, x_step):
        out.append(
            f'<text x="{sx(xv):.1f}" y="{HEIGHT - PAD + 16}" text-anchor="middle">{xv:d}</text>'
        )
    for k in range(5):
        yv = y_max * k / 4
        out.append(f'<text x="{PAD - 6}" y="{sy(yv) + 4:.1f}" text-anchor="end">{yv:.3g}</text>')
    on_front = set(front)
    for i, (x, y) in enumerate(points):
        if i in on_front:
            continue
        if y is None:
            out.append(
                f'<text x="{sx(x):.1f}" y="{sy(None):.1f}" text-anchor="middle" '
                'fill="#8a8a8a">x</text>'
            )
        else:
            out.append(f'<circle cx="{sx(x):.1f}" cy="{sy(y):.1f}" r="2.5" fill="#8a8a8a"/>')
    line = " ".join(
        f"{sx(points[i][0]):.1f},{sy(points[i][1]):.1f}" for i in front if points[i][1] is not None
    )
    if line:
        out.append(f'<polyline points="{line}" fill="none" stroke="#1f4e79" stroke-width="1.5"/>')
    for i in front:
        x, y = points[i]
        out.append(
            f'<rect x="{sx(x) - 4:.1f}" y="{sy(y) - 4:.1f}" width="8" height="8" fill="#1f4e79">'
            f"<title>combination {i}: {x:g} false trips, "
            f"{'missed' if y is None else f'{y:.3g} s'}</title></rect>"
        )
    out.append("</svg>")
    return "\n".join(out)
