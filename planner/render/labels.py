"""Unit labels on a label sheet or roll, and the alignment page for a printer.

A label carries the code large in a monospaced bold face (``K7QM-4X9PA``),
a QR code of the same text, and as much of the following as fits, listed
from the field kept longest to the field dropped first:

1. the hazard words of the round (safety before everything but the code),
2. the trial and run position, or "spare", "retained", "homogeneity",
3. the destination laboratory (its name, else its id; none on a spare),
4. the use-by date,
5. the study and the round,
6. the storage text of the round.

The code and the QR always stay. A field that is too wide is first set in a
smaller size (down to 5 pt), then wrapped; if the fields still do not fit the
height of the label, the lowest of the list is dropped, then the next. Nothing
is clipped and nothing is drawn past the label's padding.

The material is never printed on a unit label, and apart from the code and the
run position every label of a round says the same (``planner.parcel``): one
use-by date (the preparation date plus the *shortest* stability of the round's
materials), one storage text and the hazard words of every material. A date, a
storage text or a hazard word per material would tell a laboratory which of its
units hold the same material; so every unit is stored and handled as the most
demanding one is.

Host labels are sorted material by material, each material led by a
separator label (no QR) that names the material and how many labels follow;
within a material the test units by destination laboratory (in study order)
and trial, then the units the host keeps: spares, retained, homogeneity.

Spares stay with the host until one is sent to replace a damaged unit
(``planner.spares``), so a spare's label names no destination and a
laboratory's own labels (``lab_labels``) have none. A retained unit sent as a
replacement is printed as a spare (``issued``), so that nothing on the unit a
laboratory receives says where it came from.

A label's words ("trial 1 · run 3", "for ...", "use by ...") are in the language of
the laboratory that tests or keeps the unit (``planner.language``); a spare, which
may go to any laboratory, and a separator, which the host reads, are in the study's.

A circulating set has one label per artefact, printed by the host: the code,
"circulating artefact", the study and round, the storage text and the hazard
words, but no destination and no use-by date, because the same
piece goes to every laboratory. Its separator still tells the host which
artefact the label that follows belongs on.
"""

from __future__ import annotations

from collections.abc import Collection, Iterable, Iterator, Sequence
from dataclasses import dataclass
from datetime import date
from pathlib import Path
from typing import TYPE_CHECKING, Any

from planner import codes, language, parcel
from planner.errors import PlannerError, Where
from planner.render import _layout, _qr
from planner.render._sheets import MM, Geometry

if TYPE_CHECKING:
    from planner.language import Texts
    from planner.spec import Study

__all__ = [
    "CHUNK",
    "MIN_SIZE",
    "Label",
    "Separator",
    "host_labels",
    "lab_labels",
    "layout",
    "pick",
    "render",
    "render_calibration",
    "use_by",
]

MIN_SIZE = 5.0
"""Smallest text size on a label in points (about 1.8 mm capitals; common practice)."""

CHUNK = 240
"""QR symbols per task handed to a worker process."""

_LEADING = 1.16
# Smallest share of the nominal size before wrapping. DejaVu Sans sets 11-15 % wider than
# Helvetica, which this layout was first tuned for, with a larger x-height (0.547 em against
# 0.523): at 0.73 its lower case is 95 % as tall as Helvetica's at the former 0.8, and a
# laboratory's name fits the width it used to.
_SHRINK = 0.73
_CODE_MIN = 7.0  # below this a one-line code is set in two groups instead
_QR_SHARE = 0.42  # of the label width, at most, for the symbol with its quiet zone


@dataclass(frozen=True, slots=True)
class Label:
    """What one unit label says; every text is already in its printed form."""

    code: str            # compact
    hazard: str = ""
    trial: str = ""
    lab: tuple[str, ...] = ()      # alternatives, longest first
    use_by: str = ""
    study: str = ""
    storage: str = ""


@dataclass(frozen=True, slots=True)
class Separator:
    """The host's label that heads the labels of one material batch."""

    material: str
    description: str
    count: int
    study: str


