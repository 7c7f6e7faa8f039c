"""Inline SVG charts for the HTML report, written by hand: histograms on log-spaced bins and bar charts.

Each chart is one ``<svg class="plot">`` element with a ``<title>`` (its name), an x-axis label and a y-axis label
(``<text class="x-label">``, ``<text class="y-label">``), tick labels, and one ``<rect class="bar">`` per drawn
number, which carries that number in ``data-value`` (and in a ``<title>`` tooltip): what the bar's length shows,
so a test can compare the drawing with the report's figures.  No fonts, images or scripts: text uses the page's
font, colours come from the page's CSS classes.
"""
from __future__ import annotations

import math
from html import escape

WIDTH, HEIGHT = 640, 300
LEFT, RIGHT, TOP, BOTTOM = 72, 16, 36, 52


def compact(value: float) -> str:
    """A short tick label: 950, 1.2k, 35k, 4.1M, 2G; fractions as 0.25."""
    if value == 0:
        return "0"
    magnitude = abs(value)
    for div, suffix in ((1e9, "G"), (1e6, "M"), (1e3, "k")):
        if magnitude >= div:
            text = f"{value / div:.3g}"
            return text + suffix
    if magnitude >= 1:
        return f"{value:.3g}" if value != int(value) else f"{int(value)}"
    return f"{value:.2g}"


def nice_ticks(top: float, count: int = 5) -> list[float]:
    """Ticks 0, step, 2 step, ... up to at least ``top``, with a step of 1, 2 or 5 times a power of ten."""
    if top <= 0:
        return [0.0, 1.0]
    raw = top / count
    power = 10 ** math.floor(math.log10(raw))
    step = next(m * power for m in (1, 2, 5, 10) if m * power >= raw)
    ticks = [0.0]
    while ticks[-1] < top:
        ticks.append(ticks[-1] + step)
    return ticks


def log_ticks(lo: float, hi: float) -> list[float]:
    """Ticks for a log axis from ``lo`` to ``hi`` (both > 0): 1, 2, 5 times powers of ten, or only the powers of
    ten when that would be more than ten ticks."""
    first, last = math.floor(math.log10(lo)), math.ceil(math.log10(hi))
    dense = [m * 10 ** p for p in range(first, last + 1) for m in (1, 2, 5)]
    dense = [t for t in dense if lo <= t <= hi]
    if len(dense) <= 10:
        return dense
    return [10 ** p for p in range(first, last + 1) if lo <= 10 ** p <= hi]


class Chart:
    """One SVG chart being drawn: plot area, scales, and the elements so far."""

    def __init__(self, title: str, x_label: str, y_label: str, plot_id: str, height: int = HEIGHT):
        self.title, self.x_label, self.y_label, self.plot_id = title, x_label, y_label, plot_id
        self.height = height
        self.x0, self.x1 = LEFT, WIDTH - RIGHT
        self.y0, self.y1 = height - BOTTOM, TOP  # y0: bottom of the plot area, y1: its top
        self.parts: list[str] = []

    def add(self, element: str) -> None:
        self.parts.append(element)

    def text(self, x: float, y: float, label: str, cls: str = "tick", anchor: str = "middle", extra: str = "") -> None:
        self.add(f'<text class="{cls}" x="{x:.1f}" y="{y:.1f}" text-anchor="{anchor}"{extra}>{escape(label)}</text>')

    def bar(self, x: float, y: float, w: float, h: float, value, tip: str, cls: str = "bar") -> None:
        self.add(f'<rect class="{cls}" x="{x:.2f}" y="{y:.2f}" width="{max(w, 0):.2f}" height="{max(h, 0):.2f}" '
                 f'data-value="{value}"><title>{escape(tip)}</title></rect>')

    def render(self) -> str:
        head = (f'<svg class="plot" id="{self.plot_id}" role="img" '
                f'viewBox="0 0 {WIDTH} {self.height}" width="{WIDTH}" height="{self.height}">'
                f'<title>{escape(self.title)}</title>')
        axes = (f'<line class="axis" x1="{self.x0}" y1="{self.y0}" x2="{self.x1}" y2="{self.y0}"/>'
                f'<line class="axis" x1="{self.x0}" y1="{self.y0}" x2="{self.x0}" y2="{self.y1}"/>')
        labels = (f'<text class="x-label" x="{(self.x0 + self.x1) / 2:.1f}" y="{self.height - 10}" '
                  f'text-anchor="middle">{escape(self.x_label)}</text>'
                  f'<text class="y-label" x="14" y="{(self.y0 + self.y1) / 2:.1f}" text-anchor="middle" '
                  f'transform="rotate(-90 14 {(self.y0 + self.y1) / 2:.1f})">{escape(self.y_label)}</text>')
        return head + "".join(self.parts) + axes + labels + "</svg>"

    # -- a linear y scale ---------------------------------------------------------------------------------------
    def y_scale(self, top: float):
        ticks = nice_ticks(top * 1.08)  # room above the tallest bar for its value
        peak = ticks[-1]
        for t in ticks:
            y = self.y0 - (self.y0 - self.y1) * t / peak
            self.add(f'<line class="grid" x1="{self.x0}" y1="{y:.1f}" x2="{self.x1}" y2="{y:.1f}"/>')
            self.text(self.x0 - 6, y + 4, compact(t), anchor="end")
        return lambda v: (self.y0 - self.y1) * v / peak


