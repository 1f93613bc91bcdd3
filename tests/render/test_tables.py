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
    from reportlab.lib.pagesizes import A4
    from reportlab.platypus import SimpleDocTemplate

    from planner.render import _layout
    from tests.render.conftest import long_table

    rows, style = long_table(["material", "x_pt", "a long heading\nin two lines", "score",
                              "band"])
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

