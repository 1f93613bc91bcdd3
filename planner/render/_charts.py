"""Charts of the report and the letters, drawn straight on the reportlab canvas.

Each chart is a platypus Flowable of a fixed size, so it can sit in the text
flow or in a table cell. They draw with canvas primitives rather than
reportlab.graphics shapes: a round of hundreds of laboratories puts thousands
of bars on a page, and building a shape object for each would dominate the
time. Only what the chart needs to say is drawn: an axis with a few round
ticks, reference lines named at the right edge, and labels under the bars
when there are few enough to read.

Charts:

- ``MeansChart``   laboratory means with intervals, the assigned value and a band
- ``BarsChart``    one bar per laboratory with reference lines (Mandel h and k,
                   z scores with shaded satisfactory / questionable bands)
- ``BudgetChart``  a variance budget: shares of the whole in one bar, a part enlarged
- ``ToleranceChart``  spreads (k SD) as bars over the tolerance width
- ``StripChart``   one row per material: everyone's score as a tick, one marked
"""

from __future__ import annotations

import math
from collections.abc import Sequence
from dataclasses import dataclass
from typing import Any

from reportlab.platypus import Flowable

from planner.render import _layout

# reportlab is imported at module level here (the classes derive from Flowable);
# only the evaluate and demo commands import this module, inside the command.

__all__ = ["Line", "MeansChart", "BarsChart", "Share", "BudgetChart", "Spread",
           "ToleranceChart", "StripChart", "nice_ticks",
           "MAX_LABELS", "SAT", "QUEST", "UNSAT", "band_colour"]

MAX_LABELS = 40
"""Most bars that get a name under them; above this only flagged bars are named."""

# Band shading of our own: the satisfactory band a pale blue-grey, questionable pale sand,
# unsatisfactory pale brick. Their lightness falls in that order, so the bands stay apart
# on a black-and-white printer, and black text reads on each.
SAT = "#edf2f3"
QUEST = "#f0e2c0"
UNSAT = "#e6c3ba"
_BAR = "#8fa9ad"
_BAR_HI = _layout.ACCENT
_BAR_BAD = "#b03a2e"
_BAR_WARN = "#c98a12"


def band_colour(band: str | None) -> str | None:
    """Return the fill colour of a performance band, None for no band."""
    return {"satisfactory": SAT, "questionable": QUEST, "unsatisfactory": UNSAT}.get(band or "")


def nice_ticks(lo: float, hi: float, count: int = 5) -> list[float]:
    """Return about ``count`` round tick values covering lo..hi (1, 2, 2.5 or 5 times 10^k)."""
    if not (math.isfinite(lo) and math.isfinite(hi)) or hi <= lo:
        return [lo] if math.isfinite(lo) else []
    raw = (hi - lo) / max(count, 1)
    mag = 10 ** math.floor(math.log10(raw))
    step = next(m * mag for m in (1, 2, 2.5, 5, 10) if m * mag >= raw)
    first = math.ceil(lo / step - 1e-9) * step
    out = []
    v = first
    while v <= hi + step * 1e-9:
        out.append(0.0 if abs(v) < step * 1e-9 else v)
        v += step
    return out


def _fmt(v: float) -> str:
    return f"{v + 0.0:.4g}"  # + 0.0: a negative zero prints as 0, not '-0'


@dataclass(frozen=True, slots=True)
class Line:
    """A horizontal reference line at ``value``; ``dash`` for dashed, ``label`` at the right."""

    value: float
    label: str = ""
    colour: str = _layout.INK
    dash: bool = False


