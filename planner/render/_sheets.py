"""Label-sheet geometries: the one loader of ``templates/sheets/*.yaml``.

A geometry is page size, grid, label size, margins, pitch and corner radius,
all in millimetres, margins measured from the top-left corner of the page as a
ruler on the sheet would. Each file is named by its geometry
(``a4-3x8-70x37``: A4, 3 columns, 8 rows, 70 x 37 mm) and opens with a comment
on where its numbers came from. A study folder may hold its own geometries in
``sheets/NAME.yaml``; they are found before the bundled ones.

Cells are numbered from 1, row by row from the top-left, as a person counts
labels on a partly used sheet (``--start-at``).
"""

from __future__ import annotations

import difflib
from collections.abc import Iterable
from dataclasses import dataclass
from pathlib import Path
from typing import Any

import yaml

from planner.errors import SpecError, Where
from planner.resources import template_path

__all__ = ["MM", "PAGE_SIZES", "Geometry", "load", "names", "parse"]

MM = 72.0 / 25.4
"""PDF points per millimetre."""

PAGE_SIZES = {"A4": (210.0, 297.0), "letter": (215.9, 279.4)}
"""Named page sizes in mm: ISO 216 A4 and US Letter (8.5 x 11 in)."""

# Rounding slack when checking that cells fit: the sheets are given to 0.01 mm.
_SLACK = 0.01


@dataclass(frozen=True, slots=True)
class Geometry:
    """A label sheet: page and grid in millimetres (see the module docstring)."""

    name: str
    description: str
    page_width: float
    page_height: float
    columns: int
    rows: int
    label_width: float
    label_height: float
    margin_left: float
    margin_top: float
    pitch_x: float
    pitch_y: float
    corner_radius: float
    padding: float

    @property
    def per_page(self) -> int:
        """Return the number of labels on one page."""
        return self.columns * self.rows

    @property
    def is_roll(self) -> bool:
        """Return whether each page is a single label (a continuous roll)."""
        return self.per_page == 1

    def cell_mm(self, index: int) -> tuple[float, float, float, float]:
        """Return (left, top, width, height) in mm from the page's top-left of cell ``index`` (0-based)."""
        row, column = divmod(index % self.per_page, self.columns)
        return (self.margin_left + column * self.pitch_x, self.margin_top + row * self.pitch_y,
                self.label_width, self.label_height)

    def cell_pt(self, index: int, offset_mm: tuple[float, float] = (0.0, 0.0)
                ) -> tuple[float, float, float, float]:
        """Return (x, y, width, height) in PDF points, origin bottom-left, of cell ``index``.

        ``offset_mm`` shifts the print right (x) and down (y), for a printer
        that feeds off-centre.
        """
        left, top, width, height = self.cell_mm(index)
        x = (left + offset_mm[0]) * MM
        y = (self.page_height - top - height - offset_mm[1]) * MM
        return x, y, width * MM, height * MM


def names(folders: Iterable[Path] = ()) -> list[str]:
    """Return the names of every geometry in ``folders`` and the bundled sheets, sorted."""
    found: set[str] = set()
    for folder in (*folders, template_path("sheets")):
        if Path(folder).is_dir():
            found.update(p.stem for p in Path(folder).glob("*.yaml"))
    return sorted(found)


def load(name: str, folders: Iterable[Path] = (), *, field: str = "label_sheet") -> Geometry:
    """Return the geometry called ``name``; raise SpecError naming the known sheets if none.

    ``field`` is where the name came from (the spec's label_sheet, or --sheet).
    """
    folders = tuple(folders)
    for folder in (*folders, template_path("sheets")):
        path = Path(folder) / f"{name}.yaml"
        if path.is_file():
            return parse(path.read_text(encoding="utf-8"), name=name, file=str(path))
    known = names(folders)
    guess = difflib.get_close_matches(name, known, n=1)
    hint = f"; did you mean {guess[0]!r}?" if guess else f"; known sheets: {', '.join(known)}"
    raise SpecError(f"no label sheet called {name!r}{hint}", Where(field=field))