def log_histogram(title: str, x_label: str, y_label: str, plot_id: str, edges: list[int], counts: list[int],
                  unit_word: str, marks: dict | None = None, highlight_from: int | None = None) -> str:
    """Bars over integer bins ``[edges[i], edges[i + 1])`` on a log x axis (a bin starting at 0 is drawn as its own
    bar left of 1, labelled 0). ``marks``: {value: label} vertical lines (e.g. the window). Bars of bins at or
    above ``highlight_from`` get the class ``bar over``."""
    chart = Chart(title, x_label, y_label, plot_id)
    marks = marks or {}
    # Leading empty bins are not drawn (the axis starts at the first bin with a value); the rest all are.
    first = next((i for i, n in enumerate(counts) if n), 0)
    edges, counts = list(edges[first:]), list(counts[first:])
    lows = [max(e, 0.5) if e > 0 else 0.5 for e in edges[:-1]]  # the zero bin spans [0.5, 1) on the log axis
    highs = [max(e, 1) for e in edges[1:]]
    lo = min(lows) if lows else 0.5
    hi = max(highs + [m * 1.15 for m in marks]) if highs or marks else 2
    span = math.log(hi) - math.log(lo)

    def x(v: float) -> float:
        return chart.x0 + (chart.x1 - chart.x0) * (math.log(v) - math.log(lo)) / span

    height = chart.y_scale(max(counts, default=0))
    for t in log_ticks(max(lo, 1), hi):
        chart.text(x(t), chart.y0 + 16, compact(t))
        chart.add(f'<line class="tickmark" x1="{x(t):.1f}" y1="{chart.y0}" x2="{x(t):.1f}" y2="{chart.y0 + 4}"/>')
    if edges and edges[0] == 0:
        chart.text(x(0.7), chart.y0 + 16, "0")
    for a, b, low, high, n in zip(edges[:-1], edges[1:], lows, highs, counts):
        span_text = f"{a:,}" if b == a + 1 else f"{a:,} to {b - 1:,}"
        cls = "bar over" if highlight_from is not None and a >= highlight_from else "bar"
        h = height(n)
        chart.bar(x(low) + 0.5, chart.y0 - h, x(high) - x(low) - 1, h, n,
                  f"{span_text} {unit_word}: {n:,}", cls)
    for value, label in marks.items():
        chart.add(f'<line class="mark" x1="{x(value):.1f}" y1="{chart.y1 - 4}" x2="{x(value):.1f}" y2="{chart.y0}"/>')
        chart.text(x(value) - 4, chart.y1 + 8, label, cls="mark-label", anchor="end")
    return chart.render()


