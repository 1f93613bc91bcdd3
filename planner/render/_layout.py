"""Page sizes, fonts, colours, margins and the running header and footer of every document.

Our look: black text on white, one accent colour for titles and rules, a
grey for secondary text, wide margins and air between sections. Codes are
set in a monospaced bold face so that 0/O and 1/I are told apart at a glance
(the code alphabet has no O, I or L, but readers do not know that). Every page
of a document names the study and the round in the header and ends with
"page N of M"; host documents carry a confidentiality line in the header.

Text is set in TrueType fonts embedded in every PDF (reportlab keeps only the glyphs a
document uses): the bundled DejaVu Sans family, which draws Latin with every European
diacritic, Greek and Cyrillic, or a study's own files (``planner.fonts``). ``FONT``,
``BOLD``, ``MONO`` and ``MONO_REGULAR`` are the names reportlab knows them by;
``use_fonts`` chooses the files, ``fonts_ready`` registers the bundled ones when nothing
was chosen. Registration happens once per process and never at import, so that
``ringplan --help`` stays free of reportlab.
"""

from __future__ import annotations

from collections.abc import Callable, Iterator, Sequence
from contextlib import contextmanager
from dataclasses import dataclass
from pathlib import Path
from typing import TYPE_CHECKING, Any

if TYPE_CHECKING:
    from planner.fonts import FontSet

__all__ = [
    "ACCENT",
    "BOLD",
    "FONT",
    "INK",
    "hazard_cautions",
    "sign_lines",
    "MONO",
    "MONO_REGULAR",
    "MUTED",
    "RULE",
    "Running",
    "build",
    "check_box",
    "chosen_fonts",
    "content_width",
    "escape",
    "fit_text",
    "fonts_ready",
    "grouped_fingerprint",
    "page_size",
    "deflate",
    "plain_streams",
    "FLATE_LEVEL",
    "rounded_box",
    "styles",
    "table",
    "table_style",
    "use_fonts",
    "wrap_words",
    "write_atomic",
]

ACCENT = "#1d5c63"
"""The one accent colour (a deep blue-green) for titles, rules and marks."""
INK = "#1a1a1a"
MUTED = "#6b6b6b"
RULE = "#c9cfd1"
# The names of the fonts text is set in; ``use_fonts`` points them at a study's own files.
FONT = "DejaVuSans"
BOLD = "DejaVuSans-Bold"
MONO = "DejaVuSansMono-Bold"
MONO_REGULAR = "DejaVuSansMono"

_chosen: FontSet | None = None
_registered: dict[FontSet, tuple[str, str, str, str]] = {}

_MM = 72.0 / 25.4
_MARGIN_SIDE = 20 * _MM
_MARGIN_TOP = 27 * _MM
_MARGIN_BOTTOM = 20 * _MM


def page_size(paper: str) -> tuple[float, float]:
    """Return (width, height) in points of "A4" (ISO 216, 210 x 297 mm) or "letter" (8.5 x 11 in)."""
    if paper == "A4":
        return 210 * _MM, 297 * _MM
    if paper == "letter":
        return 8.5 * 72, 11 * 72
    raise ValueError(f"unknown paper {paper!r}")


def use_fonts(chosen: FontSet) -> None:
    """Set the documents drawn from now on in the files of ``chosen``: register them with
    reportlab (once per process) and point FONT, BOLD, MONO and MONO_REGULAR at them.

    Raises SpecError for a study's file that takes the name of another font in use.
    """
    global FONT, BOLD, MONO, MONO_REGULAR, _chosen
    names = _registered.get(chosen)
    if names is None:
        names = _registered[chosen] = _register(chosen)
    FONT, BOLD, MONO, MONO_REGULAR = names
    _chosen = chosen


def chosen_fonts() -> FontSet | None:
    """Return the fonts ``use_fonts`` chose in this process, None if none were chosen yet."""
    return _chosen


def fonts_ready() -> None:
    """Register the bundled fonts unless fonts were chosen already; cheap after the first."""
    if _chosen is None:
        from planner import fonts

        use_fonts(fonts.BUNDLED)