def use_by(study: Study, manifest: dict[str, Any]) -> date | None:
    """Return the preparation date plus the shortest stability of the study's materials."""
    prepared = manifest.get("dates", {}).get("prepare_on")
    return parcel.use_by(study, date.fromisoformat(prepared) if prepared else None)


def _kind_text(unit: dict[str, Any], t: Texts) -> str:
    kind = unit["kind"]
    if kind == "test":
        return t("label.trial_run", trial=unit["trial"], position=unit["position"])
    return t(f"label.{kind}") if kind in ("spare", "retained", "homogeneity",
                                          "artefact") else str(kind)


def _label(study: Study, manifest: dict[str, Any], unit: dict[str, Any],
           expiry: str) -> Label:
    # Nothing of the unit's material: the same hazard and storage text on every label.
    lab = study.lab(unit["lab"])
    host = manifest["host"]
    # In the language of the laboratory that tests (or keeps) the unit; a spare waits with
    # the host for whichever laboratory needs one, and an artefact visits them all, so
    # those speak the study's language.
    shared = unit["kind"] in ("spare", "artefact")
    t = language.texts(language.DEFAULT if shared else language.of(lab))
    study_text = t("label.study", study=study.id, round=manifest["round"])
    if unit["kind"] == "artefact":
        # The same piece visits every laboratory: no destination, no use-by date.
        return Label(code=unit["code"], hazard=parcel.hazard_word(study),
                     trial=_kind_text(unit, t), study=study_text,
                     storage=parcel.storage(study))
    to = ("label.for_host" if lab.id == host and unit["kind"] in ("retained", "homogeneity")
          else "label.for")
    destination = () if shared else (t(to, name=lab.name), t(to, name=lab.id))
    return Label(
        code=unit["code"],
        hazard=parcel.hazard_word(study),
        trial=_kind_text(unit, t),
        lab=destination,
        use_by=t("label.use_by", date=expiry) if expiry else "",
        study=study_text,
        storage=parcel.storage(study),
    )


def _lab_rank(study: Study) -> dict[str, int]:
    return {lab.id: i for i, lab in enumerate(study.laboratories)}


_KIND_RANK = {"test": 0, "spare": 1, "retained": 2, "homogeneity": 3}


def _unit_order(study: Study) -> Any:
    labs = _lab_rank(study)
    return lambda u: (_KIND_RANK.get(u["kind"], 9), labs.get(u["lab"], len(labs)),
                      u["trial"] or 0, u["position"] or 0, u["code"])


def host_labels(study: Study, manifest: dict[str, Any], key: dict[str, Any], *,
                issued: Collection[str] = ()) -> list[Label | Separator]:
    """Return every label of the round for the host's sheet: per material a separator, then
    its test units by laboratory and trial, then its spares, retained and homogeneity units.

    ``issued`` are the codes the host sent as replacements (``intake.issued_spares``): a
    retained unit among them is labelled as a spare."""
    expiry = use_by(study, manifest)
    text = expiry.isoformat() if expiry else ""
    by_material: dict[str, list[dict[str, Any]]] = {}
    for unit in key["units"]:
        by_material.setdefault(unit["material"], []).append(unit)
    out: list[Label | Separator] = []
    order = _unit_order(study)
    for material in study.materials:
        units = sorted(by_material.get(material.id, []), key=order)
        if not units:
            continue
        out.append(Separator(material.id, material.description, len(units),
                             f"{study.id} · round {manifest['round']}"))
        out += [_label(study, manifest, {**u, "kind": "spare"} if u["code"] in issued else u,
                       text) for u in units]
    return out


