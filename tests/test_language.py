"""A laboratory's documents in its language: text files, spec, documents, forms, letters.

The round is the demo's (planned, printed, a spare issued, forms returned, the key opened,
evaluated) with hel writing German (as in the example) and tor French; the others and the
coordinator keep English. Texts are read back with pdfplumber and openpyxl.
"""

from __future__ import annotations

import re
from pathlib import Path

import pytest
from conftest import EXAMPLE, ROUND, filled, receive, run_cli, write

from planner import language, plan, spec
from planner.render import letter, result_form
from tests.render.conftest import pdf_text

EN = language.texts("en")
DE = language.texts("de")
FR = language.texts("fr")


def _flat(text: str) -> str:
    return " ".join(text.split())


def _pdf(path: Path) -> str:
    return _flat(" ".join(pdf_text(path)))


def _sentences(t: language.Texts, section: str, *, longer_than: int = 40) -> list[str]:
    """Return the texts of ``section`` without placeholders and mark-up, long enough that
    another language would not say them word for word."""
    return [_flat(v) for k, v in t.entries.items()
            if k.startswith(section + ".") and not language.fields(v) and "<" not in v
            and len(v) > longer_than]


# --- the text files ----------------------------------------------------------------------

@pytest.mark.parametrize("code", [c for c in language.available() if c != "en"])
def test_every_language_has_the_english_keys_and_placeholders(code):
    other = language.texts(code)
    assert sorted(other.entries) == sorted(EN.entries)
    for key, english in EN.entries.items():
        assert language.fields(other.entries[key]) == language.fields(english), key


@pytest.mark.parametrize("code", language.available())
def test_texts_hold_only_bold_and_italic_markup(code):
    for key, text in language.texts(code).entries.items():
        tags = re.findall(r"</?([A-Za-z]+)[^>]*>", text)
        assert set(tags) <= {"b", "i"}, (key, tags)
        assert "&" not in text, key
        assert text == text.strip() or key in ("opening.before_results",
                                                "opening.after_results",
                                                "opening.opened_with", "common.semicolon"), key


def test_the_form_headings_of_no_language_read_as_the_machine_header():
    # intake takes the first row with 'code' and 'value' for the header (forms._read_xlsx);
    # a heading row in the laboratory's words stands above it and must not be taken
    for code in language.available():
        t = language.texts(code)
        words = {t(f"form.column.{name}").lower() for name in plan.FORM_COLUMNS}
        assert code == "en" or not {"code", "value"} <= words, code


def test_identity_keys_are_those_intake_reads():
    from planner import forms

    assert set(plan.FORM_IDENTITY) == set(forms.IDENTITY_KEYS) | set(forms._MORE_IDENTITY)
    assert {k.removeprefix("form.identity.") for k in EN.entries
            if k.startswith("form.identity.")} == set(plan.FORM_IDENTITY)


# --- the spec ------------------------------------------------------------------------------

def test_unknown_language_is_one_spec_error_naming_the_field_and_the_languages(tmp_path,
                                                                               runner):
    text = (EXAMPLE / "study.yaml").read_text(encoding="utf-8")
    assert "    language: de " in text  # hel, in the example
    folder = tmp_path / "study"
    folder.mkdir()
    path = folder / "study.yaml"
    path.write_text(text.replace("    language: de ", "    language: dk "), encoding="utf-8")
    line = next(i for i, ln in enumerate(path.read_text(encoding="utf-8").splitlines(), 1)
                if "language: dk" in ln)
    result = run_cli(runner, "check", folder)
    assert result.exit_code == 2
    assert result.stderr.strip().splitlines() == [
        f"error: {path}:{line}: laboratories[2].language: 'dk' is not a language of "
        "ringplan's documents; use one of en, de, es, fr"]


def test_a_laboratory_without_language_gets_the_study_language():
    study = spec.load(EXAMPLE)
    assert [language.of(lab) for lab in study.laboratories] == ["en", "en", "de", "en", "en"]


