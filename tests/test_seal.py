"""Sealing the key: canonical JSON, fingerprint, scrypt + AES-GCM, clear failures."""

from __future__ import annotations

import base64
import hashlib
import json
import stat

import pytest

from planner import seal
from planner.errors import SealError

KEY = {"b": 1, "a": "ü", "units": [{"code": "K7QM4X9PA", "material": "M1"}]}


def test_canonical_json_is_sorted_compact_utf8():
    assert seal.canonical(KEY) == '{"a":"ü","b":1,"units":[{"code":"K7QM4X9PA","material":"M1"}]}'.encode()


def test_fingerprint_is_sha256_hex():
    # FIPS 180-4 test vector: SHA-256("abc")
    assert seal.fingerprint(b"abc") == (
        "ba7816bf8f01cfea414140de5dae2223b00361a396177a9cb410ff61f20015ad")


def test_round_trip_and_wrong_passphrase():
    data = seal.canonical(KEY)
    sealed = seal.seal_key(data, "a long enough phrase")
    # The plaintext writes the material id quoted ('"M1"'); base64 never holds a quote, so
    # this cannot match by chance the way a bare b"M1" did in about 1 run in 30.
    assert data not in sealed and b"K7QM4X9PA" not in sealed and b'"M1"' in data
    assert b'"M1"' not in sealed
    assert seal.unseal_key(sealed, "a long enough phrase") == data
    with pytest.raises(SealError, match="wrong passphrase"):
        seal.unseal_key(sealed, "another long phrase")


def test_tampered_ciphertext_is_named():
    sealed = json.loads(seal.seal_key(seal.canonical(KEY), "a long enough phrase"))
    raw = bytearray(base64.b64decode(sealed["data"]))
    raw[3] ^= 0x01
    sealed["data"] = base64.b64encode(bytes(raw)).decode()
    with pytest.raises(SealError, match="has been altered"):
        seal.unseal_key(json.dumps(sealed).encode(), "a long enough phrase")


def test_swapped_fingerprint_is_detected():
    sealed = json.loads(seal.seal_key(seal.canonical(KEY), "a long enough phrase"))
    sealed["fingerprint"] = "0" * 64
    with pytest.raises(SealError, match="has been altered"):
        seal.unseal_key(json.dumps(sealed).encode(), "a long enough phrase")


def test_garbage_file():
    with pytest.raises(SealError, match="not a sealed ringplan key"):
        seal.unseal_key(b"hello", "a long enough phrase")


def test_short_passphrase_refused():
    with pytest.raises(SealError, match="use at least 10"):
        seal.seal_key(b"{}", "short")


def test_private_files_are_owner_only(tmp_path):
    target = tmp_path / "key.json"
    seal.write_private(target, b"{}")
    assert stat.S_IMODE(target.stat().st_mode) == 0o600
    assert list(tmp_path.iterdir()) == [target]


def test_read_key_json_returns_the_bytes_whatever_key_fingerprint_says(tmp_path):
    # key.fingerprint is a copy for sha256sum; the key is checked against the ledger and
    # the manifest by audit.check_fingerprint (tests/test_fingerprint_attacks.py)
    data = seal.canonical(KEY)
    (tmp_path / seal.KEY_NAME).write_bytes(data)
    (tmp_path / seal.FINGERPRINT_NAME).write_text(hashlib.sha256(b"other").hexdigest() + "\n")
    assert seal.read_key_json(tmp_path) == data
    (tmp_path / seal.KEY_NAME).unlink()
    with pytest.raises(SealError, match="has not been unsealed yet"):
        seal.read_key_json(tmp_path)


@pytest.mark.parametrize("field, value", [("n", 3), ("n", 2 ** 30), ("r", 0), ("p", -1)])
def test_a_sealed_key_with_an_altered_scrypt_cost_is_one_clear_error(field, value):
    from planner.errors import SealError

    sealed = json.loads(seal.seal_key(b'{"a":1}', "maple tide lantern"))
    sealed["kdf"][field] = value
    with pytest.raises(SealError, match="header was altered"):
        seal.unseal_key(json.dumps(sealed).encode(), "maple tide lantern")
