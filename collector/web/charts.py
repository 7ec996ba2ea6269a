"""
Small charts drawn on the server as inline SVG: no script, no library, readable on a phone.

Each chart is a ``<figure>`` whose caption names it; the SVG carries ``role="img"`` and points at the
caption, and a one-line text summary follows for people who do not see the drawing.
"""

from __future__ import annotations

import html
import math
import time
from collections.abc import Sequence

W, H = 400.0, 150.0
"""The drawing box in SVG units: about one CSS pixel each in a chart card on a desktop."""
LEFT, RIGHT, TOP, BOTTOM = 48.0, 8.0, 8.0, 20.0


def _ticks(lo: float, hi: float, n: int = 3) -> list[float]:
    if hi <= lo:
        return [lo]
    step = 10 ** math.floor(math.log10((hi - lo) / n))
    for m in (1, 2, 5, 10):
        if (hi - lo) / (step * m) <= n + 1:
            step *= m
            break
    first = math.ceil(lo / step) * step
    return [first + i * step for i in range(int((hi - first) / step) + 1)]


def _label(v: float, step: float) -> str:
    """A tick label with as many decimals as the tick step needs (ticks 81.62, 81.64 stay apart)."""
    digits = max(0, -math.floor(math.log10(step))) if step > 0 else 0
    a = abs(v)
    if digits == 0 and a >= 1e4:
        return f"{v / 1e3:.0f}k".replace("-", "−")
    return f"{v:.{digits}f}".replace("-", "−")


def time_chart(
    chart_id: str,
    title: str,
    series: Sequence[tuple[str, Sequence[tuple[float, float]]]],
    *,
    t0: float,
    t1: float,
    unit: str,
    summary: str,
    dots: bool = False,
    bars: float | None = None,
    zero: bool = False,
    band: tuple[float, float] | None = None,
) -> str:
    """
    A time chart of one or more series of (collector time, value).

    ``bars``: draw each point as a bar this many seconds wide; ``dots``: points only; ``zero``: the
    value axis includes 0; ``band``: a shaded tolerance band (low, high) in the value's unit.
    """
    colours = ("#0b5cad", "#a85600", "#2b7a47", "#6a3a98", "#b02a20")
    values = [v for _, pts in series for _, v in pts if math.isfinite(v)]
    cap = f'<figcaption id="{chart_id}">{html.escape(title)} <span class="note">({html.escape(unit)})</span></figcaption>'
    if not values:
        return f'<figure class="chart">{cap}<p class="note">{html.escape(summary or "nothing recorded in this window")}</p></figure>'
    lo, hi = min(values), max(values)
    if band:
        lo, hi = min(lo, band[0]), max(hi, band[1])
    if zero:
        lo, hi = min(lo, 0.0), max(hi, 0.0)
    if hi - lo < 1e-9:
        lo, hi = lo - 1, hi + 1
    pad = (hi - lo) * 0.08
    lo, hi = lo - (0 if zero and lo == 0 else pad), hi + pad
    span = max(t1 - t0, 1.0)

    def x(t: float) -> float:
        return round(LEFT + (t - t0) / span * (W - LEFT - RIGHT), 1)

    def y(v: float) -> float:
        return round(TOP + (hi - v) / (hi - lo) * (H - TOP - BOTTOM), 1)

    out = [
        f'<svg viewBox="0 0 {W:.0f} {H:.0f}" role="img" aria-labelledby="{chart_id}" xmlns="http://www.w3.org/2000/svg">'
    ]
    if band:
        out.append(
            f'<rect x="{LEFT}" y="{y(band[1])}" width="{W - LEFT - RIGHT}" height="{y(band[0]) - y(band[1])}" fill="#e3f4e8"/>'
        )
    ticks = _ticks(lo, hi)
    step = ticks[1] - ticks[0] if len(ticks) > 1 else 1.0
    for v in ticks:
        out.append(
            f'<line x1="{LEFT}" x2="{W - RIGHT}" y1="{y(v)}" y2="{y(v)}" stroke="#dde2e8" stroke-width="1"/>'
            f'<text x="{LEFT - 4}" y="{y(v) + 4}" text-anchor="end">{_label(v, step)}</text>'
        )
    for k in range(4):
        t = t0 + span * k / 3
        anchor = "start" if k == 0 else "end" if k == 3 else "middle"
        out.append(
            f'<text x="{x(t)}" y="{H - 5}" text-anchor="{anchor}">{time.strftime("%H:%M", time.gmtime(t))}</text>'
        )
    out.append(
        f'<line x1="{LEFT}" x2="{LEFT}" y1="{TOP}" y2="{H - BOTTOM}" stroke="#4a5563"/>'
        f'<line x1="{LEFT}" x2="{W - RIGHT}" y1="{H - BOTTOM}" y2="{H - BOTTOM}" stroke="#4a5563"/>'
    )
    for i, (_name, pts) in enumerate(series):
        c = colours[i % len(colours)]
        pts = [(t, v) for t, v in pts if math.isfinite(v)]
        if bars:
            w = max(1.0, (W - LEFT - RIGHT) * bars / span - 1)
            for t, v in pts:
                out.append(
                    f'<rect x="{x(t)}" y="{min(y(v), y(0))}" width="{w:.1f}" height="{abs(y(0) - y(v)):.1f}" fill="{c}"/>'
                )
        elif dots or len(pts) == 1:
            out.extend(f'<circle cx="{x(t)}" cy="{y(v)}" r="2" fill="{c}"/>' for t, v in pts)
        else:
            d = " ".join(f"{'M' if j == 0 else 'L'}{x(t)},{y(v)}" for j, (t, v) in enumerate(pts))
            out.append(f'<path d="{d}" fill="none" stroke="{c}" stroke-width="1.8"/>')
    out.append("</svg>")
    names = [n for n, _ in series if n]
    key = ""
    if len(names) > 1:
        key = (
            '<ul class="legend">'
            + "".join(
                f'<li><span class="swatch" style="background:{colours[i % len(colours)]}"></span>{html.escape(n)}</li>'
                for i, n in enumerate(names)
            )
            + "</ul>"
        )
    return (
        f'<figure class="chart">{cap}{"".join(out)}{key}<p class="note">{html.escape(summary)}</p></figure>'
    )
