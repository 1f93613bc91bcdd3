"""Unit labels: every QR decodes to a code of the round, everything stays inside its cell,
no material on a label, fields dropped in the documented order.

External checks: pages rendered by pdfium (pypdfium2) and read by zxing-cpp;
positions and text read back with pdfplumber.
"""

from __future__ import annotations

from pathlib import Path

import pytest

from planner import codes
from planner.errors import CodeError, PlannerError
from planner.render import _layout, _sheets, labels
from tests.render.conftest import decode_qr, pdf_text, render_pages, secret_words

MM = 72 / 25.4
SLACK = 0.05  # points; pdfplumber rounds glyph boxes


def _cells(g: _sheets.Geometry, inset: float = 0.0) -> list[tuple[float, float, float, float]]:
    """Cells as (x0, top, x1, bottom) in points from the page's top-left, like pdfplumber."""
    out = []
    for i in range(g.per_page):
        left, top, w, h = g.cell_mm(i)
        out.append(((left + inset) * MM, (top + inset) * MM, (left + w - inset) * MM,
                    (top + h - inset) * MM))
    return out


def _inside(obj: dict, cells: list[tuple[float, float, float, float]]) -> bool:
    return any(obj["x0"] >= c[0] - SLACK and obj["x1"] <= c[2] + SLACK and
               obj["top"] >= c[1] - SLACK and obj["bottom"] <= c[3] + SLACK for c in cells)


def _sample(printed) -> list:
    """A few labels of every kind, hazard labels and two separators."""
    items = labels.host_labels(printed.study, printed.manifest, printed.key)
    hazard = next(i for i, x in enumerate(items) if isinstance(x, labels.Separator)
                  and x.material == "PP-FR")
    return items[:6] + items[hazard:hazard + 20]


def test_every_host_label_qr_decodes_to_its_code(printed):
    path = printed.folder / "host" / "labels.pdf"
    decoded = decode_qr(render_pages(path))
    round_codes = {codes.format(u["code"]) for u in printed.key["units"]}
    # every decoded text is a valid code of the round ...
    assert all(codes.is_valid(text) for text in decoded)
    assert set(decoded) <= round_codes
    # ... and every label's code is decoded, once
    assert sorted(decoded) == sorted(round_codes)


@pytest.mark.parametrize("name", _sheets.names())
def test_labels_on_each_sheet_decode_and_stay_inside_their_cells(printed, tmp_path, name):
    import pdfplumber

    g = _sheets.load(name)
    items = _sample(printed)
    path = labels.render(tmp_path / "l.pdf", items, g, title="t")
    wanted = sorted(codes.format(x.code) for x in items if isinstance(x, labels.Label))
    assert sorted(decode_qr(render_pages(path))) == wanted
    padded = _cells(g, inset=g.padding)
    whole = _cells(g)
    with pdfplumber.open(str(path)) as pdf:
        images = 0
        for page in pdf.pages:
            assert (float(page.width), float(page.height)) == pytest.approx(
                (g.page_width * MM, g.page_height * MM), abs=0.1 * MM)
            for char in page.chars:
                assert _inside(char, padded), (name, char["text"], char["x0"], char["top"])
            for image in page.images:
                assert _inside(image, padded), (name, image["x0"], image["top"])
                images += 1
            for rect in page.rects:
                assert _inside(rect, whole), (name, rect["x0"], rect["top"])
        assert images == len(wanted)


def test_labels_of_a_laboratory_name_no_material(printed, tmp_path):
    g = _sheets.load("a4-3x8-70x37")
    for lab in printed.manifest["labs"]:
        items = labels.lab_labels(printed.study, printed.manifest, printed.key, lab)
        assert not any(isinstance(x, labels.Separator) for x in items)
        text = "\n".join(pdf_text(labels.render(tmp_path / f"{lab}.pdf", items, g, title="t")))
        for word in secret_words(printed.study):
            assert word.lower() not in text.lower(), (lab, word)


def test_host_sheet_orders_by_material_with_separators(printed):
    items = labels.host_labels(printed.study, printed.manifest, printed.key)
    material_of = {u["code"]: u["material"] for u in printed.key["units"]}
    seps = [x for x in items if isinstance(x, labels.Separator)]
    assert [s.material for s in seps] == [m.id for m in printed.study.materials]
    current = None
    count = 0
    for item in items + [None]:
        if item is None or isinstance(item, labels.Separator):
            if current is not None:
                assert count == current.count
            current, count = item, 0
            continue
        assert material_of[item.code] == current.material
        count += 1
    # 5 laboratories x 3 trials + 5 spares + 2 retained + 10 homogeneity (study.yaml)
    assert all(s.count == 5 * 3 + 5 * 1 + 2 + 10 for s in seps)


def test_separators_carry_no_qr_and_appear_on_the_host_sheet_only(printed):
    text = "\n".join(pdf_text(printed.folder / "host" / "labels.pdf"))
    assert text.count("next: ") == len(printed.study.materials)


def test_use_by_is_preparation_plus_shortest_stability(printed):
    from datetime import date, timedelta

    # study.yaml: prepare_on 2027-01-11; shortest stability RE-MIX 120 days
    assert labels.use_by(printed.study, printed.manifest) == date(2027, 1, 11) + timedelta(120)
    items = labels.host_labels(printed.study, printed.manifest, printed.key)
    # in the language of the laboratory that tests the unit (hel writes German, study.yaml)
    assert {x.use_by for x in items if isinstance(x, labels.Label)} == {
        "use by 2027-05-11", "verwendbar bis 2027-05-11"}