def bars(title: str, x_label: str, y_label: str, plot_id: str, labels: list[str], values: list[int],
         unit_word: str, classes: list[str] | None = None) -> str:
    """Vertical bars, one per category (e.g. one per label shift)."""
    chart = Chart(title, x_label, y_label, plot_id)
    height = chart.y_scale(max(values, default=0))
    slot = (chart.x1 - chart.x0) / max(len(values), 1)
    width = min(slot * 0.7, 90)
    for i, (label, value) in enumerate(zip(labels, values)):
        cx = chart.x0 + slot * (i + 0.5)
        h = height(value)
        cls = f"bar {classes[i]}" if classes else "bar"
        chart.bar(cx - width / 2, chart.y0 - h, width, h, value, f"{label}: {value:,} {unit_word}", cls)
        chart.text(cx, chart.y0 + 16, label)
        chart.text(cx, chart.y0 - h - 4, f"{value:,}", cls="value")
    return chart.render()


def grouped_bars(title: str, x_label: str, y_label: str, plot_id: str, labels: list[str],
                 series: list[tuple[str, str, list[int]]], unit_word: str) -> str:
    """Bars side by side per category, one per series: ``series`` is ``[(name, css class, values)]``."""
    chart = Chart(title, x_label, y_label, plot_id)
    height = chart.y_scale(max((v for _, _, values in series for v in values), default=0))
    slot = (chart.x1 - chart.x0) / max(len(labels), 1)
    width = min(slot * 0.8 / max(len(series), 1), 48)
    for i, label in enumerate(labels):
        cx = chart.x0 + slot * (i + 0.5)
        left = cx - width * len(series) / 2
        for j, (name, cls, values) in enumerate(series):
            value = values[i]
            h = height(value)
            chart.bar(left + j * width, chart.y0 - h, width - 2, h, value, f"{name}, {label}: {value:,} {unit_word}",
                      f"bar {cls}")
            if value:
                chart.text(left + (j + 0.5) * width, chart.y0 - h - 4, f"{value:,}", cls="value")
        chart.text(cx, chart.y0 + 16, label)
    x = chart.x0 + 8
    for name, cls, _ in series:
        chart.add(f'<rect class="swatch {cls}" x="{x:.1f}" y="6" width="12" height="12"/>')
        chart.text(x + 16, 16, name, anchor="start", cls="legend")
        x += 32 + 7.5 * len(name)
    return chart.render()


def stacked_rows(title: str, x_label: str, y_label: str, plot_id: str, rows: list[tuple[str, list[tuple]]],
                 legend: list[tuple[str, str]]) -> str:
    """Horizontal stacked bars, one per row: ``rows`` is ``[(row label, [(segment class, value, tip), ...])]``;
    ``legend`` is ``[(segment class, words)]``."""
    height = TOP + 30 + 34 * len(rows) + BOTTOM
    chart = Chart(title, x_label, y_label, plot_id, height=height)
    chart.x0 = 200
    chart.y1 = TOP + 24
    total = max((sum(v for _, v, _ in segs) for _, segs in rows), default=0)
    ticks = nice_ticks(total)
    peak = ticks[-1] or 1

    def w(v: float) -> float:
        return (chart.x1 - chart.x0) * v / peak

    for t in ticks:
        xt = chart.x0 + w(t)
        chart.add(f'<line class="grid" x1="{xt:.1f}" y1="{chart.y1}" x2="{xt:.1f}" y2="{chart.y0}"/>')
        chart.text(xt, chart.y0 + 16, compact(t))
    for i, (label, segments) in enumerate(rows):
        y = chart.y1 + 8 + 34 * i
        chart.text(chart.x0 - 8, y + 16, label, anchor="end", cls="row-label")
        x = chart.x0
        for cls, value, tip in segments:
            chart.bar(x, y, w(value), 22, value, tip, f"bar {cls}")
            x += w(value)
    x = chart.x0
    for cls, words in legend:
        chart.add(f'<rect class="swatch {cls}" x="{x:.1f}" y="6" width="12" height="12"/>')
        chart.text(x + 16, 16, words, anchor="start", cls="legend")
        x += 24 + 7.5 * len(words)
    return chart.render()
