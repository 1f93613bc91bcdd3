"""reportlab's Table, drawing its plain-text cells in one text object.

A round of hundreds of laboratories puts tens of thousands of table cells into its
report and letters; reportlab draws each plain-text cell as a text object of its own
(begin, font, colour, position, end). ``Table`` works out every position as reportlab
does (the same alignment, vertical alignment, paddings and leading) and writes the cells
into one text object per table, drawn before the table's rules as reportlab draws them.
Cells that are flowables, and any cell with options the shortcut does not follow
(links, a text direction, shaping), are drawn by reportlab itself. The page looks the
same; tests/render/test_tables.py compares the two, pixel by pixel.
"""

from __future__ import annotations

from typing import Any

from reportlab.platypus import Flowable
from reportlab.platypus import Table as _ReportlabTable

__all__ = ["Table", "table"]

_ALIGN = {"LEFT": 0.0, "RIGHT": 1.0, "CENTRE": 0.5, "CENTER": 0.5}
_VALIGN = frozenset({"TOP", "MIDDLE", "BOTTOM"})


class Table(_ReportlabTable):  # type: ignore[misc]
    """A platypus Table whose plain-text cells are written in one text object."""

    _pending: list[tuple[Any, ...]] | None = None

    def draw(self) -> None:
        self._pending = []
        try:
            super().draw()
        finally:
            self._pending = None

    def _drawCell(self, cellval: Any, cellstyle: Any, pos: tuple[float, float],  # noqa: N802
                  size: tuple[float, float]) -> None:
        shift = _ALIGN.get(cellstyle.alignment)
        if (self._pending is None or isinstance(cellval, (tuple, list, Flowable))
                or shift is None or cellstyle.valign not in _VALIGN or cellstyle.href
                or cellstyle.destination or cellstyle.direction or cellstyle.shaping
                or getattr(cellval, "onDraw", None)):
            super()._drawCell(cellval, cellstyle, pos, size)
            return
        colpos, rowpos = pos
        colwidth, rowheight = size
        # The positions of reportlab's Table._drawCell (5.x) for a string.
        if shift == 0.0:
            x = colpos + cellstyle.leftPadding
        elif shift == 1.0:
            x = colpos + colwidth - cellstyle.rightPadding
        else:
            x = colpos + (colwidth + cellstyle.leftPadding - cellstyle.rightPadding) * 0.5
        lines = str(cellval).split("\n")
        leading, fontsize = cellstyle.leading, cellstyle.fontsize
        if cellstyle.valign == "BOTTOM":
            y = rowpos + cellstyle.bottomPadding + len(lines) * leading - fontsize
        elif cellstyle.valign == "TOP":
            y = rowpos + rowheight - cellstyle.topPadding - fontsize
        else:
            y = (rowpos + (cellstyle.bottomPadding + rowheight - cellstyle.topPadding
                           + len(lines) * leading) / 2.0 - fontsize)
        for line in lines:
            self._pending.append((cellstyle.fontname, fontsize, leading, cellstyle.color,
                                  x, y, line, shift))
            y -= leading

    def _drawLines(self) -> None:  # noqa: N802
        self._flush()
        super()._drawLines()

    def _flush(self) -> None:
        """Write the collected cells in one text object."""
        if not self._pending:
            return
        c = self.canv
        text = c.beginText()
        font: tuple[str, float, float] | None = None
        colour = None
        for name, size, leading, fill, x, y, line, shift in self._pending:
            if font != (name, size, leading):
                text.setFont(name, size, leading)
                font = (name, size, leading)
            if colour is None or fill != colour:
                text.setFillColor(fill)
                colour = fill
            if shift:
                x -= shift * c.stringWidth(line, name, size)
            text.setTextOrigin(x, y)
            text.textOut(line)
        c.drawText(text)
        self._pending = []


def table(rows: Any, widths: Any, style: Any, **kwargs: Any) -> Table:
    """Return a left-aligned ``Table`` with ``style`` (as ``_layout.table`` does)."""
    made = Table([list(r) for r in rows], colWidths=list(widths), hAlign="LEFT", **kwargs)
    made.setStyle(style)
    return made
