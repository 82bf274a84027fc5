"""Ages from a date of birth and a valuation date.

The rule:

* A person's anniversary in a calendar year is the same month and day as their birth. For a
  person born on 29 February the anniversary in a year that is not a leap year is taken to be
  28 February (a choice: common practice in some places; others use 1 March).
* Completed years = the number of anniversaries after the birth date that fall on or before
  the valuation date.
* Exact age = completed years + d / n, where d is the number of days from the last
  anniversary (the birth date itself for completed years 0) to the valuation date and n the
  number of days from that anniversary to the next one: an "actual/actual between
  anniversaries" day count. A year holding 29 February between the two anniversaries has
  n = 366.
* ``last-birthday``: the completed years.
* ``nearest-birthday``: completed years + 1 if d / n >= 1/2, else completed years; exactly
  half way rounds up to the next birthday.

Every definition returns a float; whole ages are exact (for example 40.0).
"""

import datetime

AGE_DEFINITIONS = ("exact", "last-birthday", "nearest-birthday")


def anniversary(date_of_birth: datetime.date, year: int) -> datetime.date:
    """Return the birthday of ``date_of_birth`` in calendar ``year`` (29 Feb -> 28 Feb in a
    year that is not a leap year)."""
    try:
        return date_of_birth.replace(year=year)
    except ValueError:  # 29 February in a year that is not a leap year
        return datetime.date(year, 2, 28)


def _check_date(value, what: str) -> None:
    if not isinstance(value, datetime.date) or isinstance(value, datetime.datetime):
        raise TypeError(f"{what} must be a datetime.date, got {type(value).__name__}")


def age_at(date_of_birth: datetime.date, valuation_date: datetime.date, definition: str) -> float:
    """Return the age at ``valuation_date`` of a person born on ``date_of_birth``.

    ``definition`` is one of AGE_DEFINITIONS; see the module docstring for the rule. Raises
    ValueError if the valuation date is before the date of birth or the definition is unknown.
    """
    _check_date(date_of_birth, "date_of_birth")
    _check_date(valuation_date, "valuation_date")
    if definition not in AGE_DEFINITIONS:
        raise ValueError(f"unknown age definition {definition!r}; "
                         f"known: {', '.join(AGE_DEFINITIONS)}")
    if valuation_date < date_of_birth:
        raise ValueError(f"the valuation date {valuation_date.isoformat()} is before the date "
                         f"of birth {date_of_birth.isoformat()}")
    completed = valuation_date.year - date_of_birth.year
    if anniversary(date_of_birth, valuation_date.year) > valuation_date:
        completed -= 1
    last = anniversary(date_of_birth, date_of_birth.year + completed)
    following = anniversary(date_of_birth, date_of_birth.year + completed + 1)
    days = (valuation_date - last).days
    length = (following - last).days
    if definition == "last-birthday":
        return float(completed)
    if definition == "nearest-birthday":
        return float(completed + 1 if 2 * days >= length else completed)
    return completed + days / length
