"""The decoding key: canonical JSON, its fingerprint, and sealing with a passphrase.

The key is canonical JSON (sorted keys, no insignificant white space, UTF-8);
its SHA-256 is the round's fingerprint, printed on every document before
anything ships. ``key.sealed`` holds the key encrypted with AES-256-GCM under a
key derived from the passphrase by scrypt (RFC 7914), both from the
``cryptography`` package. The fingerprint is bound in as associated data, so a
sealed file cannot be swapped for another round's. A separate verifier derived
from the passphrase tells a wrong passphrase apart from a damaged file.

``key.fingerprint`` is a convenience copy for ``sha256sum`` and nothing here
trusts it: the key is checked against the fingerprint the ledger recorded at
planning and the manifest's (``audit.check_fingerprint``).
"""

from __future__ import annotations

import base64
import hashlib
import hmac
import json
import secrets
from pathlib import Path
from typing import Any

from planner.errors import SealError, Where

__all__ = [
    "canonical", "fingerprint", "seal_key", "unseal_key", "write_private",
    "open_key", "read_key_json", "validate_fingerprint", "SEALED_NAME", "FINGERPRINT_NAME",
    "KEY_NAME", "MIN_PASSPHRASE", "normalize_passphrase", "check_strength",
]

SEALED_NAME = "key.sealed"
FINGERPRINT_NAME = "key.fingerprint"
KEY_NAME = "key.json"
MIN_PASSPHRASE = 10
_FORMAT = "ringplan-sealed/1"
# scrypt cost: 2**15 x 8 x 1 uses 32 MiB and about 0.1 s, the interactive setting RFC 7914 suggests.
_SCRYPT = {"n": 2**15, "r": 8, "p": 1}


def canonical(key: dict[str, Any]) -> bytes:
    """Return the canonical JSON bytes of the key (sorted keys, compact, UTF-8)."""
    return json.dumps(key, sort_keys=True, separators=(",", ":"), ensure_ascii=False).encode("utf-8")


def fingerprint(key_json: bytes) -> str:
    """Return the SHA-256 of the canonical key as 64 lower-case hex digits."""
    return hashlib.sha256(key_json).hexdigest()


def validate_fingerprint(text: str, *, field: str | None = None) -> str:
    """Return a typed fingerprint as 64 lower-case hex digits; raise SealError if it is not one.

    Spaces and case are ignored, so the grouped fingerprint of a packing list can be
    typed as printed.
    """
    compact = "".join(text.split()).lower()
    wrong = sorted({c for c in compact if c not in "0123456789abcdef"})
    if wrong or len(compact) != 64:
        verb = "is not a hex digit" if len(wrong) == 1 else "are not hex digits"
        found = (f"{', '.join(map(repr, wrong))} {verb}" if wrong
                 else f"it has {len(compact)} hex digits")
        raise SealError(f"{text!r} is not a SHA-256 fingerprint ({found}); copy the 64 hex "
                        "digits (0-9, a-f) printed on your packing list", Where(field=field))
    return compact


def _derive(passphrase: str, salt: bytes, params: dict[str, int]) -> tuple[bytes, bytes]:
    from cryptography.hazmat.primitives.kdf.scrypt import Scrypt

    raw = Scrypt(salt=salt, length=64, n=params["n"], r=params["r"], p=params["p"]).derive(
        passphrase.encode("utf-8"))
    return raw[:32], hashlib.sha256(b"ringplan-verifier" + raw[32:]).digest()


def normalize_passphrase(text: str) -> str:
    """Return a passphrase as every source gives it: no byte order mark, no line ending, no
    white space at either end (a passphrase never begins or ends with a space; inside it,
    spaces count)."""
    return text.lstrip("\ufeff").strip()


def check_strength(passphrase: str) -> None:
    """Raise SealError for a passphrase too weak to seal a key with, saying what would do."""
    if len(passphrase) < MIN_PASSPHRASE:
        raise SealError(f"the passphrase has {len(passphrase)} characters; use at least "
                        f"{MIN_PASSPHRASE} (a few unrelated words work well)")
    if len(set(passphrase)) < 5 or passphrase.isdigit():
        # '1234567890' or 'aaaaaaaaaa' fall to the first guesses of any attack on scrypt
        raise SealError("the passphrase is too easy to guess (only digits, or fewer than 5 "
                        "different characters); use a few unrelated words")


