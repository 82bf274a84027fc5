"""Validation of items: what the engine refuses before any array is built."""

import math

from service.engine.items import (
    _EPS,
    LAST_SURVIVOR,
    MAX_FREQUENCY,
    START_REQUIREMENTS,
    TIMINGS,
    Item,
)


def _multiple_of(value: float, m: int) -> bool:
    scaled = value * m
    return abs(scaled - round(scaled)) <= _EPS * max(1.0, abs(scaled))


_PERIODS = {1: ("year", "years"), 2: ("half-year", "half-years"), 4: ("quarter", "quarters"),
            12: ("month", "months"), 26: ("fortnight", "fortnights"), 52: ("week", "weeks"),
            365: ("day", "days")}


def whole_periods_problem(value: float, m: int, *, least: int = 0) -> str | None:
    """Say why ``value`` years is not a whole number of 1/m-year periods, naming the nearest
    valid value (at least ``least`` periods); None when it is."""
    return None if _multiple_of(value, m) else _not_whole_periods(value, m, least=least)


def _not_whole_periods(value: float, m: int, *, least: int = 0) -> str:
    """Say that ``value`` years is not a whole number of 1/m-year periods, and name the nearest
    valid value (at least ``least`` periods)."""
    one, many = _PERIODS.get(m, (f"period of 1/{m} year", f"periods of 1/{m} year"))
    n = max(least, math.floor(value * m + 0.5))
    how = "" if m in _PERIODS else f" (payments {m} times a year)"
    return (f"{value:.6g} is not a whole number of {many}{how}; "
            f"nearest: {n / m!r} ({n} {one if n == 1 else many})")


def _check_item(item: Item) -> dict[str, list[str]]:
    """The item's own problems, by path within it (empty when it has none). Each check is
    a comparison or two where the value is valid; messages are composed only for errors."""
    errors: dict[str, list[str]] = {}
    p = item.payments
    lives = item.lives
    if not 1 <= len(lives) <= 2:
        errors["lives"] = ["an item has one or two lives"]
    if p.timing not in TIMINGS:
        errors["timing"] = [f"must be one of {', '.join(TIMINGS)}"]
    discrete = p.timing != "continuous"
    m = p.frequency
    if discrete and not (isinstance(m, int) and 1 <= m <= MAX_FREQUENCY):
        errors["frequency"] = [f"must be a whole number from 1 to {MAX_FREQUENCY}"]
    term, deferral, guarantee = p.term, p.deferral, p.guarantee
    if not (math.isfinite(deferral) and deferral >= 0):
        errors["deferral"] = ["must be a finite number of years, zero or more"]
    if not (math.isfinite(guarantee) and guarantee >= 0):
        errors["guarantee"] = ["must be a finite number of years, zero or more"]
    if term is not None and not (math.isfinite(term) and term > 0):
        errors["term"] = ["must be a positive number of years, or null for life"]
    if not (math.isfinite(p.escalation) and p.escalation > -1):
        errors["escalation"] = ["must be a finite rate above -1"]
    if ("term" not in errors and term is not None and math.isfinite(guarantee)
            and guarantee > term * (1 + 1e-12)):
        errors.setdefault("guarantee", []).append(
            f"a guarantee of {guarantee:g} years is longer than the term of {term:g} years")
    if discrete and "frequency" not in errors:
        for name, v in (("term", term), ("deferral", deferral), ("guarantee", guarantee)):
            # (0 is a whole number of periods)
            if v is not None and v != 0 and name not in errors and not _multiple_of(v, m):
                errors[name] = [_not_whole_periods(v, m, least=int(name == "term"))]
    if item.start_requires not in START_REQUIREMENTS:
        errors["start_requires"] = [f"must be one of {', '.join(START_REQUIREMENTS)}"]
    if item.survivorship != LAST_SURVIVOR:  # (the usual amounts are valid)
        for k, amount in enumerate(item.survivorship):
            if not (math.isfinite(amount) and 0 <= amount <= 1):
                errors[f"survivorship.{k}"] = ["amounts must lie between 0 and 1"]
    for n, life in enumerate(lives):
        if not math.isfinite(life.age + life.age_adjustment):
            errors[f"lives.{n}.age"] = ["must be a finite age"]
        mult = life.mortality_multiplier
        if not (math.isfinite(mult) and mult >= 0):
            errors[f"lives.{n}.mortality_multiplier"] = ["must be a finite number, zero or more"]
        if not (math.isfinite(life.flat_extra) and 0 <= life.flat_extra <= 1):
            errors[f"lives.{n}.flat_extra"] = ["must be a number from 0 to 1"]
        if life.duration is not None and not (isinstance(life.duration, int)
                                              and life.duration >= 0):
            errors[f"lives.{n}.duration"] = ["must be a whole number of years, zero or more"]
    return errors
