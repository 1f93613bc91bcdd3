"""Every document tells how the key was opened, as the ledger shows it, and history trusts
only evaluations the ledger recorded.

Rounds are planned from the example study with the fixed secret of conftest and fed
through the command line as a coordinator would: forms received with ``ringplan
receive``, the prep sheet printed early, the key opened with ``unseal --force`` while
one laboratory (crx) has sent nothing, then ``ringplan evaluate``. The expected
sentences are the ones the documents promise; times are the ledger clock's, set here.
"""

from __future__ import annotations

import json
import re
import shutil
from pathlib import Path

import pytest
from conftest import EXAMPLE, LABS, PASSPHRASE, ROUND, filled, plan_example_round, run_cli, write
from typer.testing import CliRunner

from planner import plan

FORCED_REASON = "crx sent nothing"
PRINTED_AT = "2027-01-11T08:30:00+00:00"
RECEIVED_AT = "2027-01-30T09:00:00+00:00"
OPENED_AT = "2027-02-03T10:15:00+00:00"
OLD_CLAIM = "only after every result was in"


def _text(path: Path) -> str:
    """Return the words of a PDF with every run of white space made one space."""
    import pdfplumber

    with pdfplumber.open(path) as pdf:
        return " ".join(" ".join((page.extract_text() or "").split()) for page in pdf.pages)


def _flat(text: str) -> str:
    return " ".join(text.split())


def _words(lab: str):
    """Return the texts a laboratory's letter is written in (hel writes German, study.yaml)."""
    from planner import language, spec

    return language.texts(language.of(spec.load(EXAMPLE).lab(lab)))


def _round(base: Path, *, senders, force: bool, print_early: bool = True) -> Path:
    """Plan, (print the prep sheet,) receive the forms of ``senders``, unseal, evaluate."""
    from planner.ledger import Ledger

    study_dir = base / "norrvik-mfr"
    shutil.copytree(Path(__file__).resolve().parent.parent / "examples" / "norrvik-mfr",
                    study_dir)
    runner = CliRunner()
    clock = {"now": PRINTED_AT}
    with pytest.MonkeyPatch.context() as mp:
        mp.setattr(Ledger, "now", lambda self: clock["now"])
        mp.setenv("RINGPLAN_PASSPHRASE", PASSPHRASE)
        plan_example_round(study_dir)
        if print_early:
            done = run_cli(runner, "print", study_dir, "--round", ROUND, "--only", "prep")
            assert done.exit_code == 0, done.stderr
        clock["now"] = RECEIVED_AT
        for lab in senders:
            done = run_cli(runner, "receive", study_dir, "--round", ROUND,
                           write(base, f"{lab}.csv", filled(study_dir, lab)))
            assert done.exit_code == 0, done.stderr
        clock["now"] = OPENED_AT
        extra = ("--force", "--reason", FORCED_REASON) if force else ()
        done = run_cli(runner, "unseal", study_dir, "--round", ROUND, *extra)
        assert done.exit_code == 0, done.stderr
        done = run_cli(runner, "evaluate", study_dir, "--round", ROUND)
        assert done.exit_code == 0, done.stderr
    return study_dir


@pytest.fixture(scope="module")
def forced(tmp_path_factory) -> Path:
    """A round opened by force while crx had sent nothing, then evaluated."""
    return _round(tmp_path_factory.mktemp("forced"), senders=LABS[:-1], force=True)


@pytest.fixture(scope="module")
def normal(tmp_path_factory) -> Path:
    """A round opened once every laboratory's form was recorded, then evaluated."""
    return _round(tmp_path_factory.mktemp("normal"), senders=LABS, force=False,
                  print_early=False)


def _report(study_dir: Path) -> Path:
    return plan.round_dir(study_dir, ROUND) / "report"


def _statistics(study_dir: Path) -> dict:
    return json.loads((_report(study_dir) / "statistics.json").read_text(encoding="utf-8"))


# --- a forced opening ----------------------------------------------------------------

def test_statistics_json_records_the_forced_opening_and_the_early_printing(forced):
    opening = _statistics(forced)["opening"]
    assert (opening["at"], opening["forced"], opening["reason"], opening["missing"]) == (
        OPENED_AT, True, FORCED_REASON, ["crx"])
    assert [(e["kind"], e["at"], e["detail"]["documents"], e["before_results"])
            for e in opening["early_decryptions"]] == [
        ("printed", PRINTED_AT, ["host/prep-sheet.pdf"], True)]
    assert opening["first_result_at"] == RECEIVED_AT and opening["received_after"] == []


def test_report_says_near_the_top_that_the_key_was_opened_before_every_result(forced):
    import pdfplumber

    with pdfplumber.open(_report(forced) / "report.pdf") as pdf:
        first_page = " ".join((pdf.pages[0].extract_text() or "").split())
    assert ("The decoding key was opened on 2027-02-03 at 10:15 UTC BEFORE every result was "
            f"in: forced by the coordinator, reason: '{FORCED_REASON}'; results missing at "
            "that moment: crx.") in first_page
    assert ("While it was sealed, the key was decrypted on 2027-01-11 at 08:30 UTC to print "
            "the host's documents (prep sheet), before any result had come in.") in first_page
    assert "no results recorded from crx: it has no scores in this round" in first_page
    assert OLD_CLAIM not in _text(_report(forced) / "report.pdf")


