"""Small, dependency-free building blocks for the inline SVG charts of the review pack.

Everything here returns text. Every string that reaches the output — labels, attribute
values, tooltips — passes through :func:`esc` (``html.escape`` with quotes), so a portfolio
id or class name can never open an element or an attribute. Numbers are written with a
fixed number of decimals so the same input always gives the same bytes.

Palette: the eight colours of Okabe & Ito's colour-universal-design set (Okabe, M., Ito, K.
(2008), "Color Universal Design (CUD) — How to make figures and presentations that are
friendly to colorblind people", J*Fly, https://jfly.uni-koeln.de/color/), distinguishable
under the common colour-vision deficiencies. Lines also differ by dash pattern, so the
charts stay readable printed in grey.
"""

from __future__ import annotations

import html
import math
from collections.abc import Iterable, Mapping, Sequence
from dataclasses import dataclass

# Okabe & Ito (2008) colour-universal-design palette (source in the module docstring).
BLACK = "#000000"
ORANGE = "#E69F00"
SKY_BLUE = "#56B4E9"
BLUISH_GREEN = "#009E73"
YELLOW = "#F0E442"
BLUE = "#0072B2"
VERMILLION = "#D55E00"
REDDISH_PURPLE = "#CC79A7"
# Neutrals for axes, grids and text (not part of the palette; no hue to confuse).
INK = "#1f2328"
MUTED = "#5b636e"
GRID = "#d9dde3"

CoordValue = float | int


def esc(value: object) -> str:
    """Escape any value for HTML text and for a double- or single-quoted attribute."""
    return html.escape(str(value), quote=True)


def num(value: float) -> str:
    """A coordinate with two decimals and no trailing zeros ("12.5", "-3", "0")."""
    text = f"{value:.2f}".rstrip("0").rstrip(".")
    return "0" if text in ("-0", "") else text


def exact(value: float | int | None) -> str:
    """A value for a ``data-*`` attribute: the shortest text that reads back to the same float.

    ``repr`` of a Python float round-trips exactly (Python's float repr, PEP 3101 / the
    "shortest repr" rule of Python 3.1+), so a browser test can compare with the table.
    """
    if value is None:
        return ""
    if isinstance(value, bool):
        return "true" if value else "false"
    if isinstance(value, int):
        return str(value)
    return repr(float(value))


def attrs(values: Mapping[str, object | None]) -> str:
    """Render attributes in the given order, escaped; ``None`` values are left out."""
    parts = []
    for key, value in values.items():
        if value is None:
            continue
        name = key.rstrip("_").replace("_", "-")
        if isinstance(value, float):
            value = num(value)
        parts.append(f' {name}="{esc(value)}"')
    return "".join(parts)


def element(tag: str, values: Mapping[str, object | None], content: str | None = None) -> str:
    """One SVG/HTML element; ``content`` must already be escaped markup."""
    if content is None:
        return f"<{tag}{attrs(values)}/>"
    return f"<{tag}{attrs(values)}>{content}</{tag}>"


def tooltip(text: str) -> str:
    """A ``<title>`` child: the browser shows it on hover; it is plain, escaped text."""
    return f"<title>{esc(text)}</title>"


@dataclass(frozen=True)
class Scale:
    """Linear map of a data interval onto a pixel interval.

    y = r0 + (x − d0)(r1 − r0)/(d1 − d0); the middle of the pixel interval when d0 = d1.
    """

    d0: float
    d1: float
    r0: float
    r1: float

    def __call__(self, value: float) -> float:
        span = self.d1 - self.d0
        if span == 0:
            return (self.r0 + self.r1) / 2
        return self.r0 + (value - self.d0) * (self.r1 - self.r0) / span


def _nice_number(value: float, *, round_it: bool) -> float:
    """Heckbert's nice number: 1, 2, 5 or 10 times a power of ten (from memory: Heckbert,
    P.S. (1990), "Nice numbers for graph labels", Graphics Gems, Academic Press, 61-63)."""
    exponent = math.floor(math.log10(value))
    fraction = value / 10**exponent
    if round_it:
        steps = ((1.5, 1.0), (3.0, 2.0), (7.0, 5.0))
        nice = next((n for limit, n in steps if fraction < limit), 10.0)
    else:
        steps = ((1.0, 1.0), (2.0, 2.0), (5.0, 5.0))
        nice = next((n for limit, n in steps if fraction <= limit), 10.0)
    return nice * 10**exponent


def nice_ticks(lo: float, hi: float, count: int = 5) -> list[float]:
    """Round tick values covering [lo, hi] (Heckbert 1990, see :func:`_nice_number`).

    The returned ticks start at or below ``lo`` and end at or above ``hi``; a degenerate
    interval is widened around its value first.
    """
    if not (math.isfinite(lo) and math.isfinite(hi)):
        return [0.0]
    if hi < lo:
        lo, hi = hi, lo
    if hi - lo < 1e-12:
        pad = max(abs(lo) * 0.1, 1e-4)
        lo, hi = lo - pad, hi + pad
    span = _nice_number(hi - lo, round_it=False)
    step = _nice_number(span / max(count - 1, 1), round_it=True)
    first = math.floor(lo / step) * step
    last = math.ceil(hi / step) * step
    n = round((last - first) / step)
    # Rounding to the step's decimals keeps 0.30000000000000004 out of the labels.
    decimals = max(0, -math.floor(math.log10(step)) + 1)
    return [round(first + i * step, decimals) + 0.0 for i in range(n + 1)]