def _number(raw: dict[str, Any], section: str, key: str, file: str, *,
            minimum: float = 0.0, strict: bool = True) -> float:
    where = Where(file, None, f"{section}.{key}" if section else key)
    block = raw.get(section, {}) if section else raw
    if not isinstance(block, dict) or key not in block:
        raise SpecError("is required but missing", where)
    value = block[key]
    if isinstance(value, bool) or not isinstance(value, (int, float)):
        raise SpecError(f"expected a number of millimetres, got {value!r}", where)
    if value < minimum or (strict and value == minimum):
        bound = ">" if strict else ">="
        raise SpecError(f"{value!r} is out of range; it must be {bound} {minimum}", where)
    return float(value)


def parse(text: str, *, name: str, file: str = "<sheet>") -> Geometry:
    """Return the geometry written in YAML ``text``; raise SpecError if it is incomplete or
    its cells do not fit on its page."""
    try:
        raw = yaml.safe_load(text)
    except yaml.YAMLError as exc:
        raise SpecError(f"this is not valid YAML: {exc}", Where(file)) from None
    if not isinstance(raw, dict):
        raise SpecError("a sheet is a mapping with page, grid, label, margin and pitch",
                        Where(file))
    page = raw.get("page")
    if isinstance(page, str):
        if page not in PAGE_SIZES:
            raise SpecError(f"{page!r} is not a known page; use one of {', '.join(PAGE_SIZES)} "
                            "or give {width: ..., height: ...} in mm", Where(file, None, "page"))
        page_w, page_h = PAGE_SIZES[page]
    else:
        page_w = _number(raw, "page", "width", file)
        page_h = _number(raw, "page", "height", file)
    columns, rows = (raw.get("grid") or {}).get("columns"), (raw.get("grid") or {}).get("rows")
    for key, value in (("columns", columns), ("rows", rows)):
        if not isinstance(value, int) or isinstance(value, bool) or value < 1:
            raise SpecError(f"expected a whole number of at least 1, got {value!r}",
                            Where(file, None, f"grid.{key}"))
    assert isinstance(columns, int) and isinstance(rows, int)
    geometry = Geometry(
        name=name,
        description=str(raw.get("description", name)),
        page_width=page_w, page_height=page_h, columns=columns, rows=rows,
        label_width=_number(raw, "label", "width", file),
        label_height=_number(raw, "label", "height", file),
        margin_left=_number(raw, "margin", "left", file, strict=False),
        margin_top=_number(raw, "margin", "top", file, strict=False),
        pitch_x=_number(raw, "pitch", "x", file),
        pitch_y=_number(raw, "pitch", "y", file),
        corner_radius=_number(raw, "", "corner_radius", file, strict=False),
        padding=_number(raw, "", "padding", file, strict=False),
    )
    _check_fit(geometry, file)
    return geometry


def _check_fit(g: Geometry, file: str) -> None:
    if g.pitch_x + _SLACK < g.label_width:
        raise SpecError(f"column pitch {g.pitch_x} mm is less than the label width "
                        f"{g.label_width} mm; labels would overlap", Where(file, None, "pitch.x"))
    if g.pitch_y + _SLACK < g.label_height:
        raise SpecError(f"row pitch {g.pitch_y} mm is less than the label height "
                        f"{g.label_height} mm; labels would overlap", Where(file, None, "pitch.y"))
    right = g.margin_left + (g.columns - 1) * g.pitch_x + g.label_width
    bottom = g.margin_top + (g.rows - 1) * g.pitch_y + g.label_height
    if right > g.page_width + _SLACK:
        raise SpecError(f"the last column ends at {right:.2f} mm, past the page width "
                        f"{g.page_width} mm; check margin.left, pitch.x and label.width",
                        Where(file, None, "grid.columns"))
    if bottom > g.page_height + _SLACK:
        raise SpecError(f"the last row ends at {bottom:.2f} mm, past the page height "
                        f"{g.page_height} mm; check margin.top, pitch.y and label.height",
                        Where(file, None, "grid.rows"))
    if 2 * g.corner_radius > min(g.label_width, g.label_height):
        raise SpecError(f"corner radius {g.corner_radius} mm is more than half the label",
                        Where(file, None, "corner_radius"))
    if 2 * g.padding >= min(g.label_width, g.label_height):
        raise SpecError(f"padding {g.padding} mm leaves no room inside the label",
                        Where(file, None, "padding"))
