"""Inline SVG charts for the HTML report: an account's level with its usual band, the fleet-wide
daily factor, and the account index's sparklines.

Each chart is a plain string of SVG with its text labels (axis ticks, dates) as ``<text>``
elements, so it needs no script or font file, and scales with the page through its
``viewBox``.  Colours never carry meaning alone: the band is a fill, the judged days are hatched,
the onset is a dashed line with a label, masked days are pale stripes with the line broken.

Inputs are lists of floats (``None`` or NaN = missing) and ISO dates, one per day, oldest first.
"""

from __future__ import annotations

import math
from datetime import date

INK = "#1b2a3a"
GRID = "#d5dde2"
RAW = "#a9b7c0"
SERIES = "#0f5c6e"
BAND = "#d3e0e8"
WINDOW = "#c7a34a"
ONSET = "#5b3f8c"
SEGMENT = "#8c2d04"
MASK = "#eceff1"

MONTHS = "Jan Feb Mar Apr May Jun Jul Aug Sep Oct Nov Dec".split()


def _finite(values) -> list[float]:
    return [v for v in values if v is not None and math.isfinite(v)]


def nice_ticks(vmax: float, count: int = 3) -> list[float]:
    """Round values from 0 up to about ``vmax`` (``count`` or so of them, 0 first): steps of 1, 2,
    2.5 or 5 times a power of ten, so an axis reads 0, 20, 40 rather than 0, 17.3, 34.6."""
    if not math.isfinite(vmax) or vmax <= 0:
        return [0.0, 1.0]
    raw = vmax / count
    power = 10 ** math.floor(math.log10(raw))
    step = next(m * power for m in (1, 2, 2.5, 5, 10) if m * power >= raw)
    top = step * math.ceil(vmax / step - 1e-9)
    return [i * step for i in range(int(round(top / step)) + 1)]


def tick_label(value: float) -> str:
    """A y-axis tick as a person writes it: 0, 2.5, 40, 1.2k."""
    if value >= 10_000:
        return f"{value / 1000:.0f}k"
    if value >= 1_000:
        return f"{value / 1000:.1f}".rstrip("0").rstrip(".") + "k"
    return f"{value:.2f}".rstrip("0").rstrip(".")


