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
- ``ComponentsChart``  components of variation as grouped horizontal bars
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

__all__ = ["Line", "MeansChart", "BarsChart", "ComponentsChart", "StripChart", "nice_ticks",
           "MAX_LABELS", "SAT", "QUEST", "UNSAT", "band_colour"]

MAX_LABELS = 40
"""Most bars that get a name under them; above this only flagged bars are named."""

# Band colours: muted green / amber / red, light enough to print black text on.
SAT = "#d9eadb"
QUEST = "#f6e3b4"
UNSAT = "#f1c6c2"
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
    return f"{v:.4g}"


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

        c.setLineWidth(0.7 if n <= 100 else 0.35)
        dot = max(0.6, min(2.2, step * 0.3))
        for i in range(n):
            m = self.means[i]
            if m is None or not math.isfinite(m):
                continue
            colour = HexColor(_BAR_HI if self.highlight[i] else _layout.INK)
            c.setStrokeColor(colour)
            c.setFillColor(colour)
            x = x0 + (i + 0.5) * step
            a, b = self.lows[i], self.highs[i]
            if a is not None and b is not None and math.isfinite(a) and math.isfinite(b):
                c.line(x, y_of(a), x, y_of(b))
                if n <= 100:
                    c.line(x - dot, y_of(a), x + dot, y_of(a))
                    c.line(x - dot, y_of(b), x + dot, y_of(b))
            c.circle(x, y_of(m), dot, stroke=0, fill=1)
        named = [n <= MAX_LABELS or hl for hl in self.highlight]
        self._x_labels(c, self.labels, named)


class BarsChart(_Chart):
    """One bar per laboratory from zero, with reference lines and optional shaded bands.

    ``shade`` lists (low, high, colour) bands drawn behind the bars (e.g. |z| <= 2 green);
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
        for i, v in enumerate(self.values):
            if v is None or not math.isfinite(v):
                flagged.append(False)
                continue
            level = abs(v)
            colour = (_BAR_BAD if level >= bad_at else _BAR_WARN if level > warn_at
                      else _BAR_HI if self.highlight[i] else _BAR)
            flagged.append(level > warn_at)
            c.setFillColor(HexColor(colour))
            x = x0 + (i + 0.5) * step - bar / 2
            y = y_of(v)
            c.rect(x, min(zero, y), bar, abs(y - zero), stroke=0, fill=1)
            if v > hi or v < lo:
                c.setFont(_layout.FONT, 5.5)
                c.setFillColor(HexColor(_layout.INK))
                c.drawCentredString(x + bar / 2, (y - 7) if v > hi else (y + 2), _fmt(v))
        c.setStrokeColor(HexColor(_layout.MUTED))
        c.setLineWidth(0.5)
        c.line(x0, zero, x0 + w, zero)
        self._lines(c, self.lines, lo, hi)
        named = [n <= MAX_LABELS or f or hl for f, hl in zip(flagged, self.highlight)]
        self._x_labels(c, self.labels, named)


class ComponentsChart(_Chart):
    """Grouped horizontal bars: for each component, one bar per series (percentages)."""

    _left = 78.0
    _right = 18.0
    _bottom = 24.0

    _COLOURS = (_layout.ACCENT, "#8fa9ad", "#c98a12")

    def __init__(self, components: Sequence[str], series: Sequence[tuple[str, Sequence[float | None]]],
                 *, width: float, height: float, title: str = "") -> None:
        super().__init__(width, height, title)
        self.components, self.series = components, series

    def draw(self) -> None:
        from reportlab.lib.colors import HexColor

        c = self.canv
        self._draw_title(c)
        x0, y0, w, h = self._area
        vals = [v for _, vs in self.series for v in vs if v is not None and math.isfinite(v)]
        # Past 150 % the bars only say "far too much"; clip them and print the value.
        top = min(max(vals + [100.0]), 150.0) * 1.05
        ticks = nice_ticks(0.0, top)
        c.setFont(_layout.FONT, 6.5)
        c.setLineWidth(0.4)
        for t in ticks:
            x = x0 + t / top * w
            c.setStrokeColor(HexColor(_layout.RULE))
            c.line(x, y0, x, y0 + h)
            c.setFillColor(HexColor(_layout.MUTED))
            c.drawCentredString(x, y0 - 9, f"{t:g} %")
        groups = len(self.components)
        k = max(len(self.series), 1)
        gh = h / max(groups, 1)
        bh = gh * 0.72 / k
        for g, name in enumerate(self.components):
            top_y = y0 + h - g * gh - gh * 0.14
            c.setFillColor(HexColor(_layout.INK))
            c.setFont(_layout.FONT, 7.5)
            c.drawRightString(x0 - 4, top_y - gh * 0.36 - 2.5, name)
            for s, (_, vs) in enumerate(self.series):
                v = vs[g]
                if v is None or not math.isfinite(v):
                    continue
                y = top_y - (s + 1) * bh
                length = min(max(v, 0.0), top) / top * w
                c.setFillColor(HexColor(self._COLOURS[s % len(self._COLOURS)]))
                c.rect(x0, y, length, bh * 0.9, stroke=0, fill=1)
                c.setFillColor(HexColor(_layout.INK))
                c.setFont(_layout.FONT, 6)
                text = f"{v:.1f}" + (" (clipped)" if v > top else "")
                if v > top:
                    c.setFillColor(HexColor("#ffffff"))
                    c.drawRightString(x0 + length - 2, y + bh * 0.45 - 2, text)
                else:
                    c.drawString(x0 + length + 2, y + bh * 0.45 - 2, text)
        # legend under the axis
        lx = x0
        c.setFont(_layout.FONT, 7)
        for s, (label, _) in enumerate(self.series):
            c.setFillColor(HexColor(self._COLOURS[s % len(self._COLOURS)]))
            c.rect(lx, 3, 7, 7, stroke=0, fill=1)
            c.setFillColor(HexColor(_layout.INK))
            c.drawString(lx + 10, 4, label)
            lx += 16 + c.stringWidth(label, _layout.FONT, 7)


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
        from reportlab.lib.colors import HexColor

        c = self.canv
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