def lab_labels(study: Study, manifest: dict[str, Any], key: dict[str, Any],
               lab_id: str) -> list[Label | Separator]:
    """Return the labels of the units in one laboratory's parcel (no separators), by trial and
    run position; spares stay with the host (the host's own retained and homogeneity units
    follow its test units)."""
    expiry = use_by(study, manifest)
    text = expiry.isoformat() if expiry else ""
    units = sorted((u for u in key["units"] if u["lab"] == lab_id and u["kind"] != "spare"),
                   key=_unit_order(study))
    return [_label(study, manifest, u, text) for u in units]


def pick(items: Iterable[Label | Separator], chosen: Iterable[str], *,
         round_id: str) -> list[Label | Separator]:
    """Return the labels of the ``chosen`` codes in the order given, without separators; raise
    CodeError for a malformed code and PlannerError for a code not in ``items``."""
    found = {item.code: item for item in items if isinstance(item, Label)}
    out: list[Label | Separator] = []
    for text in chosen:
        code = codes.validate(text, where=Where(field="--codes"))
        if code not in found:
            raise PlannerError(f"{codes.format(code)!r} is not a code of round {round_id!r} "
                               "(or not one of the chosen laboratory's); check the label",
                               Where(field="--codes"))
        out.append(found[code])
    return out


# --- layout of one label --------------------------------------------------------


@dataclass(frozen=True, slots=True)
class _Line:
    text: str
    font: str
    size: float
    boxed: bool = False


@dataclass(frozen=True, slots=True)
class _Frame:
    """Where the parts of a label go, in points relative to the cell's lower-left corner."""

    qr_x: float
    qr_y: float
    qr_side: float
    text_x: float
    text_width: float
    text_bottom: float
    text_top: float


def _frame(g: Geometry) -> _Frame:
    w, h, pad = g.label_width * MM, g.label_height * MM, g.padding * MM
    total = min(h, _QR_SHARE * w)
    # The quiet zone may run into the padding (both are blank), but the symbol
    # itself keeps the padding clear as a margin for feed errors.
    side = min(total * 21 / (21 + 2 * _qr.QUIET), total - 2 * pad)
    return _Frame(qr_x=(total - side) / 2, qr_y=(h - side) / 2, qr_side=side,
                  text_x=total, text_width=w - total - pad,
                  text_bottom=pad, text_top=h - pad)


def _sizes(frame: _Frame) -> tuple[float, float]:
    height = frame.text_top - frame.text_bottom
    code = max(8.0, min(18.0, 0.3 * height))
    body = max(MIN_SIZE, min(8.5, height / 8))
    return code, body


def _fit(text: str, font: str, size: float, width: float, *, boxed: bool = False
         ) -> list[_Line] | None:
    """Return the lines of one field: shrunk to fit, else wrapped; None if it cannot fit."""
    from reportlab.pdfbase.pdfmetrics import stringWidth

    _layout.fonts_ready()
    extra = 2 * 0.35 * size if boxed else 0.0
    natural = stringWidth(text, font, size) + extra
    if natural <= width:
        return [_Line(text, font, size, boxed)]
    shrunk = size * (width - extra) / (natural - extra)
    # Shrink only so far that the line still reads as one of its label; past
    # that a second line is the kinder choice.
    if shrunk >= max(MIN_SIZE, _SHRINK * size):
        shrunk = int(shrunk * 10) / 10  # a tenth of a point below the exact fit
        return [_Line(text, font, shrunk, boxed)]
    for wrap_size in (max(MIN_SIZE, 0.9 * size), MIN_SIZE):
        parts = _layout.wrap_words(text, font, wrap_size, width - extra)
        if parts is not None:
            return [_Line(p, font, wrap_size, boxed) for p in parts]
    return None


# Display order top to bottom; drop order is the reverse of _KEEP.
_SHOWN = ("hazard", "trial", "lab", "use_by", "study", "storage")
_KEEP = ("hazard", "trial", "lab", "use_by", "study", "storage")


def _height(lines: Sequence[_Line]) -> float:
    return sum(line.size * _LEADING + (0.5 * line.size if line.boxed else 0) for line in lines)


