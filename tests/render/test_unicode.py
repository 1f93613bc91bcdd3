"""Names and addresses in their own scripts on every document, with no missing glyph.

Laboratories named and addressed in Polish, Czech, Greek, Russian and Turkish: a round is
planned, printed and evaluated, and pdfplumber reads each name and address line back, as
written, from the packing list, run sheet, labels, letter and report. Every character drawn
must have a glyph in the embedded font it is drawn with (checked against that font file's
character map, read by reportlab), and no standard PDF font may remain. ``check`` warns of
text the fonts cannot draw, naming the field and the code points.
"""

from __future__ import annotations

import re
import shutil
from pathlib import Path

import pytest
import yaml

from planner import fonts, spec
from planner.render import _layout
from tests.conftest import run_cli
from tests.render.conftest import (EXAMPLE, PASSPHRASE, ROUND, pdf_text, plan_example,
                                   plan_in_place)

# Laboratory id: (name, address lines, contact, country); ids, order and hosts of the example.
LABS = {
    "kal": ("Laboratorium Łódź Żółć", ("ul. Żółć 12", "90-001 Łódź", "Polska"),
            "Małgorzata Śliwińska", "PL"),
    "tor": ("Řídící laboratoř Ústí nad Labem", ("Masarykova 1", "400 01 Ústí nad Labem",
                                                "Česko"), "Jiří Dvořák", "CZ"),
    "hel": ("Εργαστήριο Θεσσαλονίκης", ("Οδός Εγνατίας 12", "546 30 Θεσσαλονίκη", "Ελλάδα"),
            "Γιώργος Παπαδόπουλος", "GR"),
    "lin": ("Лаборатория Новосибирск", ("ул. Ленина 5", "630000 Новосибирск", "Россия"),
            "Анна Смирнова", "RU"),
    "crx": ("İzmir Ölçüm Laboratuvarı", ("Şehitler Caddesi 3", "Karşıyaka, İzmir", "Türkiye"),
            "Ayşe Doğan", "TR"),
}
TITLE = "Porównanie międzylaboratoryjne · Διεργαστηριακή σύγκριση · Межлабораторное сравнение"
BUNDLED_NAMES = {"DejaVuSans": fonts.BUNDLED.regular, "DejaVuSans-Bold": fonts.BUNDLED.bold,
                 "DejaVuSans-Oblique": fonts.BUNDLED.italic,
                 "DejaVuSansMono": fonts.BUNDLED.mono,
                 "DejaVuSansMono-Bold": fonts.BUNDLED.mono_bold}


def _rewrite(study_dir: Path, change) -> None:
    """Load study.yaml as plain data, let ``change`` edit it, and write it back (UTF-8)."""
    path = study_dir / "study.yaml"
    data = yaml.safe_load(path.read_text(encoding="utf-8"))
    change(data)
    path.write_text(yaml.safe_dump(data, allow_unicode=True, sort_keys=False), encoding="utf-8")


def _in_own_scripts(data) -> None:
    data["study"]["title"] = TITLE
    for lab in data["laboratories"]:
        name, address, contact, country = LABS[lab["id"]]
        lab.update(name=name, address=list(address), country=country)
        lab["contact"]["name"] = contact


def _flat(pages: list[str]) -> str:
    """Return the text of a document with every run of white space as one space."""
    return " ".join(" ".join(pages).split())


def _plan_print_evaluate(target: Path):
    from planner import audit, evaluate
    from planner import plan as planning
    from planner.ledger import Ledger
    from planner.render import print_round

    study, made = plan_in_place(target)
    key = planning.key_of(made)
    printed = print_round(study, target, ROUND, key=key)
    # One plausible value per test unit; the numbers do not matter here.
    records = [{"lab": u.lab, "code": u.code, "value": 1.0 + 0.01 * (i % 7), "uncertainty": None}
               for i, u in enumerate(made.units) if u.kind == "test"]
    with Ledger.open(target) as ledger:
        audit.unseal_round(study, target, ROUND, ledger, passphrase=PASSPHRASE, force=True,
                           reason="test")
        report_dir = evaluate.evaluate_round(study, target, ROUND, ledger, results=records)
    return study, planning.round_dir(target, ROUND), printed, report_dir


@pytest.fixture(scope="module")
def round_in_own_scripts(tmp_path_factory):
    target = tmp_path_factory.mktemp("unicode") / "study"
    shutil.copytree(EXAMPLE, target)
    _rewrite(target, _in_own_scripts)
    study, folder, printed, report_dir = _plan_print_evaluate(target)
    pdfs = [p for p in printed if p.suffix == ".pdf"] + sorted(report_dir.glob("*.pdf"))
    return study, folder, report_dir, pdfs


@pytest.mark.parametrize("lab", list(LABS))
def test_name_and_address_print_as_written_on_packing_list_run_sheet_and_letter(
        round_in_own_scripts, lab):
    _, folder, report_dir, _ = round_in_own_scripts
    name, address, contact, _ = LABS[lab]
    for path in (folder / "labs" / lab / "packing-list.pdf",
                 folder / "labs" / lab / "run-sheet.pdf",
                 report_dir / f"letter-{lab}.pdf"):
        text = _flat(pdf_text(path))
        assert name in text, path.name
        if path.name != "run-sheet.pdf":  # the run sheet names the laboratory, not its address
            for line in address:
                assert line in text, (path.name, line)
    assert contact in _flat(pdf_text(report_dir / f"letter-{lab}.pdf"))