# --- a round with a German and a French laboratory ---------------------------------------

@pytest.fixture(scope="module")
def round_(tmp_path_factory):
    """The demo's round with hel in German and tor in French."""
    from planner import demo

    root = tmp_path_factory.mktemp("languages")
    text = (EXAMPLE / "study.yaml").read_text(encoding="utf-8")
    tor = "    decimal: comma\n    transit_days: 2\n  - id: hel"
    assert tor in text
    source = root / "source.yaml"
    source.write_text(text.replace(tor, "    decimal: comma\n    language: fr\n"
                                        "    transit_days: 2\n  - id: hel"), encoding="utf-8")
    with pytest.MonkeyPatch.context() as patch:
        patch.setattr(demo, "example_spec", lambda: source)
        built = demo.build_demo(root / "study")
    built["folder"] = plan.round_dir(built["study_dir"], built["round"])
    built["study"] = spec.load(built["study_dir"])
    assert built["host"] not in ("hel", "tor")  # their own parcels, not the host's stops
    return built


def test_german_run_sheet_is_german(round_):
    text = _pdf(round_["folder"] / "labs" / "hel" / "run-sheet.pdf")
    for key in ("title", "how_to", "order", "session", "report_all", "lost", "sealed"):
        assert _flat(DE(f"run_sheet.{key}")) in text, key
    assert "Seite 1 von" in text and "Runde 2027-1" in text
    assert "JJJJ-MM-TT" in text  # the form's dates are typed as ISO dates, and it says so
    for sentence in _sentences(EN, "run_sheet"):
        assert sentence not in text, sentence
    assert "Run sheet" not in text and "How to test" not in text


def test_german_packing_list_is_german(round_):
    text = _pdf(round_["folder"] / "labs" / "hel" / "packing-list.pdf")
    for key in ("title", "closed", "fingerprint_note", "packed_by", "received_by"):
        assert _flat(DE(f"packing_list.{key}")) in text, key
    assert _flat(DE("common.sds_note")) in text and DE("common.hazard_heading") in text
    assert "Ersatzproben bleiben beim ausrichtenden Labor" in text
    for sentence in _sentences(EN, "packing_list") + _sentences(EN, "common"):
        assert sentence not in text, sentence
    for word in ("Packing list", "Signatures", "Hazard cautions", "signature", "page 1 of"):
        assert word not in text, word


def test_german_csv_form_keeps_the_machine_lines_and_says_the_rest_in_german(round_):
    lines = (round_["folder"] / "labs" / "hel" / "result-form.csv").read_text(
        encoding="utf-8").splitlines()
    keys = [ln[2:].split(":", 1)[0] for ln in lines if ln.startswith("# ")][:-1]
    assert keys == ["study", "round", "laboratory", "fingerprint", "unit", "decimal",
                    "measurand", "results due", "submission token"]
    note = lines[len(keys)]
    assert note == "# " + DE("form.note", decimal="Dezimalkomma")
    assert lines[len(keys) + 1] == ";".join(plan.FORM_COLUMNS)
    english = (round_["folder"] / "labs" / "kal" / "result-form.csv").read_text(
        encoding="utf-8")
    assert "fill in value (decimal comma, no thousands separator)" in english
    assert "fill in value" not in "\n".join(lines)