def _code_lines(printed: str, size: float, width: float, height: float,
                g: Geometry) -> list[_Line]:
    """Return the code on one line, or in its two groups when one line would be too small."""
    # Widths at 1 pt: a monospaced face gives every code of a round the same width.
    one = min(size, width / _text_width(printed, _layout.MONO, 1.0))
    if one >= _CODE_MIN:
        return [_Line(printed, _layout.MONO, int(one * 10) / 10)]
    first, second = printed.split("-")
    widest = max(_text_width(first + "-", _layout.MONO, 1.0),
                 _text_width(second, _layout.MONO, 1.0))
    two = min(size, width / widest, height / (2 * _LEADING))
    if two < MIN_SIZE:
        raise PlannerError(f"label sheet {g.name!r} is too small for a readable code; "
                           "choose a sheet with larger labels", Where(field="--sheet"))
    two = int(two * 10) / 10
    return [_Line(first + "-", _layout.MONO, two), _Line(second, _layout.MONO, two)]


class _Cache:
    """What the labels of one document share, so that each is worked out once: every field's
    text fitted to the width (``fits``), every arrangement of fields (``arrangements``: which
    alternative of each field, which fields dropped) and the place of every line of one
    (``places``), and the operators that show a text (``shown``, per document).

    An arrangement depends only on the form of the fitted fields (how many lines each
    alternative takes, in which face and size), not on their words, so the labels of a
    round's hundreds of laboratories share a few arrangements; ``hits`` and ``misses``
    count, per table, how often one was found and how often made.
    """

    __slots__ = ("arrangements", "fits", "hits", "misses", "places", "shown")

    def __init__(self) -> None:
        self.fits: dict[tuple[Any, ...], list[_Line] | None] = {}
        self.arrangements: dict[tuple[Any, ...], tuple[dict[str, int], list[str], list[str]]]
        self.arrangements = {}
        self.places: dict[tuple[Any, ...], list[tuple[float, float]]] = {}
        self.shown: dict[tuple[str, str, float], str] = {}
        self.hits: dict[str, int] = {"fits": 0, "arrangements": 0, "places": 0, "shown": 0}
        self.misses: dict[str, int] = dict.fromkeys(self.hits, 0)

    def fit(self, text: str, font: str, size: float, width: float, boxed: bool
            ) -> list[_Line] | None:
        key = (text, font, size, width, boxed)
        if key in self.fits:
            self.hits["fits"] += 1
            return self.fits[key]
        self.misses["fits"] += 1
        found = self.fits[key] = _fit(text, font, size, width, boxed=boxed)
        return found


def _options(texts: dict[str, tuple[str, ...]], body: float, width: float,
             cache: _Cache | None = None) -> tuple[dict[str, list[list[_Line]]], list[str]]:
    """Return every alternative of every field fitted to ``width``, and the fields none of
    whose alternatives fits (one word wider than the label)."""
    options: dict[str, list[list[_Line]]] = {}
    dropped: list[str] = []
    fit = cache.fit if cache is not None else (
        lambda text, font, size, width, boxed: _fit(text, font, size, width, boxed=boxed))
    for name in _KEEP:
        font = _layout.BOLD if name in ("hazard", "trial") else _layout.FONT
        fitted = [lines for text in texts[name] if text
                  for lines in [fit(text, font, body, width, name == "hazard")] if lines]
        if fitted:
            options[name] = fitted
        elif any(texts[name]):
            dropped.append(name)
    return options, dropped