def test_labels_name_the_destination_in_its_script(round_in_own_scripts):
    import pdfplumber

    from planner.render import _sheets

    study, folder, _, _ = round_in_own_scripts
    sheet = _sheets.load(study.study.label_sheet)
    mm = 72 / 25.4
    cells = []
    with pdfplumber.open(str(folder / "host" / "labels.pdf")) as pdf:
        for page in pdf.pages:
            for i in range(sheet.per_page):
                left, top, width, height = sheet.cell_mm(i)
                box = (left * mm, top * mm, (left + width) * mm, (top + height) * mm)
                # a field too wide for the label wraps at spaces: even out the white space
                cells.append(_flat([page.crop(box).extract_text() or ""]))
    for name, *_ in LABS.values():
        assert any(name in cell for cell in cells), name


def test_report_carries_the_title_as_written(round_in_own_scripts):
    _, _, report_dir, _ = round_in_own_scripts
    assert TITLE in _flat(pdf_text(report_dir / "report.pdf"))


def _undrawn(path: Path, faces: dict[str, Path]) -> list[tuple[str, str]]:
    """Return (font, character) of every character drawn in ``path`` without a glyph in the
    embedded font it is drawn with, or in a font other than ``faces``."""
    import pdfplumber

    out = []
    with pdfplumber.open(str(path)) as pdf:
        for page in pdf.pages:
            for char in page.chars:
                face = char["fontname"].split("+", 1)[-1]  # drop the subset tag
                text = char["text"]
                if face not in faces or len(text) != 1 or ord(text) not in fonts.characters(
                        faces[face]):
                    out.append((face, text))
    return out


def _base_fonts(path: Path) -> set[str]:
    """Return the font names of every font resource of a PDF (reportlab writes font
    dictionaries as plain objects), without subset tags."""
    names = re.findall(rb"/BaseFont\s*/([^\s/<>\[\]()]+)", path.read_bytes())
    return {n.decode("latin-1").split("+", 1)[-1] for n in names}


def test_every_character_drawn_has_a_glyph_in_its_embedded_font(round_in_own_scripts):
    _, _, _, pdfs = round_in_own_scripts
    # labels, prep sheet, packing lists, run sheets, report, letters
    assert len(pdfs) == 2 + 2 * len(LABS) + 1 + len(LABS)
    for path in pdfs:
        assert _undrawn(path, BUNDLED_NAMES) == [], path.name
        assert _base_fonts(path) <= set(BUNDLED_NAMES), path.name


def test_the_glyph_check_finds_a_character_no_font_has(tmp_path):
    """The check above can fail: a name with Chinese characters draws the empty glyph."""
    from planner.render import packing_list

    study, manifest, _ = plan_example(tmp_path / "study")
    far = study.model_copy(update={"laboratories": tuple(
        lab.model_copy(update={"name": "東京 Laboratory"}) if lab.id == "crx" else lab
        for lab in study.laboratories)})
    path = packing_list.render(tmp_path / "p.pdf", far, manifest, "crx", paper="A4")
    # wherever the name is drawn, its two characters are the font's empty glyph
    assert _undrawn(path, BUNDLED_NAMES)
    assert "Laboratory" in _flat(pdf_text(path))


def test_history_page_is_set_in_the_embedded_fonts(round_in_own_scripts, runner):
    _, folder, _, _ = round_in_own_scripts
    study_dir = folder.parents[1]
    result = run_cli(runner, "history", study_dir)
    assert result.exit_code == 0, result.output
    path = study_dir / "history.pdf"
    assert _undrawn(path, BUNDLED_NAMES) == []
    assert _base_fonts(path) <= set(BUNDLED_NAMES)


# --- check: text the fonts cannot draw -----------------------------------------------

def _named(lab_index: int, name: str):
    def change(data) -> None:
        data["laboratories"][lab_index]["name"] = name
    return change


def test_check_warns_of_characters_the_bundled_font_lacks(example_dir, runner):
    _rewrite(example_dir, _named(4, "Crossway 東京 Laboratory"))
    result = run_cli(runner, "check", example_dir)
    assert result.exit_code == 0, result.output
    warnings = [line for line in result.stderr.splitlines() if line.startswith("warning: ")]
    assert warnings == [
        "warning: laboratories[4].name: 東 (U+6771), 京 (U+4EAC) cannot be drawn with the "
        "bundled DejaVu Sans and would print as empty boxes; name TrueType fonts that have "
        "them under study.fonts"]


def test_check_is_silent_on_every_european_script(example_dir, runner):
    _rewrite(example_dir, _in_own_scripts)
    result = run_cli(runner, "check", example_dir)
    assert result.exit_code == 0, result.output
    assert "warning: " not in result.stderr