class _Chart(Flowable):  # type: ignore[misc]
    """A chart of a fixed size with a plot area inside margins and a title line."""

    _left = 34.0
    _right = 40.0
    _top = 16.0
    _bottom = 12.0

    def __init__(self, width: float, height: float, title: str = "") -> None:
        super().__init__()
        self.width = width
        self.height = height
        self.title = title

    def wrap(self, avail_width: float, avail_height: float) -> tuple[float, float]:
        return self.width, self.height

    # plot area in chart coordinates
    @property
    def _area(self) -> tuple[float, float, float, float]:
        return (self._left, self._bottom, self.width - self._left - self._right,
                self.height - self._bottom - self._top)

    def _draw_title(self, c: Any) -> None:
        if self.title:
            from reportlab.lib.colors import HexColor

            c.setFillColor(HexColor(_layout.INK))
            c.setFont(_layout.BOLD, 8)
            c.drawString(0, self.height - 9,
                         _layout.fit_text(self.title, _layout.BOLD, 8, self.width))

    def _y_axis(self, c: Any, lo: float, hi: float, ticks: Sequence[float]) -> None:
        from reportlab.lib.colors import HexColor

        x0, y0, w, h = self._area
        c.setStrokeColor(HexColor(_layout.RULE))
        c.setLineWidth(0.4)
        c.setFillColor(HexColor(_layout.MUTED))
        c.setFont(_layout.FONT, 6.5)
        for t in ticks:
            y = y0 + (t - lo) / (hi - lo) * h
            c.line(x0, y, x0 + w, y)
            c.drawRightString(x0 - 3, y - 2.2, _fmt(t))
        c.setStrokeColor(HexColor(_layout.MUTED))
        c.line(x0, y0, x0, y0 + h)

    def _lines(self, c: Any, lines: Sequence[Line], lo: float, hi: float) -> None:
        from reportlab.lib.colors import HexColor

        x0, y0, w, h = self._area
        shown = sorted((ln for ln in lines if lo <= ln.value <= hi), key=lambda ln: ln.value)
        labels: list[tuple[float, Line]] = []
        for ln in shown:
            y = y0 + (ln.value - lo) / (hi - lo) * h
            c.setStrokeColor(HexColor(ln.colour))
            c.setLineWidth(0.8)
            c.setDash(3, 2) if ln.dash else c.setDash()
            c.line(x0, y, x0 + w, y)
            c.setDash()
            if ln.label:
                labels.append((y, ln))
        # Push labels of close lines apart (bottom-up for the lower half, top-down for the
        # upper half) so that the 5 % and 1 % names do not print over each other.
        gap = 7.0
        mid = y0 + h / 2
        placed: list[tuple[float, Line]] = []
        lower = [item for item in labels if item[0] < mid]
        upper = [item for item in labels if item[0] >= mid]
        last = -1e9
        for y, ln in reversed(lower):
            ty = min(y, last - gap) if last > -1e9 else y
            placed.append((ty, ln))
            last = ty
        last = -1e9
        for y, ln in upper:
            ty = max(y, last + gap)
            placed.append((ty, ln))
            last = ty
        c.setFont(_layout.FONT, 6.5)
        for ty, ln in placed:
            c.setFillColor(HexColor(ln.colour))
            c.drawString(x0 + w + 3, ty - 2.2, ln.label)

    def _x_labels(self, c: Any, labels: Sequence[str], named: Sequence[bool]) -> None:
        from reportlab.lib.colors import HexColor

        x0, y0, w, h = self._area
        n = len(labels)
        if not n:
            return
        step = w / n
        size = min(6.5, max(4.5, step * 0.9 / max(1, max(len(s) for s in labels)) * 1.8))
        c.setFillColor(HexColor(_layout.INK))
        c.setFont(_layout.FONT, size)
        right = -1e9
        for i, (text, show) in enumerate(zip(labels, named)):
            if not show:
                continue
            x = x0 + (i + 0.5) * step
            half = c.stringWidth(text, _layout.FONT, size) / 2
            if x - half < right + 2:
                continue  # would print over the previous name; the bar's colour still shows
            c.drawCentredString(x, y0 - size - 2, text)
            right = x + half


def _range(values: Sequence[float | None], extra: Sequence[float] = (),
           pad: float = 0.06) -> tuple[float, float]:
    vals = [v for v in values if v is not None and math.isfinite(v)] + list(extra)
    if not vals:
        return -1.0, 1.0
    lo, hi = min(vals), max(vals)
    if hi == lo:
        lo, hi = lo - (abs(lo) * 0.1 or 1.0), hi + (abs(hi) * 0.1 or 1.0)
    span = hi - lo
    return lo - pad * span, hi + pad * span