@pytest.mark.parametrize("lab", LABS)
def test_every_letter_discloses_the_forced_opening_with_the_reason(forced, lab):
    s = _statistics(forced)
    text = _text(_report(forced) / f"letter-{lab}.pdf")
    assert OLD_CLAIM not in text
    # A letter names only its own laboratory: in the others' letters the reason and the list
    # of the missing give crx's participant code of this round.
    t = _words(lab)
    crx = t("letter.your_laboratory") if lab == "crx" else s["participants"]["crx"]
    said = "crx" if lab == "crx" else s["participants"]["crx"]
    if t.code == "en":
        assert ("The decoding key was opened on 2027-02-03 at 10:15 UTC BEFORE every result was "
                f"in: forced by the coordinator, reason: '{said} sent nothing'; results missing "
                f"at that moment: {crx}.") in text
    # the same sentence in the laboratory's language (hel writes German)
    assert _flat(t("opening.forced", when=t("opening.time_utc", date="2027-02-03", time="10:15"),
                   why=t("opening.reason", reason=f"{said} sent nothing"),
                   missing=crx)) in text
    assert _flat(t("opening.host_documents", when=t("opening.time_utc", date="2027-01-11",
                                                    time="08:30"),
                   documents=t("opening.document.prep-sheet"))
                 + t("opening.before_results")) in text
    for other in LABS:
        if other != lab:
            assert not re.search(rf"\b{other}\b", text), other


def test_the_laboratory_without_results_is_told_so_plainly(forced):
    text = _text(_report(forced) / "letter-crx.pdf")
    assert ("No results of your laboratory were recorded for this round, so it has no scores."
            in text)
    assert "0 of 0" not in text and "satisfactory" not in text.split("All participants")[0]
    # No table of dashes: neither the score table nor the results section, only the title.
    assert "your mean" not in text and text.count("Your results") == 1
    assert _statistics(forced)["results"]["per_lab"]["crx"] == 0


@pytest.mark.parametrize("lab", LABS)
def test_every_letter_prints_the_full_fingerprint(forced, lab):
    fingerprint = _statistics(forced)["fingerprint"]
    text = _text(_report(forced) / f"letter-{lab}.pdf")
    assert len(fingerprint) == 64 and fingerprint in text.replace(" ", "")
    if _words(lab).code == "en":
        assert "equal to the fingerprint printed on your packing list and run sheet" in text
    assert _flat(_words(lab).template("letter.fingerprint_packing").split("{")[0]) in text


def test_results_recorded_after_the_opening_are_named_in_the_disclosure(forced, tmp_path,
                                                                        runner, clock):
    clock["now"] = "2027-02-05T09:00:00+00:00"
    study_dir = _copy(forced, tmp_path)
    late = write(tmp_path, "crx-late.csv", filled(study_dir, "crx"))
    taken = run_cli(runner, "receive", study_dir, "--round", ROUND, late, "--after-unseal",
                    "--reason", "found in the post room")
    assert taken.exit_code == 0, taken.stderr
    assert run_cli(runner, "evaluate", study_dir, "--round", ROUND).exit_code == 0
    s = _statistics(study_dir)
    assert s["opening"]["received_after"] == ["crx"] and s["opening"]["forced"] is True
    assert ("Results recorded after the opening, and flagged after-unseal: crx."
            in _text(_report(study_dir) / "report.pdf"))
    tor = _text(_report(study_dir) / "letter-tor.pdf")
    assert (f"Results recorded after the opening, and flagged after-unseal: "
            f"{s['participants']['crx']}.") in tor
    crx = _text(_report(study_dir) / "letter-crx.pdf")
    assert "flagged after-unseal: your laboratory." in crx
    assert "No results of your laboratory" not in crx   # it has scores now


# --- a normal opening ----------------------------------------------------------------

def test_letters_after_a_normal_opening_say_every_result_was_recorded(normal):
    s = _statistics(normal)
    assert (s["opening"]["forced"], s["opening"]["missing"]) == (False, [])
    assert s["opening"]["early_decryptions"] == []
    for lab in LABS:
        text = _text(_report(normal) / f"letter-{lab}.pdf")
        t = _words(lab)
        assert _flat(t("opening.opened", when=t("opening.time_utc", date="2027-02-03",
                                                 time="10:15"))) in text
        if t.code == "en":
            assert ("The decoding key was opened on 2027-02-03 at 10:15 UTC, after the results "
                    "of every laboratory had been recorded.") in text
        assert "BEFORE" not in text and OLD_CLAIM not in text
        assert "No results of your laboratory" not in text
    report = _text(_report(normal) / "report.pdf")
    assert "after the results of every laboratory had been recorded" in report
    assert "no results recorded from" not in report