def _register(chosen: FontSet) -> tuple[str, str, str, str]:
    """Register the files of ``chosen`` and their bold and italic pairings; return the names
    of the regular, bold, mono bold and mono faces."""
    import hashlib

    from reportlab.pdfbase import pdfmetrics
    from reportlab.pdfbase.ttfonts import TTFont

    from planner import fonts
    from planner.errors import SpecError, Where

    bundled = {fonts.BUNDLED.regular, fonts.BUNDLED.bold, fonts.BUNDLED.italic,
               fonts.BUNDLED.mono, fonts.BUNDLED.mono_bold}
    names = []
    for role, path in (("regular", chosen.regular), ("bold", chosen.bold),
                       ("italic", chosen.italic), ("mono", chosen.mono),
                       ("mono_bold", chosen.mono_bold)):
        # A study's file is named by its content, so that the same file gets the same name
        # (and the same PDF bytes) in every process, worker processes included.
        name = path.stem if path in bundled else (
            f"study-{role}-{hashlib.sha256(path.read_bytes()).hexdigest()[:12]}")
        if name not in pdfmetrics.getRegisteredFontNames():
            # Only the glyphs a document uses are embedded (asciiReadable would add all of
            # ASCII: some 8 KB more per face). No shaping: the scripts we print need none,
            # and the bytes stay the same whether or not a shaping library is installed.
            font = TTFont(name, str(path), asciiReadable=False, shapable=False)
            pdfmetrics.registerFont(font)
            # reportlab takes a second file that has the PostScript name of a font already
            # registered for that font, and would draw with the other file's glyphs.
            if pdfmetrics.getFont(name).face._ttf_data != font.face._ttf_data:
                raise SpecError(f"the font {path.name!r} calls itself "
                                f"{font.face.name.decode('latin-1')!r} like another font in "
                                "use, with other glyphs; choose a font of another name",
                                Where(field=f"study.fonts.{role}"))
        names.append(name)
    regular, bold, italic, mono, mono_bold = names
    # <b> and <i> in paragraph mark-up find the bold and italic faces through the family.
    pdfmetrics.registerFontFamily(regular, normal=regular, bold=bold, italic=italic,
                                  boldItalic=bold)
    pdfmetrics.registerFontFamily(mono, normal=mono, bold=mono_bold, italic=mono,
                                  boldItalic=mono_bold)
    return regular, bold, mono_bold, mono


def styles() -> dict[str, Any]:
    """Return the paragraph styles of our documents by name."""
    from reportlab.lib.colors import HexColor
    from reportlab.lib.styles import ParagraphStyle

    fonts_ready()
    # DejaVu Sans has a large x-height (0.547 em; Helvetica, the face these sizes were first
    # chosen for, 0.523): 9 pt of it reads as large as 9.5 pt of Helvetica did.
    body = ParagraphStyle("body", fontName=FONT, bulletFontName=FONT, fontSize=9,
                          leading=12.8, textColor=HexColor(INK))
    return {
        "body": body,
        "title": ParagraphStyle("title", parent=body, fontName=BOLD, fontSize=18, leading=22,
                                textColor=HexColor(ACCENT), spaceAfter=3 * _MM),
        "lead": ParagraphStyle("lead", parent=body, fontSize=10, leading=14.2,
                               spaceAfter=5 * _MM),
        "h2": ParagraphStyle("h2", parent=body, fontName=BOLD, fontSize=11, leading=14.2,
                             textColor=HexColor(ACCENT), spaceBefore=7 * _MM,
                             spaceAfter=2.5 * _MM),
        "small": ParagraphStyle("small", parent=body, fontSize=7.6, leading=10,
                                textColor=HexColor(MUTED)),
        "label": ParagraphStyle("label", parent=body, fontSize=7.1, leading=9,
                                textColor=HexColor(MUTED)),
        "cell": ParagraphStyle("cell", parent=body, fontSize=8.5, leading=11),
        "mono": ParagraphStyle("mono", parent=body, fontName=MONO, fontSize=10, leading=12.4),
        "bullet": ParagraphStyle("bullet", parent=body, leftIndent=5 * _MM, bulletIndent=0,
                                 spaceAfter=1.2 * _MM),
    }


