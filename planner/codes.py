"""Blind codes: compact, validate, is_valid, format and new_code.

A blind code is 8 random characters (40 bits) from the Crockford base32
alphabet (digits and upper-case letters without I, L, O and U) followed by one
check character computed with the Luhn mod N algorithm over that alphabet
(python-stdnum's ``luhn`` module). It is printed in two groups, 4 and 5
characters: ``K7QM-4X9PA``. The check character catches every single mistyped
character and every swap of two neighbouring characters except a swap of '0'
and 'Z' (the pair (0, N-1) that Luhn mod N cannot see).

Reading a code back is forgiving, as the Crockford base32 spec asks: case,
spaces and hyphens are ignored, and O reads as 0, I and L as 1.

>>> compact("k7qm 4x9pa")
'K7QM4X9PA'
>>> validate("K7QM-4X9PA")
'K7QM4X9PA'
>>> is_valid("K7QM-4X9P0")
False
>>> format("K7QM4X9PA")
'K7QM-4X9PA'
"""

from __future__ import annotations

from collections.abc import Set
from typing import TYPE_CHECKING

from stdnum import luhn

from planner.errors import CodeError, Where

if TYPE_CHECKING:
    from planner.draw import Stream

__all__ = [
    "ALPHABET",
    "PAYLOAD_LENGTH",
    "LENGTH",
    "compact",
    "validate",
    "is_valid",
    "format",
    "calc_check_character",
    "new_code",
    "new_codes",
]

ALPHABET = "0123456789ABCDEFGHJKMNPQRSTVWXYZ"
"""Crockford base32: the 32 symbols, in value order, without I, L, O and U."""

PAYLOAD_LENGTH = 8
"""Random characters in a code (8 x 5 = 40 bits)."""

LENGTH = PAYLOAD_LENGTH + 1
"""Characters in a code with its check character."""

_EXAMPLE = "K7QM-4X9PA"
# Look-alikes the Crockford spec reads as digits; U has no reading and stays an error.
_READ_AS = str.maketrans({"O": "0", "I": "1", "L": "1"})
_IGNORED = " -"
_SYMBOLS = frozenset(ALPHABET)


def compact(text: str) -> str:
    """Return the code in upper case without spaces or hyphens, with O read as 0 and I, L as 1."""
    upper = text.upper().translate(_READ_AS)
    return "".join(ch for ch in upper if ch not in _IGNORED)


def calc_check_character(payload: str) -> str:
    """Return the Luhn mod 32 check character for an 8-character payload."""
    return str(luhn.calc_check_digit(payload, alphabet=ALPHABET))


def validate(text: str, *, where: Where | None = None) -> str:
    """Return the compact code, or raise CodeError saying what is wrong with it."""
    for position, given in enumerate(text, start=1):
        if given in _IGNORED:
            continue
        if compact(given) not in _SYMBOLS:
            raise CodeError(
                f"{text!r} has {given!r} at position {position}, which is not a code "
                "character (codes use the digits and the letters A-Z except I, L, O, U)",
                where)
    code = compact(text)
    if len(code) != LENGTH:
        raise CodeError(
            f"{text!r} has {len(code)} code characters; expected {LENGTH} "
            f"characters like {_EXAMPLE!r}", where)
    if luhn.checksum(code, alphabet=ALPHABET) != 0:
        raise CodeError(
            f"check character does not match in {text!r}: a character was mistyped "
            "or two were swapped", where)
    return code


def is_valid(text: str) -> bool:
    """Return whether the text reads as a code with a matching check character."""
    try:
        validate(text)
    except CodeError:
        return False
    return True


def format(code: str) -> str:  # noqa: A001 - the stdnum verb, called as codes.format
    """Return the code in its printed form, 4 characters, a hyphen, then 5."""
    compacted = compact(code)
    return f"{compacted[:4]}-{compacted[4:]}"


def new_code(stream: Stream) -> str:
    """Return a new compact code: 8 characters drawn from the stream and the check character."""
    payload = "".join(ALPHABET[stream.below(len(ALPHABET))] for _ in range(PAYLOAD_LENGTH))
    return payload + calc_check_character(payload)


def new_codes(stream: Stream, count: int, *, taken: Set[str] = frozenset(),
              skipped: list[str] | None = None) -> list[str]:
    """Return ``count`` distinct new compact codes, none of them in ``taken``.

    A code that collides is thrown away and drawn again, so the result depends
    only on the stream and on ``taken``. The codes thrown away because they are in
    ``taken`` are appended to ``skipped`` (when given): with them, and no other
    knowledge of ``taken``, the same codes can be drawn again.
    """
    if count < 0:
        raise ValueError("count must not be negative")
    before = {compact(code) for code in taken}
    seen = set(before)
    out: list[str] = []
    while len(out) < count:
        code = new_code(stream)
        if code not in seen:
            seen.add(code)
            out.append(code)
        elif skipped is not None and code in before:
            skipped.append(code)
    return out
