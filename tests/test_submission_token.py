"""A form comes from its laboratory: the submission token, tried as a participant who has the
manifest (every laboratory's codes) and wants to send results in another laboratory's name."""

from __future__ import annotations

import json

from conftest import PASSPHRASE, ROUND, filled, nothing_recorded, one_error, receive, write
from planner import plan, seal, tokens
from planner.ledger import Ledger


def _token_line(lines):
    i = next(i for i, ln in enumerate(lines) if ln.startswith("# submission token:"))
    return i, lines[i].split(":", 1)[1].strip()


def test_each_form_carries_its_own_token_and_the_ledger_only_its_digest(planned):
    key = seal.open_key(plan.round_dir(planned, ROUND), PASSPHRASE)
    secret = bytes.fromhex(key["secret"])
    with Ledger.open(planned) as ledger:
        digests = ledger.events(ROUND, "planned")[-1].detail["tokens"]
    seen = set()
    for lab in ("kal", "tor", "hel", "lin", "crx"):
        _, token = _token_line(filled(planned, lab))
        assert tokens.compact(token) == tokens.submission_token(secret, lab)
        assert digests[lab] == tokens.digest(token) and token not in json.dumps(digests)
        seen.add(token)
    assert len(seen) == 5


def test_no_shared_file_holds_a_token(planned):
    from planner.render import print_round

    folder = plan.round_dir(planned, ROUND)
    key = seal.open_key(folder, PASSPHRASE)
    print_round(spec_of(planned), planned, ROUND, key=key, only="runsheets")
    _, kal = _token_line(filled(planned, "kal"))
    shared = [folder / plan.MANIFEST_NAME, folder / seal.FINGERPRINT_NAME,
              planned / "ledger.sqlite"] + sorted((folder / "labs" / "tor").iterdir())
    for path in shared:
        data = path.read_bytes()
        assert tokens.compact(kal).encode() not in data and kal.encode() not in data, path
    assert kal in _pdf_text(folder / "labs" / "kal" / "run-sheet.pdf")


def test_a_form_with_another_laboratorys_token_is_refused(planned, runner, tmp_path):
    # tor fills in its own form but, to send it as kal, needs kal's token: it uses its own.
    lines = filled(planned, "kal")
    i, _ = _token_line(lines)
    lines[i] = "# submission token: " + _token_line(filled(planned, "tor"))[1]
    path = write(tmp_path, "kal-by-tor.csv", lines)
    message = one_error(receive(runner, planned, path), path, i + 1)
    assert "the submission token is not that of laboratory 'kal'" in message
    assert nothing_recorded(planned)


def test_a_form_without_a_token_is_refused(planned, runner, tmp_path):
    lines = [ln for ln in filled(planned, "kal") if not ln.startswith("# submission token:")]
    path = write(tmp_path, "kal.csv", lines)
    assert "has no '# submission token: ...' line" in one_error(
        receive(runner, planned, path), path, 1)
    assert nothing_recorded(planned)


def test_the_token_is_read_however_it_is_typed(planned, runner, tmp_path):
    lines = filled(planned, "kal")
    i, token = _token_line(lines)
    lines[i] = "# submission token: " + token.replace("-", " ").lower()
    result = receive(runner, planned, write(tmp_path, "kal.csv", lines))
    assert result.exit_code == 0, result.stderr


def spec_of(study_dir):
    from planner import spec

    return spec.load(study_dir)


def _pdf_text(path):
    import pdfplumber

    with pdfplumber.open(path) as pdf:
        return "\n".join(page.extract_text() or "" for page in pdf.pages)