def layout(label: Label, g: Geometry, *, cache: _Cache | None = None
           ) -> tuple[list[_Line], tuple[str, ...]]:
    """Return the text lines of ``label`` on geometry ``g`` and the fields that had to be dropped.

    ``cache`` keeps what labels of one document share (``_Cache``). Raises PlannerError
    when the label is too small for the code at the smallest size.
    """
    frame = _frame(g)
    code_size, body = _sizes(frame)
    width, height = frame.text_width, frame.text_top - frame.text_bottom
    code_lines = _code_lines(codes.format(label.code), code_size, width, height, g)
    texts: dict[str, tuple[str, ...]] = {
        "hazard": (label.hazard,), "trial": (label.trial,), "lab": label.lab,
        "use_by": (label.use_by,), "study": (label.study,), "storage": (label.storage,)}
    options, unfit = _options(texts, body, width, cache)
    # What decides the arrangement: the form of every fitted alternative, not its words.
    form = (tuple((ln.font, ln.size) for ln in code_lines), tuple(
        (name, tuple(tuple((ln.size, ln.boxed) for ln in alt) for alt in options[name]))
        for name in options), tuple(unfit))
    found = cache.arrangements.get(form) if cache is not None else None
    if found is None:
        found = _arrange(options, unfit, code_lines, body, height, g)
        if cache is not None:
            cache.arrangements[form] = found
            cache.misses["arrangements"] += 1
    else:
        assert cache is not None
        cache.hits["arrangements"] += 1
    choice, kept, dropped = found
    lines = code_lines + [ln for name in _SHOWN if name in kept
                          for ln in options[name][choice[name]]]
    return lines, tuple(dropped)


def _arrange(options: dict[str, list[list[_Line]]], unfit: list[str],
             code_lines: list[_Line], body: float, height: float, g: Geometry
             ) -> tuple[dict[str, int], list[str], list[str]]:
    """Return which alternative of each field is shown, the fields kept and the fields dropped
    (``unfit`` first), dropping from the end of ``_KEEP`` until the label's height holds them."""
    choice = {name: 0 for name in options}
    kept = [name for name in _KEEP if name in options]
    dropped = list(unfit)
    while True:
        lines = [ln for name in _SHOWN if name in kept for ln in options[name][choice[name]]]
        gap = 0.25 * body if lines else 0.0
        if _height(code_lines + lines) + gap <= height:
            return choice, kept, dropped
        if not kept:
            raise PlannerError(f"label sheet {g.name!r} is too small for a readable code; "
                               "choose a sheet with larger labels", Where(field="--sheet"))
        last = kept[-1]
        # A shorter alternative of the field about to go (the lab's id for its name) comes first.
        if choice[last] + 1 < len(options[last]):
            choice[last] += 1
        else:
            dropped.append(kept.pop())


def _descent(font: str) -> float:
    """Return how far below the baseline ``font`` reaches, in ems (at least 0.22)."""
    from reportlab.pdfbase.pdfmetrics import getDescent

    _layout.fonts_ready()
    # 0.22: the room this layout always left, for fonts that claim less than they draw
    return max(0.22, -float(getDescent(font, 1.0)))


def _text_width(text: str, font: str, size: float) -> float:
    from reportlab.pdfbase.pdfmetrics import stringWidth

    _layout.fonts_ready()
    return float(stringWidth(text, font, size))


# --- drawing ------------------------------------------------------------------------


def _placed(lines: Sequence[_Line], x: float, top: float, bottom: float, code_count: int
            ) -> list[tuple[_Line, float, float, tuple[float, float, float, float] | None]]:
    """Return each line with its x, its baseline and the box around it (if boxed)."""
    gap = 0.25 * lines[code_count].size if len(lines) > code_count else 0.0
    total = _height(lines) + gap
    # Centre the block in the text area, so short labels do not hang from the top.
    y = top - ((top - bottom) - total) / 2
    out: list[tuple[_Line, float, float, tuple[float, float, float, float] | None]] = []
    for i, line in enumerate(lines):
        if i == code_count:
            y -= gap
        if line.boxed:
            y -= 0.25 * line.size
        y -= line.size * _LEADING
        # The line's glyphs reach down to the font's descent below the baseline.
        baseline = y + _descent(line.font) * line.size
        box = None
        if line.boxed:
            width = _text_width(line.text, line.font, line.size) + 0.7 * line.size
            box = (x, baseline - 0.3 * line.size, width, line.size * 1.12)
            y -= 0.25 * line.size
        out.append((line, x + (0.35 * line.size if line.boxed else 0.0), baseline, box))
    return out


