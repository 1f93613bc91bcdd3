"""The command line as a user meets it: one line and exit 2 for mistakes, lazy imports."""

from __future__ import annotations

import hashlib
import json
import subprocess
import sys

import pytest

from conftest import ROOT, run_cli


def test_cli_import_leaves_heavy_libraries_unloaded():
    probe = ("import sys, planner.cli; heavy = {'numpy', 'scipy', 'reportlab', 'cryptography', "
             "'pydantic', 'openpyxl', 'qrcode', 'holidays', 'rich'}; "
             "print(sorted(heavy & {m.partition('.')[0] for m in sys.modules}))")
    run = subprocess.run([sys.executable, "-c", probe], capture_output=True, text=True,
                         check=True, cwd=ROOT)
    assert run.stdout.strip() == "[]"


def test_help_lists_the_commands(runner):
    result = run_cli(runner, "--help")
    assert result.exit_code == 0
    for command in ("new", "check", "plan", "unseal", "verify"):
        assert command in result.stdout


def test_python_dash_m_runs(tmp_path):
    run = subprocess.run([sys.executable, "-m", "planner", "--help"], capture_output=True,
                         text=True, cwd=ROOT)
    assert run.returncode == 0 and "Usage" in run.stdout


def test_new_writes_a_valid_template_and_refuses_to_overwrite(tmp_path, runner):
    result = run_cli(runner, "new", tmp_path / "s")
    assert result.exit_code == 0, result.output
    assert run_cli(runner, "check", tmp_path / "s").exit_code == 0
    again = run_cli(runner, "new", tmp_path / "s")
    assert again.exit_code == 2 and "already exists" in again.stderr


def test_check_json_counts_units(example_dir, runner):
    result = run_cli(runner, "check", example_dir, "--json")
    assert result.exit_code == 0, result.output
    info = json.loads(result.stdout)
    first = info["materials"][0]
    # 5 labs x 3 trials = 15 test units, + 5 spares + 2 retained + 10 homogeneity
    assert (first["test"], first["spare"], first["retained"], first["homogeneity"]) == (15, 5, 2, 10)
    assert first["units"] == 32 and first["total_amount"] == 32 * 30
    assert info["units_total"] == 32 * 6
    assert info["next_host"]["host"] in {lab["id"] for lab in info["laboratories"] if lab["can_host"]}


def test_plan_unseal_verify_and_tamper(example_dir, runner, passphrase):
    result = run_cli(runner, "plan", example_dir, "--round", "2027-1", "--host", "kal")
    assert result.exit_code == 0, result.output
    folder = example_dir / "rounds" / "2027-1"
    refused = run_cli(runner, "unseal", example_dir, "--round", "2027-1")
    assert refused.exit_code == 2 and "results are still missing" in refused.stderr
    assert not (folder / "key.json").exists()
    opened = run_cli(runner, "unseal", example_dir, "--round", "2027-1", "--force",
                     "--reason", "audit drill")
    assert opened.exit_code == 0, opened.output
    key_bytes = (folder / "key.json").read_bytes()
    assert hashlib.sha256(key_bytes).hexdigest() == (folder / "key.fingerprint").read_text().strip()
    assert run_cli(runner, "verify", example_dir, "--round", "2027-1").exit_code == 0
    key = json.loads(key_bytes)
    unit = key["units"][3]
    unit["trial"] = None if unit["trial"] else 1
    (folder / "key.json").write_text(json.dumps(key, sort_keys=True, separators=(",", ":")))
    failed = run_cli(runner, "verify", example_dir, "--round", "2027-1")
    assert failed.exit_code == 1
    assert "does not equal the fingerprint" in failed.stderr
    from planner import codes
    assert f"unit {codes.format(unit['code'])}: trial is" in failed.stderr


@pytest.mark.parametrize("args,expected", [
    (["--host", "zzz"], "--host 'zzz' is not a laboratory of this study"),
    (["--host", "crx"], "--host 'crx' cannot host"),
    (["--receive-by", "2027-13-01"], "--receive-by '2027-13-01' is not a date"),
], ids=["unknown-host", "host-cannot-host", "bad-date"])
def test_plan_option_mistakes(example_dir, runner, passphrase, args, expected):
    result = run_cli(runner, "plan", example_dir, "--round", "2027-1", *args)
    assert result.exit_code == 2
    lines = result.stderr.strip().splitlines()
    assert len(lines) == 1 and lines[0].startswith(f"error: {expected}")
    assert not (example_dir / "rounds").exists()


def test_bad_round_id(example_dir, runner, passphrase):
    result = run_cli(runner, "plan", example_dir, "--round", "2027/1")
    assert result.exit_code == 2 and "is not a usable round id" in result.stderr