# --- status --------------------------------------------------------------------------

def test_status_lists_an_early_printing_of_host_documents_but_not_of_packing_lists(
        planned, runner, passphrase, clock):
    clock["now"] = PRINTED_AT
    assert run_cli(runner, "print", planned, "--round", ROUND, "--only", "packing").exit_code == 0
    before = run_cli(runner, "status", planned, "--round", ROUND)
    assert "decrypted while sealed" not in before.stdout
    assert run_cli(runner, "print", planned, "--round", ROUND, "--only", "prep").exit_code == 0
    after = run_cli(runner, "status", planned, "--round", ROUND)
    assert after.exit_code == 0, after.stderr
    assert ("2027-01-11 at 08:30 UTC: the key was decrypted while sealed, to print host "
            "documents (host/prep-sheet.pdf)") in " ".join(after.stdout.split())
    info = json.loads(run_cli(runner, "status", planned, "--round", ROUND, "--json").stdout)
    assert [e["kind"] for e in info["key"]["early_decryptions"]] == ["printed"]


def test_status_lists_a_spare_issued_and_a_forced_opening(planned, runner, passphrase, clock):
    from planner import codes

    damaged = codes.format(json.loads((plan.round_dir(planned, ROUND) / "manifest.json")
                                      .read_text(encoding="utf-8"))["labs"]["tor"]["trials"][0][0])
    assert run_cli(runner, "spare", planned, "--round", ROUND, "--lab", "tor",
                   "--damaged", damaged).exit_code == 0
    clock["now"] = OPENED_AT
    assert run_cli(runner, "unseal", planned, "--round", ROUND, "--force", "--reason",
                   FORCED_REASON).exit_code == 0
    shown = " ".join(run_cli(runner, "status", planned, "--round", ROUND).stdout.split())
    assert "the key was decrypted while sealed, to issue spare" in shown
    assert f"for unit {damaged} of tor" in shown
    assert ("2027-02-03 at 10:15 UTC: the key was opened BEFORE every result was in, forced: "
            f"reason '{FORCED_REASON}'; missing then: kal, tor, hel, lin, crx") in shown


# --- history -------------------------------------------------------------------------

def _copy(study_dir: Path, tmp_path: Path) -> Path:
    target = tmp_path / "copy"
    shutil.copytree(study_dir, target)
    return target


def test_history_reads_an_evaluation_the_ledger_recorded(forced, tmp_path, runner):
    study_dir = _copy(forced, tmp_path)
    result = run_cli(runner, "history", study_dir, "--json", "--no-pdf")
    assert result.exit_code == 0, result.stderr
    assert [r["round"] for r in json.loads(result.stdout)["rounds"]] == [ROUND]


def test_history_refuses_a_statistics_file_edited_after_evaluation(forced, tmp_path, runner):
    study_dir = _copy(forced, tmp_path)
    path = _report(study_dir) / "statistics.json"
    s = json.loads(path.read_text(encoding="utf-8"))
    block = s["measurands"]["value"]
    for entry in block["scores"][block["materials"][0]]["labs"].values():
        entry["z"] = 0.0                      # everyone made satisfactory
    path.write_text(json.dumps(s, indent=1) + "\n", encoding="utf-8")
    result = run_cli(runner, "history", study_dir, "--no-pdf")
    assert result.exit_code == 2
    lines = result.stderr.strip().splitlines()
    assert len(lines) == 1 and lines[0].startswith(f"error: {path}: the file was changed after "
                                                   f"round '{ROUND}' was evaluated")


def test_history_refuses_statistics_copied_into_a_round_never_evaluated(forced, tmp_path,
                                                                        runner):
    study_dir = _copy(forced, tmp_path)
    fake = study_dir / "rounds" / "2027-9" / "report" / "statistics.json"
    fake.parent.mkdir(parents=True)
    shutil.copy(_report(study_dir) / "statistics.json", fake)
    result = run_cli(runner, "history", study_dir, "--no-pdf")
    assert result.exit_code == 2
    lines = result.stderr.strip().splitlines()
    assert len(lines) == 1 and lines[0] == (
        f"error: {fake}: the ledger records no evaluation of round '2027-9', so 'ringplan "
        "evaluate' did not write this file here; remove it, or evaluate the round")


def test_history_says_when_an_evaluated_round_lost_its_statistics(forced, tmp_path, runner):
    # Deleting a round's statistics must not make its scores vanish from the record quietly.
    study_dir = _copy(forced, tmp_path)
    (_report(study_dir) / "statistics.json").unlink()
    result = run_cli(runner, "history", study_dir, "--no-pdf")
    assert result.exit_code == 0, result.stderr
    assert (f"round {ROUND} was evaluated, but its report/statistics.json is missing"
            in " ".join(result.stdout.split()))
    as_json = json.loads(run_cli(runner, "history", study_dir, "--json", "--no-pdf").stdout)
    assert as_json["missing_statistics"] == [ROUND] and as_json["rounds"] == []