def _draw_lines(canvas: Any, lines: Sequence[_Line], x: float, top: float, bottom: float,
                code_count: int) -> None:
    for line, text_x, baseline, box in _placed(lines, x, top, bottom, code_count):
        canvas.setFont(line.font, line.size)
        canvas.drawString(text_x, baseline, line.text)
        if box is not None:
            canvas.setLineWidth(0.6)
            canvas.rect(*box, stroke=1, fill=0)


def _pdf_string(data: bytes) -> str:
    """Return the character codes ``data`` as a PDF literal string; control bytes as octal
    escapes."""
    out = []
    for byte in data:
        if byte in (0x28, 0x29, 0x5C):
            out.append("\\" + chr(byte))
        elif 32 <= byte < 127:
            out.append(chr(byte))
        else:
            out.append(f"\\{byte:03o}")
    return "(" + "".join(out) + ")"


def _shown(text: str, font: str, size: float, doc: Any) -> str:
    """Return the operators that show ``text`` in ``font``: reportlab numbers the glyphs of
    a TrueType font in subsets of 256 per document, each a font resource of its own."""
    from reportlab.pdfbase.pdfmetrics import getFont

    face = getFont(font)
    return " ".join(f"{face.getSubsetInternalName(subset, doc)} {size:.2f} Tf "
                    f"{_pdf_string(data)} Tj" for subset, data in face.splitString(text, doc))


def _text_ops(lines: Sequence[_Line], frame: _Frame, code_count: int, doc: Any, ink: str,
              cache: _Cache) -> str:
    """Return the operators of a label's text relative to its cell.

    The places of the lines are worked out once per arrangement of sizes, and the operators
    of a text once per document (the code's, new on every label, after the other lines', so
    that glyphs are numbered in the order they always were).
    """
    form = (code_count, *((ln.font, ln.size, ln.boxed) for ln in lines))
    places = cache.places.get(form)
    if places is None:
        cache.misses["places"] += 1
        places = cache.places[form] = [
            (x, baseline) for _, x, baseline, _ in
            _placed(lines, frame.text_x, frame.text_top, frame.text_bottom, code_count)]
    else:
        cache.hits["places"] += 1
    shown: list[str] = [""] * len(lines)
    for i in (*range(code_count, len(lines)), *range(code_count)):
        line = lines[i]
        key = (line.text, line.font, line.size)
        if i >= code_count and key in cache.shown:
            cache.hits["shown"] += 1
            shown[i] = cache.shown[key]
            continue
        shown[i] = _shown(line.text, line.font, line.size, doc)
        if i >= code_count:  # a code is shown once; keeping it would only fill memory
            cache.misses["shown"] += 1
            cache.shown[key] = shown[i]
    parts = [f"{ink} rg {ink} RG BT"]
    boxes = []
    for line, (x, baseline), ops in zip(lines, places, shown):
        parts.append(f"1 0 0 1 {x:.2f} {baseline:.2f} Tm {ops}")
        if line.boxed:
            width = _text_width(line.text, line.font, line.size) + 0.7 * line.size
            box = (frame.text_x, baseline - 0.3 * line.size, width, line.size * 1.12)
            boxes.append("0.6 w {:.2f} {:.2f} {:.2f} {:.2f} re S".format(*box))
    parts.append("ET")
    return " ".join(parts + boxes)


