"""Rounding of final factors: the shortest decimal form of the float (repr), rounded with the
decimal module's ROUND_HALF_UP (a tie goes away from zero) or ROUND_HALF_EVEN (a tie goes to
the even digit). Source of the rounding modes: the Python decimal module documentation. The
expected values are hand-worked."""

import math

import pytest

from service.engine.rounding import ROUNDING_RULES, round_factor


@pytest.mark.parametrize("value, places, half_up, half_even", (
    # repr(2.675) is '2.675' (the binary float is just below it, so round() gives 2.67);
    # the tie's kept digit 7 is odd: half-up 2.68, half-even 2.68.
    (2.675, 2, 2.68, 2.68),
    # '2.665': the kept digit 6 is even: half-up 2.67, half-even 2.66.
    (2.665, 2, 2.67, 2.66),
    # Negative ties: half-up goes away from zero, half-even to the even digit.
    (-2.675, 2, -2.68, -2.68),
    (-2.665, 2, -2.67, -2.66),
    # Not a tie: both rules agree.
    (12.34567, 3, 12.346, 12.346),
    (-12.34547, 3, -12.345, -12.345),
    # places 0: 2.5 -> 3 / 2, 3.5 -> 4 / 4, -0.5 -> -1 / 0.
    (2.5, 0, 3.0, 2.0),
    (3.5, 0, 4.0, 4.0),
    (-0.5, 0, -1.0, 0.0),
    # Already short enough: unchanged.
    (14.25, 4, 14.25, 14.25),
))
def test_hand_worked(value, places, half_up, half_even):
    assert round_factor(value, places, "half-up") == half_up
    assert round_factor(value, places, "half-even") == half_even


def test_the_float_itself_would_round_down():
    # The binary value of 2.675 is below the tie, so rounding the float exactly gives 2.67;
    # rounding its shortest decimal form is the point of the rule.
    assert round(2.675, 2) == 2.67
    assert round_factor(2.675, 2, "half-up") == 2.68


def test_zero_is_never_negative():
    got = round_factor(-0.001, 2, "half-up")
    assert got == 0.0 and math.copysign(1.0, got) == 1.0


def test_large_values_keep_their_digits():
    # Hand-worked: 123456789012345.67 (repr '123456789012345.67') to 1 place half-up.
    assert round_factor(123456789012345.67, 1, "half-up") == 123456789012345.7


@pytest.mark.parametrize("value", (math.nan, math.inf, -math.inf))
@pytest.mark.parametrize("rule", ROUNDING_RULES)
def test_values_that_are_not_finite_are_refused(value, rule):
    with pytest.raises(ValueError, match="cannot round"):
        round_factor(value, 2, rule)


@pytest.mark.parametrize("places", (-1, 1.5, True))
def test_bad_places_are_refused(places):
    with pytest.raises(ValueError, match="places"):
        round_factor(1.0, places, "half-up")


def test_unknown_rule_is_refused():
    with pytest.raises(ValueError, match="unknown rounding rule"):
        round_factor(1.0, 2, "half-down")