# Without a CJK font on the test machine, a study font that covers what DejaVu Sans lacks is
# the bundled DejaVu Sans Mono: it has most APL symbols (U+2336 to U+237A), DejaVu Sans not.
OWN_SYMBOL = "\u235f"


def _with_study_fonts(study_dir: Path, regular: Path, bold: Path):
    shutil.copy(regular, study_dir / "own-regular.ttf")
    shutil.copy(bold, study_dir / "own-bold.ttf")

    def change(data) -> None:
        data["study"]["fonts"] = {"regular": "own-regular.ttf", "bold": "own-bold.ttf"}
    _rewrite(study_dir, change)


def test_a_study_font_that_has_the_characters_silences_the_warning(example_dir, runner):
    _rewrite(example_dir, _named(1, f"Torvhaug {OWN_SYMBOL} Laboratory"))
    before = run_cli(runner, "check", example_dir)
    assert (f"warning: laboratories[1].name: {OWN_SYMBOL} (U+235F) cannot be drawn with the "
            "bundled DejaVu Sans") in before.stderr
    _with_study_fonts(example_dir, fonts.BUNDLED.mono, fonts.BUNDLED.mono_bold)
    after = run_cli(runner, "check", example_dir)
    assert after.exit_code == 0, after.output
    assert "warning: " not in after.stderr


def test_study_fonts_that_lack_a_character_are_named_in_the_warning(example_dir, runner):
    _rewrite(example_dir, _named(2, "Helmbrecht 東 Laboratory"))
    _with_study_fonts(example_dir, fonts.BUNDLED.mono, fonts.BUNDLED.mono_bold)
    result = run_cli(runner, "check", example_dir)
    assert ("warning: laboratories[2].name: 東 (U+6771) cannot be drawn with the fonts of "
            "study.fonts") in result.stderr


def _cjk_truetype() -> Path | None:
    """Return a TrueType font of this machine with Chinese characters, if there is one."""
    import subprocess

    try:
        listed = subprocess.run(["fc-list", ":lang=zh", "file"], capture_output=True,
                                text=True, check=False).stdout
    except OSError:
        return None
    for line in listed.splitlines():
        path = Path(line.split(":")[0].strip())
        if path.suffix.lower() == ".ttf" and not fonts.problems(
                spec.Fonts(regular=str(path)), Path("/")):
            if 0x6771 in fonts.characters(path):
                return path
    return None


def test_a_cjk_study_font_prints_a_chinese_name(example_dir, runner):
    found = _cjk_truetype()
    if found is None:
        pytest.skip("no TrueType font with Chinese characters on this machine")
    _rewrite(example_dir, _named(4, "Crossway 東京 Laboratory"))
    _with_study_fonts(example_dir, found, found)
    result = run_cli(runner, "check", example_dir)
    assert "warning: " not in result.stderr


# --- a study's own fonts in print -------------------------------------------------------

@pytest.fixture
def bundled_afterwards():
    """Documents drawn by later tests are set in the bundled fonts again."""
    yield
    _layout.use_fonts(fonts.BUNDLED)


def test_documents_are_set_in_the_study_fonts(tmp_path, bundled_afterwards):
    from planner.render import print_round

    target = tmp_path / "study"
    shutil.copytree(EXAMPLE, target)
    _rewrite(target, _named(4, f"Crossway {OWN_SYMBOL} Laboratory"))
    _with_study_fonts(target, fonts.BUNDLED.mono, fonts.BUNDLED.mono_bold)
    study, _ = plan_in_place(target)
    paths = print_round(study, target, ROUND, key=None, only="packing", lab="crx")
    assert [p.name for p in paths] == ["packing-list.pdf"]
    faces = {"DejaVuSansMono": fonts.BUNDLED.mono, "DejaVuSansMono-Bold": fonts.BUNDLED.mono_bold}
    assert _undrawn(paths[0], faces) == []  # every character in the study's (mono) faces
    assert f"Crossway {OWN_SYMBOL} Laboratory" in _flat(pdf_text(paths[0]))


@pytest.mark.parametrize("content, problem", [
    (None, "is not a file; give the path of a .ttf file, relative to the study folder"),
    (b"not a font at all", "is not a TrueType font file; give a .ttf file"),
    (b"OTTO" + bytes(76), "has PostScript (CFF) outlines, which cannot be embedded; give a "
                          "font with TrueType outlines (.ttf)"),
], ids=["missing", "not-a-font", "cff-outlines"])
def test_a_font_file_that_cannot_be_used_is_one_line_and_exit_2(example_dir, runner, content,
                                                                problem):
    if content is not None:
        (example_dir / "own.ttf").write_bytes(content)

    def change(data) -> None:
        data["study"]["fonts"] = {"regular": "own.ttf"}
    _rewrite(example_dir, change)
    line = next(i for i, text in enumerate(
        (example_dir / "study.yaml").read_text(encoding="utf-8").splitlines(), start=1)
        if text.strip().startswith("regular:"))
    result = run_cli(runner, "check", example_dir)
    assert result.exit_code == 2
    assert result.stderr.strip() == (f"error: {example_dir / 'study.yaml'}:{line}: "
                                     f"study.fonts.regular: 'own.ttf' {problem}")