class MeansChart(_Chart):
    """Laboratory means as dots with interval whiskers, a centre line and a dashed band.

    ``lows``/``highs`` are the interval ends (None for no interval); ``centre`` is the
    assigned value, ``band`` the (low, high) pair drawn dashed (x_pt -+ 2 sigma_pt).
    """

    def __init__(self, labels: Sequence[str], means: Sequence[float | None],
                 lows: Sequence[float | None], highs: Sequence[float | None], *,
                 centre: float | None, band: tuple[float, float] | None,
                 highlight: Sequence[bool] | None = None, width: float, height: float,
                 title: str = "", centre_label: str = "x_pt",
                 band_label: str = "2 sigma_pt") -> None:
        super().__init__(width, height, title)
        self.labels, self.means, self.lows, self.highs = labels, means, lows, highs
        self.centre, self.band = centre, band
        self.highlight = highlight or [False] * len(labels)
        self.centre_label, self.band_label = centre_label, band_label

    def draw(self) -> None:
        from reportlab.lib.colors import HexColor

        c = self.canv
        self._draw_title(c)
        extra = [v for v in (self.centre, *(self.band or ())) if v is not None]
        lo, hi = _range([*self.means, *self.lows, *self.highs], extra)
        self._y_axis(c, lo, hi, nice_ticks(lo, hi))
        lines = []
        if self.band is not None:
            lines += [Line(self.band[0], f"-{self.band_label}", _BAR_BAD, True),
                      Line(self.band[1], f"+{self.band_label}", _BAR_BAD, True)]
        if self.centre is not None:
            lines.append(Line(self.centre, self.centre_label, _layout.ACCENT))
        self._lines(c, lines, lo, hi)
        x0, y0, w, h = self._area
        n = len(self.labels)
        step = w / max(n, 1)

        def y_of(v: float) -> float:
            return y0 + (v - lo) / (hi - lo) * h

        width = 0.7 if n <= 100 else 0.35
        dot = max(0.6, min(2.2, step * 0.3))
        # One path per colour for the whiskers and one for the dots (a round cap on a
        # segment of no length is a filled circle): hundreds of laboratories draw in a
        # few operators instead of a colour change and four curves each.
        whiskers = {colour: c.beginPath() for colour in (_layout.INK, _BAR_HI)}
        dots = {colour: c.beginPath() for colour in (_layout.INK, _BAR_HI)}
        for i in range(n):
            m = self.means[i]
            if m is None or not math.isfinite(m):
                continue
            colour = _BAR_HI if self.highlight[i] else _layout.INK
            x = x0 + (i + 0.5) * step
            a, b = self.lows[i], self.highs[i]
            if a is not None and b is not None and math.isfinite(a) and math.isfinite(b):
                path = whiskers[colour]
                path.moveTo(x, y_of(a))
                path.lineTo(x, y_of(b))
                if n <= 100:
                    for v in (a, b):
                        path.moveTo(x - dot, y_of(v))
                        path.lineTo(x + dot, y_of(v))
            dots[colour].moveTo(x, y_of(m))
            dots[colour].lineTo(x, y_of(m))
        c.saveState()
        c.setLineWidth(width)
        for colour, path in whiskers.items():
            c.setStrokeColor(HexColor(colour))
            c.drawPath(path, stroke=1, fill=0)
        c.setLineCap(1)
        c.setLineWidth(2 * dot)
        for colour, path in dots.items():
            c.setStrokeColor(HexColor(colour))
            c.drawPath(path, stroke=1, fill=0)
        c.restoreState()
        named = [n <= MAX_LABELS or hl for hl in self.highlight]
        self._x_labels(c, self.labels, named)


