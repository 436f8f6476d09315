"""Numbers beside their limits (pipeline.printed): our own contract, nothing to cite; the 17
digits that tell any two doubles apart are IEEE 754's binary64 (common practice)."""
from __future__ import annotations

from pipeline.printed import compared, digits_apart, number


def test_the_short_form_where_it_tells_value_and_limit_apart():
    assert compared(5.0, 8.0) == ("5", "8")
    assert compared(31, 32) == ("31", "32")
    assert compared(8.0, 8.0) == ("8", "8")  # equal numbers print alike
    assert number(1234.5678, 4) == "1235" and number(7, 4) == "7" and number(True) == "True"


def test_more_digits_where_the_short_form_would_print_them_alike():
    assert compared(7.999992, 8.0) == ("7.99999", "8")
    assert compared(8.000004, 8.0) == ("8.000004", "8")
    assert compared(0.29996, 0.3) == ("0.29996", "0.3")
    a, b = compared(1.0, 1.0 + 2 ** -52)  # the nearest doubles still print apart
    assert a != b


def test_a_value_against_several_limits_and_values_that_are_not_numbers():
    assert digits_apart(7.999992, [8.0, 1200.0]) == 6
    assert digits_apart(600.0, [8.0, 1200.0]) == 3
    assert digits_apart(7.999992, [8.0, None, [1, 2], True], 4) == 6
    assert digits_apart("C major", [8.0]) == 3


def test_large_numbers_print_their_whole_part():
    # an audit found the default max_seconds printed as 1.2e+03 in a drop sentence
    assert compared(1500.0, 1200.0) == ("1500", "1200")
    assert compared(1200.4, 1200.0) == ("1200.4", "1200")
    assert number(2_000_000.0) == "2000000" and number(float("inf")) == "inf"
    assert number(0.00012) == "0.00012"
