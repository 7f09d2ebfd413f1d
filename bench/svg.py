"""A tiny line-plot writer: SVG as plain text, no plotting library.

    from svg import line_plot
    line_plot({"asha": [(0, 0.9), (5, 0.95)], "baseline": [(1, 0.8), (9, 0.93)]},
              "out.svg", title="best so far", xlabel="CPU-seconds", ylabel="accuracy",
              step=True, hline=(0.97, "reference"))

Each series is a list of (x, y) points drawn as one polyline (``step=True`` draws a
best-so-far staircase: the value holds until the next point). Axes get about five "nice"
ticks; ``logx``/``logy`` put an axis on a log10 scale (values must be > 0). Nothing here reads
a clock or the network; the output depends on the input only.
"""

from __future__ import annotations

import math
from collections.abc import Mapping, Sequence
from html import escape
from pathlib import Path

__all__ = ["line_plot", "nice_ticks", "PALETTE"]

PALETTE = ("#1f6fb4", "#d9541e", "#2a9d3f", "#8e44ad", "#b8860b", "#17a2b8", "#c0392b", "#555555")

Point = tuple[float, float]


def nice_ticks(low: float, high: float, count: int = 5) -> list[float]:
    """About ``count`` round tick values covering [low, high]."""
    if not (math.isfinite(low) and math.isfinite(high)):
        return []
    if high <= low:
        return [low]
    raw = (high - low) / max(1, count)
    power = 10 ** math.floor(math.log10(raw))
    step = next(m * power for m in (1, 2, 2.5, 5, 10) if m * power >= raw)
    first = math.ceil(low / step - 1e-9) * step
    ticks = []
    value = first
    while value <= high + step * 1e-9:
        ticks.append(round(value, 12))
        value += step
    return ticks


def _log_ticks(low: float, high: float) -> list[float]:
    lo, hi = math.floor(math.log10(low) + 1e-9), math.ceil(math.log10(high) - 1e-9)
    return [10.0**k for k in range(lo, hi + 1) if low * (1 - 1e-9) <= 10.0**k <= high * (1 + 1e-9)]


def _label(value: float) -> str:
    if value == 0:
        return "0"
    if abs(value) >= 1e4 or abs(value) < 1e-3:
        return f"{value:.0e}".replace("e+0", "e").replace("e+", "e").replace("e-0", "e-")
    return f"{value:g}"