class BarsChart(_Chart):
    """One bar per laboratory from zero, with reference lines and optional shaded bands.

    ``shade`` lists (low, high, colour) bands drawn behind the bars (e.g. |z| <= 2 in the satisfactory shade);
    bars beyond ``flag_at`` (absolute value) are drawn in a warning colour and named
    even when there are too many bars to name them all. ``limit`` clips the axis to
    -+limit (a bar past it is drawn to the edge, its value written at the end).
    """

    def __init__(self, labels: Sequence[str], values: Sequence[float | None], *,
                 lines: Sequence[Line] = (), shade: Sequence[tuple[float, float, str]] = (),
                 flag_at: tuple[float, float] | None = None,
                 highlight: Sequence[bool] | None = None, symmetric: bool = True,
                 limit: float | None = None, width: float, height: float,
                 title: str = "") -> None:
        super().__init__(width, height, title)
        self.labels, self.values = labels, values
        self.lines, self.shade, self.flag_at = lines, shade, flag_at
        self.highlight = highlight or [False] * len(labels)
        self.symmetric, self.limit = symmetric, limit

    def draw(self) -> None:
        from reportlab.lib.colors import HexColor

        c = self.canv
        self._draw_title(c)
        vals = [v for v in self.values if v is not None and math.isfinite(v)]
        refs = [ln.value for ln in self.lines]
        top = max([abs(v) for v in vals + refs] + [1.0]) * 1.08
        if self.limit is not None:
            top = min(top, self.limit)
        lo, hi = (-top, top) if self.symmetric else (0.0, top)
        x0, y0, w, h = self._area

        def y_of(v: float) -> float:
            return y0 + (min(max(v, lo), hi) - lo) / (hi - lo) * h

        for a, b, colour in self.shade:
            c.setFillColor(HexColor(colour))
            ya, yb = y_of(max(a, lo)), y_of(min(b, hi))
            if yb > ya:
                c.rect(x0, ya, w, yb - ya, stroke=0, fill=1)
        self._y_axis(c, lo, hi, nice_ticks(lo, hi))
        n = len(self.labels)
        step = w / max(n, 1)
        bar = step * (0.62 if n <= 100 else 0.85)
        zero = y_of(0.0)
        flagged = []
        warn_at, bad_at = self.flag_at or (math.inf, math.inf)
        # The bars of one colour go into one path (they never overlap), values past the
        # axis are written after all bars.
        paths: dict[str, Any] = {}
        beyond = []
        for i, v in enumerate(self.values):
            if v is None or not math.isfinite(v):
                flagged.append(False)
                continue
            level = abs(v)
            colour = (_BAR_BAD if level >= bad_at else _BAR_WARN if level > warn_at
                      else _BAR_HI if self.highlight[i] else _BAR)
            flagged.append(level > warn_at)
            x = x0 + (i + 0.5) * step - bar / 2
            y = y_of(v)
            if colour not in paths:
                paths[colour] = c.beginPath()
            paths[colour].rect(x, min(zero, y), bar, abs(y - zero))
            if v > hi or v < lo:
                beyond.append((x + bar / 2, (y - 7) if v > hi else (y + 2), _fmt(v)))
        for colour, path in paths.items():
            c.setFillColor(HexColor(colour))
            c.drawPath(path, stroke=0, fill=1)
        if beyond:
            c.setFont(_layout.FONT, 5.5)
            c.setFillColor(HexColor(_layout.INK))
            for x, y, text in beyond:
                c.drawCentredString(x, y, text)
        c.setStrokeColor(HexColor(_layout.MUTED))
        c.setLineWidth(0.5)
        c.line(x0, zero, x0 + w, zero)
        self._lines(c, self.lines, lo, hi)
        named = [n <= MAX_LABELS or f or hl for f, hl in zip(flagged, self.highlight)]
        self._x_labels(c, self.labels, named)


@dataclass(frozen=True, slots=True)
class Share:
    """One part of a variance budget: its name, its share of the whole in %, its colour."""

    name: str
    percent: float | None
    colour: str


