"""Small SVG charts as geometry: paired bars (reference against window), a number line, a timeline of firings.

Each function returns a :class:`Chart` (rectangles, lines, texts with CSS classes); ``templates/html/parts.html.j2``
draws any chart the same way, autoescaped. Shares, not counts, are drawn, so a window of a few hundred items and a
reference of a million compare on one axis.
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field
from typing import Callable, Sequence

import numpy as np

WIDTH = 520.0
HEIGHT = 210.0
LEFT, RIGHT, TOP, BOTTOM = 46.0, 10.0, 10.0, 52.0
MAX_BARS = 20  # histograms with more bins (KS uses 100) are shown in groups of neighbouring bins


@dataclass
class Shape:
    x: float
    y: float
    w: float
    h: float
    cls: str
    title: str = ""


@dataclass
class Text:
    x: float
    y: float
    text: str
    cls: str = "small"
    anchor: str = "middle"
    rotate: float = 0.0


@dataclass
class Line:
    x1: float
    y1: float
    x2: float
    y2: float
    cls: str = "axis"


@dataclass
class Chart:
    width: float
    height: float
    title: str
    shapes: list[Shape] = field(default_factory=list)
    lines: list[Line] = field(default_factory=list)
    texts: list[Text] = field(default_factory=list)


def _nice_top(x: float) -> tuple[float, int]:
    """The smallest of 1, 2, 2.5, 5 x 10^k at or above ``x``, and how many round steps divide it."""
    if x <= 0:
        return 1.0, 5
    power = 10 ** math.floor(math.log10(x))
    for step, divisions in ((1, 5), (2, 4), (2.5, 5), (5, 5), (10, 5)):
        if step * power >= x * (1 - 1e-12):
            return step * power, divisions
    return 10 * power, 5  # pragma: no cover


def _pct(x: float) -> str:
    return f"{100 * x:.3g}%"


def _num(x: float) -> str:
    return f"{x:.4g}"


def _cut(text: str, limit: int) -> str:
    return text if len(text) <= limit else text[: limit - 1] + "…"


def group_bins(reference: Sequence[float], window: Sequence[float], edges: Sequence[float], most: int = MAX_BARS
               ) -> tuple[list[float], list[float], list[float]]:
    """Neighbouring bins summed into at most ``most`` groups; returns the counts and the edges between groups."""
    k = max(1, math.ceil(len(reference) / most))
    if k == 1:
        return list(reference), list(window), list(edges)
    ref = [float(sum(reference[i:i + k])) for i in range(0, len(reference), k)]
    win = [float(sum(window[i:i + k])) for i in range(0, len(window), k)]
    kept = [edges[i + k - 1] for i in range(0, len(reference) - k, k) if i + k - 1 < len(edges)]
    return ref, win, kept


def paired_bars(reference: Sequence[float], window: Sequence[float], labels: Sequence[str] | None = None,
                edges: Sequence[float] | None = None, title: str = "") -> Chart:
    """Reference and window shares side by side per bin or category.

    ``labels`` names each category under its pair; ``edges`` (one fewer than the bins) label the boundaries of a
    histogram's bins instead.
    """
    ref = np.asarray(reference, dtype=float)
    win = np.asarray(window, dtype=float)
    ref_share = ref / ref.sum() if ref.sum() else ref
    win_share = win / win.sum() if win.sum() else win
    top, steps = _nice_top(float(max(ref_share.max(initial=0), win_share.max(initial=0))))
    chart = Chart(WIDTH, HEIGHT, title)
    plot_w, plot_h = WIDTH - LEFT - RIGHT, HEIGHT - TOP - BOTTOM
    base = TOP + plot_h
    for i in range(steps + 1):
        y = base - plot_h * i / steps
        chart.lines.append(Line(LEFT, y, WIDTH - RIGHT, y, "grid" if i else "axis"))
        chart.texts.append(Text(LEFT - 4, y + 4, _pct(top * i / steps), anchor="end"))
    count = max(1, len(ref_share))
    slot = plot_w / count
    bar = max(1.0, slot * 0.4)
    names = list(labels) if labels is not None else [f"bin {i + 1}" for i in range(count)]
    for i in range(count):
        x = LEFT + i * slot + slot / 2
        for share, cls, dx, who in ((ref_share[i], "bar-reference", -bar, "reference"),
                                    (win_share[i], "bar-window", 0.0, "window")):
            h = plot_h * share / top
            chart.shapes.append(Shape(x + dx, base - h, bar, h, cls, f"{names[i]}: {_pct(share)} of the {who}"))
    if labels is not None:
        rotate = count > 6
        for i, name in enumerate(labels):
            x = LEFT + i * slot + slot / 2
            chart.texts.append(Text(x, base + 14, _cut(str(name), 14 if rotate else 18),
                                    anchor="end" if rotate else "middle", rotate=-35 if rotate else 0.0))
    elif edges is not None and len(edges):
        every = max(1, math.ceil(len(edges) / 6))  # at most about six boundary values under the axis
        for i, edge in enumerate(edges):
            if i % every:
                continue
            x = LEFT + (i + 1) * slot
            chart.lines.append(Line(x, base, x, base + 4))
            chart.texts.append(Text(x, base + 16, _num(edge)))
        chart.texts.append(Text(LEFT + plot_w / 2, base + 34, "value (bin boundaries from the reference's quantiles)"))
    return chart


def number_line(reference_mean: float, reference_sd: float, window_mean: float, title: str = "") -> Chart:
    """A mean against the reference's mean and its band of one and two standard deviations."""
    chart = Chart(WIDTH, 110.0, title)
    sd = reference_sd if reference_sd and math.isfinite(reference_sd) and reference_sd > 0 else 1.0
    lo = min(reference_mean - 3 * sd, window_mean - 0.5 * sd)
    hi = max(reference_mean + 3 * sd, window_mean + 0.5 * sd)
    plot_w = WIDTH - 2 * LEFT

    def x(v: float) -> float:
        return LEFT + plot_w * (v - lo) / (hi - lo)

    y = 50.0
    chart.shapes.append(Shape(x(reference_mean - 2 * sd), y - 14, x(reference_mean + 2 * sd) - x(reference_mean - 2 * sd),
                              28, "band-reference", "reference mean ± 2 SD"))
    chart.shapes.append(Shape(x(reference_mean - sd), y - 14, x(reference_mean + sd) - x(reference_mean - sd), 28,
                              "bar-reference", "reference mean ± 1 SD"))
    chart.lines.append(Line(LEFT, y + 14, WIDTH - LEFT, y + 14))
    chart.lines.append(Line(x(reference_mean), y - 18, x(reference_mean), y + 18))
    chart.shapes.append(Shape(x(window_mean) - 3, y - 20, 6, 40, "bar-window", f"window mean {_num(window_mean)}"))
    chart.texts.append(Text(x(reference_mean), y - 24, f"reference {_num(reference_mean)}"))
    chart.texts.append(Text(x(window_mean), y + 34, f"window {_num(window_mean)}"))
    for v in (lo, hi):
        chart.texts.append(Text(x(v), y + 34, _num(v), anchor="start" if v == lo else "end"))
    return chart


