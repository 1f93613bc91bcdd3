"""The typefaces of every printed document: the bundled DejaVu family, a study's own font
files, and which characters they can draw.

Every PDF embeds (a subset of) TrueType fonts, so that a laboratory's name and address print
in its own script. The DejaVu Sans family bundled here covers Latin with the diacritics of
every European language, Greek and Cyrillic; the licence is in ``LICENSE`` beside the files.
A study whose names need a script DejaVu lacks (Chinese, Japanese, ...) names its own files
under ``study.fonts``::

    study:
      fonts: {regular: fonts/Own-Regular.ttf, bold: fonts/Own-Bold.ttf}

Paths are relative to the study folder; ``bold`` and ``italic`` default to ``regular``
(reportlab draws without shaping, left to right: scripts that need shaping print wrongly).
Codes, tokens and fingerprints are always set in the bundled DejaVu Sans Mono: they are
ASCII. A file must have TrueType outlines (reportlab embeds no PostScript/CFF outlines) and
allow embedding. Characters the fonts lack would print as empty boxes: ``overview`` warns of
them at ``check``.
"""

from __future__ import annotations

import struct
from dataclasses import dataclass
from functools import lru_cache
from pathlib import Path
from typing import TYPE_CHECKING

from planner.errors import SpecError, Where

if TYPE_CHECKING:
    from planner.spec import Fonts, Study

__all__ = ["BUNDLED", "ROLES", "FontSet", "characters", "for_study", "problems"]

_HERE = Path(__file__).resolve().parent

ROLES = ("regular", "bold", "italic")
"""The faces a study may name under ``study.fonts``."""


@dataclass(frozen=True, slots=True)
class FontSet:
    """The TrueType files documents are set in, one per face."""

    regular: Path
    bold: Path
    italic: Path
    mono: Path
    mono_bold: Path


BUNDLED = FontSet(regular=_HERE / "DejaVuSans.ttf", bold=_HERE / "DejaVuSans-Bold.ttf",
                  italic=_HERE / "DejaVuSans-Oblique.ttf", mono=_HERE / "DejaVuSansMono.ttf",
                  mono_bold=_HERE / "DejaVuSansMono-Bold.ttf")
"""DejaVu Sans, Sans Bold, Sans Oblique, Sans Mono and Sans Mono Bold, shipped with ringplan."""


def _named(fonts: Fonts) -> dict[str, str]:
    """Return the file each face of ``ROLES`` is set in, as written (bold, italic: regular)."""
    return {"regular": fonts.regular, "bold": fonts.bold or fonts.regular,
            "italic": fonts.italic or fonts.regular}


def problems(fonts: Fonts, folder: Path) -> list[tuple[str, str]]:
    """Return (face, message) for every file of ``fonts`` that is missing or cannot be
    embedded, relative to the study ``folder``; [] when all can be used."""
    out = []
    for role in ROLES:
        written = getattr(fonts, role)
        if written is None:
            continue
        problem = _problem(Path(folder) / written)
        if problem:
            out.append((role, f"{written!r} {problem}"))
    return out


def _problem(path: Path) -> str | None:
    """Return why ``path`` cannot be embedded, or None when it can."""
    from reportlab.pdfbase.ttfonts import TTFError, TTFontFile

    if not path.is_file():
        return "is not a file; give the path of a .ttf file, relative to the study folder"
    try:
        TTFontFile(str(path), validate=0)
    except TTFError as exc:
        text = str(exc)
        if "postscript outlines" in text:
            return ("has PostScript (CFF) outlines, which cannot be embedded; give a font with "
                    "TrueType outlines (.ttf)")
        if "subsetting/embedding" in text:
            return "forbids embedding in its licence bits; choose another font"
        return "is not a TrueType font file; give a .ttf file"
    except (OSError, ValueError, IndexError, KeyError, struct.error):
        # a damaged or foreign file can fail anywhere in the parser
        return "is not a TrueType font file; give a .ttf file"
    return None


def for_study(study: Study, study_dir: Path) -> FontSet:
    """Return the fonts of ``study`` (its ``study.fonts`` files, else the bundled family);
    raise SpecError when a named file is missing or cannot be embedded."""
    chosen = study.study.fonts
    if chosen is None:
        return BUNDLED
    found = problems(chosen, study_dir)
    if found:
        role, message = found[0]
        raise SpecError(message, Where(str(Path(study_dir) / "study.yaml"), None,
                                       f"study.fonts.{role}"))
    named = {role: (Path(study_dir) / written).resolve()
             for role, written in _named(chosen).items()}
    return FontSet(regular=named["regular"], bold=named["bold"], italic=named["italic"],
                   mono=BUNDLED.mono, mono_bold=BUNDLED.mono_bold)


def characters(path: Path) -> frozenset[int]:
    """Return the code points the TrueType font at ``path`` has a glyph for (its cmap)."""
    stat = path.stat()
    return _characters(str(path), stat.st_mtime_ns, stat.st_size)


@lru_cache(maxsize=16)
def _characters(path: str, mtime_ns: int, size: int) -> frozenset[int]:
    # the file's time and size are part of the key, so that an edited font is read again
    from reportlab.pdfbase.ttfonts import TTFontFile

    return frozenset(TTFontFile(path, validate=0).charToGlyph)