class BudgetChart(_Chart):
    """A variance budget: one bar split into shares that add up to 100 %, and a second
    bar that enlarges the first ``zoom`` shares to the full width.

    The measurement's own parts are often a sliver next to the differences between the
    materials; the second bar shows how that sliver divides. Funnel lines join the
    sliver to the enlarged bar. The legend under the bars gives every share in % of
    the whole.
    """

    _left = 96.0
    _right = 8.0
    _bar = 15.0

    def __init__(self, shares: Sequence[Share], *, zoom: int, names: tuple[str, str],
                 zoom_note: str, width: float, height: float, title: str = "") -> None:
        super().__init__(width, height, title)
        self.shares, self.zoom, self.names, self.zoom_note = shares, zoom, names, zoom_note

    def draw(self) -> None:
        from reportlab.lib.colors import HexColor

        c = self.canv
        self._draw_title(c)
        x0, w = self._left, self.width - self._left - self._right
        vals = [max(s.percent or 0.0, 0.0) for s in self.shares]
        whole = sum(vals) or 1.0
        part = sum(vals[:self.zoom])
        y1 = self.height - self._top - 10 - self._bar
        y2 = y1 - 26 - self._bar
        self._row_label(c, y1, self.names[0], "100 %")
        self._row_label(c, y2, self.names[1], self.zoom_note)
        self._segments(c, x0, y1, w, vals, whole)
        c.setFillColor(HexColor(_layout.MUTED))
        c.setFont(_layout.FONT, 6.5)
        c.drawString(x0, y1 + self._bar + 2.5,
                     f"{self.names[1]}: {100 * part / whole:.3g} %, enlarged below")
        if part > 0:
            self._segments(c, x0, y2, w, vals[:self.zoom] + [0.0] * (len(vals) - self.zoom),
                           part)
            c.setStrokeColor(HexColor(_layout.MUTED))
            c.setLineWidth(0.5)
            c.setDash(2, 2)
            c.line(x0, y1, x0, y2 + self._bar)
            c.line(x0 + part / whole * w, y1, x0 + w, y2 + self._bar)
            c.setDash()
        self._legend(c, x0, y2 - 14, w)

    def _row_label(self, c: Any, y: float, name: str, note: str) -> None:
        from reportlab.lib.colors import HexColor

        c.setFillColor(HexColor(_layout.INK))
        c.setFont(_layout.FONT, 7.5)
        c.drawRightString(self._left - 5, y + self._bar / 2 + 0.5, name)
        c.setFillColor(HexColor(_layout.MUTED))
        c.setFont(_layout.FONT, 6.5)
        c.drawRightString(self._left - 5, y + self._bar / 2 - 7.5, note)

    def _segments(self, c: Any, x0: float, y: float, w: float, vals: Sequence[float],
                  whole: float) -> None:
        from reportlab.lib.colors import HexColor

        x = x0
        for share, v in zip(self.shares, vals):
            if v <= 0:
                continue
            length = v / whole * w
            c.setFillColor(HexColor(share.colour))
            c.rect(x, y, length, self._bar, stroke=0, fill=1)
            text = f"{100 * v / whole:.3g} %"
            if c.stringWidth(text, _layout.FONT, 7) + 6 < length:
                dark = share.colour in (_layout.ACCENT, _BAR_BAD)
                c.setFillColor(HexColor("#ffffff" if dark else _layout.INK))
                c.setFont(_layout.FONT, 7)
                c.drawCentredString(x + length / 2, y + self._bar / 2 - 2.5, text)
            x += length
        # hairline separators keep touching segments apart
        c.setStrokeColor(HexColor("#ffffff"))
        c.setLineWidth(0.8)
        x = x0
        for v in vals[:-1]:
            x += max(v, 0.0) / whole * w
            if v > 0:
                c.line(x, y, x, y + self._bar)

    def _legend(self, c: Any, x0: float, y: float, w: float) -> None:
        from reportlab.lib.colors import HexColor

        x = x0
        c.setFont(_layout.FONT, 7)
        for share in self.shares:
            text = f"{share.name}: " + ("-" if share.percent is None
                                        else f"{share.percent:.3g} %")
            need = 11 + c.stringWidth(text, _layout.FONT, 7) + 12
            if x > x0 and x + need > x0 + w:
                x, y = x0, y - 11
            c.setFillColor(HexColor(share.colour))
            c.rect(x, y - 1, 7, 7, stroke=0, fill=1)
            c.setFillColor(HexColor(_layout.INK))
            c.drawString(x + 10, y, text)
            x += need


@dataclass(frozen=True, slots=True)
class Spread:
    """A spread drawn against the tolerance: its name and its width k SD (in result units)."""

    name: str
    width: float


