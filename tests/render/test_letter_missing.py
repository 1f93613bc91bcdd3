"""A letter says how many laboratories were missing at a forced opening once the list is long.

A round of hundreds of laboratories opened by force lists every missing laboratory in the
report, by id. A letter used to list them too, by participant code: hundreds of codes in
every letter, which helps no reader. Past ``letter.NAMED_MISSING`` laboratories a letter
says how many of how many participants were missing and whether its own was among them,
in its laboratory's language, and names no one; with a few it still names them by code.
The same holds for the results recorded after the opening.

The round: 14 laboratories writing English, German, French and Spanish, two materials,
planned and sealed, opened by force with no form received (so all 14 are missing, as in
tests/benchmarks/bench_evaluate.py), evaluated from results handed in directly. The other
cases give the letters the same statistics with the ledger's record of the opening changed.
"""

from __future__ import annotations

import copy
import json
import re
from pathlib import Path

import pytest

from planner import language

LANGUAGES = ("en", "de", "fr", "es")
LABS = [f"lab{i:02d}" for i in range(1, 15)]  # lab01 writes English, lab02 German, ...
CODE = re.compile(r"\bP-\d+\b")


def _spec() -> str:
    lines = ["study:", "  id: missing", "  title: Forced opening", "  measurand: melt flow rate",
             "  unit: g/10 min", "laboratories:"]
    for i, lab in enumerate(LABS):
        lines += [f"  - id: {lab}", f"    name: Laboratory {lab}", "    address: [Street 1]",
                  "    contact: {name: A. Person}", "    country: SE",
                  f"    language: {LANGUAGES[i % 4]}",
                  f"    can_host: {'true' if i < 2 else 'false'}", "    transit_days: 1"]
    lines.append("materials:")
    for j in range(2):
        lines += [f"  - id: M{j}", f"    description: material {j}", "    amount: 30",
                  "    amount_unit: g", "    storage: dry", "    stability_days: 365"]
    lines += ["design: {trials: 2, spares_per_lab: 0, run_order: random}",
              "schedule: {receive_by: 2027-03-02, test_window_days: 10, reporting_days: 5}"]
    return "\n".join(lines) + "\n"


def _text(path: Path) -> str:
    import pdfplumber

    with pdfplumber.open(path) as pdf:
        return " ".join(" ".join((page.extract_text() or "").split()) for page in pdf.pages)


def _flat(text: str) -> str:
    return " ".join(text.split())


@pytest.fixture(scope="module")
def forced(tmp_path_factory):
    """The round opened by force before any form came in, evaluated: (study, folder, key,
    rows, statistics, report folder)."""
    from planner import audit, evaluate, spec
    from planner import plan as planning
    from planner.ledger import Ledger

    folder = tmp_path_factory.mktemp("missing") / "study"
    folder.mkdir()
    (folder / "study.yaml").write_text(_spec(), encoding="utf-8")
    study = spec.load(folder)
    with Ledger.open(folder) as ledger:
        dates, route = planning.dates_for(study, LABS[0])
        made = planning.plan_round(study, round_id="R1", host=LABS[0], dates=dates,
                                   secret=bytes(range(32)), route=route)
        planning.write_round(study, folder, made, ledger, passphrase="test-only-passphrase")
        audit.unseal_round(study, folder, "R1", ledger, passphrase="test-only-passphrase",
                           force=True, reason="courier strike")
        values = {lab: 1.0 + i / 100 for i, lab in enumerate(LABS)}
        records = [{"lab": u.lab, "code": u.code, "uncertainty": None,
                    "value": values[u.lab] * (2.0 if u.material == "M1" else 1.0)
                    + 0.001 * u.trial}
                   for u in made.units if u.kind == "test"]
        out = evaluate.evaluate_round(study, folder, "R1", ledger, workers=1, results=records)
        key = planning.key_of(made)
    statistics = json.loads((out / evaluate.STATISTICS_NAME).read_text(encoding="utf-8"))
    return study, key, evaluate.unblind(key, records), statistics, out


def _letters(forced, tmp_path: Path, opening: dict) -> dict[str, str]:
    """Write the round's letters with ``opening`` as the ledger's record; return their texts
    by laboratory."""
    from planner.render import letter

    study, _, rows, statistics, _ = forced
    changed = copy.deepcopy(statistics)
    changed["opening"].update(opening)
    to = [letter.Addressee(lab.id, lab.name, tuple(lab.address), lab.contact.name,
                           lab.decimal, language.of(lab)) for lab in study.laboratories]
    paths = letter.render_all(tmp_path, changed, rows, to, paper="A4", workers=1)
    return {p.stem.removeprefix("letter-"): _text(p) for p in paths}


def _key_part(text: str, t: language.Texts) -> str:
    """Return what a letter says under its heading on the decoding key, before the key's
    fingerprint."""
    start = text.index(_flat(t("letter.key_heading")))
    end = text.index(_flat(t.template("letter.fingerprint_packing").split("{")[0]))
    return text[start:end]