def test_passphrase_sources(example_dir, runner, monkeypatch, tmp_path):
    monkeypatch.delenv("RINGPLAN_PASSPHRASE", raising=False)
    empty = tmp_path / "empty.txt"
    empty.write_text("")
    result = run_cli(runner, "plan", example_dir, "--round", "R", "--passphrase-file", empty)
    assert result.exit_code == 2 and "the passphrase file is empty" in result.stderr
    missing = run_cli(runner, "plan", example_dir, "--round", "R", "--passphrase-file",
                      tmp_path / "nope.txt")
    assert missing.exit_code == 2 and "cannot read the passphrase file" in missing.stderr
    short = tmp_path / "short.txt"
    short.write_text("abc\n")
    result = run_cli(runner, "plan", example_dir, "--round", "R", "--passphrase-file", short)
    assert result.exit_code == 2 and "use at least 10" in result.stderr
    good = tmp_path / "good.txt"
    good.write_text("a passphrase from a file\n")
    assert run_cli(runner, "plan", example_dir, "--round", "R", "--passphrase-file",
                   good).exit_code == 0
    wrong = tmp_path / "wrong.txt"
    wrong.write_text("not the right passphrase\n")
    result = run_cli(runner, "unseal", example_dir, "--round", "R", "--force", "--reason", "x",
                     "--passphrase-file", wrong)
    assert result.exit_code == 2 and "wrong passphrase" in result.stderr


def test_tampered_sealed_key_from_cli(example_dir, runner, passphrase):
    assert run_cli(runner, "plan", example_dir, "--round", "R", "--host", "kal").exit_code == 0
    sealed = example_dir / "rounds" / "R" / "key.sealed"
    doc = json.loads(sealed.read_text())
    doc["data"] = ("A" if doc["data"][0] != "A" else "B") + doc["data"][1:]
    sealed.write_text(json.dumps(doc))
    result = run_cli(runner, "unseal", example_dir, "--round", "R", "--force", "--reason", "x")
    assert result.exit_code == 2 and "has been altered" in result.stderr


def test_one_passphrase_whatever_its_source(example_dir, runner, monkeypatch, tmp_path):
    # Planned with a file saved by a Windows editor (BOM, CRLF) and opened from the
    # environment with a trailing newline and from a plain file: the same phrase.
    monkeypatch.delenv("RINGPLAN_PASSPHRASE", raising=False)
    phrase = "maple tide lantern"
    windows = tmp_path / "win.txt"
    windows.write_bytes(("\ufeff" + phrase + "\r\n").encode("utf-8"))
    windows.chmod(0o600)
    planned = run_cli(runner, "plan", example_dir, "--round", "R", "--host", "kal",
                      "--passphrase-file", windows)
    assert planned.exit_code == 0, planned.stderr
    assert "warning" not in planned.stderr  # owner-only file: no warning
    monkeypatch.setenv("RINGPLAN_PASSPHRASE", phrase + "\n")
    opened = run_cli(runner, "unseal", example_dir, "--round", "R", "--force", "--reason", "x")
    assert opened.exit_code == 0, opened.stderr


@pytest.mark.parametrize("weak, message", [
    ("          ", "the passphrase file is empty"),
    ("1234567890", "too easy to guess"),
    ("aaaaabbbbb", "too easy to guess"),
])
def test_weak_passphrases_are_refused_when_sealing(example_dir, runner, monkeypatch, tmp_path,
                                                    weak, message):
    monkeypatch.delenv("RINGPLAN_PASSPHRASE", raising=False)
    path = tmp_path / "weak.txt"
    path.write_text(weak + "\n")
    path.chmod(0o600)
    result = run_cli(runner, "plan", example_dir, "--round", "R", "--passphrase-file", path)
    assert result.exit_code == 2 and message in result.stderr
    assert len(result.stderr.strip().splitlines()) == 1
    assert not (example_dir / "rounds" / "R").exists()


def test_a_passphrase_file_others_can_read_is_named_in_a_warning(example_dir, runner,
                                                                 monkeypatch, tmp_path):
    monkeypatch.delenv("RINGPLAN_PASSPHRASE", raising=False)
    path = tmp_path / "open.txt"
    path.write_text("maple tide lantern\n")
    path.chmod(0o644)
    result = run_cli(runner, "plan", example_dir, "--round", "R", "--host", "kal",
                     "--passphrase-file", path)
    assert result.exit_code == 0
    assert f"warning: {path}: the passphrase file can be read by other users" in result.stderr


@pytest.mark.parametrize("value", ["nan", "1e9", "-25"])
def test_a_label_shift_that_no_printer_needs_is_refused(example_dir, runner, value):
    result = run_cli(runner, "print", example_dir, "--round", "R", "--offset-x", value)
    assert result.exit_code == 2 and "is not a usable shift" in result.stderr
    assert "Traceback" not in result.output


@pytest.mark.parametrize("name", ["taken", "taken/sub"])
def test_new_where_a_file_stands_is_one_line(tmp_path, runner, name):
    (tmp_path / "taken").write_text("a file\n")
    result = run_cli(runner, "new", tmp_path / name)
    assert result.exit_code == 2 and "is a file, not a folder" in result.stderr
    assert len(result.stderr.strip().splitlines()) == 1 and "Traceback" not in result.output