def test_german_xlsx_form_has_german_headings_notes_and_messages(round_):
    from openpyxl import load_workbook

    book = load_workbook(round_["folder"] / "labs" / "hel" / "result-form.xlsx")
    sheet = book[result_form.SHEET]
    rows = [[c.value for c in row] for row in sheet.iter_rows()]
    machine = next(i for i, r in enumerate(rows) if r[:8] == list(plan.FORM_COLUMNS))
    assert rows[machine - 1][:8] == [DE(f"form.column.{n}") for n in plan.FORM_COLUMNS]
    assert rows[0][:3] == ["study", "nvp-mfr", "Studie"]
    notes = {r[0] for r in rows[:machine] if r[0] and r[1] is None}
    assert _flat(DE("form.locked")) in notes and _flat(DE("form.machine_row")) in notes
    messages = {(dv.errorTitle, dv.error) for dv in sheet.data_validations.dataValidation}
    assert messages == {(DE("form.not_a_number"), DE("form.value_error")),
                        (DE("form.not_a_number"), DE("form.uncertainty_error")),
                        (DE("form.not_a_date"), DE("form.date_error"))}
    every = " ".join(str(v) for r in rows for v in r if v is not None)
    for sentence in ("Enter the result", "Pre-filled cells", "fill in value"):
        assert sentence not in every


def test_german_labels_are_german_and_spares_keep_the_study_language(round_):
    from planner import seal
    from planner.demo import PASSPHRASE
    from planner.render import labels

    key = seal.open_key(round_["folder"], PASSPHRASE)
    study, manifest = round_["study"], plan.read_manifest(round_["folder"])
    mine = labels.lab_labels(study, manifest, key, "hel")
    assert mine and all(re.fullmatch(r"Durchgang \d · Nr\. \d", x.trial) for x in mine)
    assert all(x.lab[0] == "für Helmbrecht Film Plant Laboratory" for x in mine)
    assert all(x.use_by.startswith("verwendbar bis 20") for x in mine)
    assert all(x.study == "nvp-mfr · Runde 2027-1" for x in mine)
    every = labels.host_labels(study, manifest, key)
    spares = [x for x in every if isinstance(x, labels.Label) and x.trial == "spare"]
    assert spares and all(x.use_by.startswith("use by ") for x in spares)
    text = _pdf(round_["folder"] / "host" / "labels.pdf")
    assert "verwendbar bis" in text and "use by" in text  # hel's and the others' units
    assert "Durchgang 1 · Nr. 1" in text and "trial 1 · run 1" in text


def test_german_letter_is_german_and_the_report_stays_english(round_):
    text = _pdf(round_["folder"] / "report" / "letter-hel.pdf")
    for key in ("title", "key_heading", "scores_heading", "results_heading",
                "stand_heading", "all_heading"):
        assert DE(f"letter.{key}") in text, key
    assert "Der Zuordnungsschlüssel wurde am 2027-" in text
    assert "Während er versiegelt war, wurde der Schlüssel entschlüsselt" in text
    assert "sigma_pt: 5 % des zugewiesenen Werts." in text  # the example's policy
    assert "Ersatzprobe verwendet" in text  # hel tested a spare (the demo's damaged unit)
    for sentence in (_sentences(EN, "letter") + _sentences(EN, "opening")
                     + [_flat(EN("letter.title")), "The decoding key was opened",
                        "While it was sealed", "of the assigned value",
                        "satisfactory", "page 1 of"]):
        assert sentence not in text, sentence
    report = _pdf(round_["folder"] / "report" / "report.pdf")
    assert "The decoding key was opened on 2027-" in report and "page 1 of" in report
    for word in ("Zuordnungsschlüssel", "clé de décodage", "Seite 1", "Runde 2027"):
        assert word not in report, word
    crx = _pdf(round_["folder"] / "report" / "letter-crx.pdf")
    assert "Your results in this round" in crx and "The decoding key was opened" in crx


def test_a_french_and_a_german_laboratory_in_one_round(round_):
    folder = round_["folder"]
    tor = _pdf(folder / "labs" / "tor" / "run-sheet.pdf")
    assert _flat(FR("run_sheet.order")) in tor and "page 1 sur" in tor
    assert _flat(FR("packing_list.closed")) in _pdf(folder / "labs" / "tor" / "packing-list.pdf")
    letter_tor = _pdf(folder / "report" / "letter-tor.pdf")
    assert FR("letter.title") in letter_tor
    assert "La clé de décodage a été ouverte le" in letter_tor
    assert "Der Zuordnungsschlüssel" not in letter_tor
    letter_hel = _pdf(folder / "report" / "letter-hel.pdf")
    assert "La clé de décodage" not in letter_hel
    lines = (folder / "labs" / "tor" / "result-form.csv").read_text(encoding="utf-8")
    assert "# " + FR("form.note", decimal=FR("common.decimal_comma")) in lines
    # every form was received and every letter written
    assert sorted(round_["received"]) == sorted(lab.id for lab in round_["study"].laboratories)
    assert len(round_["letters"]) == 5