def _draw_separator(canvas: Any, sep: Separator, cell: tuple[float, float, float, float],
                    g: Geometry) -> None:
    from reportlab.lib.colors import HexColor

    x, y, w, h = cell
    pad = g.padding * MM
    bar = max(1.2 * MM, 0.06 * w)
    canvas.setFillColor(HexColor(_layout.ACCENT))
    canvas.rect(x + pad, y + pad, bar, h - 2 * pad, stroke=0, fill=1)
    canvas.setFillColor(HexColor(_layout.INK))
    inner_x = x + pad + bar + pad
    width = w - (inner_x - x) - pad
    _, body = _sizes(_frame(g))
    head = _fit(f"next: {sep.material}", _layout.BOLD, body * 1.4, width) or []
    lines = head + (_fit(f"{sep.count} label{'s' if sep.count != 1 else ''} follow"
                                 f"{'s' if sep.count == 1 else ''}", _layout.BOLD, body, width) or [])
    for extra in (sep.description, sep.study):
        more = _fit(extra, _layout.FONT, body, width)
        if more and _height(lines + more) <= h - 2 * pad:
            lines += more
    while lines and _height(lines) > h - 2 * pad:
        lines.pop()
    _draw_lines(canvas, lines, inner_x, y + h - pad, y + pad, len(lines))


def _symbols(items: Sequence[Label | Separator], workers: int) -> Iterator[str]:
    """Yield the QR operators of every Label in order, computed in worker processes if asked
    (those ``_qr.prepare`` made already are taken as they are)."""
    texts = [codes.format(item.code) for item in items if isinstance(item, Label)]
    yield from _qr.stream(texts, workers=workers, chunk=CHUNK)


def render(path: Path, items: Sequence[Label | Separator], geometry: Geometry, *,
           title: str, start_at: int = 1, offset_mm: tuple[float, float] = (0.0, 0.0),
           workers: int = 1) -> Path:
    """Draw ``items`` cell by cell on ``geometry``, beginning at cell ``start_at`` of the first
    page, and write the PDF to ``path`` atomically; return ``path``.

    ``workers`` > 1 computes the QR matrices in that many processes while this
    one draws. Raises PlannerError for a ``start_at`` off the sheet.
    """
    if not 1 <= start_at <= geometry.per_page:
        raise PlannerError(f"--start-at {start_at} is not a label of sheet {geometry.name!r}; "
                           f"use 1 to {geometry.per_page}", Where(field="--start-at"))
    from reportlab.lib.colors import HexColor
    from reportlab.pdfgen.canvas import Canvas

    frame = _frame(geometry)
    page = (geometry.page_width * MM, geometry.page_height * MM)

    def write(temp: Path) -> None:
        _layout.fonts_ready()
        canvas = Canvas(str(temp), pagesize=page, pageCompression=1, invariant=1,
                        initialFontName=_layout.FONT)
        canvas.setTitle(title)
        canvas.setAuthor("ringplan")
        canvas.setCreator("ringplan")
        ink = "{:.3f} {:.3f} {:.3f}".format(*HexColor(_layout.INK).rgb())
        qr_place = (f"q 0 g {frame.qr_side:.3f} 0 0 {frame.qr_side:.3f} {frame.qr_x:.3f} "
                    f"{frame.qr_y:.3f} cm")
        symbols = _symbols(items, workers)
        cache = _Cache()
        cell_index = start_at - 1
        for item in items:
            if cell_index and cell_index % geometry.per_page == 0:
                canvas.showPage()
            cell = geometry.cell_pt(cell_index, offset_mm)
            cell_index += 1
            if isinstance(item, Separator):
                _draw_separator(canvas, item, cell, geometry)
                continue
            x, y, _, _ = cell
            lines, _dropped = layout(item, geometry, cache=cache)
            code_count = sum(1 for ln in lines if ln.font == _layout.MONO)
            ops = _text_ops(lines, frame, code_count, canvas._doc, ink, cache)
            canvas.addLiteral(f"q 1 0 0 1 {x:.2f} {y:.2f} cm {qr_place} {next(symbols)} Q "
                              f"{ops} Q")
        canvas.showPage()
        canvas.save()

    with _layout.plain_streams():  # deflated, not ASCII85-wrapped
        return _layout.write_atomic(path, write)


