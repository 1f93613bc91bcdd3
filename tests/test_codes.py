"""Tests for planner.codes: Crockford base32 blind codes with a Luhn mod 32 check.

Sources: the Luhn example 79927398713 and the Luhn mod N vector
checksum('1234', alphabet='0123456789abcdef') == 14 are the doctest examples
of python-stdnum's ``stdnum.luhn`` (see also METHODS.md section 7). The
clean-room Luhn mod N below follows the algorithm as described there, so that
the check character is tested against something other than the library we
call. That Luhn mod N misses exactly the adjacent swap of the pair (0, N-1)
follows from the doubling map (METHODS.md section 7, computed for N = 10, 16,
36); here it is measured for N = 32.
"""

from __future__ import annotations

import pytest
from hypothesis import given
from hypothesis import strategies as st
from stdnum import luhn

from planner import codes, draw
from planner.errors import CodeError, Where

SECRET = bytes(range(32))
N = len(codes.ALPHABET)


def _luhn_mod_n_check(payload: str, alphabet: str) -> str:
    # Clean-room Luhn mod N: from the right, double every second character of
    # the full code (so the rightmost payload character is doubled), replace a
    # doubled value v by v // N + v % N, and pick the check that makes the
    # total divisible by N.
    n = len(alphabet)
    total = 0
    for i, ch in enumerate(reversed(payload)):
        v = alphabet.index(ch)
        if i % 2 == 0:
            v = (2 * v) // n + (2 * v) % n
        total += v
    return alphabet[(n - total % n) % n]


def _random_codes(count: int, purpose: str = "test-codes") -> list[str]:
    return codes.new_codes(draw.Stream(SECRET, purpose), count)


# --- the published vectors: our use of stdnum is the standard algorithm ---

def test_standard_luhn_example_is_valid_with_decimal_alphabet():
    # Luhn's standard example (python-stdnum doctest; METHODS.md section 7).
    assert luhn.is_valid("79927398713", alphabet="0123456789")
    assert luhn.calc_check_digit("7992739871", alphabet="0123456789") == "3"
    assert _luhn_mod_n_check("7992739871", "0123456789") == "3"
    assert _luhn_mod_n_check("7894", "0123456789") == "9"


def test_luhn_mod_n_vector_of_python_stdnum():
    # python-stdnum doctest: with alphabet 0-9a-f, checksum('1234') == 14.
    assert luhn.checksum("1234", alphabet="0123456789abcdef") == 14


def test_check_character_agrees_with_clean_room_luhn_mod_32():
    for code in _random_codes(500):
        payload = code[:-1]
        assert codes.calc_check_character(payload) == _luhn_mod_n_check(payload, codes.ALPHABET)


def test_alphabet_is_crockford_base32():
    # Crockford base32: digits, then the letters without I, L, O, U.
    letters = "".join(c for c in "ABCDEFGHIJKLMNOPQRSTUVWXYZ" if c not in "ILOU")
    assert codes.ALPHABET == "0123456789" + letters
    assert N == 32


# --- reading and printing ---

def test_round_trip_format_compact_validate():
    for code in _random_codes(200):
        printed = codes.format(code)
        assert len(printed) == 10 and printed[4] == "-"
        assert codes.compact(printed) == code
        assert codes.validate(printed) == code
        assert codes.is_valid(printed)


def test_style_example_code_is_valid():
    assert codes.validate("K7QM-4X9PA") == "K7QM4X9PA"
    assert codes.format("K7QM4X9PA") == "K7QM-4X9PA"
    assert not codes.is_valid("K7QM-4X9P0")


@pytest.mark.parametrize("typed", [
    "k7qm-4x9pa", "K7QM 4X9PA", " k7qm4x9pa ", "K7-QM-4X-9P-A", "k7qm4x9pa",
], ids=["lower", "space", "padded", "hyphens", "plain"])
def test_reading_ignores_case_spaces_and_hyphens(typed):
    assert codes.validate(typed) == "K7QM4X9PA"


def test_look_alike_letters_read_as_digits():
    # Crockford base32: O reads as 0, I and L as 1.
    payload = "10A01B0C"
    code = payload + codes.calc_check_character(payload)
    typed = code.replace("0", "o").replace("1", "I", 1).replace("1", "l")
    assert codes.compact(typed) == code
    assert codes.validate(typed) == code


@given(st.lists(st.sampled_from(codes.ALPHABET), min_size=8, max_size=8).map("".join),
       st.sampled_from(["lower", "upper"]), st.sampled_from(["", " ", "-"]))
def test_round_trip_property(payload, case, sep):
    code = payload + codes.calc_check_character(payload)
    printed = codes.format(code)
    typed = printed.replace("-", sep)
    typed = typed.lower() if case == "lower" else typed
    assert codes.validate(typed) == code
    assert codes.format(codes.validate(printed)) == printed


