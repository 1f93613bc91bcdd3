"""Forging the opened key the way a coordinator could, and the checks that refuse it.

Every attack here rewrites plain files of the round folder (key.json, key.fingerprint,
manifest.json, key.sealed), as anyone with the folder can. What no attack rewrites is
the fingerprint the ledger recorded at planning and the one printed on the packing
lists (read back from the PDF a laboratory receives); those decide.
"""

from __future__ import annotations

import base64
import json
import re

import pytest

from conftest import LABS, PASSPHRASE, ROUND, filled, receive, run_cli, write
from planner import audit, plan, seal, spec
from planner.errors import SealError
from planner.ledger import Ledger

_GROUPED = re.compile(r"\b(?:[0-9a-f]{8} ){7}[0-9a-f]{8}\b")


# --- a round whose results are in and whose key is open --------------------------------

@pytest.fixture
def unsealed(planned, runner, tmp_path, passphrase):
    """The example round with every laboratory's form received and the key opened."""
    for lab in LABS:
        assert receive(runner, planned, write(tmp_path, f"{lab}.csv",
                                              filled(planned, lab))).exit_code == 0
    opened = run_cli(runner, "unseal", planned, "--round", ROUND)
    assert opened.exit_code == 0, opened.stderr
    return planned


def _folder(study_dir):
    return plan.round_dir(study_dir, ROUND)


def _planned_fingerprint(study_dir):
    with Ledger.open(study_dir) as ledger:
        return ledger.current_round(ROUND).fingerprint


def _packing_list_fingerprint(study_dir, runner, lab="tor"):
    """Print a laboratory's packing list and return the fingerprint on it, as printed."""
    from pdfplumber import open as open_pdf

    made = run_cli(runner, "print", study_dir, "--round", ROUND, "--only", "packing",
                   "--lab", lab)
    assert made.exit_code == 0, made.stderr
    with open_pdf(_folder(study_dir) / "labs" / lab / "packing-list.pdf") as pdf:
        text = "\n".join(page.extract_text() or "" for page in pdf.pages)
    (found,) = set(_GROUPED.findall(text))
    return found


def _swap_two_materials(key):
    """Swap the materials of the first two test units of one laboratory that differ in it;
    return their codes."""
    units = [u for u in key["units"] if u["kind"] == "test" and u["lab"] == "tor"]
    a = units[0]
    b = next(u for u in units if u["material"] != a["material"])
    a["material"], b["material"] = b["material"], a["material"]
    return a["code"], b["code"]


def _rewrite_manifest(study_dir, fingerprint):
    path = _folder(study_dir) / plan.MANIFEST_NAME
    manifest = json.loads(path.read_text(encoding="utf-8"))
    manifest["fingerprint"] = fingerprint
    path.write_text(json.dumps(manifest, indent=1, ensure_ascii=False) + "\n", encoding="utf-8")


def _forge_key_json(study_dir, *, manifest=True):
    """Swap two materials in key.json and write its new SHA-256 into key.fingerprint (and,
    unless told not to, into the manifest); return the new SHA-256 and the two codes."""
    folder = _folder(study_dir)
    key = json.loads((folder / seal.KEY_NAME).read_bytes())
    swapped = _swap_two_materials(key)
    forged = seal.canonical(key)   # canonical, so that sha256sum gives the same as ringplan
    (folder / seal.KEY_NAME).write_bytes(forged)
    print_ = seal.fingerprint(forged)
    (folder / seal.FINGERPRINT_NAME).write_text(print_ + "\n", encoding="ascii")
    if manifest:
        _rewrite_manifest(study_dir, print_)
    return print_, swapped


def _one_error_line(result):
    """Assert a refusal: exit 2, exactly one stderr line starting 'error:', no traceback;
    return the line."""
    assert result.exit_code == 2, (result.stdout, result.stderr)
    assert isinstance(result.exception, SystemExit)
    lines = result.stderr.strip().splitlines()
    assert len(lines) == 1 and lines[0].startswith("error: "), lines
    assert "Traceback" not in result.output
    return lines[0]


