"""The deterministic random stream derived from the round secret.

Everything random in a round (codes, run orders, which spare goes where)
comes from one 256-bit secret, so that the same study and secret rebuild the
same round on any machine and with any library version. The stream is
HMAC-SHA256 in counter mode, standard library only::

    block[c] = HMAC-SHA256(key=secret, msg=purpose.encode() + b"\\x00" + c.to_bytes(8, "big"))

for c = 0, 1, 2, ...; the blocks are read as one long byte string. Each use
gets its own *purpose* string, so that adding draws for one purpose never
shifts another. The purpose names are the callers' business; the convention is
a slash path naming what is drawn, such as ``"codes"`` or
``"order/<lab>/<trial>"``.

How bytes become numbers is part of the format and must not change:
``bits(k)`` takes the next ceil(k/8) bytes, reads them big-endian and keeps the
top k bits; ``below(n)`` draws ``(n - 1).bit_length()`` bits and rejects values
of n or more; ``shuffle`` is Fisher-Yates from the last position down, with
``below(i + 1)`` choosing the item for position i.

>>> s = Stream(bytes(32), "doc")
>>> t = Stream(bytes(32), "doc")
>>> s.below(1000) == t.below(1000)
True
"""

from __future__ import annotations

import hashlib
import hmac
import secrets
from collections.abc import Sequence
from typing import TypeVar

__all__ = ["SECRET_BYTES", "Stream", "new_secret", "substream"]

SECRET_BYTES = 32
"""Length of a round secret in bytes (256 bits)."""

_T = TypeVar("_T")


def new_secret() -> bytes:
    """Return a fresh 32-byte round secret from the operating system's generator."""
    # The only non-deterministic function of the package: everything else is
    # derived from what this returns, so it must come from a CSPRNG.
    return secrets.token_bytes(SECRET_BYTES)


class Stream:
    """A reproducible source of random bits for one purpose of one round."""

    __slots__ = ("_secret", "_prefix", "_counter", "_buffer")

    def __init__(self, secret: bytes, purpose: str) -> None:
        if not isinstance(secret, bytes | bytearray) or len(secret) != SECRET_BYTES:
            raise ValueError(f"a round secret is {SECRET_BYTES} bytes")
        self._secret = bytes(secret)
        self._prefix = purpose.encode("utf-8") + b"\x00"
        self._counter = 0
        self._buffer = b""

    def __repr__(self) -> str:
        # Never show the secret, not even in a traceback.
        purpose = self._prefix[:-1].decode("utf-8")
        return f"Stream(purpose={purpose!r}, block={self._counter})"

    def _take(self, nbytes: int) -> bytes:
        while len(self._buffer) < nbytes:
            message = self._prefix + self._counter.to_bytes(8, "big")
            block = hmac.new(self._secret, message, hashlib.sha256).digest()
            self._buffer += block
            self._counter += 1
        out, self._buffer = self._buffer[:nbytes], self._buffer[nbytes:]
        return out

    def token(self, nbytes: int) -> bytes:
        """Return the next ``nbytes`` bytes of the stream."""
        if nbytes < 0:
            raise ValueError("nbytes must not be negative")
        return self._take(nbytes)

    def bits(self, k: int) -> int:
        """Return an integer of k random bits, 0 <= value < 2**k."""
        if k < 0:
            raise ValueError("k must not be negative")
        nbytes = (k + 7) // 8
        value = int.from_bytes(self._take(nbytes), "big")
        return value >> (8 * nbytes - k)

    def below(self, n: int) -> int:
        """Return an integer drawn uniformly from 0 .. n-1 (rejection sampling, no bias)."""
        if n < 1:
            raise ValueError("n must be at least 1")
        k = (n - 1).bit_length()
        while True:
            value = self.bits(k)
            if value < n:
                return value

    def shuffle(self, items: Sequence[_T]) -> list[_T]:
        """Return a new list holding the items in a uniformly random order."""
        out = list(items)
        for i in range(len(out) - 1, 0, -1):
            j = self.below(i + 1)
            out[i], out[j] = out[j], out[i]
        return out


def substream(secret: bytes, purpose: str) -> Stream:
    """Return the stream of ``secret`` for ``purpose``, starting at its first byte."""
    return Stream(secret, purpose)
