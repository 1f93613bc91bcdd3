"""A planned and printed round of the example study, shared by the render tests.

Planned through the real planner (fixed secret) so the documents are checked
on the same manifest, key and result-form CSV a user would have.
"""

from __future__ import annotations

import shutil
from dataclasses import dataclass
from pathlib import Path
from typing import Any

import pytest

ROOT = Path(__file__).resolve().parents[2]
EXAMPLE = ROOT / "examples" / "norrvik-mfr"
SECRET = bytes(range(32))
PASSPHRASE = "render-tests-passphrase"
ROUND = "2027-1"

from tests.conftest import clear_shipping  # noqa: E402 - after the constants it shares

# ISO 216 A4 and US Letter in PDF points (1 pt = 25.4/72 mm).
A4_PT = (210 / 25.4 * 72, 297 / 25.4 * 72)
LETTER_PT = (8.5 * 72, 11 * 72)
TENTH_MM_PT = 0.1 / 25.4 * 72


@dataclass
class Printed:
    study: Any
    study_dir: Path
    folder: Path
    manifest: dict[str, Any]
    key: dict[str, Any]
    paths: list[Path]


def plan_example(target: Path, *, paper: str = "A4") -> tuple[Any, dict[str, Any], dict[str, Any]]:
    """Copy the example study to ``target``, plan round 2027-1 with the fixed secret; return
    (study, manifest, key)."""
    from planner import plan, seal

    shutil.copytree(EXAMPLE, target)
    if paper != "A4":
        spec_file = target / "study.yaml"
        text = spec_file.read_text(encoding="utf-8")
        spec_file.write_text(text.replace("paper: A4", f"paper: {paper}"), encoding="utf-8")
    study, _ = plan_in_place(target)
    folder = plan.round_dir(target, ROUND)
    return study, plan.read_manifest(folder), seal.open_key(folder, PASSPHRASE)


def plan_in_place(target: Path) -> tuple[Any, Any]:
    """Plan round 2027-1 of the study folder ``target`` (host kal, the fixed secret) and write
    it; return (study, the RoundPlan)."""
    from planner import plan, spec
    from planner.ledger import Ledger

    study = spec.load(target)
    dates, route = plan.dates_for(study, "kal")
    made = plan.plan_round(study, round_id=ROUND, host="kal", dates=dates, secret=SECRET,
                           route=route)
    with Ledger.open(target) as ledger:
        plan.write_round(study, target, made, ledger, passphrase=PASSPHRASE)
    clear_shipping(target, ROUND)
    return study, made


@pytest.fixture(scope="package")
def printed(tmp_path_factory: pytest.TempPathFactory) -> Printed:
    """The example round planned and printed in full on A4."""
    from planner import plan
    from planner.render import print_round

    target = tmp_path_factory.mktemp("a4") / "norrvik-mfr"
    study, manifest, key = plan_example(target)
    paths = print_round(study, target, ROUND, key=key)
    return Printed(study, target, plan.round_dir(target, ROUND), manifest, key, paths)


@pytest.fixture(scope="package")
def printed_letter(tmp_path_factory: pytest.TempPathFactory) -> Printed:
    """The same round for a study on US Letter paper (documents only, labels on a Letter sheet)."""
    from planner import plan
    from planner.render import print_round

    target = tmp_path_factory.mktemp("letter") / "norrvik-mfr"
    study, manifest, key = plan_example(target, paper="letter")
    paths = print_round(study, target, ROUND, key=key, sheet="letter-3x10-67x25")
    return Printed(study, target, plan.round_dir(target, ROUND), manifest, key, paths)


def render_pages(path: Path, dpi: int = 300) -> list[Any]:
    """Return every page of a PDF rendered by pdfium as a PIL image."""
    import pypdfium2 as pdfium

    pdf = pdfium.PdfDocument(str(path))
    try:
        return [pdf[i].render(scale=dpi / 72).to_pil() for i in range(len(pdf))]
    finally:
        pdf.close()


def decode_qr(images: list[Any]) -> list[str]:
    """Return the text of every QR code zxing-cpp finds on the images."""
    import zxingcpp

    return [r.text for image in images
            for r in zxingcpp.read_barcodes(image, formats=zxingcpp.BarcodeFormat.QRCode)]


def pdf_text(path: Path) -> list[str]:
    """Return the text of each page, as pdfplumber extracts it."""
    import pdfplumber

    with pdfplumber.open(str(path)) as pdf:
        return [page.extract_text() or "" for page in pdf.pages]


def secret_words(study: Any) -> list[str]:
    """Return every material id and description of the study: text no participant may see."""
    return [w for m in study.materials for w in (m.id, m.description)]


def long_table(head: list[Any], *extra: tuple[Any, ...]) -> tuple[list[list[Any]], Any]:
    """Return (rows, style) of a table long enough to run over pages, its heading ``head``
    repeated: numbers, a cell in two lines, paragraphs in some cells, fonts, alignments,
    a colour and a background of our table style, and ``extra`` style commands."""
    from reportlab.lib.colors import HexColor
    from reportlab.platypus import Paragraph

    from planner.render import _layout

    st = _layout.styles()
    rows = [head]
    for i in range(70):
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
        *extra,
    ])
    return rows, style
