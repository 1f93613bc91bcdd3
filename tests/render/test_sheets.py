"""Label-sheet geometries: every bundled file loads, its cells fit on its page, and broken
files are refused with the field that is wrong."""

from __future__ import annotations

import pytest

from planner.errors import SpecError
from planner.render import _sheets
from planner.resources import template_path

GOOD = """
page: A4
grid: {columns: 2, rows: 2}
label: {width: 100, height: 140}
margin: {left: 5, top: 8.5}
pitch: {x: 100, y: 140}
corner_radius: 2
padding: 2
"""


def test_the_bundled_sheets_cover_the_kinds_the_issue_asks_for():
    sheets = {name: _sheets.load(name) for name in _sheets.names()}
    a4 = [g for g in sheets.values() if (g.page_width, g.page_height) == (210.0, 297.0)]
    letter = [g for g in sheets.values() if (g.page_width, g.page_height) == (215.9, 279.4)]
    rolls = [g for g in sheets.values() if g.is_roll]
    assert len(a4) >= 2 and max(g.label_height for g in a4) >= 30 > min(
        g.label_height for g in a4)
    assert letter
    assert rolls and all((g.page_width, g.page_height) == (g.label_width, g.label_height)
                         for g in rolls)
    assert any(g.label_height <= 13 for g in sheets.values())  # tube / vial label


@pytest.mark.parametrize("name", _sheets.names())
def test_every_cell_of_every_sheet_lies_on_its_page(name):
    g = _sheets.load(name)
    for i in range(g.per_page):
        left, top, w, h = g.cell_mm(i)
        assert left >= 0 and top >= 0
        assert left + w <= g.page_width + 0.01 and top + h <= g.page_height + 0.01
    # neighbours do not overlap
    assert g.pitch_x >= g.label_width - 0.01 and g.pitch_y >= g.label_height - 0.01


@pytest.mark.parametrize("name", _sheets.names())
def test_every_sheet_file_opens_with_a_comment_on_its_numbers(name):
    text = template_path("sheets", f"{name}.yaml").read_text(encoding="utf-8")
    assert text.startswith("# ")


def test_named_pages_are_iso_a4_and_us_letter():
    # ISO 216: A4 is 210 x 297 mm; US Letter is 8.5 x 11 in = 215.9 x 279.4 mm
    assert _sheets.PAGE_SIZES["A4"] == (210.0, 297.0)
    assert _sheets.PAGE_SIZES["letter"] == pytest.approx((8.5 * 25.4, 11 * 25.4))


def test_cell_points_follow_the_top_left_measures():
    g = _sheets.parse(GOOD, name="t")
    x, y, w, h = g.cell_pt(3)  # second row, second column
    assert x == pytest.approx((5 + 100) * 72 / 25.4)
    assert y == pytest.approx((297 - 8.5 - 140 - 140) * 72 / 25.4)
    assert (w, h) == pytest.approx((100 * 72 / 25.4, 140 * 72 / 25.4))
    x2, y2, _, _ = g.cell_pt(3, (1.0, 2.0))
    assert (x2 - x, y - y2) == pytest.approx((72 / 25.4, 2 * 72 / 25.4))


@pytest.mark.parametrize("change, field, words", [
    (("margin: {left: 5", "margin: {left: 15"), "grid.columns", "past the page width"),
    (("pitch: {x: 100", "pitch: {x: 90"), "pitch.x", "labels would overlap"),
    (("label: {width: 100", "label: {width: -1"), "label.width", "out of range"),
    (("page: A4", "page: A5"), "page", "not a known page"),
    (("grid: {columns: 2", "grid: {columns: 0"), "grid.columns", "at least 1"),
], ids=["off-page", "overlap", "negative", "page", "no-columns"])
def test_broken_sheets_are_refused_with_the_field(change, field, words):
    with pytest.raises(SpecError) as caught:
        _sheets.parse(GOOD.replace(*change), name="t", file="t.yaml")
    assert caught.value.where.field == field
    assert words in caught.value.message


def test_unknown_sheet_suggests_the_nearest():
    with pytest.raises(SpecError, match="did you mean 'a4-3x8-70x37'"):
        _sheets.load("a4-3x8-70x36")


def test_a_study_folder_may_bring_its_own_sheet(tmp_path):
    (tmp_path / "own-2x2.yaml").write_text("# ours\n" + GOOD, encoding="utf-8")
    assert _sheets.load("own-2x2", [tmp_path]).columns == 2
    assert "own-2x2" in _sheets.names([tmp_path])