def _findings(result):
    """Assert an audit finding: exit 1, every stderr line starting 'error:', no traceback;
    return the lines."""
    assert result.exit_code == 1, (result.stdout, result.stderr)
    assert isinstance(result.exception, SystemExit)
    lines = result.stderr.strip().splitlines()
    assert lines and all(line.startswith("error: ") for line in lines), lines
    assert "Traceback" not in result.output
    return lines


def _nothing_evaluated(study_dir):
    assert not (_folder(study_dir) / "report").exists()
    with Ledger.open(study_dir) as ledger:
        assert ledger.events(ROUND, "evaluated") == []
    return True


# --- the forged key, with key.fingerprint and the manifest rewritten to match ---------------

def test_forged_key_agrees_with_the_rewritten_fingerprint_file_and_manifest(unsealed):
    planned = _planned_fingerprint(unsealed)
    forged, _ = _forge_key_json(unsealed)
    folder = _folder(unsealed)
    # what the coordinator's files say: the forged key matches both, so a check against
    # them alone (as evaluate made against key.fingerprint before) would have passed
    assert seal.fingerprint((folder / seal.KEY_NAME).read_bytes()) == forged
    assert (folder / seal.FINGERPRINT_NAME).read_text().split()[0] == forged
    assert plan.read_manifest(folder)["fingerprint"] == forged
    # what they do not say: the ledger still holds the fingerprint of planning
    assert forged != planned


def test_evaluate_refuses_a_forged_key_because_the_ledger_holds_the_planned_fingerprint(
        unsealed, runner):
    planned = _planned_fingerprint(unsealed)
    forged, _ = _forge_key_json(unsealed)
    line = _one_error_line(run_cli(runner, "evaluate", unsealed, "--round", ROUND))
    key_path = _folder(unsealed) / seal.KEY_NAME
    assert line == (
        f"error: {key_path}: its SHA-256 {forged[:16]}... does not equal the fingerprint "
        f"recorded in the ledger at planning, {planned[:16]}...; manifest.json was rewritten "
        "to match the key; this is not the key fixed before shipping")
    assert _nothing_evaluated(unsealed)


def test_evaluate_library_raises_seal_error_at_key_json_for_a_forged_key(unsealed):
    from planner import evaluate

    _forge_key_json(unsealed)
    study = spec.load(unsealed)
    with Ledger.open(unsealed) as ledger, pytest.raises(SealError) as caught:
        evaluate.evaluate_round(study, unsealed, ROUND, ledger)
    assert caught.value.where.file == str(_folder(unsealed) / seal.KEY_NAME)
    assert "recorded in the ledger at planning" in caught.value.message


def test_verify_finds_a_forged_key_and_names_the_swapped_units(unsealed, runner):
    from planner import codes

    _, (a, b) = _forge_key_json(unsealed)
    lines = _findings(run_cli(runner, "verify", unsealed, "--round", ROUND))
    assert "does not equal the fingerprint recorded in the ledger at planning" in lines[0]
    assert "manifest.json was rewritten to match the key" in lines[0]
    for code in (a, b):
        assert any(line.startswith(f"error: unit {codes.format(code)}: material is")
                   for line in lines[1:]), (code, lines)


def test_verify_with_the_packing_list_fingerprint_fails_on_a_forged_key(unsealed, runner):
    printed = _packing_list_fingerprint(unsealed, runner)
    assert printed.replace(" ", "") == _planned_fingerprint(unsealed)
    forged, _ = _forge_key_json(unsealed)
    lines = _findings(run_cli(runner, "verify", unsealed, "--round", ROUND,
                              "--fingerprint", printed))
    given = [line for line in lines if "differs from the fingerprint given" in line]
    assert given == [
        f"error: {_folder(unsealed) / seal.KEY_NAME}: its SHA-256 {forged[:16]}... differs from "
        f"the fingerprint given, {printed.replace(' ', '')[:16]}...; if it was copied right, this is not the key "
        "the packing list was printed for"]