# --- a German form returned ------------------------------------------------------------------

def test_a_german_csv_form_is_received(planned, runner, tmp_path):
    lines = filled(planned, "hel")
    assert lines[9].startswith("# Bitte ausfüllen")
    result = receive(runner, planned, write(tmp_path, "hel.csv", lines))
    assert result.exit_code == 0, result.stderr


def test_a_german_xlsx_form_is_received(planned, runner, tmp_path):
    from datetime import date

    from openpyxl import load_workbook

    folder = plan.round_dir(planned, ROUND)
    text = (folder / "labs" / "hel" / "result-form.csv").read_text(encoding="utf-8")
    path = result_form.render(tmp_path / "hel.xlsx", text, language="de")
    book = load_workbook(path)
    sheet = book[result_form.SHEET]
    header = next(r for r in range(1, sheet.max_row + 1)
                  if [c.value for c in sheet[r]][:8] == list(plan.FORM_COLUMNS))
    assert sheet.cell(header - 1, 4).value == "Messwert"
    for n, r in enumerate(range(header + 1, sheet.max_row + 1), start=1):
        sheet.cell(r, 4).value = 10 + n / 4
        sheet.cell(r, 6).value = date(2027, 1, 21)
        sheet.cell(r, 7).value = "P. Vogt"
    book.save(path)
    result = receive(runner, planned, path)
    assert result.exit_code == 0, result.stderr


# --- what the evaluation writes in words, in the letter --------------------------------------

@pytest.mark.parametrize("policy", [
    {"kind": "fixed", "value": 0.05}, {"kind": "percent", "percent": 2.5},
    {"kind": "precision", "sigma_R": 0.4, "sigma_r": 0.2}, {"kind": "participants"}],
    ids=lambda p: p["kind"])
def test_every_sigma_pt_policy_is_said_in_the_letters_language(policy):
    from planner.stats import iso13528

    said = iso13528.SigmaPt(**policy).describe()
    german = letter._reworded(said, "letter.policy", DE, comma=True)
    assert german != said and german == DE(f"letter.policy.{policy['kind']}", **{
        name: str(value).replace(".", ",") for name, value in policy.items() if name != "kind"})
    assert letter._reworded(said, "letter.policy", EN, comma=False) == said


def _means(values):
    labs = [f"L{i}" for i in range(1, len(values) + 1)]
    return [v for v in values for _ in range(2)], [lab for lab in labs for _ in range(2)]


@pytest.mark.parametrize("means, options, why", [
    ([1.2] * 9 + [1.1, 1.3], {}, "zero_sd"),
    ([10.0, 10.1, 9.9, 10.0, 10.2, 11.5], {}, "few_participants"),
    ([10.0, 10.1, 11.5], {}, "weak_consensus"),
    ([10.0, 20.0, 10.0, 30.0, 20.0, 30.0, 10.0, 40.0], {"sigma_pt": 1.0}, "coarse_step"),
], ids=["zero-sd", "few-participants", "weak-consensus", "coarse-step"])
def test_every_reason_for_no_band_is_said_in_the_letters_language(means, options, why):
    from planner.stats import iso13528

    values, labs = _means(means)
    said = iso13528.evaluate(values, labs, **options).no_band
    assert said is not None
    german = letter._reworded(said, "letter.why", DE, comma=True)
    assert german != said
    assert german.startswith(DE.template(f"letter.why.{why}").split("{")[0])
