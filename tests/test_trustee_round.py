"""The example round sealed for three trustees, threshold two, through the CLI from
`trustee new` to `evaluate`: the coordinator alone cannot open the key, the host prints its
documents with its own copy, any two trustees' releases open it, one does not."""

from __future__ import annotations

import json

import pytest

from conftest import LABS, ROUND, clear_shipping, filled, receive, run_cli, write
from planner import plan

TRUSTEES = ("t1", "t2", "t3")


def _secret_file(path, text):
    path.write_text(text + "\n", encoding="utf-8")
    path.chmod(0o600)
    return path


@pytest.fixture
def trustee_round(example_dir, runner, tmp_path, clock, monkeypatch):
    monkeypatch.delenv("RINGPLAN_PASSPHRASE", raising=False)
    words = _secret_file(tmp_path / "pass.txt", "quiet river stone lamp")
    keys = {}
    for who in (*TRUSTEES, "kal"):
        made = run_cli(runner, "trustee", "new", who, "--out", tmp_path / f"{who}.pem",
                       "--passphrase-file", words)
        assert made.exit_code == 0, made.stderr
        keys[who] = made.stdout.strip().splitlines()[-1]
        assert oct((tmp_path / f"{who}.pem").stat().st_mode & 0o777) == "0o600"
    path = example_dir / "study.yaml"
    text = path.read_text(encoding="utf-8")
    text = text.replace("    can_host: true\n    decimal: comma\n    transit_days: 1\n",
                        "    can_host: true\n    decimal: comma\n    transit_days: 1\n"
                        f"    public_key: {keys['kal']}\n", 1)
    text += ("\nsealing:\n  threshold: 2\n  trustees:\n" + "".join(
        f"    - {{id: {t}, name: Trustee {t}, public_key: {keys[t]}}}\n" for t in TRUSTEES))
    path.write_text(text, encoding="utf-8")
    assert run_cli(runner, "check", example_dir).exit_code == 0
    planned = run_cli(runner, "plan", example_dir, "--round", ROUND, "--host", "kal")
    assert planned.exit_code == 0, planned.stderr
    return example_dir, tmp_path, words


def _release(runner, study, tmp_path, words, who):
    out = tmp_path / f"release-{who}.json"
    made = run_cli(runner, "trustee", "release", plan.round_dir(study, ROUND) / "key.sealed",
                   "--key", tmp_path / f"{who}.pem", "--out", out, "--passphrase-file", words)
    assert made.exit_code == 0, made.stderr
    return out


def test_a_round_sealed_for_trustees_from_trustee_new_to_evaluate(trustee_round, runner):
    study, tmp_path, words = trustee_round
    folder = plan.round_dir(study, ROUND)
    assert (folder / plan.HOST_SEALED_NAME).is_file()
    # The coordinator alone cannot print host documents; the host can, with its own copy.
    alone = run_cli(runner, "print", study, "--round", ROUND, "--only", "prep",
                    "--passphrase-file", words)
    assert alone.exit_code == 2 and "sealed for its trustees" in alone.stderr
    host = run_cli(runner, "print", study, "--round", ROUND, "--host-key", tmp_path / "kal.pem",
                   "--passphrase-file", words)
    assert host.exit_code == 0, host.stderr
    assert (folder / "host" / "prep-sheet.pdf").is_file()
    for lab in LABS:
        assert receive(runner, study, write(tmp_path, f"{lab}.csv",
                                            filled(study, lab))).exit_code == 0
    # The coordinator's passphrase never opens a trustee-sealed round.
    tried = run_cli(runner, "unseal", study, "--round", ROUND, "--passphrase-file", words)
    assert tried.exit_code == 2 and "give --release FILE from 2 of them" in tried.stderr
    one = _release(runner, study, tmp_path, words, "t1")
    few = run_cli(runner, "unseal", study, "--round", ROUND, "--release", one)
    assert few.exit_code == 2 and len(few.stderr.strip().splitlines()) == 1
    assert not (folder / "key.json").exists()
    three = _release(runner, study, tmp_path, words, "t3")
    opened = run_cli(runner, "unseal", study, "--round", ROUND, "--release", one,
                     "--release", three)
    assert opened.exit_code == 0, opened.stderr
    assert run_cli(runner, "verify", study, "--round", ROUND).exit_code == 0
    status = run_cli(runner, "status", study, "--round", ROUND)
    assert "opened with the releases of t1, t3" in " ".join(status.stdout.split())
    evaluated = run_cli(runner, "evaluate", study, "--round", ROUND)
    assert evaluated.exit_code == 0, evaluated.stderr
    stats = json.loads((folder / "report" / "statistics.json").read_text(encoding="utf-8"))
    assert stats["opening"]["sealing"]["kind"] == "trustees"
    assert stats["opening"]["releases"] == ["t1", "t3"]


