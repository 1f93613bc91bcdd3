"""A difference of equal values can be a negative zero (-0.0); the documents print it as 0.

Python formats -0.0 as '-0', which in a letter's table of scores reads as a score below
zero that is none.
"""

from __future__ import annotations

import pytest

from planner.render import _charts, letter, report


@pytest.mark.parametrize("fmt", [report.fmt, letter._num, _charts._fmt])
def test_a_negative_zero_prints_as_zero_and_other_numbers_keep_their_sign(fmt):
    assert fmt(-0.0) == "0"
    assert fmt(0.0) == "0"
    assert fmt(-1.25) == "-1.25"
    assert fmt(-0.0004) == "-0.0004"


def test_a_letter_with_a_decimal_comma_prints_a_negative_zero_as_zero():
    assert letter._num(-0.0, comma=True) == "0"
    assert letter._num(-1.5, comma=True) == "-1,5"