def test_print_refuses_a_forged_key_so_no_document_shows_the_forged_fingerprint(
        unsealed, runner):
    _forge_key_json(unsealed)
    # A packing list is made without the key, from the manifest: the manifest rewritten to
    # the forged key's fingerprint is what print refuses, before any document.
    line = _one_error_line(run_cli(runner, "print", unsealed, "--round", ROUND,
                                   "--only", "packing", "--lab", "tor"))
    assert "does not equal the one recorded in the ledger at planning" in line
    assert "the manifest was changed" in line
    assert not (_folder(unsealed) / "labs" / "tor" / "packing-list.pdf").exists()
    # Labels are made with the key: there the forged key itself is refused.
    line = _one_error_line(run_cli(runner, "print", unsealed, "--round", ROUND,
                                   "--only", "labels"))
    assert "does not equal the fingerprint recorded in the ledger at planning" in line


# --- key.fingerprint alone -------------------------------------------------------------------

def test_a_rewritten_key_fingerprint_does_not_stop_the_genuine_key(unsealed, runner):
    folder = _folder(unsealed)
    (folder / seal.FINGERPRINT_NAME).write_text("0" * 64 + "\n", encoding="ascii")
    checked = run_cli(runner, "verify", unsealed, "--round", ROUND)
    assert checked.exit_code == 0, checked.stderr
    done = run_cli(runner, "evaluate", unsealed, "--round", ROUND)
    assert done.exit_code == 0, done.stderr
    statistics = json.loads((folder / "report" / "statistics.json").read_text(encoding="utf-8"))
    assert statistics["fingerprint"] == _planned_fingerprint(unsealed)


def test_a_forged_key_with_a_matching_key_fingerprint_is_still_refused(unsealed, runner):
    planned = _planned_fingerprint(unsealed)
    forged, _ = _forge_key_json(unsealed, manifest=False)
    assert (_folder(unsealed) / seal.FINGERPRINT_NAME).read_text().split()[0] == forged
    line = _one_error_line(run_cli(runner, "evaluate", unsealed, "--round", ROUND))
    assert line.endswith(f"its SHA-256 {forged[:16]}... does not equal the fingerprint recorded "
                         f"in the ledger at planning, {planned[:16]}...; this is not the key "
                         "fixed before shipping")
    assert _nothing_evaluated(unsealed)
    lines = _findings(run_cli(runner, "verify", unsealed, "--round", ROUND))
    assert "does not equal the fingerprint recorded in the ledger at planning" in lines[0]


# --- the manifest alone ----------------------------------------------------------------------

def test_a_rewritten_manifest_fingerprint_is_refused_although_the_key_is_genuine(
        unsealed, runner):
    planned = _planned_fingerprint(unsealed)
    _rewrite_manifest(unsealed, "ab" * 32)
    manifest_path = _folder(unsealed) / plan.MANIFEST_NAME
    expected = (f"error: {manifest_path}: its fingerprint {'ab' * 8}... does not equal the one "
                f"recorded in the ledger at planning, {planned[:16]}..., which the key "
                "matches; the manifest was changed")
    assert _one_error_line(run_cli(runner, "evaluate", unsealed, "--round", ROUND)) == expected
    # print of a packing list reads no key, so it cannot say the key matches
    assert _one_error_line(run_cli(runner, "print", unsealed, "--round", ROUND,
                                   "--only", "packing", "--lab", "tor")) == expected.replace(
        ", which the key matches", "")
    assert _findings(run_cli(runner, "verify", unsealed, "--round", ROUND))[0] == expected


# --- a forged key sealed again with the passphrase -------------------------------------------

def _forge_sealed(study_dir):
    """Decrypt the sealed key, swap two materials, seal it again with the same passphrase and
    rewrite key.fingerprint and the manifest to match; return the new SHA-256."""
    folder = _folder(study_dir)
    key = seal.open_key(folder, PASSPHRASE)
    _swap_two_materials(key)
    forged = seal.canonical(key)
    seal.write_private(folder / seal.SEALED_NAME, seal.seal_key(forged, PASSPHRASE))
    (folder / seal.FINGERPRINT_NAME).write_text(seal.fingerprint(forged) + "\n")
    _rewrite_manifest(study_dir, seal.fingerprint(forged))
    return seal.fingerprint(forged)


def test_unseal_refuses_a_forged_key_sealed_again_with_the_passphrase(planned, runner,
                                                                      passphrase):
    _forge_sealed(planned)
    line = _one_error_line(run_cli(runner, "unseal", planned, "--round", ROUND, "--force",
                                   "--reason", "audit drill"))
    assert line.startswith(f"error: {_folder(planned) / seal.SEALED_NAME}: the SHA-256 of the "
                           "key decrypted from it ")
    assert "does not equal the fingerprint recorded in the ledger at planning" in line
    assert not (_folder(planned) / seal.KEY_NAME).exists()


