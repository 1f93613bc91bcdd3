"""Hand-over sheets of a circulating set: who from, who to, dates, artefacts, boxes, signatures,
page N of M, hazards deferring to the safety data sheet, and never a material.
External readers: pdfplumber (text, rectangles, page sizes)."""

from __future__ import annotations

import shutil

import pytest

from planner import codes, language
from planner.render import handover
from tests.render.conftest import (
    A4_PT,
    PASSPHRASE,
    ROOT,
    SECRET,
    TENTH_MM_PT,
    pdf_text,
    secret_words,
)

HARDNESS = ROOT / "examples" / "norrvik-hardness"
HOST = "lin"
BOX_PT = 3.6 / 25.4 * 72
SDS_NOTE = language.texts("en")("common.sds_note")


def _plan(target, text=None):
    from planner import plan, spec
    from planner.ledger import Ledger

    shutil.copytree(HARDNESS, target)
    if text is not None:
        (target / "study.yaml").write_text(text(
            (target / "study.yaml").read_text(encoding="utf-8")), encoding="utf-8")
    study = spec.load(target)
    dates, route = plan.dates_for(study, HOST)
    made = plan.plan_round(study, round_id="C1", host=HOST, dates=dates, secret=SECRET,
                           route=route)
    with Ledger.open(target) as ledger:
        folder = plan.write_round(study, target, made, ledger, passphrase=PASSPHRASE)
    return study, plan.read_manifest(folder)


@pytest.fixture(scope="module")
def planned(tmp_path_factory):
    return _plan(tmp_path_factory.mktemp("handover") / "hardness")


def _station(manifest, lab, visit=None):
    return next(s for s in manifest["route"] if s["lab"] == lab and s["visit"] == visit)


def _render(tmp_path, planned, station):
    study, manifest = planned
    path = tmp_path / handover.file_name(station)
    assert handover.render(path, study, manifest, station, paper="A4") == path
    return path


def _flat(path):
    return " ".join(" ".join(pdf_text(path)).split())


def _halves(path):
    """Return the text of the left and right half of the address block on page 1."""
    import pdfplumber

    with pdfplumber.open(str(path)) as pdf:
        page = pdf.pages[0]
        words = page.extract_words()
        top = next(w["top"] for w in words if w["text"] == "received")
        bottom = next(w["top"] for w in words if w["text"] == "Dates")
        middle = float(page.width) / 2
        halves = [page.crop((0, top - 1, middle, bottom)),
                  page.crop((middle, top - 1, float(page.width), bottom))]
        return tuple(" ".join((h.extract_text() or "").split()) for h in halves)


def _boxes(path):
    import pdfplumber

    with pdfplumber.open(str(path)) as pdf:
        return sum(1 for page in pdf.pages for r in page.rects
                   if abs(r["width"] - BOX_PT) < 0.2 and abs(r["height"] - BOX_PT) < 0.2)


def test_participant_stop_names_both_neighbours_dates_and_codes(tmp_path, planned):
    study, manifest = planned
    station = next(s for s in manifest["route"] if s["visit"] is None
                   and s["received_from"] != HOST and s["next_lab"] != HOST)
    path = _render(tmp_path, planned, station)
    text = _flat(path)
    came, goes = study.lab(station["received_from"]), study.lab(station["next_lab"])
    # the sender stands in the left column under "received from", the next one on the right
    left, right = _halves(path)
    assert left.startswith("received from") and came.name in left and came.address[-2] in left
    assert right.startswith("pass on to") and goes.name in right and goes.address[-2] in right
    assert goes.contact.name in right and goes.contact.email in right
    assert goes.name not in left and came.name not in right
    for day in (station["arrive"], station["test_start"], station["test_end"],
                station["pass_on"]):
        assert day in text
    following = _station(manifest, goes.id) if goes.id != HOST else None
    if following:
        assert following["arrive"] in text
    for code in manifest["artefacts"]:
        assert codes.format(code) in text
    assert " ".join(manifest["fingerprint"][i:i + 8] for i in range(0, 64, 8)) in text
    assert "received by" in text and "passed on by" in text
    # one box as received and one as passed on for each artefact
    assert _boxes(path) == 2 * len(manifest["artefacts"])
    pages = pdf_text(path)
    for n in range(1, len(pages) + 1):
        assert f"page {n} of {len(pages)}" in pages[n - 1]


def test_host_start_middle_and_end_sheets(tmp_path, planned):
    study, manifest = planned
    host = study.lab(HOST)
    start = _flat(_render(tmp_path, planned, _station(manifest, HOST, "start")))
    assert "the set starts here" in start and "prepared and checked by (host)" in start
    assert study.lab(_station(manifest, HOST, "start")["next_lab"]).name in start
    middle_station = _station(manifest, HOST, "middle")
    middle = _flat(_render(tmp_path, planned, middle_station))
    assert "received back by (host)" in middle and "passed on by (host)" in middle
    assert study.lab(middle_station["received_from"]).name in middle
    assert study.lab(middle_station["next_lab"]).name in middle
    assert "tell the coordinator" in middle and "tell the host at once" not in middle
    end_station = _station(manifest, HOST, "end")
    end_path = _render(tmp_path, planned, end_station)
    end = _flat(end_path)
    assert "the route ends here" in end and "the set stays with the host" in end
    assert study.lab(end_station["received_from"]).name in end
    assert "passed on: OK" not in end and "Pass the set on by" not in end
    assert _boxes(end_path) == len(manifest["artefacts"])
    assert host.name in end


def test_pages_are_a4_and_no_material_is_named(tmp_path, planned):
    import pdfplumber

    study, manifest = planned
    for station in manifest["route"]:
        path = _render(tmp_path, planned, station)
        text = " ".join(pdf_text(path))
        assert not any(word in text for word in secret_words(study))
        with pdfplumber.open(str(path)) as pdf:
            for page in pdf.pages:
                assert page.mediabox[2] == pytest.approx(A4_PT[0], abs=TENTH_MM_PT)
                assert page.mediabox[3] == pytest.approx(A4_PT[1], abs=TENTH_MM_PT)


def test_hazard_cautions_defer_to_the_safety_data_sheet(tmp_path):
    def with_hazard(text):
        return text.replace(
            "storage: 'flat, sealed with desiccant', stability_days: 365}",
            "storage: 'flat, sealed with desiccant', stability_days: 365, "
            "hazard: {word: IRRITANT, note: wear gloves when handling}}")

    study, manifest = _plan(tmp_path / "hazard", with_hazard)
    assert any(m.hazard for m in study.materials)
    station = _station(manifest, HOST, "start")
    text = _flat(_render(tmp_path, (study, manifest), station))
    assert "IRRITANT: wear gloves when handling" in text
    assert " ".join(SDS_NOTE.split()) in text
    assert not any(word in text for word in secret_words(study))


def test_no_hazard_says_so(tmp_path, planned):
    _, manifest = planned
    text = _flat(_render(tmp_path, planned, _station(manifest, HOST, "end")))
    assert "No artefact of this set carries a hazard word." in text
    assert " ".join(SDS_NOTE.split()) in text


def test_file_names_and_split_rounds_refused(tmp_path, planned):
    study, manifest = planned
    assert handover.file_name(_station(manifest, HOST, "middle")) == "handover-middle.pdf"
    assert handover.file_name(_station(manifest, "crx")) == "handover.pdf"
    split = {**manifest, "mode": "split"}
    with pytest.raises(ValueError, match="circulating set"):
        handover.render(tmp_path / "x.pdf", study, split, manifest["route"][0], paper="A4")