class ToleranceChart(_Chart):
    """Spreads (k SD) as bars over the tolerance width, on the scale of the results.

    The tolerance is a light track with its end marked; ``marks`` are shares of the
    tolerance drawn as thin ticks over the track (with their names). A bar that ends
    beyond a mark takes the colour of the highest mark it passes.
    """

    _left = 96.0
    _right = 14.0
    _bottom = 14.0

    def __init__(self, spreads: Sequence[Spread], *, tolerance: float,
                 marks: Sequence[tuple[float, str]], width: float, height: float,
                 title: str = "") -> None:
        super().__init__(width, height, title)
        self.spreads, self.tolerance, self.marks = spreads, tolerance, marks

    def draw(self) -> None:
        from reportlab.lib.colors import HexColor

        c = self.canv
        self._draw_title(c)
        x0, y0, w, h = self._area
        tol = self.tolerance
        top = max([tol] + [s.width for s in self.spreads]) * 1.12
        def at(v: float) -> float:
            return x0 + v / top * w
        # tolerance track behind the bars
        c.setFillColor(HexColor("#eef1f2"))
        c.setStrokeColor(HexColor(_layout.RULE))
        c.setLineWidth(0.5)
        c.rect(x0, y0, at(tol) - x0, h - 10, stroke=1, fill=1)
        c.setFont(_layout.FONT, 6.5)
        for frac, name in self.marks:
            x = at(frac * tol)
            c.setStrokeColor(HexColor(_layout.MUTED))
            c.setDash(1.5, 1.5)
            c.line(x, y0, x, y0 + h - 10)
            c.setDash()
            c.setFillColor(HexColor(_layout.MUTED))
            c.drawCentredString(x, y0 + h - 7, name)
        c.setStrokeColor(HexColor(_layout.INK))
        c.setLineWidth(1.2)
        c.line(at(tol), y0 - 2, at(tol), y0 + h - 10)
        c.setFillColor(HexColor(_layout.INK))
        c.drawCentredString(at(tol), y0 + h - 7, f"tolerance {_fmt(tol)}")
        # axis in result units
        c.setLineWidth(0.4)
        for t in nice_ticks(0.0, top):
            if t > top:
                continue
            c.setStrokeColor(HexColor(_layout.MUTED))
            c.line(at(t), y0, at(t), y0 - 2)
            c.setFillColor(HexColor(_layout.MUTED))
            c.drawCentredString(at(t), y0 - 9, _fmt(t))
        rows = max(len(self.spreads), 1)
        step = (h - 10) / rows
        for i, s in enumerate(self.spreads):
            yc = y0 + h - 10 - (i + 0.5) * step
            bh = min(11.0, step * 0.6)
            colour = _layout.ACCENT
            for frac, colour_at in zip(sorted(f for f, _ in self.marks), (_BAR_WARN, _BAR_BAD)):
                if s.width > frac * tol:
                    colour = colour_at
            c.setFillColor(HexColor(colour))
            c.rect(x0, yc - bh / 2, at(s.width) - x0, bh, stroke=0, fill=1)
            c.setFillColor(HexColor(_layout.INK))
            c.setFont(_layout.FONT, 7.5)
            c.drawRightString(x0 - 5, yc - 2.5, s.name)
            text = f"{_fmt(s.width)}, {100 * s.width / tol:.3g} % of the tolerance"
            c.setFont(_layout.FONT, 6.5)
            tw = c.stringWidth(text, _layout.FONT, 6.5)
            if at(s.width) + 3 + tw <= x0 + w + self._right:
                c.setFillColor(HexColor("#eef1f2" if s.width < tol else "#ffffff"))
                c.rect(at(s.width) + 1.5, yc - 4, tw + 3, 8.5, stroke=0, fill=1)
                c.setFillColor(HexColor(_layout.INK))
                c.drawString(at(s.width) + 3, yc - 2.2, text)
            else:  # no room after the bar: inside it, at its end
                c.setFillColor(HexColor("#ffffff"))
                c.drawRightString(at(s.width) - 3, yc - 2.2, text)