def test_print_refuses_a_forged_key_sealed_again_with_the_passphrase(planned, runner,
                                                                     passphrase):
    _forge_sealed(planned)
    line = _one_error_line(run_cli(runner, "print", planned, "--round", ROUND,
                                   "--only", "prep"))
    assert "the SHA-256 of the key decrypted from it" in line
    assert not (_folder(planned) / "host" / "prep-sheet.pdf").exists()


def test_a_sealed_file_whose_header_names_another_key_is_refused(planned):
    from cryptography.hazmat.primitives.ciphers.aead import AESGCM

    # An attacker with the passphrase encrypts a forged key under the genuine fingerprint
    # as associated data, so that the header still shows the planned fingerprint.
    folder = _folder(planned)
    genuine = json.loads((folder / seal.SEALED_NAME).read_bytes())
    key = seal.open_key(folder, PASSPHRASE)
    _swap_two_materials(key)
    kdf = genuine["kdf"]
    aes_key, _ = seal._derive(PASSPHRASE, bytes.fromhex(kdf["salt"]),
                              {k: kdf[k] for k in ("n", "r", "p")})
    data = AESGCM(aes_key).encrypt(bytes.fromhex(genuine["nonce"]), seal.canonical(key),
                                   genuine["fingerprint"].encode("ascii"))
    lying = {**genuine, "data": base64.b64encode(data).decode("ascii")}
    with pytest.raises(SealError, match="does not hash to the fingerprint in the sealed file"):
        seal.unseal_key(json.dumps(lying).encode("ascii"), PASSPHRASE)


# --- verify --fingerprint ----------------------------------------------------------------------

@pytest.mark.parametrize("form", [
    lambda fp: fp,
    lambda fp: fp.upper(),
    lambda fp: " ".join(fp[i:i + 8] for i in range(0, 64, 8)),
], ids=["compact", "upper-case", "grouped-as-printed"])
def test_verify_with_the_right_fingerprint_passes(unsealed, runner, form):
    result = run_cli(runner, "verify", unsealed, "--round", ROUND,
                     "--fingerprint", form(_planned_fingerprint(unsealed)))
    assert result.exit_code == 0, result.stderr
    assert result.stderr == ""
    assert "the manifest's and the one given" in result.stdout


def test_verify_with_a_wrong_fingerprint_is_a_finding_exit_1(unsealed, runner):
    planned = _planned_fingerprint(unsealed)
    wrong = planned[:-1] + ("0" if planned[-1] != "0" else "1")
    lines = _findings(run_cli(runner, "verify", unsealed, "--round", ROUND,
                              "--fingerprint", wrong))
    assert len(lines) == 1 and "differs from the fingerprint given" in lines[0]


@pytest.mark.parametrize("text,why", [
    ("xyz", "'x', 'y', 'z' are not hex digits"),
    ("ab" * 31 + "a", "it has 63 hex digits"),
    ("ab" * 32 + "0", "it has 65 hex digits"),
    ("ab" * 31 + "ag", "'g' is not a hex digit"),
], ids=["xyz", "63-digits", "65-digits", "one-non-hex"])
def test_verify_with_a_malformed_fingerprint_is_one_error_line_exit_2(unsealed, runner, text,
                                                                      why):
    line = _one_error_line(run_cli(runner, "verify", unsealed, "--round", ROUND,
                                   "--fingerprint", text))
    assert line == (f"error: --fingerprint: {text!r} is not a SHA-256 fingerprint ({why}); copy "
                    "the 64 hex digits (0-9, a-f) printed on your packing list")


def test_check_fingerprint_returns_the_planned_fingerprint_for_the_genuine_key(unsealed):
    folder = _folder(unsealed)
    with Ledger.open(unsealed) as ledger:
        found = audit.check_fingerprint(folder, ledger, ROUND,
                                        (folder / seal.KEY_NAME).read_bytes())
    assert found == _planned_fingerprint(unsealed)
