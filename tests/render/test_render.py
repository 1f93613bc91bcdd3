"""print_round: which files it writes, its options and the errors a user can meet."""

from __future__ import annotations

import json

import pytest

from planner import codes
from planner.errors import LedgerError, PlannerError, SealError
from planner.render import KINDS, print_round
from tests.render.conftest import ROUND, decode_qr, pdf_text, render_pages


def test_a_full_print_writes_every_document_of_the_round(printed):
    names = sorted(str(p.relative_to(printed.folder)) for p in printed.paths)
    expected = ["host/labels.pdf", "host/prep-sheet.pdf"]
    for lab in printed.manifest["labs"]:
        expected += [f"labs/{lab}/packing-list.pdf", f"labs/{lab}/run-sheet.pdf",
                     f"labs/{lab}/result-form.xlsx"]
    assert names == sorted(expected)
    assert all(p.is_file() and p.stat().st_size > 0 for p in printed.paths)
    assert not [p for p in printed.folder.rglob(".*") if p.name.endswith((".tmp", "-tmp"))]


def test_only_and_lab_limit_what_is_printed(printed):
    paths = print_round(printed.study, printed.study_dir, ROUND, key=printed.key,
                        only="runsheets", lab="tor")
    assert [p.relative_to(printed.folder).as_posix() for p in paths] == ["labs/tor/run-sheet.pdf"]
    paths = print_round(printed.study, printed.study_dir, ROUND, key=printed.key,
                        only="labels", lab="tor", sheet="a4-5x13-38x21")
    assert [p.relative_to(printed.folder).as_posix() for p in paths] == ["labs/tor/labels.pdf"]
    entry = printed.manifest["labs"]["tor"]
    wanted = [c for run in entry["trials"] for c in run]  # spares stay with the host
    assert sorted(decode_qr(render_pages(paths[0]))) == sorted(codes.format(c) for c in wanted)


def test_codes_reprint_only_the_chosen_labels(printed):
    chosen = [u["code"] for u in printed.key["units"][:2]]
    paths = print_round(printed.study, printed.study_dir, ROUND, key=printed.key,
                        codes=[codes.format(c) for c in chosen], start_at=7)
    assert [p.name for p in paths] == ["labels-reprint.pdf"]
    assert sorted(decode_qr(render_pages(paths[0]))) == sorted(codes.format(c) for c in chosen)
    assert "next:" not in "\n".join(pdf_text(paths[0]))


@pytest.mark.parametrize("kwargs, words", [
    ({"only": "letters"}, "is not a kind of document"),
    ({"lab": "xyz"}, "is not a laboratory of round"),
    ({"only": "prep", "codes": ["K7QM-4X9PA"]}, "--codes reprints labels"),
    ({"sheet": "a4-9x9"}, "no label sheet called"),
], ids=["only", "lab", "codes-with-only", "sheet"])
def test_user_mistakes_are_planner_errors(printed, kwargs, words):
    with pytest.raises(PlannerError, match=words):
        print_round(printed.study, printed.study_dir, ROUND, key=printed.key, **kwargs)


def test_a_key_that_is_not_the_rounds_is_refused(printed):
    changed = json.loads(json.dumps(printed.key))
    changed["units"][0]["material"], changed["units"][1]["material"] = (
        changed["units"][1]["material"], changed["units"][0]["material"])
    if changed == printed.key:
        changed["units"][0]["lab"] = "crx" if changed["units"][0]["lab"] != "crx" else "kal"
    with pytest.raises(SealError, match="does not match"):
        print_round(printed.study, printed.study_dir, ROUND, key=changed, only="prep")


def test_an_unplanned_round_is_refused(printed):
    with pytest.raises(LedgerError, match="has not been planned"):
        print_round(printed.study, printed.study_dir, "2099-9", key=printed.key)


def test_every_kind_is_known():
    assert KINDS == ("labels", "prep", "packing", "runsheets", "forms")


def test_render_modules_share_the_render_verb():
    from planner.render import labels, packing_list, prep_sheet, result_form, run_sheet

    for module in (labels, packing_list, prep_sheet, result_form, run_sheet):
        assert callable(module.render)
        assert all(hasattr(module, name) for name in module.__all__)
