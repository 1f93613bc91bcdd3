"""The PDF documents of a round: page sizes, header and footer, contents, and no material
on anything a laboratory receives. External readers: pdfplumber, pypdfium2, zxing-cpp."""

from __future__ import annotations

import re
from pathlib import Path

import pytest

from planner import codes, language
from tests.render.conftest import (
    A4_PT,
    LETTER_PT,
    TENTH_MM_PT,
    decode_qr,
    pdf_text,
    render_pages,
    secret_words,
)


def _boxes(path):
    import pdfplumber

    with pdfplumber.open(str(path)) as pdf:
        return [tuple(float(v) for v in page.mediabox) for page in pdf.pages]


def _documents(printed):
    return [p for p in printed.paths if p.suffix == ".pdf" and p.name != "labels.pdf"]


@pytest.mark.parametrize("which, size", [("printed", A4_PT), ("printed_letter", LETTER_PT)])
def test_document_pages_are_iso_a4_or_us_letter(request, which, size):
    printed = request.getfixturevalue(which)
    docs = _documents(printed)
    assert len(docs) == 1 + 2 * len(printed.manifest["labs"])
    for path in docs:
        for box in _boxes(path):
            assert box[0] == 0 and box[1] == 0
            assert box[2] == pytest.approx(size[0], abs=TENTH_MM_PT)
            assert box[3] == pytest.approx(size[1], abs=TENTH_MM_PT)


def test_label_sheet_pages_match_their_paper(printed, printed_letter):
    for box in _boxes(printed.folder / "host" / "labels.pdf"):
        assert box[2:] == pytest.approx(A4_PT, abs=TENTH_MM_PT)
    for box in _boxes(printed_letter.folder / "host" / "labels.pdf"):
        assert box[2:] == pytest.approx(LETTER_PT, abs=TENTH_MM_PT)


def _texts(printed, lab):
    """Return the words of a laboratory's documents (hel writes German, study.yaml)."""
    return language.texts(language.of(printed.study.lab(lab)))


def test_every_page_names_study_round_and_page_n_of_m(printed):
    for path in _documents(printed):
        lab = path.parent.name if path.parent.parent.name == "labs" else None
        t = _texts(printed, lab) if lab else language.texts()
        pages = pdf_text(path)
        for n, text in enumerate(pages, start=1):
            assert t("common.page", number=n, total=len(pages)) in text, path.name
            assert "nvp-mfr" in text and t("common.round", round="2027-1") in text, path.name


def test_nothing_a_laboratory_receives_names_a_material(printed):
    from openpyxl import load_workbook

    for lab in printed.manifest["labs"]:
        folder = printed.folder / "labs" / lab
        texts = pdf_text(folder / "packing-list.pdf") + pdf_text(folder / "run-sheet.pdf")
        book = load_workbook(folder / "result-form.xlsx")
        texts += [str(c.value) for row in book.active.iter_rows() for c in row if c.value]
        texts.append((folder / "result-form.csv").read_text(encoding="utf-8"))
        joined = "\n".join(texts).lower()
        for word in secret_words(printed.study):
            assert word.lower() not in joined, (lab, word)


def test_packing_list_lists_the_parcel_sorted_by_code(printed):
    for lab, entry in printed.manifest["labs"].items():
        text = "\n".join(pdf_text(printed.folder / "labs" / lab / "packing-list.pdf"))
        found = re.findall(r"\b[0-9A-Z]{4}-[0-9A-Z]{5}\b", text)
        expected = sorted(c for run in entry["trials"] for c in run)  # no spare: the host's
        assert found == [codes.format(c) for c in expected]
        t, flat = _texts(printed, lab), " ".join(text.split())
        # "Spares stay with the host: if a unit is lost ..." in the laboratory's words
        assert " ".join(t.template("packing_list.contents").split(")", 1)[1].split()) in flat
        assert printed.manifest["fingerprint"][:8] in text
        assert entry["ship"] in text and entry["arrive"] in text
        assert printed.manifest["dates"]["results_due"] in text
        for key in ("packed_by", "checked_by", "received_by"):
            assert t(f"packing_list.{key}") in flat
        # PP-FR is the one material with a hazard (study.yaml); its note and the SDS rule show
        assert "IRRITANT" in text and " ".join(t("common.sds_note").split()) in flat


def test_run_sheet_gives_each_trial_in_run_order_with_a_qr_per_row(printed):
    lab = "crx"
    entry = printed.manifest["labs"][lab]
    path = printed.folder / "labs" / lab / "run-sheet.pdf"
    text = "\n".join(pdf_text(path))
    found = re.findall(r"\b[0-9A-Z]{4}-[0-9A-Z]{5}\b", text)
    in_order = [codes.format(c) for run in entry["trials"] for c in run]
    assert found[:len(in_order)] == in_order
    assert "g/10 min" in text  # the study's unit heads the result column
    assert "do not try to find out which material" in " ".join(text.split())
    decoded = decode_qr(render_pages(path, dpi=300))
    assert sorted(decoded) == sorted(in_order)


def test_prep_sheet_totals_and_confidential_mark(printed):
    pages = pdf_text(printed.folder / "host" / "prep-sheet.pdf")
    text = "\n".join(pages)
    assert all("CONFIDENTIAL" in page for page in pages)
    # per material: 5 labs x 3 trials + 5 spares + 2 retained + 10 homogeneity = 32 units
    # (study.yaml); 32 x 30 g = 960 g, for RE-MIX too
    assert re.search(r"HD-BM5\s.*?15 5 2 10 32 30 g 960 g", text, re.DOTALL)
    assert re.search(r"RE-MIX\s.*?15 5 2 10 32 30 g 960 g", text, re.DOTALL)
    for unit in printed.key["units"]:
        assert codes.format(unit["code"]) in text


def test_prep_sheet_of_a_circulating_set_lists_each_artefact_once(tmp_path):
    """The host's sheet of a circulating set names one code per material and the route."""
    import pdfplumber

    from planner import codes as code_mod
    from planner import plan as planning
    from planner import spec as spec_mod
    from planner.render import prep_sheet

    root = Path(__file__).resolve().parents[2]
    study = spec_mod.load(root / "examples" / "norrvik-hardness")
    dates, route = planning.dates_for(study, "lin")
    result = planning.plan_round(study, round_id="C1", host="lin", dates=dates,
                                 secret=bytes(range(32)), route=route)
    manifest = planning.manifest_of(study, result)
    out = prep_sheet.render(tmp_path / "prep.pdf", study, manifest, planning.key_of(result),
                            paper="A4")
    with pdfplumber.open(out) as pdf:
        text = "\n".join(page.extract_text() or "" for page in pdf.pages)
    for unit in result.units:
        assert text.count(code_mod.format(unit.code)) == 1
    assert "Route" in text and "lin (middle)" in text and "homogeneity" not in text
