"""QR drawing: the image mask holds exactly the matrix qrcode made, and a reader decodes it."""

from __future__ import annotations

from planner.render import _qr


def test_image_mask_bits_are_the_matrix():
    grid = _qr.matrix("K7QM-4X9PA")
    assert len(grid) == 21  # version 1 (ISO/IEC 18004: 21 x 21 modules)
    ops = _qr.image_mask(grid)
    hexdata = ops.split(" ID ", 1)[1].split(">", 1)[0]
    raw = bytes.fromhex(hexdata)
    row_bytes = 3  # 21 bits padded to whole bytes
    for r, row in enumerate(grid):
        bits = int.from_bytes(raw[r * row_bytes:(r + 1) * row_bytes], "big") >> 3
        assert [bool(bits >> (20 - c) & 1) for c in range(21)] == row
    assert _qr.modules(ops) == 21


def test_drawn_symbol_is_read_by_zxing(tmp_path):
    from reportlab.pdfgen.canvas import Canvas

    from tests.render.conftest import decode_qr, render_pages

    path = tmp_path / "q.pdf"
    canvas = Canvas(str(path), pagesize=(200, 200))
    _qr.draw(canvas, _qr.image_mask(_qr.matrix("ZZZZ-00000")), 50, 50, 30)
    canvas.save()
    assert decode_qr(render_pages(path, dpi=300)) == ["ZZZZ-00000"]