class StripChart(_Chart):
    """One row per material: everyone's score as a thin tick, the reader's own as a marker.

    Rows are (label, scores of all participants, own score or None); the own score is
    among the others too (its tick sits under the marker). The axis runs over
    -+``limit``; the satisfactory and questionable bands are shaded; scores past the
    limit are drawn at the edge. With more than ``MAX_LABELS`` participants the ticks
    become a histogram in steps of 0.25, so the chart stays light. Letters of one round
    share everything but the marker: give them one ``cache`` dict and the shapes are
    turned into PDF operators once.
    """

    _left = 62.0
    _right = 14.0
    _top = 8.0
    _bottom = 16.0

    def __init__(self, rows: Sequence[tuple[str, Sequence[float | None], float | None]], *,
                 width: float, row_height: float = 14.0, limit: float = 4.0,
                 title: str = "", score_name: str = "score",
                 cache: dict[str, list[str]] | None = None) -> None:
        super().__init__(width, len(rows) * row_height + self._top + self._bottom, title)
        self.rows, self.row_height, self.limit = rows, row_height, limit
        self.score_name = score_name
        self.cache = cache
        if title:
            self._top = 16.0
            self.height += 8.0

    def _x_of(self, v: float) -> float:
        x0, _, w, _ = self._area
        lim = self.limit
        return x0 + (min(max(v, -lim), lim) + lim) / (2 * lim) * w

    def _shapes(self, c: Any) -> None:
        """Draw what every letter shares and that holds no text: bands, rules, ticks."""
        from reportlab.lib.colors import HexColor

        x0, y0, w, h = self._area
        lim = self.limit
        x_of = self._x_of
        for a, b, colour in ((-3, -2, QUEST), (2, 3, QUEST), (-2, 2, SAT),
                             (-lim, -3, UNSAT), (3, lim, UNSAT)):
            c.setFillColor(HexColor(colour))
            c.rect(x_of(a), y0, x_of(b) - x_of(a), h, stroke=0, fill=1)
        rh = self.row_height
        for r, (_, scores, _) in enumerate(self.rows):
            top = y0 + h - r * rh
            mid = top - rh / 2
            c.setStrokeColor(HexColor(_layout.RULE))
            c.setLineWidth(0.3)
            c.line(x0, top - rh, x0 + w, top - rh)
            vals = [v for v in scores if v is not None and math.isfinite(v)]
            c.setStrokeColor(HexColor(_layout.MUTED))
            if len(vals) <= MAX_LABELS:
                c.setLineWidth(0.7)
                for v in vals:
                    x = x_of(v)
                    c.line(x, mid - rh * 0.25, x, mid + rh * 0.25)
            else:
                bins: dict[int, int] = {}
                for v in vals:
                    b = int(math.floor((min(max(v, -lim), lim - 1e-9)) / 0.25))
                    bins[b] = bins.get(b, 0) + 1
                most = max(bins.values())
                c.setFillColor(HexColor(_layout.MUTED))
                for b, count in bins.items():
                    xa = x_of(b * 0.25)
                    bh = count / most * rh * 0.7
                    c.rect(xa, top - rh + rh * 0.12, x_of((b + 1) * 0.25) - xa - 0.3, bh,
                           stroke=0, fill=1)
        c.setStrokeColor(HexColor(_layout.MUTED))
        c.setLineWidth(0.5)
        c.line(x_of(0), y0, x_of(0), y0 + h)

    def draw(self) -> None:
        self._static(self.canv)
        self._marks(self.canv)

    def _static(self, c: Any) -> None:
        """Draw all but the markers: the same in every letter of a round."""
        from reportlab.lib.colors import HexColor

        self._draw_title(c)
        x0, y0, w, h = self._area
        lim = self.limit
        x_of = self._x_of
        if self.cache is not None and "shapes" in self.cache:
            # Operators only (colours, rects, lines): no font or other page resource.
            c._code.extend(self.cache["shapes"])
        else:
            start = len(c._code)
            self._shapes(c)
            if self.cache is not None:
                self.cache["shapes"] = list(c._code[start:])
        c.setFont(_layout.FONT, 6.5)
        c.setFillColor(HexColor(_layout.MUTED))
        for t in range(-int(lim), int(lim) + 1):
            c.drawCentredString(x_of(t), y0 - 8, f"{t:+d}" if t else "0")
        c.drawCentredString(x0 + w / 2, y0 - 15, self.score_name)
        rh = self.row_height
        c.setFillColor(HexColor(_layout.INK))
        c.setFont(_layout.FONT, 7)
        for r, (label, _, _) in enumerate(self.rows):
            mid = y0 + h - r * rh - rh / 2
            c.drawRightString(x0 - 4, mid - 2.4, _layout.fit_text(label, _layout.FONT, 7,
                                                                  self._left - 6))

    def _marks(self, c: Any) -> None:
        """Draw the reader's own score of each row as a marker."""
        from reportlab.lib.colors import HexColor

        _, y0, _, h = self._area
        x_of = self._x_of
        rh = self.row_height
        c.setFillColor(HexColor(_layout.ACCENT))
        c.setStrokeColor(HexColor("#ffffff"))
        c.setLineWidth(0.6)
        for r, (_, _, own) in enumerate(self.rows):
            if own is None or not math.isfinite(own):
                continue
            mid = y0 + h - r * rh - rh / 2
            x = x_of(own)
            p = c.beginPath()
            s = rh * 0.32
            p.moveTo(x, mid + s)
            p.lineTo(x + s, mid)
            p.lineTo(x, mid - s)
            p.lineTo(x - s, mid)
            p.close()
            c.drawPath(p, stroke=1, fill=1)
