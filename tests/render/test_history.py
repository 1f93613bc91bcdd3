"""Tests for planner.render.history: the one-page history of a study.

Rounds are written by hand as statistics.json files (see tests/test_history.py
for the fields) and recorded in the ledger as evaluated; the page is read back with
pypdfium2.
"""

from __future__ import annotations

import hashlib
import json
from pathlib import Path

import pytest

from planner import history
from planner.ledger import Ledger
from planner.render import history as page

# ISO 216 A4 and US Letter in PDF points (1 pt = 25.4/72 mm).
A4_PT = (210 / 25.4 * 72, 297 / 25.4 * 72)
LETTER_PT = (8.5 * 72, 11 * 72)


def _write_page_round(study: Path, round_id: str, host: str, test_start: str, scores: dict) -> None:
    Ledger.open(study).close()  # the ledger exists before any manifest, as after 'ringplan plan'
    folder = study / "rounds" / round_id
    (folder / "report").mkdir(parents=True)
    (folder / "report" / "statistics.json").write_text(json.dumps(
        {"round": round_id, "host": host, "materials": list(scores), "scores": scores}))
    (folder / "manifest.json").write_text(json.dumps(
        {"round": round_id, "host": host, "dates": {"test_start": test_start}}))
    written = (folder / "report" / "statistics.json").read_bytes()
    with Ledger.open(study) as ledger, ledger.transaction():
        ledger.record_event(round_id, "evaluated",
                            {"statistics_sha256": hashlib.sha256(written).hexdigest()})


@pytest.mark.parametrize(("labs", "paper", "size"), [(2, "A4", A4_PT), (120, "letter", LETTER_PT)],
                         ids=["few-labs-A4", "many-labs-letter"])
def test_history_page_is_one_page_of_the_paper_asked(tmp_path, labs, paper, size):
    import pypdfium2

    ids = [f"lab{i:03d}" for i in range(labs)]
    for k in range(6):
        labs_scores = {lab: {"mean": 10.0 + 0.01 * (i - k), "z": 0.3 * ((i + k) % 7 - 3),
                             "z_prime": None} for i, lab in enumerate(ids)}
        scores = {"M": {"assigned_value": 10.0, "use_z_prime": False, "labs": labs_scores}}
        _write_page_round(tmp_path, f"r{k}", ids[k % labs], f"2026-0{k + 1}-10", scores)
    with Ledger.open(tmp_path) as ledger:
        record = history.collect(tmp_path, ledger, labs=ids)
    out = page.render(tmp_path / "history.pdf", record, study_id="s1", title="t", paper=paper)
    pdf = pypdfium2.PdfDocument(out)
    try:
        assert len(pdf) == 1
        assert pdf[0].get_size() == pytest.approx(size, abs=0.01)
        text = pdf[0].get_textpage().get_text_range().replace("\r\n", " ")
    finally:
        pdf.close()
    assert "Laboratories over rounds" in text and "lab000" in text
    assert record["host_effect"]["pooled"]["statement"][:30] in text