def seal_key(key_json: bytes, passphrase: str) -> bytes:
    """Return the sealed file's bytes for ``key_json``; raise SealError for a weak passphrase."""
    from cryptography.hazmat.primitives.ciphers.aead import AESGCM

    check_strength(passphrase)
    salt, nonce = secrets.token_bytes(16), secrets.token_bytes(12)
    aes_key, verifier = _derive(passphrase, salt, _SCRYPT)
    print_ = fingerprint(key_json)
    data = AESGCM(aes_key).encrypt(nonce, key_json, print_.encode("ascii"))
    doc = {
        "format": _FORMAT,
        "kdf": {"name": "scrypt", **_SCRYPT, "salt": salt.hex()},
        "verifier": verifier.hex(),
        "cipher": "AES-256-GCM",
        "nonce": nonce.hex(),
        "fingerprint": print_,
        "data": base64.b64encode(data).decode("ascii"),
    }
    return (json.dumps(doc, indent=1) + "\n").encode("ascii")


def unseal_key(sealed: bytes, passphrase: str, *, name: str = SEALED_NAME) -> bytes:
    """Return the canonical key JSON inside ``sealed``; raise SealError if it cannot be opened."""
    from cryptography.exceptions import InvalidTag
    from cryptography.hazmat.primitives.ciphers.aead import AESGCM

    where = Where(name)
    try:
        doc = json.loads(sealed)
        if doc.get("format") != _FORMAT:
            raise ValueError
        kdf = doc["kdf"]
        salt, nonce = bytes.fromhex(kdf["salt"]), bytes.fromhex(doc["nonce"])
        data = base64.b64decode(doc["data"], validate=True)
        params = {k: int(kdf[k]) for k in ("n", "r", "p")}
        print_ = str(doc["fingerprint"])
        verifier = bytes.fromhex(doc["verifier"])
    except (ValueError, KeyError, TypeError, AttributeError):
        raise SealError("this is not a sealed ringplan key or it is damaged; restore it from "
                        "your backup", where) from None
    if params != _SCRYPT or len(salt) != 16 or len(nonce) != 12:
        # A header edited to other scrypt costs would make opening fail oddly, or take
        # hours and gigabytes: only the cost ringplan seals with is read.
        raise SealError("the sealed key's header was altered (its scrypt cost or sizes are "
                        "not the ones ringplan writes); restore it from your backup", where)
    aes_key, check = _derive(passphrase, salt, params)
    if not hmac.compare_digest(check, verifier):
        raise SealError("wrong passphrase for this key; use the passphrase given when the round "
                        "was planned", where)
    try:
        key_json = AESGCM(aes_key).decrypt(nonce, data, print_.encode("ascii"))
    except InvalidTag:
        raise SealError("the sealed key has been altered (its authentication tag does not "
                        "match); restore it from your backup", where) from None
    # The tag only binds the header's fingerprint; whoever holds the passphrase could
    # seal another key under it, so the plaintext must hash to it as well.
    if fingerprint(key_json) != print_:
        raise SealError("the key inside does not hash to the fingerprint in the sealed file's "
                        "header; it was not sealed by ringplan", where)
    return key_json


def write_private(path: Path, data: bytes) -> None:
    """Write ``data`` to ``path`` atomically with owner-only permissions (0600); a link at
    ``path`` is refused (``files.write_bytes``; inside a study folder, call that with the
    study folder as root, so the folders on the way are checked too)."""
    from planner import files

    files.write_bytes(Path(path), data, root=Path(path).parent, private=True)


def open_key(round_dir: Path, passphrase: str) -> dict[str, Any]:
    """Return the decoded key of a round, decrypted in memory; raise SealError if it cannot be
    opened. Only its own header vouches for it: ``audit.open_key`` also checks it against the
    ledger and the manifest."""
    path = round_dir / SEALED_NAME
    try:
        sealed = path.read_bytes()
    except OSError:
        raise SealError("the sealed key is missing", Where(str(path))) from None
    return dict(json.loads(unseal_key(sealed, passphrase, name=str(path))))


def read_key_json(round_dir: Path) -> bytes:
    """Return the bytes of key.json of an unsealed round, unchecked; raise SealError while the
    key is still sealed. ``audit.read_key`` checks them against the ledger and the manifest."""
    path = round_dir / KEY_NAME
    try:
        return path.read_bytes()
    except OSError:
        raise SealError("the key has not been unsealed yet; run 'ringplan unseal' first",
                        Where(str(path))) from None