# --- error detection ---

def test_every_single_substitution_is_detected():
    codes_checked = 0
    for code in _random_codes(300, "substitutions"):
        for position in range(len(code)):
            for ch in codes.ALPHABET:
                if ch == code[position]:
                    continue
                typo = code[:position] + ch + code[position + 1:]
                assert not codes.is_valid(typo), (code, typo)
        codes_checked += 1
    assert codes_checked == 300


def test_adjacent_transpositions_detection_rate(capsys):
    from scipy.stats import binomtest

    swaps = missed = 0
    for code in _random_codes(10_000, "transpositions"):
        for i in range(len(code) - 1):
            a, b = code[i], code[i + 1]
            if a == b:
                continue
            swaps += 1
            swapped = code[:i] + b + a + code[i + 2:]
            undetected = codes.is_valid(swapped)
            # Theory: only the pair (0, N-1) = ('0', 'Z') goes unseen, always.
            assert undetected == ({a, b} == {"0", "Z"}), (code, swapped)
            missed += undetected
    rate = 1 - missed / swaps
    with capsys.disabled():
        print(f"\nadjacent transpositions: {swaps} swaps, {missed} undetected, "
              f"detection {100 * rate:.3f} % (theory {100 * (1 - 2 / (N * (N - 1))):.3f} %)")
    assert rate > 0.99
    # Characters of a code are independent and uniform (the check character
    # too), so a swap of two differing neighbours is ('0','Z') with p = 2/(32*31).
    assert binomtest(missed, swaps, 2 / (N * (N - 1))).pvalue > 0.001


def test_zero_z_swap_is_the_known_blind_spot():
    payload = "0Z345678"
    code = payload + codes.calc_check_character(payload)
    assert codes.is_valid("Z0" + code[2:])


# --- new codes ---

def test_new_codes_are_distinct_valid_and_avoid_taken():
    taken = set(_random_codes(50, "taken"))
    # A stream that starts with the same draws as `taken` must step past them all.
    fresh = codes.new_codes(draw.Stream(SECRET, "taken"), 80, taken=taken)
    assert len(fresh) == len(set(fresh)) == 80
    assert not taken & set(fresh)
    assert all(codes.is_valid(c) and len(c) == 9 for c in fresh)


def test_new_codes_are_deterministic_given_the_stream():
    a = codes.new_codes(draw.Stream(SECRET, "det"), 20)
    b = codes.new_codes(draw.Stream(SECRET, "det"), 20)
    assert a == b and codes.new_codes(draw.Stream(SECRET, "det"), 0) == []


def test_new_codes_compare_taken_in_compact_form():
    first = codes.new_code(draw.Stream(SECRET, "form"))
    again = codes.new_codes(draw.Stream(SECRET, "form"), 1, taken={codes.format(first).lower()})
    assert again != [first]


def test_new_code_uses_the_whole_alphabet_at_every_position():
    seen = [set() for _ in range(8)]
    for code in _random_codes(2000, "coverage"):
        for i, ch in enumerate(code[:8]):
            seen[i].add(ch)
    assert all(s == set(codes.ALPHABET) for s in seen)


# --- messages ---

@pytest.mark.parametrize(("typed", "message"), [
    ("K7QM-4X9P", "'K7QM-4X9P' has 8 code characters; expected 9 characters like 'K7QM-4X9PA'"),
    ("", "'' has 0 code characters; expected 9 characters like 'K7QM-4X9PA'"),
    ("K7QU-4X9PA", "'K7QU-4X9PA' has 'U' at position 4, which is not a code character "
                   "(codes use the digits and the letters A-Z except I, L, O, U)"),
    ("K7QM_4X9PA", "'K7QM_4X9PA' has '_' at position 5, which is not a code character "
                   "(codes use the digits and the letters A-Z except I, L, O, U)"),
    ("K7QM-4X9P0", "check character does not match in 'K7QM-4X9P0': a character was "
                   "mistyped or two were swapped"),
], ids=["short", "empty", "letter-u", "underscore", "check"])
def test_code_error_messages(typed, message):
    with pytest.raises(CodeError) as info:
        codes.validate(typed)
    assert str(info.value) == message
    assert not codes.is_valid(typed)


def test_code_error_carries_the_given_place():
    with pytest.raises(CodeError) as info:
        codes.validate("K7QM-4X9P0", where=Where("results.csv", 4, "code"))
    assert str(info.value).startswith("results.csv:4: code: check character does not match")


def test_multi_letter_upper_case_is_not_taken_for_a_code_character():
    # U+FB06 (the 'st' ligature) upper-cases to 'ST'; it must be refused, not read as two.
    with pytest.raises(CodeError, match="at position 9, which is not a code character"):
        codes.validate("K7QM-4X9\ufb06")
