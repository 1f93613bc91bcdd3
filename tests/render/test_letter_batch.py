"""Letters made in a batch are the letters reportlab's own layout makes, only cheaper.

``render_all`` lays out a round's letters with flowables of our own: tables drawn straight
from the style's commands (``Grid``), paragraphs broken into lines once for every letter
that has them (``Laid``) or has them but for the addressee's id (``Shaped``), lines of
text, whole paragraphs and the scores chart but its markers whose PDF operators are
worked out once (``Chart``), and font programs made once per subset. These tests hold them to what
reportlab's Table and Paragraph draw, page by page (pypdfium2 renderings) and word for
word (pdfplumber text), on the demo round (three measurands, a letter in German, decimal
commas, the host's own letter, wrapped headings) and on tables that run over pages.
"""

from __future__ import annotations

import re
import shutil
from pathlib import Path

import pytest

TOLERANCE = 8  # grey levels: anti-aliasing of positions equal to 1e-6 pt may differ


def _pages(path: Path) -> list:
    import numpy as np
    import pypdfium2 as pdfium

    pdf = pdfium.PdfDocument(str(path))
    try:
        return [np.asarray(pdf[i].render(scale=3).to_pil().convert("L"), dtype=int)
                for i in range(len(pdf))]
    finally:
        pdf.close()


def _text(path: Path) -> list[str]:
    import pdfplumber

    with pdfplumber.open(path) as pdf:
        return [page.extract_text() for page in pdf.pages]


def _same_look(a: Path, b: Path) -> None:
    ours, theirs = _pages(a), _pages(b)
    assert len(ours) == len(theirs), (a.name, len(ours), len(theirs))
    for i, (x, y) in enumerate(zip(ours, theirs, strict=True)):
        assert x.shape == y.shape
        assert abs(x - y).max() <= TOLERANCE, (a.name, i, int(abs(x - y).max()))


@pytest.fixture(scope="module")
def demo_round(tmp_path_factory):
    """The demo study, evaluated: its folder and round."""
    from planner import demo

    made = demo.build_demo(tmp_path_factory.mktemp("letters") / "ringplan-demo")
    return made["study_dir"], made["round"]


def _evaluate(source: Path, target: Path, round_id: str, **workers) -> Path:
    """Evaluate a copy of an evaluated round again; return its report folder."""
    from planner import evaluate, spec
    from planner.ledger import Ledger

    shutil.copytree(source, target, symlinks=True)
    study = spec.load(target)
    with Ledger.open(target, create=False) as ledger:
        return evaluate.evaluate_round(study, target, round_id, ledger, **workers)


def _batch_inputs(source: Path, round_id: str) -> tuple[dict, list, list]:
    """Return what ``letter.render_all`` takes for an evaluated round: its statistics, its
    unblinded rows and the addressees."""
    import json

    from planner import evaluate, intake, language, plan, spec
    from planner.ledger import Ledger
    from planner.render import letter

    study = spec.load(source)
    folder = plan.round_dir(source, round_id)
    statistics = json.loads((folder / evaluate.REPORT_DIR / evaluate.STATISTICS_NAME)
                            .read_text(encoding="utf-8"))
    with Ledger.open(source, create=False) as ledger:
        key = json.loads((folder / "key.json").read_text(encoding="utf-8"))
        accepted = evaluate.accepted_results(study, ledger, round_id,
                                             manifest=plan.read_manifest(folder))
        rows = evaluate.unblind(key, accepted, issued=intake.issued_spares(ledger, round_id))
    to = [letter.Addressee(lab.id, lab.name, tuple(lab.address), lab.contact.name,
                           lab.decimal, language.of(lab)) for lab in study.laboratories]
    return statistics, rows, to