def test_the_report_still_names_every_missing_laboratory_by_id(forced):
    *_, statistics, out = forced
    assert statistics["opening"]["forced"] and statistics["opening"]["missing"] == LABS
    report = _text(out / "report.pdf")
    assert "results missing at that moment: " + ", ".join(LABS) + "." in report


@pytest.mark.parametrize("lab", LABS[:4], ids=LANGUAGES)
def test_a_letter_gives_the_count_and_its_own_among_them_and_no_code(forced, lab):
    *_, statistics, out = forced
    text = _text(out / f"letter-{lab}.pdf")
    t = language.texts(LANGUAGES[LABS.index(lab)])
    part = _key_part(text, t)
    said = t("opening.count_all", total=14)  # every participant: "all 14", not "14 of 14"
    assert _flat(said) in part
    # the sentence from the time on, in the laboratory's language
    assert _flat(t("opening.forced", when="WHEN", why=t("opening.reason",
                                                        reason="courier strike"),
                   missing=said).split("WHEN")[1]) in part
    assert not CODE.search(part), part
    assert not any(other in text for other in LABS if other != lab)


def test_a_letter_whose_laboratory_was_not_missing_says_so(forced, tmp_path):
    # 12 of the 14 missing (more than NAMED_MISSING): lab01 and lab02 had sent theirs
    from planner.render import letter

    assert len(LABS[2:]) > letter.NAMED_MISSING
    texts = _letters(forced, tmp_path, {"missing": LABS[2:]})
    for lab, text in texts.items():
        t = language.texts(LANGUAGES[LABS.index(lab) % 4])
        part = _key_part(text, t)
        key = "opening.count_others" if lab in LABS[:2] else "opening.count_yours"
        assert _flat(t(key, count=12, total=14)) in part, lab
        other = "opening.count_yours" if key == "opening.count_others" else "opening.count_others"
        assert _flat(t(other, count=12, total=14)) not in part, lab
        assert not CODE.search(part), (lab, part)


def test_a_few_missing_are_still_named_by_participant_code(forced, tmp_path):
    *_, statistics, _ = forced
    codes = statistics["participants"]
    few = ["lab03", "lab05", "lab09"]
    texts = _letters(forced, tmp_path, {"missing": few, "reason": "lab05 sent nothing"})
    for lab, text in texts.items():
        t = language.texts(LANGUAGES[LABS.index(lab) % 4])
        part = _key_part(text, t)
        named = [t("letter.your_laboratory") if slot == lab else codes[slot] for slot in few]
        assert _flat(t("opening.forced", when="WHEN", why="WHY", missing=", ".join(named))
                     .split("WHY")[1]) in part, lab
        # the reason gives lab05 by its code in the others' letters, as before
        assert ("lab05 sent nothing" if lab == "lab05" else f"{codes['lab05']} sent nothing") \
            in part
        assert set(CODE.findall(part)) == {codes[s] for s in few if s != lab}, lab


def test_results_recorded_after_the_opening_are_counted_past_a_few(forced, tmp_path):
    *_, statistics, _ = forced
    codes = statistics["participants"]
    late = LABS[:11]
    texts = _letters(forced, tmp_path, {"missing": LABS, "received_after": late})
    for lab, text in texts.items():
        t = language.texts(LANGUAGES[LABS.index(lab) % 4])
        part = _key_part(text, t)
        counted = t("opening.count_yours" if lab in late else "opening.count_others",
                    count=11, total=14)
        assert _flat(t("opening.received_after", names=counted)) in part, lab
        assert not CODE.search(part), lab
    texts = _letters(forced, tmp_path / "few", {"missing": LABS, "received_after": late[:2]})
    t = language.texts("en")
    assert _flat(t("opening.received_after", names=f"{codes['lab01']}, {codes['lab02']}")) \
        in _key_part(texts["lab05"], t)
    assert _flat(t("opening.received_after", names=f"your laboratory, {codes['lab02']}")) \
        in _key_part(texts["lab01"], t)


def test_an_id_in_the_reason_is_masked_in_every_letter_with_one_pattern_per_round(forced):
    # The pattern of every id is made once per round (it cost 12 ms a letter at 500
    # laboratories); the own id stays, the others become their codes, longest first and
    # whole ids only, as before.
    from planner.render import _opening

    *_, statistics, _ = forced
    codes = statistics["participants"]
    _opening._ids.cache_clear()
    text = "lab03 and LAB11 sent nothing; lab1 is no id; lab03x neither"
    for lab in LABS:
        out, hidden = _opening.masked(text, codes, keep=lab)
        want = text.replace("lab03 ", ("lab03" if lab == "lab03" else codes["lab03"]) + " ")
        want = want.replace("LAB11", "LAB11" if lab == "lab11" else codes["lab11"])
        assert (out, hidden) == (want, want != text), lab
    assert _opening._ids.cache_info().misses == 1
    assert _opening.masked(text, {"lab03": "P-1"}, keep="lab03") == (text, False)