def two_bars(reference: float, window: float, names: tuple[str, str], unit: str = "share", title: str = "") -> Chart:
    """One figure in the reference and in the window: a share (``unit="share"``) or a number of rows."""
    show: Callable[[float], str] = _pct if unit == "share" else (lambda v: f"{v:,.0f}")
    values = [reference, window]
    chart = Chart(WIDTH, 110.0, title)
    top, _ = _nice_top(max(values) if max(values) > 0 else 1.0)
    left = 150.0
    plot_w = WIDTH - left - 70
    for i, (v, name) in enumerate(zip(values, names)):
        y = 12 + i * 44
        w = plot_w * max(v, 0.0) / top
        chart.shapes.append(Shape(left, y, w, 28, "bar-reference" if i == 0 else "bar-window", f"{name}: {show(v)}"))
        chart.texts.append(Text(left - 6, y + 19, name, cls="", anchor="end"))
        chart.texts.append(Text(left + w + 6, y + 19, show(v), cls="", anchor="start"))
    chart.lines.append(Line(left, 6, left, 102))
    return chart


def timeline(times: Sequence[float], levels: Sequence[int], start: float, end: float, cover: float = 0.0,
             width: float = 400.0, height: float = 18.0) -> Chart:
    """Firings over a period: a full-height bar where a check was critical, a half-height one where it warned,
    a thin line where it was evaluated and quiet (the level is in the height as well as the colour).

    Each evaluation at t covers its window ``(t - cover, t]``; a column shows the worst level it covers, and a
    column no evaluation covers stays empty.
    """
    chart = Chart(width, height, "")
    span = max(end - start, 1.0)
    columns = max(1, int(width))
    worst = np.full(columns, -1)
    t = np.asarray(times, dtype=float)
    if t.size:
        last = np.clip(np.ceil((t - start) / span * columns).astype(int) - 1, 0, columns - 1)
        first = np.clip(np.floor((t - cover - start) / span * columns).astype(int), 0, columns - 1)
        first = np.minimum(first, last)
        level = np.asarray(levels, dtype=int)
        for a, b, v in zip(first, last, level):  # a few thousand evaluations at most per check
            worst[a:b + 1] = np.maximum(worst[a:b + 1], v)
    day = 86400.0
    for midnight in np.arange(math.ceil(start / day) * day, end, day):
        x = (midnight - start) / span * width
        chart.lines.append(Line(x, 0, x, height, "tl-day"))
    i = 0
    while i < columns:
        j = i
        while j + 1 < columns and worst[j + 1] == worst[i]:
            j += 1
        v = int(worst[i])
        x, w = i * width / columns, (j - i + 1) * width / columns
        if v == 0:
            chart.shapes.append(Shape(x, height / 2 - 1, w, 2, "tl-quiet"))
        elif v == 1:
            chart.shapes.append(Shape(x, height / 2 - 5, w, 10, "tl-warn", "warn"))
        elif v == 2:
            chart.shapes.append(Shape(x, 0, w, height, "tl-critical", "critical"))
        i = j + 1
    return chart


def day_axis(start: float, end: float, width: float = 400.0, height: float = 16.0) -> Chart:
    """Dates under the midnights of a period (every day up to two weeks, else every seventh), for timelines."""
    import datetime as dt

    chart = Chart(width, height, "")
    span = max(end - start, 1.0)
    day = 86400.0
    midnights = np.arange(math.ceil(start / day) * day, end, day)
    every = 1 if len(midnights) <= 14 else 7
    for i, midnight in enumerate(midnights):
        if i % every:
            continue
        x = (midnight - start) / span * width
        label = dt.datetime.fromtimestamp(float(midnight), dt.timezone.utc).strftime("%m-%d")
        chart.texts.append(Text(x, height - 4, label, anchor="middle" if 12 < x < width - 12 else
                                "start" if x <= 12 else "end"))
    return chart