def line_plot(
    series: Mapping[str, Sequence[Point]],
    path: str | Path,
    *,
    title: str = "",
    xlabel: str = "",
    ylabel: str = "",
    step: bool = False,
    logx: bool = False,
    logy: bool = False,
    hline: tuple[float, str] | None = None,
    width: int = 720,
    height: int = 420,
    markers: bool = False,
) -> Path:
    """Write the plot to ``path`` (parents created); return the path."""
    left, right, top, bottom = 70, 170, 40, 55
    plot_w, plot_h = width - left - right, height - top - bottom
    points = [(x, y) for pts in series.values() for x, y in pts
              if math.isfinite(x) and math.isfinite(y) and (not logx or x > 0) and (not logy or y > 0)]
    if hline is not None:
        points.append((points[0][0] if points else 0.0, hline[0]))
    if not points:
        points = [(0.0, 0.0), (1.0, 1.0)]
    xs, ys = [p[0] for p in points], [p[1] for p in points]
    x0, x1, y0, y1 = min(xs), max(xs), min(ys), max(ys)
    if x1 <= x0:
        x0, x1 = (x0 / 2, x0 * 2) if logx else (x0 - 1, x1 + 1)
    if y1 <= y0:
        y0, y1 = (y0 / 2, y0 * 2) if logy else (y0 - 0.5, y1 + 0.5)
    if not logy:
        pad = (y1 - y0) * 0.05
        y0, y1 = y0 - pad, y1 + pad

    def tx(x: float) -> float:
        if logx:
            return left + (math.log10(x) - math.log10(x0)) / (math.log10(x1) - math.log10(x0)) * plot_w
        return left + (x - x0) / (x1 - x0) * plot_w

    def ty(y: float) -> float:
        if logy:
            return top + plot_h - (math.log10(y) - math.log10(y0)) / (math.log10(y1) - math.log10(y0)) * plot_h
        return top + plot_h - (y - y0) / (y1 - y0) * plot_h

    out = [
        f'<svg xmlns="http://www.w3.org/2000/svg" width="{width}" height="{height}" '
        f'viewBox="0 0 {width} {height}" font-family="sans-serif" font-size="12">',
        f'<rect x="0" y="0" width="{width}" height="{height}" fill="white"/>',
        f'<text x="{left + plot_w / 2:.1f}" y="22" text-anchor="middle" font-size="14">{escape(title)}</text>',
        f'<rect x="{left}" y="{top}" width="{plot_w}" height="{plot_h}" fill="none" stroke="#333"/>',
    ]
    for t in _log_ticks(x0, x1) if logx else nice_ticks(x0, x1):
        px = tx(t)
        out.append(f'<line x1="{px:.1f}" y1="{top}" x2="{px:.1f}" y2="{top + plot_h}" stroke="#e5e5e5"/>')
        out.append(f'<text x="{px:.1f}" y="{top + plot_h + 16}" text-anchor="middle">{_label(t)}</text>')
    for t in _log_ticks(y0, y1) if logy else nice_ticks(y0, y1):
        py = ty(t)
        out.append(f'<line x1="{left}" y1="{py:.1f}" x2="{left + plot_w}" y2="{py:.1f}" stroke="#e5e5e5"/>')
        out.append(f'<text x="{left - 6}" y="{py + 4:.1f}" text-anchor="end">{_label(t)}</text>')
    out.append(f'<text x="{left + plot_w / 2:.1f}" y="{height - 14}" text-anchor="middle">{escape(xlabel)}</text>')
    out.append(f'<text transform="translate(16 {top + plot_h / 2:.1f}) rotate(-90)" text-anchor="middle">'
               f"{escape(ylabel)}</text>")
    if hline is not None and y0 <= hline[0] <= y1:
        py = ty(hline[0])
        out.append(f'<line x1="{left}" y1="{py:.1f}" x2="{left + plot_w}" y2="{py:.1f}" stroke="#777" '
                   f'stroke-dasharray="5,4"/>')
        out.append(f'<text x="{left + plot_w - 4}" y="{py - 4:.1f}" text-anchor="end" fill="#555">{escape(hline[1])}</text>')
    legend_y = top + 8
    for i, (name, pts) in enumerate(series.items()):
        color = PALETTE[i % len(PALETTE)]
        clean = sorted((x, y) for x, y in pts if math.isfinite(x) and math.isfinite(y)
                       and (not logx or x > 0) and (not logy or y > 0))
        coords: list[str] = []
        for j, (x, y) in enumerate(clean):
            if step and j > 0:
                coords.append(f"{tx(x):.1f},{ty(clean[j - 1][1]):.1f}")
            coords.append(f"{tx(x):.1f},{ty(y):.1f}")
        if len(coords) > 1:
            out.append(f'<polyline fill="none" stroke="{color}" stroke-width="2" points="{" ".join(coords)}"/>')
        if markers or len(coords) == 1:
            out.extend(f'<circle cx="{tx(x):.1f}" cy="{ty(y):.1f}" r="3" fill="{color}"/>' for x, y in clean)
        ly = legend_y + 18 * i
        out.append(f'<line x1="{left + plot_w + 10}" y1="{ly + 12}" x2="{left + plot_w + 30}" y2="{ly + 12}" '
                   f'stroke="{color}" stroke-width="3"/>')
        out.append(f'<text x="{left + plot_w + 35}" y="{ly + 16}">{escape(name)}</text>')
    out.append("</svg>")
    target = Path(path)
    target.parent.mkdir(parents=True, exist_ok=True)
    target.write_text("\n".join(out) + "\n", encoding="utf-8")
    return target
