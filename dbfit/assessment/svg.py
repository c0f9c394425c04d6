"""A minimal inline-SVG chart kit: a plot frame with linear or log axes, ticks, lines, points and bars.

Everything is returned as SVG text; numbers are written with a fixed precision and text is escaped.
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field
from html import escape

from dbfit.assessment.report_format import power_of_ten

WIDTH, HEIGHT = 460, 300
MARGIN_LEFT, MARGIN_RIGHT, MARGIN_TOP, MARGIN_BOTTOM = 58, 18, 16, 46


def num(value: float) -> str:
    """A coordinate as short SVG text."""
    return f"{value:.2f}".rstrip("0").rstrip(".")


@dataclass
class Axis:
    """Maps data values in [low, high] to pixels in [start, end]; ``log`` maps on the log10 scale."""

    low: float
    high: float
    start: float
    end: float
    log: bool = False

    def __post_init__(self) -> None:
        if self.log:
            self._lo, self._hi = math.log10(self.low), math.log10(self.high)
        else:
            self._lo, self._hi = self.low, self.high
        if self._hi <= self._lo:
            self._hi = self._lo + 1.0

    def clamp(self, value: float) -> float:
        return min(max(value, self.low), self.high)

    def __call__(self, value: float) -> float:
        value = self.clamp(value)
        position = math.log10(value) if self.log else value
        return self.start + (position - self._lo) / (self._hi - self._lo) * (self.end - self.start)

    def ticks(self) -> list[float]:
        """Round tick values inside the range: powers and halves of ten (log) or steps of 1, 2 or 5 (linear)."""
        if self.log:
            values = []
            for power in range(math.floor(self._lo), math.ceil(self._hi) + 1):
                for factor in (1, 2, 5):
                    values.append(factor * 10.0**power)
            inside = [v for v in values if self.low <= v <= self.high]
            if len(inside) > 9:
                inside = [
                    v
                    for v in inside
                    if math.isclose(math.log10(v) % 1, 0, abs_tol=1e-9)
                    or math.isclose(math.log10(v) % 1, 1, abs_tol=1e-9)
                ]
            return inside
        span = self.high - self.low
        raw = span / 5
        magnitude = 10.0 ** math.floor(math.log10(raw))
        step = next(s * magnitude for s in (1, 2, 5, 10) if s * magnitude >= raw)
        first = math.ceil(self.low / step - 1e-9) * step
        count = int(math.floor((self.high - first) / step + 1e-9)) + 1
        return [round(first + i * step, 12) for i in range(count)]


def tick_label(value: float) -> str:
    if value == 0:
        return "0"
    if abs(value) >= 1e4 or abs(value) < 1e-3:
        return power_of_ten(value, 1)
    return f"{value:g}"


@dataclass
class Chart:
    """One chart: a frame of ``WIDTH`` x ``HEIGHT`` pixels with an x and a y axis and drawn parts."""

    x: Axis
    y: Axis
    title: str
    x_label: str
    y_label: str
    css_class: str
    height: float = HEIGHT
    width: float = WIDTH
    parts: list[str] = field(default_factory=list)

    @classmethod
    def make(
        cls,
        x_range: tuple[float, float],
        y_range: tuple[float, float],
        title: str,
        x_label: str,
        y_label: str,
        css_class: str,
        x_log: bool = False,
        height: float = HEIGHT,
        left: float = MARGIN_LEFT,
        width: float = WIDTH,
    ) -> Chart:
        x = Axis(x_range[0], x_range[1], left, width - MARGIN_RIGHT, log=x_log)
        y = Axis(y_range[0], y_range[1], height - MARGIN_BOTTOM, MARGIN_TOP)
        return cls(x, y, title, x_label, y_label, css_class, height, width)

    def polyline(self, points: list[tuple[float, float]], css_class: str) -> None:
        text = " ".join(f"{num(self.x(a))},{num(self.y(b))}" for a, b in points)
        self.parts.append(f'<polyline class="{css_class}" points="{text}"/>')

    def segment(self, a: tuple[float, float], b: tuple[float, float], css_class: str) -> None:
        self.parts.append(
            f'<line class="{css_class}" x1="{num(self.x(a[0]))}" y1="{num(self.y(a[1]))}" '
            f'x2="{num(self.x(b[0]))}" y2="{num(self.y(b[1]))}"/>'
        )

    def point(self, a: float, b: float, css_class: str, tip: str, radius: float = 4.0) -> None:
        self.parts.append(
            f'<circle class="{css_class}" cx="{num(self.x(a))}" cy="{num(self.y(b))}" r="{num(radius)}">'
            f"<title>{escape(tip)}</title></circle>"
        )

    def bar(self, left: float, right: float, top: float, css_class: str, tip: str) -> None:
        x0, x1, y0, y1 = self.x(left), self.x(right), self.y(top), self.y(self.y.low)
        self.parts.append(
            f'<rect class="{css_class}" x="{num(x0)}" y="{num(min(y0, y1))}" width="{num(abs(x1 - x0))}" '
            f'height="{num(abs(y1 - y0))}"><title>{escape(tip)}</title></rect>'
        )

    def raw(self, svg: str) -> None:
        self.parts.append(svg)

    def _axes(self, y_ticks: bool) -> list[str]:
        out = []
        bottom, top, left, right = self.y.start, self.y.end, self.x.start, self.x.end
        for value in self.x.ticks():
            px = num(self.x(value))
            out.append(f'<line class="grid" x1="{px}" y1="{num(top)}" x2="{px}" y2="{num(bottom)}"/>')
            out.append(
                f'<text class="tick" x="{px}" y="{num(bottom + 15)}" text-anchor="middle">'
                f"{escape(tick_label(value))}</text>"
            )
        if y_ticks:
            for value in self.y.ticks():
                py = num(self.y(value))
                out.append(f'<line class="grid" x1="{num(left)}" y1="{py}" x2="{num(right)}" y2="{py}"/>')
                out.append(
                    f'<text class="tick" x="{num(left - 6)}" y="{num(self.y(value) + 4)}" '
                    f'text-anchor="end">{escape(tick_label(value))}</text>'
                )
        out.append(
            f'<rect class="frame" x="{num(left)}" y="{num(top)}" width="{num(right - left)}" '
            f'height="{num(bottom - top)}"/>'
        )
        out.append(
            f'<text class="axis-label" x="{num((left + right) / 2)}" y="{num(self.height - 8)}" '
            f'text-anchor="middle">{escape(self.x_label)}</text>'
        )
        if self.y_label:
            out.append(
                f'<text class="axis-label" transform="translate(14 {num((top + bottom) / 2)}) rotate(-90)" '
                f'text-anchor="middle">{escape(self.y_label)}</text>'
            )
        return out

    def svg(self, y_ticks: bool = True) -> str:
        body = "".join(self._axes(y_ticks) + self.parts)
        return (
            f'<svg class="chart {self.css_class}" viewBox="0 0 {num(self.width)} {num(self.height)}" width="{num(self.width)}" '
            f'height="{num(self.height)}" role="img" aria-label="{escape(self.title)}" '
            f'xmlns="http://www.w3.org/2000/svg"><title>{escape(self.title)}</title>{body}</svg>'
        )
