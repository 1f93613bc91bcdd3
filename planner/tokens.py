"""Submission tokens: a form comes from its laboratory.

Each laboratory's result form and run sheet carry a token of 12 Crockford base32
characters (60 bits) that no other laboratory receives: it is drawn from the round
secret (HMAC-SHA256 counters of ``draw.Stream``, one stream per laboratory), so it
can be printed again whenever the key is at hand, and the ledger keeps only its
SHA-256, in the round's chained "planned" event. ``receive`` refuses a form whose
token is missing or is not its laboratory's: the manifest, which lists every
laboratory's codes, is not enough to send results in another laboratory's name.
Sixty bits make guessing the token, or inverting its SHA-256, out of reach.
"""

from __future__ import annotations

import hashlib

from planner import codes, draw

__all__ = ["LENGTH", "submission_token", "digest", "compact", "format"]

LENGTH = 12


def submission_token(secret: bytes, lab: str) -> str:
    """Return the submission token of laboratory ``lab`` in a round (12 characters)."""
    stream = draw.Stream(secret, f"submission-token/{lab}")
    value = stream.bits(5 * LENGTH)
    return "".join(codes.ALPHABET[(value >> (5 * i)) & 31] for i in range(LENGTH))


def compact(text: str) -> str:
    """Return a token as typed or printed without spaces or hyphens, upper case."""
    return codes.compact(text)


def digest(token: str) -> str:
    """Return the SHA-256 (hex) of a token, as the ledger keeps it."""
    return hashlib.sha256(f"ringplan-token/1:{compact(token)}".encode("ascii", "replace")
                          ).hexdigest()


def format(token: str) -> str:  # noqa: A001 - the verb every code-like module offers
    """Return a token in groups of four for printing: 'K7QM-4X9P-A2B3'."""
    t = compact(token)
    return "-".join(t[i:i + 4] for i in range(0, len(t), 4))
