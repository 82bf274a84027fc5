"""The body's JSON parse against the definition: duplicate keys refused (the first named),
numbers that are not finite floats refused, everything else as json.loads reads it.

The reference here is json.loads with hooks written from that definition (every object's
keys checked one by one, every float literal converted and checked); the texts hold the
edges a faster parse would have to get right (numbers just inside and outside the float
range, with and without exponents, duplicates at depth)."""

import json
import math

import pytest

from service.api.body import MAX_OBJECT_MEMBERS, _BodyError, _parse


def _reference(text: str):
    def pairs(items):
        seen = {}
        for key, value in items:
            if key in seen:
                raise _BodyError(f"duplicate key '{key}'")
            seen[key] = value
        return seen

    def number(literal):
        value = float(literal)
        if not math.isfinite(value):
            raise _BodyError(f"number {literal} is out of range")
        return value

    def constant(name):
        raise _BodyError(f"'{name}' is not a JSON number")

    return json.loads(text, object_pairs_hook=pairs, parse_constant=constant,
                      parse_float=number)


def _outcome(parse, text):
    try:
        return "ok", repr(parse(text))
    except (_BodyError, ValueError) as exc:
        return "error", type(exc).__name__, str(exc)


TEXTS = [
    '{"a": 1.5, "b": [1, 2.25e3, -0.0, 1e-400]}',
    '{"a": 1e308}', '{"a": 1.7976931348623157e308}', '{"a": 1.8e308}', '{"a": 1e999}',
    '{"a": -1E+400}', '{"a": 1e0400}', '{"a": 2.5e-999}',
    '{"a": ' + "9" * 199 + '.5e99}',            # about 1e298: finite
    '{"a": ' + "9" * 250 + '.0}',               # 1e250: finite, but long
    '{"a": ' + "9" * 309 + '.0}',               # 1e309: too large
    '{"a": ' + "1" + "0" * 301 + '.0e10}',      # 1e311 with a two-digit exponent
    '{"a": ' + "1" + "0" * 400 + '}',           # a large integer stays an integer
    '{"e123": "e400", "x": 1.0}',               # exponent-like text in strings
    '{"a": NaN}', '{"a": -Infinity}',
    '{"a": 1, "a": 2}', '{"a": {"b": 1, "c": 2, "b": 3, "c": 4}}',
    '[{"x": 1}, {"y": 2, "y": 1e999}]',
    '{"a": 1, "b": 2', '"just a string"', '3.25',
]


@pytest.mark.parametrize("text", TEXTS)
def test_the_parse_agrees_with_the_definition(text):
    assert _outcome(_parse, text) == _outcome(_reference, text)


def test_too_large_numbers_and_duplicates_are_refused():
    """Without this the comparison could pass with both refusing nothing."""
    for text in ('{"a": 1e999}', '{"a": ' + "9" * 309 + '.0}', '{"a": 1, "a": 2}'):
        with pytest.raises(_BodyError):
            _parse(text)
    assert _parse('{"a": 1e308, "b": 2}') == {"a": 1e308, "b": 2}
    assert MAX_OBJECT_MEMBERS > 2
