"""QR codes: the matrix from ``qrcode``, drawn as a 1-bit image mask.

A code such as ``K7QM-4X9PA`` fits QR version 1 (21 x 21 modules) in
alphanumeric mode at error-correction level Q (up to 16 characters, ISO/IEC
18004 table 7), which survives about a quarter of the symbol being smudged.

Each symbol is drawn as one inline image mask, one bit per module, painted in
the current fill colour and scaled to size: about 130 bytes of content before
compression, where even merged rectangles cost several hundred, and there are
no seams between neighbouring modules for an anti-aliasing renderer to show.
``/Interpolate`` is left at its default (false), so printers and viewers scale
the modules as sharp squares. The quiet zone of 4 modules (ISO/IEC 18004) is
left blank around the image by the caller; ``QUIET`` gives its width.
"""

from __future__ import annotations

from collections.abc import Iterable, Sequence
from typing import TYPE_CHECKING, Any

if TYPE_CHECKING:
    from reportlab.pdfgen.canvas import Canvas

__all__ = ["QUIET", "draw", "flowable", "image_mask", "image_masks", "matrix", "modules"]

QUIET = 4
"""Width of the blank quiet zone around a symbol, in modules."""


def matrix(text: str) -> list[list[bool]]:
    """Return the QR matrix of ``text`` (True = dark module), without quiet zone."""
    import qrcode
    from qrcode.constants import ERROR_CORRECT_Q

    symbol = qrcode.QRCode(version=None, error_correction=ERROR_CORRECT_Q, border=0)
    symbol.add_data(text)
    symbol.make(fit=True)
    return [list(row) for row in symbol.get_matrix()]


def modules(ops: str) -> int:
    """Return the number of modules across a symbol drawn by ``image_mask`` operators."""
    return int(ops.split("/W ", 1)[1].split(" ", 1)[0])


def image_mask(grid: Sequence[Sequence[bool]]) -> str:
    """Return PDF inline-image operators that paint the dark modules of ``grid`` in a unit square."""
    n = len(grid)
    rows = []
    for row in grid:
        bits = 0
        for dark in row:
            bits = (bits << 1) | bool(dark)
        pad = (-n) % 8
        rows.append((bits << pad).to_bytes((n + pad) // 8, "big").hex())
    # /D [1 0]: a 1 bit (dark module) paints; ASCIIHex keeps the content stream text.
    return f"BI /W {n} /H {n} /IM true /BPC 1 /D [1 0] /F /AHx ID {''.join(rows)}> EI"


def image_masks(texts: Iterable[str]) -> list[str]:
    """Return ``image_mask(matrix(t))`` for every text; the unit of work of a worker process."""
    return [image_mask(matrix(text)) for text in texts]


def draw(canvas: Canvas, ops: str, x: float, y: float, side: float) -> None:
    """Paint the symbol ``ops`` in black with its lower-left corner at (x, y), ``side`` points across.

    The quiet zone is outside this square.
    """
    canvas.addLiteral(f"q 0 g {side:.3f} 0 0 {side:.3f} {x:.3f} {y:.3f} cm {ops} Q")


def flowable(text: str, side: float) -> Any:
    """Return a platypus flowable of the symbol of ``text``, ``side`` points across with its quiet zone."""
    from reportlab.platypus import Flowable

    ops = image_mask(matrix(text))
    n = modules(ops)

    class _Symbol(Flowable):  # type: ignore[misc]
        def wrap(self, avail_width: float, avail_height: float) -> tuple[float, float]:
            return side, side

        def draw(self) -> None:
            inner = side * n / (n + 2 * QUIET)
            margin = (side - inner) / 2
            draw(self.canv, ops, margin, margin, inner)

    return _Symbol()