@dataclass(frozen=True, slots=True)
class Running:
    """What the header and footer of every page say."""

    study_id: str
    study_title: str
    round_id: str
    document: str
    confidential: str = ""
    # The reader's words (planner.language): ``{round}``; ``{number}`` and ``{total}``.
    round_text: str = "round {round}"
    page_text: str = "page {number} of {total}"


def write_atomic(path: Path, write: Callable[[Path], None], *, staged: bool = False) -> Path:
    """Call ``write`` with a temporary name beside ``path``, then rename it into place; return ``path``.

    Through ``planner.files``: never through a link, owner-only where the round's layout
    says so (host documents, the report and letters); PlannerError when the disk refuses.
    ``staged`` stops short of flushing and renaming and returns the temporary file, for
    ``files.settle`` to put in place together with others (``files.stage``).
    """
    from planner import files

    root, private = files.placement(path)
    if staged:
        return files.stage(path, write, root=root, private=private)
    return files.write_atomic(path, write, root=root, private=private)


def _numbered_canvas(running: Running) -> type:
    """Return a canvas class that holds pages back until the end, then stamps "page N of M"."""
    from reportlab.lib.colors import HexColor
    from reportlab.pdfgen.canvas import Canvas

    class _Numbered(Canvas):  # type: ignore[misc]
        def __init__(self, *args: Any, **kwargs: Any) -> None:
            kwargs.setdefault("invariant", 1)
            super().__init__(*args, **kwargs)
            self._held: list[dict[str, Any]] = []

        def showPage(self) -> None:
            self._held.append(dict(self.__dict__))
            self._startPage()

        def save(self) -> None:
            total = len(self._held)
            for number, state in enumerate(self._held, start=1):
                self.__dict__.update(state)
                self._stamp(number, total)
                Canvas.showPage(self)
            Canvas.save(self)

        def _stamp(self, number: int, total: int) -> None:
            width, height = self._pagesize
            # Line up with the frame of the text, which keeps 6 pt of padding.
            left, right = _MARGIN_SIDE + 6, width - _MARGIN_SIDE - 6
            top = height - 14 * _MM
            self.saveState()
            self.setFillColor(HexColor(INK))
            self.setFont(BOLD, 8.5)
            self.drawString(left, top, running.study_id)
            gap = self.stringWidth(running.study_id + "  ", BOLD, 8.5)
            self.setFont(FONT, 8.5)
            self.setFillColor(HexColor(MUTED))
            self.drawString(left + gap, top, running.round_text.format(round=running.round_id))
            self.drawRightString(right, top, running.document)
            if running.confidential:
                self.setFillColor(HexColor(ACCENT))
                self.setFont(BOLD, 8)
                self.drawString(left, top - 4.2 * _MM, running.confidential)
            self.setStrokeColor(HexColor(ACCENT))
            self.setLineWidth(0.6)
            rule = top - (6.5 if running.confidential else 2.6) * _MM
            self.line(left, rule, right, rule)
            bottom = 11 * _MM
            self.setStrokeColor(HexColor(RULE))
            self.setLineWidth(0.4)
            self.line(left, bottom + 4 * _MM, right, bottom + 4 * _MM)
            self.setFillColor(HexColor(MUTED))
            self.setFont(FONT, 7.5)
            self.drawString(left, bottom, fit_text(
                running.study_title, FONT, 7.5, right - left - 30 * _MM))
            self.drawRightString(right, bottom,
                                 running.page_text.format(number=number, total=total))
            self.restoreState()

    return _Numbered


def build(path: Path, story: Sequence[Any], *, paper: str, running: Running,
          title: str, staged: bool = False) -> Path:
    """Lay out ``story`` on pages of ``paper`` with our header and footer; write ``path``
    atomically (``staged``: return the temporary file, as ``write_atomic`` says)."""
    from reportlab.platypus import SimpleDocTemplate

    fonts_ready()

    def write(temp: Path) -> None:
        doc = SimpleDocTemplate(
            str(temp), pagesize=page_size(paper), leftMargin=_MARGIN_SIDE,
            rightMargin=_MARGIN_SIDE, topMargin=_MARGIN_TOP + (4 * _MM if running.confidential
                                                               else 0),
            bottomMargin=_MARGIN_BOTTOM, title=title, author="ringplan",
            # reportlab's default first font is Helvetica, a font of no document of ours
            initialFontName=FONT,
            subject=f"{running.study_id} round {running.round_id}", creator="ringplan")
        with plain_streams():
            doc.build(list(story), canvasmaker=_numbered_canvas(running))

    return write_atomic(path, write, staged=staged)