def _reportlab_only(monkeypatch):
    """Make letters the way reportlab lays them out, with none of the batch's shortcuts."""
    from reportlab.platypus import Paragraph, Spacer

    from planner.render import _charts, _tables, letter

    monkeypatch.setattr(letter, "_grid", lambda rows, widths, style: _tables.table(
        rows, widths, style, repeatRows=1))
    monkeypatch.setattr(letter, "_para", lambda text, style, shared=True, but="":
                        Paragraph(text, style))
    monkeypatch.setattr(letter, "_strip_chart", _charts.StripChart)
    monkeypatch.setattr(letter, "_Seed", lambda seeds: Spacer(0, 0))
    monkeypatch.setattr(letter, "_shared_font_files", lambda names: lambda: None)


@pytest.mark.parametrize("workers", [1, 2], ids=["one process", "two processes"])
def test_letters_of_a_batch_read_and_look_as_reportlab_lays_them_out(demo_round, tmp_path,
                                                                      monkeypatch, workers):
    source, round_id = demo_round
    ours = _evaluate(source, tmp_path / "ours", round_id, workers=workers)
    with monkeypatch.context() as m:
        _reportlab_only(m)
        theirs = _evaluate(source, tmp_path / "theirs", round_id, workers=1)
    letters = sorted(p.name for p in theirs.glob("letter-*.pdf"))
    assert len(letters) == 5
    for name in letters:
        assert _text(ours / name) == _text(theirs / name), name
        _same_look(ours / name, theirs / name)


def test_a_letter_in_a_batch_is_byte_for_byte_the_letter_made_alone(demo_round, tmp_path):
    # Shared font programs, widths and maps, cached encodings and replayed paragraphs and
    # charts change nothing in the file but its /ID (reportlab's hash of the temporary name)
    # and its dates (the clock's second, which may tick between the two).
    from planner.render import letter

    statistics, rows, to = _batch_inputs(*demo_round)
    batch, alone = tmp_path / "batch", tmp_path / "alone"
    batch.mkdir()
    alone.mkdir()
    letter.render_all(batch, statistics, rows, to, paper="A4", workers=1)
    letter._ENCODED.clear()  # nothing left over from the batch
    views = letter.anonymous_views(statistics)
    for a in to:
        own = [r for r in rows if r.lab == a.lab]
        seeds = letter._seeds(statistics, [x for x in to if x.language == a.language],
                              a.language)
        letter._render(alone / f"letter-{a.lab}.pdf", statistics, own, a, paper="A4",
                       views=views, seeds=seeds)

    def without_id(path: Path) -> bytes:
        data = re.sub(rb"/ID \n\[<[0-9a-f]+><[0-9a-f]+>\]", b"", path.read_bytes())
        return re.sub(rb"/(Creation|Mod)Date \(D:[0-9+'Z]+\)", b"", data)

    for a in to:
        name = f"letter-{a.lab}.pdf"
        assert without_id(batch / name) == without_id(alone / name), name


def test_the_letters_of_a_batch_embed_one_font_program_per_face_and_language(demo_round,
                                                                             tmp_path):
    # What makes them cheap: the letters of a language give their fonts the same subsets,
    # so each face's program is made once. The demo writes in English and German and sets
    # text, bold, italic and codes: at most 4 x 2 programs for its 5 letters (20 without).
    from planner.render import letter

    source, round_id = demo_round
    letter._FONT_FILES.clear()
    _evaluate(source, tmp_path / "ours", round_id, workers=1)
    assert 4 <= len(letter._FONT_FILES) <= 8, sorted(
        (Path(name).name, len(subset)) for name, subset in letter._FONT_FILES)


# --- tables ------------------------------------------------------------------------------

def _table_document(path: Path, make) -> Path:
    from reportlab.lib.colors import HexColor
    from reportlab.lib.pagesizes import A4
    from reportlab.platypus import Paragraph, SimpleDocTemplate, Spacer

    from planner.render import _layout
    from tests.render.conftest import long_table

    rows, style = long_table(
        ["material", "x_pt", "a long heading\nin two lines",
         Paragraph("a heading that wraps in its column", _layout.styles()["cell"]), "band"],
        ("TOPPADDING", (0, 0), (-1, -1), 2.2), ("BOTTOMPADDING", (0, 0), (-1, -1), 2.2),
        ("BACKGROUND", (0, 40), (2, 60), HexColor("#f3e2dd")))  # over a page break
    _layout.fonts_ready()
    SimpleDocTemplate(str(path), pagesize=A4).build(
        [Spacer(1, 300), make(rows, [70, 60, 110, 90, 90], style)])
    return path