def test_small_labels_drop_fields_in_the_documented_order(printed):
    item = next(x for x in labels.host_labels(printed.study, printed.manifest, printed.key)
                if isinstance(x, labels.Label) and x.hazard)
    order = ("storage", "study", "use_by", "lab", "trial", "hazard")
    for name in _sheets.names():
        lines, dropped = labels.layout(item, _sheets.load(name))
        # the dropped fields are always the tail of the priority list
        assert dropped == order[:len(dropped)], (name, dropped)
        shown = "".join(line.text for line in lines)
        assert codes.format(item.code) in shown.replace(" ", "")
    _, dropped = labels.layout(item, _sheets.load("a4-3x8-70x37"))
    assert dropped == ()
    _, dropped = labels.layout(item, _sheets.load("a4-5x20-35x13"))
    assert "storage" in dropped and "hazard" not in dropped


def test_too_long_text_is_shrunk_then_wrapped_never_cut(printed):
    g = _sheets.load("a4-3x8-70x37")
    long_lab = "for The Extraordinarily Long-Named Central Polymer Research Laboratory"
    item = labels.Label(code="K7QM4X9PA", trial="trial 1 · run 1", lab=(long_lab,),
                        use_by="use by 2027-05-11", study="nvp-mfr · round 2027-1")
    lines, dropped = labels.layout(item, g)
    lab_lines = [ln.text for ln in lines if ln.font == _layout.FONT][:3]
    assert "lab" not in dropped
    assert " ".join(lab_lines).replace("- ", "-").startswith(long_lab[:40])
    assert "".join(ln.text for ln in lines).replace(" ", "").count("Laboratory") == 1


def test_start_at_and_offset_move_the_first_label(printed, tmp_path):
    import pdfplumber

    g = _sheets.load("a4-3x8-70x37")
    items = [x for x in _sample(printed) if isinstance(x, labels.Label)][:2]
    path = labels.render(tmp_path / "s.pdf", items, g, title="t", start_at=5,
                         offset_mm=(1.5, -2.0))
    left, top, w, h = g.cell_mm(4)
    with pdfplumber.open(str(path)) as pdf:
        first = min(pdf.pages[0].images, key=lambda im: (im["top"], im["x0"]))
    assert left * MM + 1.5 * MM < first["x0"] < (left + w / 2) * MM + 1.5 * MM
    assert (top - 2.0) * MM < first["top"] < (top + h) * MM


def test_offset_shifts_everything_by_exact_millimetres(printed, tmp_path):
    import pdfplumber

    g = _sheets.load("a4-5x13-38x21")
    items = [x for x in _sample(printed) if isinstance(x, labels.Label)][:3]
    plain = labels.render(tmp_path / "a.pdf", items, g, title="t")
    moved = labels.render(tmp_path / "b.pdf", items, g, title="t", offset_mm=(2.0, 3.0))
    with pdfplumber.open(str(plain)) as a, pdfplumber.open(str(moved)) as b:
        for ia, ib in zip(a.pages[0].images, b.pages[0].images, strict=True):
            assert ib["x0"] - ia["x0"] == pytest.approx(2.0 * MM, abs=0.01)
            assert ib["top"] - ia["top"] == pytest.approx(3.0 * MM, abs=0.01)


def test_start_at_off_the_sheet_is_refused(printed, tmp_path):
    g = _sheets.load("a4-3x8-70x37")
    with pytest.raises(PlannerError, match="--start-at 25 is not a label"):
        labels.render(tmp_path / "x.pdf", [], g, title="t", start_at=25)


def test_pick_reprints_chosen_codes_and_refuses_strangers(printed):
    items = labels.host_labels(printed.study, printed.manifest, printed.key)
    some = [x for x in items if isinstance(x, labels.Label)][3]
    chosen = labels.pick(items, [codes.format(some.code).lower()], round_id="2027-1")
    assert chosen == [some]
    with pytest.raises(CodeError):
        labels.pick(items, ["K7QM-4X9P0"], round_id="2027-1")  # wrong check character
    stranger = "K7QM-4X9PA"  # valid check character (codes.py doctest), not in this round
    assert stranger.replace("-", "") not in {u["code"] for u in printed.key["units"]}
    with pytest.raises(PlannerError, match="is not a code of round"):
        labels.pick(items, [stranger], round_id="2027-1")


def test_parallel_rendering_gives_the_same_bytes(printed, tmp_path, monkeypatch):
    g = _sheets.load("a4-3x8-70x37")
    items = labels.host_labels(printed.study, printed.manifest, printed.key)
    monkeypatch.setattr(labels, "CHUNK", 20)
    one = labels.render(tmp_path / "1.pdf", items, g, title="t", workers=1)
    two = labels.render(tmp_path / "2.pdf", items, g, title="t", workers=2)
    assert Path(one).read_bytes() == Path(two).read_bytes()


def test_calibration_page_outlines_every_cell(tmp_path):
    import pdfplumber

    from planner.render import print_calibration

    for name in ("a4-5x13-38x21", "roll-57x32"):
        g = _sheets.load(name)
        path = print_calibration(tmp_path / f"{name}.pdf", name, (0.0, 0.0))
        text = "\n".join(pdf_text(path))
        assert name in text
        with pdfplumber.open(str(path)) as pdf:
            page = pdf.pages[0]
            assert (float(page.width), float(page.height)) == pytest.approx(
                (g.page_width * MM, g.page_height * MM), abs=0.1 * MM)
            numbers = {c["text"] for c in page.chars}
            # every cell number printed (digits of the last cell's number)
            assert set(str(g.per_page)) <= numbers
            outlines = [o for o in page.rects + page.curves
                        if abs((o["x1"] - o["x0"]) - g.label_width * MM) < 0.2]
            assert len(outlines) >= g.per_page