FLATE_LEVEL = 1
"""The zlib level of our page streams. Measured on a page of table operators (40 kB):
level 1 deflates it in 0.09 ms, reportlab's default (6) in 0.35 ms, for 17 % more bytes;
at 500 letters some 4 % of their time. Embedded fonts are deflated at the same level."""


def deflate(data: bytes) -> bytes:
    """Return ``data`` deflated as our PDFs' streams are (``FLATE_LEVEL``): for a stream
    made once and given to many documents, as reportlab would have deflated it."""
    import zlib

    return zlib.compress(data, FLATE_LEVEL)


@contextmanager
def plain_streams() -> Iterator[None]:
    """Write the streams of the PDFs made inside (pages, and the fonts embedded in them) as
    plain Flate at ``FLATE_LEVEL``.

    reportlab's default wraps them in ASCII85 as well, which makes every page a quarter
    bigger and its pure-Python encoder slower; every PDF reader takes binary streams.
    Both settings are reportlab's module-wide ones and are put back on leaving.
    """
    from reportlab import rl_config
    from reportlab.pdfbase import pdfdoc

    flate = pdfdoc.PDFZCompress

    def encode(text: Any) -> bytes:
        return deflate(text.encode("utf8") if isinstance(text, str) else text)

    was = rl_config.useA85
    had = vars(flate).get("encode")
    rl_config.useA85, flate.encode = 0, encode
    try:
        yield
    finally:
        rl_config.useA85 = was
        if had is None:
            del flate.encode
        else:
            flate.encode = had


def fit_text(text: str, font: str, size: float, width: float) -> str:
    """Return ``text`` cut at a word with an ellipsis so that it is at most ``width`` points wide."""
    from reportlab.pdfbase.pdfmetrics import stringWidth

    fonts_ready()
    if stringWidth(text, font, size) <= width:
        return text
    words = text.split()
    while words and stringWidth(" ".join(words) + " …", font, size) > width:
        words.pop()
    return " ".join(words) + " …"


def wrap_words(text: str, font: str, size: float, width: float) -> list[str] | None:
    """Return ``text`` broken at spaces (or after hyphens) into lines at most ``width`` wide,
    or None if a single word is wider than that."""
    from reportlab.pdfbase.pdfmetrics import stringWidth

    fonts_ready()
    words = text.replace("-", "- ").split() if "-" in text else text.split()
    lines: list[str] = []
    current = ""
    for word in words:
        trial = word if not current else (current + word if current.endswith("-")
                                          else current + " " + word)
        if stringWidth(trial, font, size) <= width:
            current = trial
            continue
        if stringWidth(word, font, size) > width:
            return None
        lines.append(current)
        current = word
    if current:
        lines.append(current)
    return lines


def rounded_box(canvas: Any, x: float, y: float, width: float, height: float,
                radius: float) -> None:
    """Stroke a rectangle with rounded corners (square when ``radius`` is 0)."""
    if radius > 0:
        canvas.roundRect(x, y, width, height, radius, stroke=1, fill=0)
    else:
        canvas.rect(x, y, width, height, stroke=1, fill=0)


def check_box(side: float) -> Any:
    """Return a flowable empty square, ``side`` points across, to tick by hand."""
    from reportlab.lib.colors import HexColor
    from reportlab.platypus import Flowable

    class _Box(Flowable):  # type: ignore[misc]
        def wrap(self, avail_width: float, avail_height: float) -> tuple[float, float]:
            return side, side

        def draw(self) -> None:
            self.canv.setStrokeColor(HexColor(INK))
            self.canv.setLineWidth(0.7)
            self.canv.rect(0, 0, side, side, stroke=1, fill=0)

    return _Box()