def test_a_release_for_another_round_does_not_open_this_one(trustee_round, runner, clock):
    study, tmp_path, words = trustee_round
    first = _release(runner, study, tmp_path, words, "t1")
    clock["now"] = "2027-01-31T09:00:00+00:00"
    other = run_cli(runner, "plan", study, "--round", "2027-2", "--host", "kal",
                    "--receive-by", "2027-04-20")
    assert other.exit_code == 0, other.stderr
    out = tmp_path / "release-t2-other.json"
    assert run_cli(runner, "trustee", "release", plan.round_dir(study, "2027-2") / "key.sealed",
                   "--key", tmp_path / "t2.pem", "--out", out,
                   "--passphrase-file", words).exit_code == 0
    refused = run_cli(runner, "unseal", study, "--round", ROUND, "--force", "--reason", "test",
                      "--release", first, "--release", out)
    assert refused.exit_code == 2 and len(refused.stderr.strip().splitlines()) == 1
    assert not (plan.round_dir(study, ROUND) / "key.json").exists()


def test_a_threshold_above_the_trustees_is_one_line(example_dir, runner):
    path = example_dir / "study.yaml"
    path.write_text(path.read_text(encoding="utf-8") + "\nsealing:\n  threshold: 4\n"
                    "  trustees:\n    - {id: t1, name: T, public_key: ringplan-x25519:AAAA}\n",
                    encoding="utf-8")
    result = run_cli(runner, "check", example_dir)
    assert result.exit_code == 2
    lines = result.stderr.strip().splitlines()
    assert any("sealing.threshold: 4 is larger than the 1 trustee(s) named" in ln for ln in lines)
    assert any("sealing.trustees[0].public_key" in ln for ln in lines)


def test_the_participants_documents_need_no_key(trustee_round, runner):
    # No passphrase, no host key: packing lists, run sheets and forms come from the manifest
    # and the forms plan wrote; only labels and the preparation sheet need the key.
    study, _, _ = trustee_round
    folder = plan.round_dir(study, ROUND)
    clear_shipping(study, ROUND)
    for only in ("packing", "runsheets", "forms"):
        made = run_cli(runner, "print", study, "--round", ROUND, "--only", only)
        assert made.exit_code == 0, (only, made.stderr)
    assert (folder / "labs" / "tor" / "packing-list.pdf").is_file()
    assert (folder / "labs" / "tor" / "run-sheet.pdf").is_file()
    labels = run_cli(runner, "print", study, "--round", ROUND, "--only", "labels")
    assert labels.exit_code == 2 and "sealed for its trustees" in labels.stderr


def test_the_host_issues_a_spare_with_its_own_copy_and_status_shows_it(trustee_round, runner):
    study, tmp_path, words = trustee_round
    damaged = filled(study, "tor")[11].split(";")[2]  # tor's first unit, as on its form
    alone = run_cli(runner, "spare", study, "--round", ROUND, "--lab", "tor",
                    "--damaged", damaged)
    assert alone.exit_code == 2 and "sealed for its trustees" in alone.stderr
    issued = run_cli(runner, "spare", study, "--round", ROUND, "--lab", "tor", "--damaged",
                     damaged, "--host-key", tmp_path / "kal.pem", "--passphrase-file", words)
    assert issued.exit_code == 0, issued.stderr
    labels = run_cli(runner, "print", study, "--round", ROUND, "--lab", "tor", "--only",
                     "labels", "--host-key", tmp_path / "kal.pem", "--passphrase-file", words)
    assert labels.exit_code == 0, labels.stderr
    shown = " ".join(run_cli(runner, "status", study, "--round", ROUND).stdout.split())
    assert "to issue spare" in shown and "labs/tor/labels.pdf" in shown
    assert "sealed for 3 trustees (t1, t2, t3), any 2 of whom open it together" in shown


def test_the_hosts_copy_put_in_place_of_the_trustees_is_refused(trustee_round, runner):
    # The coordinator copies the host's copy over key.sealed and asks the host alone for a
    # release: the envelope is not sealed to the trustees planning recorded.
    study, tmp_path, words = trustee_round
    folder = plan.round_dir(study, ROUND)
    (folder / "key.sealed").write_bytes((folder / plan.HOST_SEALED_NAME).read_bytes())
    out = tmp_path / "release-kal.json"
    assert run_cli(runner, "trustee", "release", folder / "key.sealed", "--key",
                   tmp_path / "kal.pem", "--out", out, "--passphrase-file", words).exit_code == 0
    tried = run_cli(runner, "unseal", study, "--round", ROUND, "--force", "--reason", "early",
                    "--release", out)
    assert tried.exit_code == 2
    assert "not sealed to the trustees planning recorded" in tried.stderr
    assert not (folder / "key.json").exists()