def test_a_letter_table_draws_what_reportlab_draws_across_pages(tmp_path):
    from planner.render import _tables, letter

    grid = _table_document(tmp_path / "grid.pdf", letter._grid)
    assert type(letter._grid([["a"]], [10], letter._layout.table_style())).__name__ == "Grid"
    theirs = _table_document(tmp_path / "reportlab.pdf", lambda rows, widths, style:
                             _tables.table(rows, widths, style, repeatRows=1))
    assert len(_pages(grid)) == 3
    assert _text(grid) == _text(theirs)
    _same_look(grid, theirs)


def test_a_table_moved_to_the_next_page_twice_still_splits(tmp_path):
    # reportlab marks a flowable it moves on; a part of a table split from such a one must
    # not carry the mark, or the next move raises "too large" (a round of 60 materials did).
    from reportlab.lib.pagesizes import A4
    from reportlab.platypus import SimpleDocTemplate, Spacer

    from planner.render import _layout, letter

    rows = [["material", "value"]] + [[f"M{i:02d}", str(i)] for i in range(56)]
    table = letter._grid(rows, [100, 100], _layout.table_style())
    _layout.fonts_ready()
    # a page with almost no room left, then a table longer than a page
    SimpleDocTemplate(str(tmp_path / "t.pdf"), pagesize=A4).build(
        [Spacer(1, 680), table])
    text = "\n".join(_text(tmp_path / "t.pdf"))
    assert all(f"M{i:02d}" in text for i in range(56))
    assert text.count("material value") >= 2  # the heading repeated on the next page



@pytest.mark.skipif(not Path("/proc/self/fd").is_dir(), reason="names a file by /proc/self/fd")
@pytest.mark.parametrize("workers", [1, 2])
def test_a_batch_of_letters_is_put_in_place_whole_or_not_at_all(demo_round, tmp_path,
                                                               monkeypatch, workers):
    # Letters are made as temporary files (in the workers), then flushed together and
    # renamed by the parent: a disk that fails while a letter is flushed leaves every
    # letter as it was, and no temporary file behind.
    import errno
    import os

    from planner import evaluate, files, plan
    from planner.errors import PlannerError
    from planner.render import letter

    source, round_id = demo_round
    statistics, rows, to = _batch_inputs(source, round_id)
    target = tmp_path / "copy"
    shutil.copytree(source, target, symlinks=True)
    out = plan.round_dir(target, round_id) / evaluate.REPORT_DIR
    before = {p.name: p.read_bytes() for p in out.glob("letter-*.pdf")}
    assert len(before) == len(to) == 5
    real, flushed = os.fsync, []

    def failing(fd):
        name = os.path.basename(os.readlink(f"/proc/self/fd/{fd}"))
        if name.startswith(".letter-"):
            flushed.append(name)
            if len(flushed) == 3:
                raise OSError(errno.ENOSPC, "No space left on device")
        return real(fd)

    monkeypatch.setattr(os, "fsync", failing)
    with pytest.raises(PlannerError, match="no space left on the disk"):
        letter.render_all(out, statistics, rows, to, paper="A4", workers=workers)
    monkeypatch.undo()
    assert len(flushed) == 5  # every letter made before any was flushed, all in the parent
    assert {p.name: p.read_bytes() for p in out.glob("letter-*.pdf")} == before
    assert sorted(out.glob(f"*{files.TEMP_SUFFIX}")) == []
    paths = letter.render_all(out, statistics, rows, to, paper="A4", workers=workers)
    assert sorted(p.name for p in paths) == sorted(before)
    assert sorted(out.glob(f"*{files.TEMP_SUFFIX}")) == []
    assert all(p.read_bytes().startswith(b"%PDF") for p in paths)