def table_style(*, header: bool = True, extra: Sequence[tuple[Any, ...]] = ()) -> Any:
    """Return our table look: thin horizontal rules, a tinted bold header row, no verticals."""
    from reportlab.lib.colors import HexColor
    from reportlab.platypus import TableStyle

    fonts_ready()
    commands: list[tuple[Any, ...]] = [
        ("FONT", (0, 0), (-1, -1), FONT, 9),
        ("TEXTCOLOR", (0, 0), (-1, -1), HexColor(INK)),
        ("VALIGN", (0, 0), (-1, -1), "MIDDLE"),
        ("LINEBELOW", (0, 0), (-1, -1), 0.4, HexColor(RULE)),
        ("TOPPADDING", (0, 0), (-1, -1), 3.5),
        ("BOTTOMPADDING", (0, 0), (-1, -1), 3.5),
        ("LEFTPADDING", (0, 0), (-1, -1), 4),
        ("RIGHTPADDING", (0, 0), (-1, -1), 4),
    ]
    if header:
        commands += [
            ("FONT", (0, 0), (-1, 0), BOLD, 8),
            ("TEXTCOLOR", (0, 0), (-1, 0), HexColor(ACCENT)),
            ("LINEBELOW", (0, 0), (-1, 0), 0.8, HexColor(ACCENT)),
            ("BACKGROUND", (0, 0), (-1, 0), HexColor("#eef3f3")),
        ]
    commands += list(extra)
    return TableStyle(commands)


def grouped_fingerprint(fingerprint: str) -> str:
    """Return the 64 hex digits in groups of 8, easier to compare by eye."""
    return " ".join(fingerprint[i:i + 8] for i in range(0, len(fingerprint), 8))


def escape(text: str) -> str:
    """Return ``text`` safe inside a reportlab Paragraph (its mark-up is XML-like)."""
    return text.replace("&", "&amp;").replace("<", "&lt;").replace(">", "&gt;")


def content_width(paper: str) -> float:
    """Return the width in points that text and tables may fill between the margins."""
    # SimpleDocTemplate's frame keeps 6 pt of padding on each side.
    return page_size(paper)[0] - 2 * _MARGIN_SIDE - 12


def table(rows: Sequence[Sequence[Any]], widths: Sequence[float], style: Any, **kwargs: Any
          ) -> Any:
    """Return a left-aligned platypus Table with our style."""
    from reportlab.platypus import Table

    made = Table([list(r) for r in rows], colWidths=list(widths), hAlign="LEFT", **kwargs)
    made.setStyle(style)
    return made


def sign_lines(width: float, labels: Sequence[str], *, row_height: float = 10 * _MM,
               columns: Sequence[float] = (0.30, 0.30, 0.15, 0.25),
               heads: Sequence[str] = ("name", "date", "signature")) -> Any:
    """Return a table of signature lines: one row per label, with name, date and signature
    (``heads``, in the reader's language)."""
    from reportlab.lib.colors import HexColor
    from reportlab.platypus import Paragraph

    st = styles()
    rows = [[Paragraph(label, st["label"]), "", "", ""] for label in labels]
    return table(
        [[Paragraph("", st["label"]), *(Paragraph(escape(h), st["label"]) for h in heads)],
         *rows],
        [c * width for c in columns],
        table_style(header=False, extra=[
            ("LINEBELOW", (1, 1), (-1, -1), 0.6, HexColor(INK)),
            ("LINEBELOW", (0, 0), (-1, 0), 0, HexColor("#ffffff")),
            ("LINEBELOW", (0, 1), (0, -1), 0, HexColor("#ffffff")),
            ("VALIGN", (0, 1), (-1, -1), "BOTTOM"),
            ("LINEAFTER", (1, 1), (2, -1), 6, HexColor("#ffffff")),
        ]), rowHeights=[5 * _MM] + [row_height] * len(labels))


def hazard_cautions(hazards: dict[str, str], *, none_text: str,
                    heading: str = "Hazard cautions") -> list[Any]:
    """Return the ``heading`` and one bullet per hazard word, or ``none_text``."""
    from reportlab.platypus import Paragraph

    st = styles()
    out: list[Any] = [Paragraph(escape(heading), st["h2"])]
    if hazards:
        out += [Paragraph(f"<b>{escape(word)}</b>: {escape(note)}", st["bullet"], bulletText="•")
                for word, note in sorted(hazards.items())]
    else:
        out.append(Paragraph(none_text, st["body"]))
    return out