def date_ticks(days: list[str], most: int = 5) -> list[int]:
    """Indices of the days to label on a date axis: the first day of each month where there are a
    few months, otherwise evenly spaced days; never more than ``most``, none at the very edges
    (their labels would be cut off)."""
    n = len(days)
    if n < 2:
        return []
    margin = max(2, n // 25)
    months = [i for i, d in enumerate(days) if d.endswith("-01") and margin <= i <= n - 1 - margin]
    if 2 <= len(months):
        step = -(-len(months) // most)
        return months[::step]
    count = min(most, 4)
    return [round(margin + j * (n - 1 - 2 * margin) / (count - 1)) for j in range(count)]


def date_label(day: str, with_year: bool = False) -> str:
    d = date.fromisoformat(day)
    return f"{MONTHS[d.month - 1]} {d.day}" + (f" {d.year}" if with_year else "")


class _Frame:
    """The plotting area of a chart and its two scales (x: day index, y: value from 0)."""

    def __init__(self, n: int, vmax: float, width: int, height: int, left: int, bottom: int, top: int = 8, right: int = 8):
        self.n, self.width, self.height = max(n, 2), width, height
        self.left, self.right, self.top, self.bottom = left, width - right, top, height - bottom
        self.ticks = nice_ticks(vmax)
        self.vmax = self.ticks[-1]

    def x(self, i: float) -> float:
        return self.left + i * (self.right - self.left) / (self.n - 1)

    def y(self, v: float) -> float:
        v = min(max(v, 0.0), self.vmax)
        return self.bottom - v / self.vmax * (self.bottom - self.top)

    def path(self, values) -> str:
        return _path(values, self.x, self.y)

    def axes(self, days: list[str], font: int = 10) -> list[str]:
        """Horizontal grid lines with their values at the left, and a date axis below."""
        out = []
        for t in self.ticks:
            y = self.y(t)
            out.append(f'<line x1="{self.left}" x2="{self.right}" y1="{y:.1f}" y2="{y:.1f}" stroke="{GRID}" stroke-width="1"/>')
            out.append(f'<text class="tick y" x="{self.left - 4}" y="{y + font * 0.35:.1f}" text-anchor="end" '
                       f'font-size="{font}" fill="{INK}">{tick_label(t)}</text>')
        out.append(f'<line x1="{self.left}" x2="{self.right}" y1="{self.bottom}" y2="{self.bottom}" stroke="{INK}" stroke-width="1"/>')
        ticks = date_ticks(days)
        years = {d[:4] for d in days}
        for i in ticks:
            x = self.x(i)
            out.append(f'<line x1="{x:.1f}" x2="{x:.1f}" y1="{self.bottom}" y2="{self.bottom + 3}" stroke="{INK}" stroke-width="1"/>')
            out.append(f'<text class="tick x" x="{x:.1f}" y="{self.bottom + 4 + font:.1f}" text-anchor="middle" '
                       f'font-size="{font}" fill="{INK}">{date_label(days[i], with_year=len(years) > 1 and i == ticks[0])}</text>')
        return out

    def stripes(self, masked, colour=MASK) -> list[str]:
        """A pale full-height stripe over each masked day (the line is broken there too)."""
        half = (self.right - self.left) / (self.n - 1) / 2
        return [f'<rect class="masked" x="{self.x(i) - half:.1f}" y="{self.top}" width="{max(2 * half, 1.5):.1f}" '
                f'height="{self.bottom - self.top}" fill="{colour}"/>' for i in masked]


def _path(values, x, y) -> str:
    """An SVG path through the finite values at (x(i), y(v)), lifted over missing ones."""
    parts, pen_down = [], False
    for i, v in enumerate(values):
        if v is None or not math.isfinite(v):
            pen_down = False
            continue
        parts.append(f"{'L' if pen_down else 'M'}{x(i):.1f},{y(v):.1f}")
        pen_down = True
    return " ".join(parts)


def _open(width: int, height: int, label: str, css_class: str = "chart") -> str:
    return (f'<svg class="{css_class}" viewBox="0 0 {width} {height}" width="{width}" height="{height}" role="img" '
            f'aria-label="{label}" xmlns="http://www.w3.org/2000/svg">')


def account_chart(days: list[str], raw, level, *, band=None, window: int = 7, onset_index=None, masked=(),
                  segments=(), width: int = 340, height: int = 150) -> str:
    """An account's recent days: the weekday-adjusted 7-day ``level`` (events a day) as the line,
    the ``raw`` days faint behind it, the usual ``band`` (low, high) of 7-day levels on the same
    scale, the last ``window`` days hatched, the onset as a dashed line, masked days as stripes and
    each of ``segments`` — ``(first index, last index, level)`` — as a thick stroke at its level.
    ``days``, ``raw`` and ``level`` have one entry per day shown."""
    extra = list(band or ()) + [s[2] for s in segments if s[2] is not None]
    frame = _Frame(len(days), max(_finite(list(raw) + list(level) + extra) or [1.0]), width, height, left=30, bottom=18)
    parts = [_open(width, height, "activity chart"),
             '<defs><pattern id="hatch" width="4" height="4" patternUnits="userSpaceOnUse" patternTransform="rotate(45)">'
             f'<line x1="0" y1="0" x2="0" y2="4" stroke="{WINDOW}" stroke-width="2"/></pattern></defs>']
    parts += frame.stripes(masked)
    if band:
        top, bottom = frame.y(band[1]), frame.y(band[0])
        parts.append(f'<rect class="band" x="{frame.left}" y="{top:.1f}" width="{frame.right - frame.left}" '
                     f'height="{max(bottom - top, 1):.1f}" fill="{BAND}"/>')
    if window:
        x0 = frame.x(max(len(days) - window, 0))
        parts.append(f'<rect class="judged" x="{x0:.1f}" y="{frame.top}" width="{frame.right - x0:.1f}" '
                     f'height="{frame.bottom - frame.top}" fill="url(#hatch)" opacity="0.5"/>')
    parts += frame.axes(days)
    raw_path = frame.path(raw)
    if raw_path:
        parts.append(f'<path class="raw" d="{raw_path}" fill="none" stroke="{RAW}" stroke-width="0.8"/>')
    for first, last, value in segments:
        if value is not None and math.isfinite(value):
            parts.append(f'<line class="segment" x1="{frame.x(first):.1f}" x2="{frame.x(last):.1f}" y1="{frame.y(value):.1f}" '
                         f'y2="{frame.y(value):.1f}" stroke="{SEGMENT}" stroke-width="2.5" opacity="0.8"/>')
    level_path = frame.path(level) or f"M{frame.left},{frame.bottom}L{frame.right},{frame.bottom}"
    parts.append(f'<path class="level" d="{level_path}" fill="none" stroke="{SERIES}" stroke-width="1.8"/>')
    if onset_index is not None and 0 <= onset_index < len(days):
        x = frame.x(onset_index)
        anchor = "end" if x > frame.right - 40 else "start"
        parts.append(f'<line class="onset" x1="{x:.1f}" x2="{x:.1f}" y1="{frame.top}" y2="{frame.bottom}" '
                     f'stroke="{ONSET}" stroke-width="1.5" stroke-dasharray="5,3"/>')
        parts.append(f'<text class="onset-label" x="{x + (-3 if anchor == "end" else 3):.1f}" y="{frame.top + 9}" '
                     f'text-anchor="{anchor}" font-size="9" fill="{ONSET}">onset</text>')
    parts.append("</svg>")
    return "".join(parts)


def fleet_chart(days: list[str], factor, masked=(), *, width: int = 1000, height: int = 140) -> str:
    """The fleet-wide daily factor (1 = an ordinary day) over ``days``, masked days as stripes,
    a dotted line at 1."""
    frame = _Frame(len(days), max(_finite(factor) + [1.0]), width, height, left=30, bottom=18)
    parts = [_open(width, height, "fleet-wide daily factor", "chart fleet")]
    parts += frame.stripes(masked, colour="#c9d2d8")
    parts += frame.axes(days)
    parts.append(f'<line class="reference" x1="{frame.left}" x2="{frame.right}" y1="{frame.y(1.0):.1f}" y2="{frame.y(1.0):.1f}" '
                 f'stroke="{INK}" stroke-dasharray="2,3" stroke-width="1"/>')
    path = frame.path(factor) or f"M{frame.left},{frame.bottom}L{frame.right},{frame.bottom}"
    parts.append(f'<path class="level" d="{path}" fill="none" stroke="{SERIES}" stroke-width="1.3"/>')
    parts.append("</svg>")
    return "".join(parts)


def sparkline(level, *, width: int = 120, height: int = 22) -> str:
    """A tiny line of ``level`` (no axes; the index's numbers beside it say the scale)."""
    finite = _finite(level)
    if not finite:
        return ""
    vmax = max(finite) or 1.0
    n = max(len(level), 2)
    points = _path(level, lambda i: 1 + i * (width - 2) / (n - 1), lambda v: height - 1 - v / vmax * (height - 2))
    return (f'<svg class="spark" viewBox="0 0 {width} {height}" width="{width}" height="{height}" role="img" '
            f'aria-label="7-day level" xmlns="http://www.w3.org/2000/svg">'
            f'<path d="{points}" fill="none" stroke="{SERIES}" stroke-width="1.2"/></svg>')
