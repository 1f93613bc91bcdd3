"""A participant audits the opened key with nothing but what it holds: key.json and the
manifest the coordinator sends after evaluation, and the fingerprint printed on its own
packing list. No study folder, no ledger."""

from __future__ import annotations

import json
import shutil

from conftest import ROUND, run_cli
from planner import audit, codes, draw, plan, seal, spec
from planner.ledger import Ledger
from test_fingerprint_attacks import (_findings, _folder, _one_error_line,
                                      _packing_list_fingerprint, _swap_two_materials, unsealed)

__all__ = ["unsealed"]  # the fixture, used by the tests below


def _hand_over(study_dir, tmp_path):
    """Copy what the participant receives into a folder of its own."""
    inbox = tmp_path / "inbox"
    inbox.mkdir()
    for name in (seal.KEY_NAME, plan.MANIFEST_NAME):
        shutil.copy(_folder(study_dir) / name, inbox / name)
    return inbox


def _verify(runner, inbox, fingerprint):
    return run_cli(runner, "verify", "--key", inbox / seal.KEY_NAME, "--manifest",
                   inbox / plan.MANIFEST_NAME, "--fingerprint", fingerprint)


def test_the_genuine_key_checks_out_with_only_key_manifest_and_packing_list(unsealed, runner,
                                                                           tmp_path):
    printed = _packing_list_fingerprint(unsealed, runner)
    inbox = _hand_over(unsealed, tmp_path)
    result = _verify(runner, inbox, printed)
    assert result.exit_code == 0, result.stderr
    assert "units and every run order rebuild from its secret exactly" in result.stdout


def test_a_forged_key_with_a_matching_manifest_fails_against_the_packing_list(unsealed, runner,
                                                                             tmp_path):
    printed = _packing_list_fingerprint(unsealed, runner)
    inbox = _hand_over(unsealed, tmp_path)
    key = json.loads((inbox / seal.KEY_NAME).read_bytes())
    a, b = _swap_two_materials(key)
    forged = seal.canonical(key)
    (inbox / seal.KEY_NAME).write_bytes(forged)
    manifest = json.loads((inbox / plan.MANIFEST_NAME).read_text(encoding="utf-8"))
    manifest["fingerprint"] = seal.fingerprint(forged)
    (inbox / plan.MANIFEST_NAME).write_text(json.dumps(manifest), encoding="utf-8")
    lines = _findings(_verify(runner, inbox, printed))
    assert "differs from the fingerprint given" in lines[0]
    text = "\n".join(lines)
    assert codes.format(a) in text and codes.format(b) in text  # the swapped units are named


def test_a_key_whose_frame_was_edited_does_not_rebuild(unsealed, runner, tmp_path):
    # Reordering the materials in the frame would change the run orders the secret gives.
    inbox = _hand_over(unsealed, tmp_path)
    key = json.loads((inbox / seal.KEY_NAME).read_bytes())
    key["frame"]["materials"].reverse()
    (inbox / seal.KEY_NAME).write_bytes(seal.canonical(key))
    lines = _findings(_verify(runner, inbox, seal.fingerprint(seal.canonical(key))))
    assert any("manifest.json: the run orders" in ln or "differ" in ln for ln in lines)


def test_a_published_key_needs_the_packing_list_fingerprint(unsealed, runner, tmp_path):
    inbox = _hand_over(unsealed, tmp_path)
    line = _one_error_line(run_cli(runner, "verify", "--key", inbox / seal.KEY_NAME,
                                   "--manifest", inbox / plan.MANIFEST_NAME))
    assert "needs --key FILE, --manifest FILE and --fingerprint HEX" in line


def test_codes_passed_over_for_earlier_rounds_are_in_the_key_so_the_rebuild_matches(example_dir,
                                                                                  tmp_path):
    # The round secret's first code is made to collide with a code "issued in an earlier
    # round": the draw passes over it, the key says so, and a rebuild from the key alone
    # (which knows no earlier round) still gives the same codes.
    from conftest import SECRET

    study = spec.load(example_dir)
    first = codes.new_code(draw.Stream(SECRET, "codes"))
    dates, route = plan.dates_for(study, "kal")
    result = plan.plan_round(study, round_id=ROUND, host="kal", dates=dates, secret=SECRET,
                             route=route, taken={first})
    key = plan.key_of(result)
    assert key["skipped"] == [first] and first not in {u.code for u in result.units}
    key_json = seal.canonical(key)
    manifest = plan.manifest_of(study, result)
    verdict = audit.verify_key(key_json, manifest, fingerprint=seal.fingerprint(key_json),
                               path=tmp_path / "key.json")
    assert verdict.ok, verdict
    # Without the skipped code the rebuild would differ: the check is not vacuous.
    key["skipped"] = []
    tampered = seal.canonical(key)
    assert not audit.verify_key(tampered, manifest, fingerprint=seal.fingerprint(tampered),
                                path=tmp_path / "key.json").ok


def test_the_ledger_must_have_issued_the_codes_a_key_says_it_passed_over(unsealed):
    # Passing over draws at will would let whoever plans steer which code goes to which
    # unit; the coordinator's verify holds the key's list against the codes the ledger
    # issued in earlier rounds (none here).
    folder = _folder(unsealed)
    key = json.loads((folder / seal.KEY_NAME).read_bytes())
    key["skipped"] = [codes.new_code(draw.Stream(bytes(32), "x"))]
    (folder / seal.KEY_NAME).write_bytes(seal.canonical(key))
    with Ledger.open(unsealed) as ledger:
        verdict = audit.verify_round(plan.round_study(unsealed, ROUND, ledger), unsealed, ROUND,
                                     ledger)
    assert any("passed over 1 code(s) of earlier rounds that the ledger never issued" in d
               for d in verdict.differences)