def render_calibration(path: Path, geometry: Geometry, *,
                       offset_mm: tuple[float, float] = (0.0, 0.0)) -> Path:
    """Write an alignment page: every cell outlined and numbered, with a 100 mm scale; return ``path``.

    Print it on plain paper at 100 % (no "fit to page"), lay it on a label
    sheet against the light, and measure how far the outlines miss the labels.
    """
    from reportlab.lib.colors import HexColor
    from reportlab.pdfgen.canvas import Canvas

    page = (geometry.page_width * MM, geometry.page_height * MM)

    def write(temp: Path) -> None:
        _layout.fonts_ready()
        canvas = Canvas(str(temp), pagesize=page, pageCompression=1, invariant=1,
                        initialFontName=_layout.FONT)
        canvas.setTitle(f"alignment page, sheet {geometry.name}")
        canvas.setAuthor("ringplan")
        small = max(MIN_SIZE, min(8.0, geometry.label_height * MM / 5))
        for index in range(geometry.per_page):
            x, y, w, h = geometry.cell_pt(index, offset_mm)
            canvas.setStrokeColor(HexColor(_layout.ACCENT))
            canvas.setLineWidth(0.5)
            _layout.rounded_box(canvas, x, y, w, h, geometry.corner_radius * MM)
            canvas.setStrokeColor(HexColor(_layout.RULE))
            pad = geometry.padding * MM
            canvas.setDash(1.5, 1.5)
            canvas.rect(x + pad, y + pad, w - 2 * pad, h - 2 * pad, stroke=1, fill=0)
            canvas.setDash()
            cx, cy = x + w / 2, y + h / 2
            canvas.setStrokeColor(HexColor(_layout.INK))
            canvas.setLineWidth(0.3)
            canvas.line(cx - 2 * MM, cy, cx + 2 * MM, cy)
            canvas.line(cx, cy - 2 * MM, cx, cy + 2 * MM)
            canvas.setFillColor(HexColor(_layout.INK))
            canvas.setFont(_layout.FONT, small)
            canvas.drawString(x + pad + 0.5 * MM, y + h - pad - small, str(index + 1))
        lines = [f"alignment page · sheet {geometry.name} · {geometry.description}",
                 (f"offset x {offset_mm[0]:+.1f} mm, y {offset_mm[1]:+.1f} mm · print at 100 %, "
                 "then measure against a label sheet")]
        _draw_notes(canvas, geometry, lines)
        canvas.showPage()
        canvas.save()

    return _layout.write_atomic(path, write)


def _draw_notes(canvas: Any, g: Geometry, lines: Sequence[str]) -> None:
    """Write the notes and a 100 mm scale in the middle of the page (or across a roll label)."""
    from reportlab.lib.colors import HexColor

    width = g.page_width * MM
    size = max(MIN_SIZE, min(8.0, g.page_height * MM / 12))
    y = g.page_height * MM / 2 + size
    # A white panel behind the notes keeps them readable over the outlines.
    block = (len(lines) + 2.2) * size * 1.4
    canvas.setFillColor(HexColor("#ffffff"))
    canvas.rect(2 * MM, y - block + size * 1.2, width - 4 * MM, block, stroke=0, fill=1)
    canvas.setFillColor(HexColor(_layout.ACCENT))
    for line in lines:
        text = _layout.fit_text(line, _layout.FONT, size, width - 4 * MM)
        canvas.setFont(_layout.FONT, size)
        canvas.drawCentredString(width / 2, y, text)
        y -= size * 1.4
    scale = min(100.0, (g.page_width - 10) // 10 * 10)
    left = (width - scale * MM) / 2
    canvas.setStrokeColor(HexColor(_layout.ACCENT))
    canvas.setLineWidth(0.6)
    canvas.line(left, y, left + scale * MM, y)
    for tick in range(0, int(scale) + 1, 10):
        canvas.line(left + tick * MM, y, left + tick * MM, y + (2.5 if tick % 50 == 0 else 1.2)
                    * MM)
    canvas.setFont(_layout.FONT, size)
    canvas.drawCentredString(width / 2, y - size * 1.3, f"{scale:.0f} mm")
