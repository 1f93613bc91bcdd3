"""planner.render._tables.Table draws what reportlab's Table draws: the same page, pixel by
pixel (pypdfium2), for the alignments, vertical alignments, fonts, colours, multi-line
cells, flowable cells and page splits the report and the letters use."""

from __future__ import annotations

from pathlib import Path


def _page_images(path: Path) -> list:
    import numpy as np
    import pypdfium2 as pdfium

    pdf = pdfium.PdfDocument(str(path))
    try:
        return [np.asarray(pdf[i].render(scale=3).to_pil().convert("L"))
                for i in range(len(pdf))]
    finally:
        pdf.close()


def _build(path: Path, cls) -> Path:
    from reportlab.lib.colors import HexColor
    from reportlab.lib.pagesizes import A4
    from reportlab.platypus import Paragraph, SimpleDocTemplate

    from planner.render import _layout

    st = _layout.styles()
    head = ["material", "x_pt", "a long heading\nin two lines", "score", "band"]
    rows = [head]
    for i in range(70):  # long enough to split over pages, the heading repeated
        rows.append([f"M{i:02d}", f"{10 + i / 7:.4g}", "12,5 ± 0,3" if i % 3 else "-",
                     Paragraph(f"<b>z</b> = {i / 10 - 3:.2f}", st["cell"]) if i % 11 == 0
                     else f"z' = {i / 10 - 3:.2f}", "satisfactory" if i % 5 else "questionable"])
    style = _layout.table_style(extra=[
        ("FONT", (0, 1), (-1, -1), _layout.FONT, 8),
        ("ALIGN", (1, 0), (-1, -1), "RIGHT"),
        ("ALIGN", (4, 0), (4, -1), "CENTRE"),
        ("VALIGN", (2, 0), (2, -1), "TOP"),
        ("VALIGN", (3, 0), (3, -1), "BOTTOM"),
        ("FONT", (0, 5), (-1, 5), _layout.BOLD, 8),
        ("FONT", (2, 1), (2, -1), _layout.MONO_REGULAR, 7),
        ("TEXTCOLOR", (1, 7), (1, 9), HexColor("#b03a2e")),
        ("BACKGROUND", (4, 3), (4, 3), HexColor("#e8d9b0")),
    ])
    table = cls([list(r) for r in rows], colWidths=[70, 60, 110, 90, 90], hAlign="LEFT",
                repeatRows=1)
    table.setStyle(style)
    _layout.fonts_ready()
    SimpleDocTemplate(str(path), pagesize=A4).build([table])
    return path


def test_the_table_draws_what_reportlab_draws(tmp_path):
    from reportlab.platypus import Table as Reportlab

    from planner.render import _tables

    theirs = _page_images(_build(tmp_path / "reportlab.pdf", Reportlab))
    ours = _page_images(_build(tmp_path / "ours.pdf", _tables.Table))
    assert len(theirs) == len(ours) >= 2
    for a, b in zip(theirs, ours):
        assert a.shape == b.shape
        assert (a != b).sum() == 0