def padded_range(values: Iterable[float], *, include: Sequence[float] = (), pad: float = 0.05):
    """(lo, hi) of the finite values and ``include``, widened by ``pad`` of the span."""
    finite = [v for v in values if v is not None and math.isfinite(v)]
    finite.extend(include)
    if not finite:
        return (-1.0, 1.0)
    lo, hi = min(finite), max(finite)
    span = hi - lo
    if span < 1e-12:
        span = max(abs(hi), 1e-3)
    return (lo - pad * span, hi + pad * span)


@dataclass(frozen=True)
class Frame:
    """The plotting rectangle of one chart inside its viewBox (pixels)."""

    width: float
    height: float
    left: float
    right: float
    top: float
    bottom: float

    @property
    def x0(self) -> float:
        return self.left

    @property
    def x1(self) -> float:
        return self.width - self.right

    @property
    def y0(self) -> float:
        return self.top

    @property
    def y1(self) -> float:
        return self.height - self.bottom


def svg_open(frame: Frame, *, chart: str, label: str, extra: Mapping[str, object] | None = None):
    """The opening ``<svg>`` tag with an accessible title; close with ``</svg>``."""
    # No xmlns: inline SVG in HTML gets its namespace from the parser, and the page then
    # holds no http(s) reference at all.
    values: dict[str, object | None] = {
        "viewBox": f"0 0 {num(frame.width)} {num(frame.height)}",
        "class": "chart",
        "role": "img",
        "aria-label": label,
        "data-chart": chart,
    }
    values.update(extra or {})
    return "<svg" + "".join(f' {k}="{esc(v)}"' for k, v in values.items() if v is not None) + ">"


def y_axis(frame: Frame, scale: Scale, ticks: Sequence[float], label) -> str:
    """Horizontal grid lines at the ticks, labelled on the left with ``label(tick)``."""
    out = []
    for tick in ticks:
        y = scale(tick)
        if y < frame.y0 - 0.5 or y > frame.y1 + 0.5:
            continue
        stroke = MUTED if tick == 0 else GRID
        out.append(
            element(
                "line",
                {
                    "x1": frame.x0,
                    "x2": frame.x1,
                    "y1": y,
                    "y2": y,
                    "stroke": stroke,
                    "stroke-width": 1.0 if tick == 0 else 0.6,
                    "class": "grid",
                },
            )
        )
        out.append(
            element(
                "text",
                {"x": frame.x0 - 6, "y": y + 3.5, "text-anchor": "end", "class": "tick"},
                esc(label(tick)),
            )
        )
    return "".join(out)


def x_axis(frame: Frame, positions: Sequence[tuple[float, str]]) -> str:
    """Tick marks and labels under the plotting rectangle at the given (x, text) positions."""
    out = [
        element(
            "line",
            {
                "x1": frame.x0,
                "x2": frame.x1,
                "y1": frame.y1,
                "y2": frame.y1,
                "stroke": MUTED,
                "stroke-width": 0.8,
            },
        )
    ]
    for x, text in positions:
        out.append(
            element(
                "line",
                {
                    "x1": x,
                    "x2": x,
                    "y1": frame.y1,
                    "y2": frame.y1 + 4,
                    "stroke": MUTED,
                    "stroke-width": 0.8,
                },
            )
        )
        out.append(
            element(
                "text",
                {"x": x, "y": frame.y1 + 15, "text-anchor": "middle", "class": "tick"},
                esc(text),
            )
        )
    return "".join(out)


def x_value_axis(frame: Frame, scale: Scale, ticks: Sequence[float], label) -> str:
    """Vertical grid lines at value ticks with labels underneath (for scatter charts)."""
    out = []
    for tick in ticks:
        x = scale(tick)
        if x < frame.x0 - 0.5 or x > frame.x1 + 0.5:
            continue
        out.append(
            element(
                "line",
                {
                    "x1": x,
                    "x2": x,
                    "y1": frame.y0,
                    "y2": frame.y1,
                    "stroke": MUTED if tick == 0 else GRID,
                    "stroke-width": 1.0 if tick == 0 else 0.6,
                    "class": "grid",
                },
            )
        )
        out.append(
            element(
                "text",
                {"x": x, "y": frame.y1 + 15, "text-anchor": "middle", "class": "tick"},
                esc(label(tick)),
            )
        )
    return "".join(out)


def axis_title(x: float, y: float, text: str, *, rotate: bool = False, anchor="middle") -> str:
    """An axis title; ``rotate`` turns it to read bottom-up beside a vertical axis."""
    values: dict[str, object | None] = {
        "x": x,
        "y": y,
        "text-anchor": anchor,
        "class": "axis-title",
    }
    if rotate:
        values["transform"] = f"rotate(-90 {num(x)} {num(y)})"
    return element("text", values, esc(text))


def polyline(points: Sequence[tuple[float, float]], values: Mapping[str, object | None]) -> str:
    """An unfilled line through the points (one ``<polyline>``)."""
    text = " ".join(f"{num(x)},{num(y)}" for x, y in points)
    return element("polyline", {"points": text, "fill": "none", **values})


def segments(points: Sequence[tuple[float, float] | None]) -> list[list[tuple[float, float]]]:
    """Split a point list at ``None`` gaps, so a missing value breaks the line."""
    runs: list[list[tuple[float, float]]] = [[]]
    for point in points:
        if point is None:
            if runs[-1]:
                runs.append([])
        else:
            runs[-1].append(point)
    return [run for run in runs if run]


def clip_rect(frame: Frame, clip_id: str) -> str:
    """A clip path for the plotting rectangle (fitted curves never spill over the axes)."""
    rect = element(
        "rect",
        {"x": frame.x0, "y": frame.y0, "width": frame.x1 - frame.x0, "height": frame.y1 - frame.y0},
    )
    return f'<defs><clipPath id="{esc(clip_id)}">{rect}</clipPath></defs>'
