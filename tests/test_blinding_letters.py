"""A participant reads its letter to find which participant code is the host's, and fails.

The attack: a letter that prints the consensus without the host lets its reader leave out
each participant code in turn, rerun Algorithm A (ISO 13528, planner.stats.iso13528) on the
others' means and see which code gives the printed value. The attacker here is generous to
itself: it gets every participant's mean at full precision by participant code (a letter
prints only their scores) and compares at the 4 significant digits a letter prints.

Before, every letter printed "Without the host's results the consensus would be ..."; the
host's own letter still prints the same numbers ("Without your results ..."), so the attack is
shown to work on that text, and to find nothing in every other letter. The round is the demo
(five laboratories, six materials).
"""

from __future__ import annotations

import json
import re

import pytest

from planner import demo, language, results, spec
from planner.stats import iso13528

_SENTENCE = re.compile(r"Without (?:your|the host's) results the consensus would be "
                       r"\(difference in brackets\): (.*?)\.(?:\s|$)")


def _text(path) -> str:
    import pdfplumber

    with pdfplumber.open(path) as pdf:
        return " ".join(" ".join((page.extract_text() or "").split()) for page in pdf.pages)


@pytest.fixture(scope="module")
def round_(tmp_path_factory):
    made = demo.build_demo(tmp_path_factory.mktemp("letters") / "ringplan-demo")
    raw = json.loads(made["statistics"].read_text(encoding="utf-8"))
    stats = results.measurand_view(raw, results.measurand_ids(raw)[0])
    letters = {path.stem.removeprefix("letter-"): _text(path) for path in made["letters"]}
    return stats, letters


def _published(text: str) -> dict[str, float]:
    """Return material -> the consensus without the host as the letter prints it."""
    found = _SENTENCE.search(text)
    if not found:
        return {}
    out = {}
    for part in found.group(1).split("; "):
        material, value, _ = part.split(" ", 2)
        out[material] = float(value.replace(",", "."))
    return out


def host_candidates(text: str, stats: dict) -> set[str]:
    """Return the participant codes whose leaving-out reproduces every printed value (every
    code when the letter prints none)."""
    codes_of = stats["participants"]
    published = _published(text)
    candidates = set(codes_of.values())
    for material, printed in published.items():
        means = {codes_of[lab]: e["mean"] for lab, e in stats["scores"][material]["labs"].items()
                 if e.get("mean") is not None}
        keep = set()
        for code in candidates:
            rest = [v for c, v in means.items() if c != code]
            if float(f"{iso13528.algorithm_a(rest).x:.4g}") == printed:
                keep.add(code)
        candidates = keep
    return candidates


def test_the_printed_consensus_without_the_host_gives_the_host_away(round_):
    stats, letters = round_
    host = stats["host"]
    assert _published(letters[host]), "the host's letter keeps the values"
    # What every letter used to print singles out the host's code among five.
    assert host_candidates(letters[host], stats) == {stats["participants"][host]}


def test_no_other_letter_lets_its_reader_single_out_the_host(round_):
    stats, letters = round_
    everyone = set(stats["participants"].values())
    others = [lab for lab in letters if lab != stats["host"]]
    assert len(others) == 4
    for lab in others:
        text = letters[lab]
        assert "consensus would be" not in text and "without the host" not in text.lower(), lab
        assert host_candidates(text, stats) == everyone, lab
        # nor is any of those values printed elsewhere in the letter
        for material, entry in stats["scores"].items():
            value = (entry.get("without_host") or {}).get("assigned_value")
            if value is not None:
                assert f"{value:.4g}" not in text and f"{value:.4g}".replace(".", ",") not in text


def test_the_report_keeps_the_consensus_without_the_host_for_the_coordinator(round_):
    stats, _ = round_
    # every material whose assigned value is a consensus (a known value has none to leave out)
    known = stats["settings"]["known_values"]
    assert all(stats["scores"][m]["without_host"].get("assigned_value") is not None
               for m in stats["materials"] if m not in known)
    assert all("known value" in stats["scores"][m]["without_host"]["skipped"] for m in known)


def test_no_letter_names_the_participant_code_a_spare_went_to(round_):
    # The host sent the spare, so it knows to whom: a P-code beside "spare" would name that
    # laboratory to the host. The demo issues one spare, to hel.
    # Each letter says it in its laboratory's language (hel writes German).
    stats, letters = round_
    study = spec.load(demo.example_spec())
    for lab, text in letters.items():
        t = language.texts(language.of(study.lab(lab)))
        # "on {when} to issue a spare unit to {lab}": what follows the time
        said = t.template("opening.spare").split("{when}")[1]
        assert said.format(lab=t("letter.your_laboratory") if lab == "hel"
                           else t("letter.a_participant")).strip() in text, lab
        assert said.format(lab=stats["participants"]["hel"]).strip() not in text, lab
