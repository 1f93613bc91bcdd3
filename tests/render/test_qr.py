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


def test_the_fast_mask_choice_is_the_one_qrcode_makes():
    # External check: qrcode's own mask search (util.lost_point over 8 symbols) on 2,000
    # random codes and on longer texts of other versions; every symbol must be identical.
    import random

    import qrcode
    from qrcode.constants import ERROR_CORRECT_Q

    def reference(text):
        symbol = qrcode.QRCode(version=None, error_correction=ERROR_CORRECT_Q, border=0)
        symbol.add_data(text)
        symbol.make(fit=True)
        return [list(row) for row in symbol.get_matrix()]

    rng = random.Random(20270130)
    alphabet = "0123456789ABCDEFGHJKMNPQRSTVWXYZ"
    texts = ["".join(rng.choice(alphabet) for _ in range(4)) + "-"
             + "".join(rng.choice(alphabet) for _ in range(5)) for _ in range(2000)]
    texts += ["A" * 16, "A" * 17, "HELLO WORLD 12345 ABCDE", "ringplan 2027-1 " + "X" * 40,
              "lower case text"]
    got = _qr.matrices(texts)
    assert [i for i, (g, t) in enumerate(zip(got, texts)) if g != reference(t)] == []
    assert _qr.matrix(texts[0]) == got[0]
