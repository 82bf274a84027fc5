"""Rounding of final factors to a number of decimal places.

The value rounded is the shortest decimal string that reads back as the float (``repr``), so
2.675 rounds as the decimal 2.675 even though the binary float is slightly below it. Rules:

* ``half-up``: a tie goes away from zero (decimal.ROUND_HALF_UP); 2.675 -> 2.68, -2.675 -> -2.68.
* ``half-even``: a tie goes to the even last digit (decimal.ROUND_HALF_EVEN); 2.665 -> 2.66.
"""

import decimal
import math

ROUNDING_RULES = ("half-up", "half-even")

_MODES = {"half-up": decimal.ROUND_HALF_UP, "half-even": decimal.ROUND_HALF_EVEN}


def round_factor(value: float, places: int, rule: str) -> float:
    """Return ``value`` rounded to ``places`` decimal places (places >= 0) under ``rule``.

    Raises ValueError for a value that is not finite, a negative or non-integer number of
    places, or an unknown rule. A result of zero is returned as 0.0, never -0.0.
    """
    if rule not in _MODES:
        raise ValueError(f"unknown rounding rule {rule!r}; known: {', '.join(ROUNDING_RULES)}")
    if not isinstance(places, int) or isinstance(places, bool) or places < 0:
        raise ValueError(f"places must be a non-negative integer, got {places!r}")
    value = float(value)
    if not math.isfinite(value):
        raise ValueError(f"cannot round {value!r}")
    exact = decimal.Decimal(repr(value))
    # Enough digits for the integer part and the places kept, whatever the magnitude.
    digits = max(exact.adjusted(), 0) + places + 2
    with decimal.localcontext() as context:
        context.prec = max(digits, 28)
        rounded = exact.quantize(decimal.Decimal(1).scaleb(-places), rounding=_MODES[rule])
    return float(rounded) + 0.0
